"""Erasure: users removed from the store, its retained snapshots and label outputs, tombstoned."""
from __future__ import annotations

import dataclasses
import json
import logging
import os
import uuid
from pathlib import Path
from typing import Iterable

import pandas as pd

from .layout import NEVER, shard_files, tombstones, user_digest
from .publish import merge_layers, publish_store, read_shard
from .reader import Store

log = logging.getLogger(__name__)


@dataclasses.dataclass(frozen=True)
class Erasure:
    """What ``forget_users`` did: the ids it found and erased, those it found nowhere, and the
    snapshot it published (None when no id was found, and nothing was published)."""

    erased: tuple[str, ...]
    not_found: tuple[str, ...]
    snapshot: str | None


def forget_users(path, user_ids: Iterable[str], outputs: Iterable = ()) -> Erasure:
    """Erase users: tombstone them, publish a snapshot without them, drop every older snapshot, and
    rewrite the Parquet files under each folder in ``outputs`` (e.g. `labeler label --out` folders)
    without their rows. Later publishes skip tombstoned users.

    An id found neither in the store's current snapshot nor in ``outputs`` is reported in
    ``not_found`` (a typo, or a user whose data has not arrived yet); it is tombstoned all the same,
    so data arriving later is never published. When no id is found, nothing is published.
    """
    import pyarrow.compute as pc
    import pyarrow.parquet as pq
    user_ids = list(dict.fromkeys(str(u) for u in user_ids))
    root = Path(path)
    store = Store(root)
    found = {u for u in user_ids if store._user(u) != (0, [])}
    for folder in outputs:
        for f in sorted(Path(folder).rglob("*.parquet")):
            table = pq.read_table(f)
            if "user_id" not in table.column_names:
                continue
            hit = pc.is_in(table.column("user_id"), value_set=_strings(user_ids))
            found |= set(pc.unique(table.column("user_id").filter(hit)).to_pylist())
            keep = table.filter(pc.invert(hit))
            if keep.num_rows != table.num_rows:
                tmp = f.with_name(f".{f.name}.{uuid.uuid4().hex}")
                pq.write_table(keep, tmp)
                os.replace(tmp, f)
    digests = {user_digest(str(u)) for u in user_ids}
    tomb = tombstones(root) | digests
    tmp = root / f".tombstones.{uuid.uuid4().hex}"
    tmp.write_text(json.dumps(sorted(tomb)))
    os.replace(tmp, root / "tombstones.json")
    erased = tuple(u for u in user_ids if u in found)
    missing = tuple(u for u in user_ids if u not in found)
    if missing:
        log.warning("not found in the store or the outputs (tombstoned all the same): %s", ", ".join(missing))
    if not erased:
        return Erasure((), missing, None)
    frames, users = [], []
    for shard in store.manifest["shards"]:
        f, u = merge_layers([read_shard(store.path(f)) for f in shard_files(store.manifest, shard)])
        frames.append(f)
        users.append(u)
    fp = pd.concat(frames, ignore_index=True)
    hist = pd.concat(users, ignore_index=True)
    fp = fp.drop(columns="history_len").merge(hist, on="user_id", how="left")
    tax = _StoredTaxonomy(store)
    name = publish_store(root, fp, tax, store.config, history=hist, as_of=store.watermark,
                         shards=store.manifest["n_shards"], retain=1)
    log.info("erased %d user(s); published %s and removed older snapshots", len(erased), name)
    return Erasure(erased, missing, name)


def _strings(values):
    import pyarrow as pa
    return pa.array(values, pa.string())


class _StoredTaxonomy:
    """The taxonomy tables of a snapshot, enough to publish the next snapshot."""

    def __init__(self, store: Store):
        con = store._con("items.sqlite")
        it = pd.read_sql_query("SELECT item_id, level, topic_id, valid_from_us, pos FROM item_topics", con)
        it["confidence"] = 1.0 - 1e-3 * it["pos"]
        vf = it.pop("valid_from_us")
        if (vf != NEVER).any():
            it["valid_from"] = pd.to_datetime(vf.where(vf != NEVER), unit="us", utc=True)
        self.item_topics = it.drop(columns="pos")
        self.topics = pd.read_sql_query("SELECT topic_id, level, parent_id, name FROM topics", con)
        self.version = store.manifest["taxonomy_version"]
