"""Publishing snapshots: shards written in parallel, unchanged ones hard-linked, pointer switched last."""
from __future__ import annotations

import datetime as dt
import hashlib
import json
import logging
import os
import sqlite3
import uuid
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..config import LabelConfig
from ..errors import InputError
from ..intake import rank_item_topics
from .layout import FORMAT, PAGE_SIZE, clean, current_name, fsync_dir, read_manifest, shard_of, to_us, tombstones, \
    user_digest

log = logging.getLogger(__name__)


def publish_store(path, footprints, taxonomy, config: LabelConfig | None = None, *,
                  history: pd.DataFrame | None = None, as_of=None, shards: int = 16,
                  retain: int = 3, workers: int | None = None) -> str:
    """Publish a new store snapshot from a footprints table; returns the snapshot name.

    ``footprints`` is what :func:`labeler.build_footprints` returns (or a :class:`LabelRun`).
    Its ``history_len`` and ``recent_us`` columns let lookups apply ``warmup`` and memory windows;
    ``history`` (user_id, history_len) adds users whose every interaction was unplaced. Shards
    are written in parallel by ``workers`` threads (default: one per core).
    """
    from ..labelling import LabelRun
    cfg = config or LabelConfig()
    if isinstance(footprints, LabelRun):
        run = footprints
        as_of = as_of if as_of is not None else pd.Timestamp(run.as_of_us, unit="us", tz="UTC")
        footprints = run.footprints_frame()
        history = run.history_frame() if history is None else history
    missing = [c for c in ("user_id", "level", "topic_id", "interactions", "known", "history_len",
                           "recent_us", "last_ts") if c not in footprints.columns]
    if missing:
        raise InputError(f"missing column(s) {missing}: publish a table from labeler.build_footprints "
                         "or a LabelRun.", source="footprints", column=missing[0])
    root = Path(path)
    (root / "snapshots").mkdir(parents=True, exist_ok=True)
    gone = tombstones(root)
    fp = footprints.copy()
    if gone:
        fp = fp[~fp["user_id"].map(user_digest).isin(gone)]
    users = fp.groupby("user_id", sort=True)["history_len"].max().rename("history_len").reset_index()
    if history is not None:
        extra = history[~history["user_id"].isin(users["user_id"])]
        if gone:
            extra = extra[~extra["user_id"].map(user_digest).isin(gone)]
        users = pd.concat([users, extra[["user_id", "history_len"]]], ignore_index=True)
    watermark = to_us(as_of) if as_of is not None else to_us(fp["last_ts"].max()) if len(fp) else None

    previous = read_manifest(root, current_name(root), any_format=True) if (root / "CURRENT").exists() else None
    seq = (previous["sequence"] + 1) if previous else 1
    name = f"snap-{seq:06d}-{uuid.uuid4().hex[:8]}"
    tmp = root / "snapshots" / f".{name}.tmp"
    tmp.mkdir()
    _write_items(tmp / "items.sqlite", taxonomy)
    users["_shard"] = [shard_of(u, shards) for u in users["user_id"]]
    fp["_shard"] = fp["user_id"].map(pd.Series(users["_shard"].to_numpy(), index=users["user_id"].to_numpy()))
    shard_info, to_write, rewritten = {}, [], []
    by_shard_fp, by_shard_users = dict(tuple(fp.groupby("_shard"))), dict(tuple(users.groupby("_shard")))
    for k in range(shards):
        f_k = by_shard_fp.get(k, fp.iloc[:0])
        u_k = by_shard_users.get(k, users.iloc[:0])
        digest = _shard_digest(f_k, u_k)
        fname = f"users-{k:02d}.sqlite"
        prev = (previous or {}).get("shards", {}).get(fname)
        if prev and prev["digest"] == digest and previous["n_shards"] == shards and previous["format"] == FORMAT:
            os.link(root / "snapshots" / previous["name"] / fname, tmp / fname)
        else:
            to_write.append((tmp / fname, f_k, u_k))
            rewritten.append(fname)
        shard_info[fname] = {"digest": digest, "users": int(len(u_k)), "rows": int(len(f_k))}
    with ThreadPoolExecutor(max_workers=max(1, min(workers or os.cpu_count() or 1, len(to_write) or 1))) as pool:
        for fut in [pool.submit(_write_shard, *job) for job in to_write]:
            fut.result()  # re-raises a failed write before anything is published
    manifest = {"format": FORMAT, "name": name, "sequence": seq, "tool_version": __version__,
                "created": dt.datetime.now(dt.timezone.utc).isoformat(), "watermark_us": watermark,
                "taxonomy_version": taxonomy.version, "config": json.loads(cfg.canonical_json()),
                "n_shards": shards, "shards": shard_info, "users": int(len(users)),
                "rewritten_shards": rewritten}
    (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")
    for f in tmp.iterdir():
        with open(f, "rb") as fh:
            os.fsync(fh.fileno())
    fsync_dir(tmp)
    os.replace(tmp, root / "snapshots" / name)
    fsync_dir(root / "snapshots")
    pointer = root / f".CURRENT.{uuid.uuid4().hex}"
    with open(pointer, "w") as fh:
        fh.write(name + "\n")
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(pointer, root / "CURRENT")
    fsync_dir(root)
    clean(root, keep=retain)
    log.info("published store snapshot %s: %d users, %d footprint rows, %d of %d shards rewritten", name,
             len(users), len(fp), len(manifest["rewritten_shards"]), shards)
    return name


def _recent_text(values: pd.Series) -> list[str]:
    """The last qualifying times as JSON arrays ("[1, 2]"), built column-wise."""
    import pyarrow as pa
    import pyarrow.compute as pc
    arr = pa.array([None if v is None else sorted(int(x) for x in v) for v in values], pa.list_(pa.int64()))
    text = pc.binary_join(pc.cast(arr, pa.list_(pa.string())), ", ")
    return pc.binary_join_element_wise("[", pc.fill_null(text, ""), "]", "").to_pylist()


def _us_list(values) -> list:
    """Timestamps as int microseconds, None for missing, column-wise."""
    ts = pd.to_datetime(pd.Series(values), utc=True)
    us = ts.astype("datetime64[us, UTC]").astype("int64").to_numpy()
    return np.where(ts.isna().to_numpy(), None, us).tolist()


def _shard_digest(fp: pd.DataFrame, users: pd.DataFrame) -> str:
    """Order-independent content hash of one shard's rows (sum of pandas' 64-bit row hashes)."""
    cols = [c for c in ("user_id", "level", "topic_id", "interactions", "engaged_interactions", "known",
                        "first_ts", "last_ts", "known_since") if c in fp.columns]
    parts = [fp[cols], pd.Series(_recent_text(fp["recent_us"]), index=fp.index, name="recent")]
    rows = pd.util.hash_pandas_object(pd.concat(parts, axis=1), index=False).to_numpy(np.uint64)
    urows = pd.util.hash_pandas_object(users[["user_id", "history_len"]], index=False).to_numpy(np.uint64)
    total = (int(rows.sum(dtype=np.uint64)), int(urows.sum(dtype=np.uint64)), len(rows), len(urows))
    return hashlib.sha256(repr(total).encode()).hexdigest()


def _write_shard(path: Path, fp: pd.DataFrame, users: pd.DataFrame) -> None:
    """One shard: ``users`` (every user, for those without topic rows) and ``topics``, clustered by
    user id. Each topic row repeats the user's history length, so that a lookup is one range read
    in one B-tree. With 16 KiB pages a shard of 62,500 users x 20 topics is a three-level tree with
    34 interior pages, soon cached, so a cold lookup reads about one page from disk."""
    con = sqlite3.connect(path)
    con.executescript(f"""
        PRAGMA page_size = {PAGE_SIZE}; PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF;
        CREATE TABLE users (user_id TEXT PRIMARY KEY, history_len INTEGER NOT NULL) WITHOUT ROWID;
        CREATE TABLE topics (user_id TEXT NOT NULL, level INTEGER NOT NULL, topic_id TEXT NOT NULL,
            interactions INTEGER, engaged_interactions INTEGER, known INTEGER, first_us INTEGER,
            last_us INTEGER, known_since_us INTEGER, recent TEXT, history_len INTEGER NOT NULL,
            PRIMARY KEY (user_id, level, topic_id)) WITHOUT ROWID;""")
    history = pd.Series(users["history_len"].fillna(0).astype(int).to_numpy(), index=users["user_id"].astype(str))
    con.executemany("INSERT INTO users VALUES (?, ?)", zip(history.index, history.tolist()))
    rows = zip(fp["user_id"].astype(str), fp["level"].astype(int).tolist(), fp["topic_id"].astype(str),
               fp["interactions"].astype(int).tolist(),
               fp.get("engaged_interactions", fp["interactions"]).astype(int).tolist(),
               fp["known"].astype(bool).astype(int).tolist(),
               _us_list(fp.get("first_ts", fp["last_ts"])), _us_list(fp["last_ts"]),
               _us_list(fp.get("known_since", pd.Series([None] * len(fp), dtype="datetime64[us, UTC]"))),
               _recent_text(fp["recent_us"]),
               fp["user_id"].astype(str).map(history).fillna(0).astype(int).tolist())
    con.executemany("INSERT INTO topics VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
    con.commit()
    con.close()


def _write_items(path: Path, taxonomy) -> None:
    it = rank_item_topics(taxonomy.item_topics)
    con = sqlite3.connect(path)
    con.executescript("""
        PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF;
        CREATE TABLE item_topics (item_id TEXT NOT NULL, level INTEGER NOT NULL, valid_from_us INTEGER NOT NULL,
            pos INTEGER NOT NULL, topic_id TEXT, PRIMARY KEY (item_id, level, valid_from_us, pos))
            WITHOUT ROWID;
        CREATE TABLE topics (topic_id TEXT PRIMARY KEY, level INTEGER, parent_id TEXT, name TEXT) WITHOUT ROWID;""")
    con.executemany("INSERT INTO item_topics VALUES (?, ?, ?, ?, ?)",
                    zip(it["item_id"].astype(str), it["level"].astype(int).tolist(),
                        it["valid_from_us"].astype(int).tolist(), it["pos"].astype(int).tolist(),
                        [None if pd.isna(t) else str(t) for t in it["topic_id"]]))
    t = taxonomy.topics
    con.executemany("INSERT INTO topics VALUES (?, ?, ?, ?)",
                    zip(t["topic_id"].astype(str), t["level"].astype(int).tolist(),
                        [None if p is None or (isinstance(p, float) and np.isnan(p)) else str(p)
                         for p in t["parent_id"]], t["name"].astype(str)))
    con.commit()
    con.close()
