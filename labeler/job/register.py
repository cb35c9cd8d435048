"""The item register: every item's topics over time, so interactions use the assignment valid then.

One row per (item version, level, topic); ``valid_from`` null means "since the beginning". An
item version that could not be placed has one row per level with a null topic: from its
``valid_from`` on, the item has no topic at that level. The register is what the job labels with:
the taxonomy's topics plus these rows.
"""
from __future__ import annotations

import dataclasses
import hashlib
import logging

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..tables import item_text
from ..taxonomy import Taxonomy

log = logging.getLogger(__name__)

COLUMNS = ["item_id", "text_hash", "valid_from", "level", "topic_id", "confidence"]


def text_hashes(items: pd.DataFrame, text_columns, category: str | None = None) -> pd.Series:
    """SHA-256 of what placement reads: the joined text (and the category for editorial taxonomies)."""
    text = item_text(items, text_columns)
    if category is not None and category in items.columns:
        text = text + "\x00" + items[category].fillna("").astype(str)
    return pd.Series([hashlib.sha256(t.encode("utf-8", "surrogatepass")).hexdigest() for t in text],
                     index=items.index)


def _rows(placed: pd.DataFrame, items: pd.DataFrame, hashes: pd.Series, levels, valid_from) -> pd.DataFrame:
    """Register rows for ``items``: their placed topics, plus null-topic rows per level where none."""
    h = pd.Series(hashes.to_numpy(), index=items["item_id"].to_numpy())
    rows = placed[["item_id", "level", "topic_id", "confidence"]].copy()
    have = set(zip(rows["item_id"], rows["level"]))
    empty = [(i, lv) for i in items["item_id"] for lv in levels if (i, lv) not in have]
    if empty:
        rows = pd.concat([rows, pd.DataFrame(empty, columns=["item_id", "level"])], ignore_index=True)
    rows["text_hash"] = rows["item_id"].map(h)
    rows["valid_from"] = rows["item_id"].map(valid_from) if isinstance(valid_from, pd.Series) else valid_from
    return _typed(rows)


def _typed(rows: pd.DataFrame) -> pd.DataFrame:
    out = rows.reindex(columns=COLUMNS).copy()
    out["valid_from"] = pd.to_datetime(out["valid_from"], utc=True).astype("datetime64[us, UTC]")
    out["level"] = out["level"].astype("int32")
    out["topic_id"] = out["topic_id"].astype(object).where(out["topic_id"].notna(), None)
    out["confidence"] = out["confidence"].astype("float64")
    return out.sort_values(["item_id", "valid_from", "level", "topic_id"], na_position="first",
                           kind="stable").reset_index(drop=True)


def first_register(tax: Taxonomy, items: pd.DataFrame, hashes: pd.Series) -> pd.DataFrame:
    """The register of the first run: every item's topics, valid since the beginning."""
    return _rows(tax.item_topics, items, hashes, tax.levels, pd.NaT)


@dataclasses.dataclass
class ItemChanges:
    new: list[str]
    changed: list[str]
    placed: int
    unplaced: int

    @property
    def unplaced_share(self) -> float:
        n = self.placed + self.unplaced
        return round(self.unplaced / n, 6) if n else 0.0


def update_register(register: pd.DataFrame, tax: Taxonomy, items: pd.DataFrame, hashes: pd.Series,
                    valid_from_us: int, first_seen_us: dict[str, int] | None = None,
                    embedder=None) -> tuple[pd.DataFrame, ItemChanges]:
    """Place new and changed items; their rows are valid from ``valid_from_us``.

    ``first_seen_us`` (backfill of late items) gives a new item's earliest interaction instead,
    so interactions that came before the item was known get its topics too.
    """
    latest = register.sort_values("valid_from", na_position="first", kind="stable") \
        .drop_duplicates("item_id", keep="last").set_index("item_id")["text_hash"]
    now = pd.Series(hashes.to_numpy(), index=items["item_id"].to_numpy())
    # pyarrow's set lookup: pandas' isin on Arrow-backed text walks the values in Python
    known = pc.is_in(pa.array(now.index.to_numpy(dtype=object), pa.string()),
                     value_set=pa.array(latest.index.to_numpy(dtype=object), pa.string())).to_numpy(zero_copy_only=False)
    new = now.index[~known].tolist()
    changed = now.index[known][now[known].to_numpy() != latest.reindex(now.index[known]).to_numpy()].tolist()
    todo = items[items["item_id"].isin(set(new) | set(changed))]
    if not len(todo):
        return register, ItemChanges([], [], 0, 0)
    placed = tax.assign(todo, embedder=embedder)
    start = pd.Timestamp(valid_from_us, unit="us", tz="UTC")
    vf = pd.Series(start, index=todo["item_id"].to_numpy())
    for item, us in (first_seen_us or {}).items():
        if item in vf.index and item in set(new):
            vf[item] = min(start, pd.Timestamp(us, unit="us", tz="UTC"))
    added = _rows(placed, todo, hashes[todo.index], tax.levels, vf)
    n_unplaced = int(len(todo) - placed["item_id"].nunique()) if len(placed) else int(len(todo))
    out = _typed(pd.concat([register, added], ignore_index=True))
    log.info("items: %d new, %d with changed text; %d placed, %d below min_confidence", len(new),
             len(changed), len(todo) - n_unplaced, n_unplaced)
    return out, ItemChanges(new, changed, int(len(todo) - n_unplaced), n_unplaced)


def read_register(path) -> pd.DataFrame:
    return _typed(pd.read_parquet(path))


def taxonomy_view(tax: Taxonomy, register: pd.DataFrame) -> Taxonomy:
    """The taxonomy with the register as its item_topics (as-of rows); keeps the taxonomy's version."""
    it = register[["item_id", "level", "topic_id", "confidence", "valid_from"]].copy()
    it["confidence"] = it["confidence"].fillna(0.0)
    return Taxonomy(tax.topics, it, tax.manifest, tax.arrays, tax.centroid_topics)


def register_hash_by_day(register: pd.DataFrame) -> tuple[np.ndarray, list[str]]:
    """Cumulative hashes of the register by day of ``valid_from``: (day starts in us, hashes).

    Entry k covers every row valid from before ``days[k] + 1 day``; null valid_from comes first.
    """
    r = _typed(register)
    vf = r["valid_from"]
    r["_us"] = np.where(vf.isna(), np.iinfo("int64").min, vf.astype("datetime64[us, UTC]").astype("int64"))
    r = r.sort_values(["_us", "item_id", "level", "topic_id"], na_position="first", kind="stable")
    day = np.where(r["_us"] == np.iinfo("int64").min, np.iinfo("int64").min, (r["_us"] // 86_400_000_000) * 86_400_000_000)
    h = hashlib.sha256(b"register")
    days, hashes = [], []
    text = np.array(["\x1f".join((item, th, str(us), str(int(lv)), "" if tid is None else str(tid),
                                  "" if conf != conf else repr(float(conf))))
                     for item, th, us, lv, tid, conf in zip(r["item_id"], r["text_hash"], r["_us"], r["level"],
                                                            r["topic_id"], r["confidence"])], dtype=object)
    for d in pd.unique(day):
        for line in text[day == d]:
            h.update(line.encode("utf-8", "surrogatepass") + b"\n")
        days.append(int(d))
        hashes.append(h.hexdigest())
    return np.array(days, dtype=np.int64), hashes
