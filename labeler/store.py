"""The lookup store: per-user footprints in SQLite shards, served from immutable snapshots.

Layout of a store folder::

    CURRENT                          name of the snapshot readers use (switched atomically)
    snapshots/<name>/manifest.json   watermark, taxonomy version, label config, shard checksums
    snapshots/<name>/items.sqlite    item topics (with validity) and topic names
    snapshots/<name>/users-NN.sqlite footprints and history of the users hashed to shard NN
    tombstones.json                  SHA-256 of erased user ids, never published again

A publish writes a new snapshot folder (shards whose content did not change are hard links to the
previous snapshot's files), fsyncs it, then renames a new ``CURRENT`` into place: a reader sees one
complete snapshot or the previous one, never a mix. Old snapshots beyond ``retain`` are removed.
"""
from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
import logging
import os
import shutil
import sqlite3
import threading
import uuid
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd

from . import __version__
from .config import LabelConfig
from .errors import ArtifactError, InputError

log = logging.getLogger(__name__)

FORMAT = "labeler-store/1"
NEVER = np.iinfo("int64").min


def shard_of(user_id: str, shards: int) -> int:
    """Stable shard number of a user id (BLAKE2b, independent of Python's hash seed)."""
    return int.from_bytes(hashlib.blake2b(user_id.encode("utf-8", "surrogatepass"), digest_size=8).digest(),
                          "little") % shards


def user_digest(user_id: str) -> str:
    return hashlib.sha256(user_id.encode("utf-8", "surrogatepass")).hexdigest()


def _us(ts) -> int | None:
    if ts is None or (isinstance(ts, float) and np.isnan(ts)) or ts is pd.NaT:
        return None
    return int(pd.Timestamp(ts).value // 1000)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _tombstones(root: Path) -> set[str]:
    p = root / "tombstones.json"
    return set(json.loads(p.read_text())) if p.exists() else set()


# -- publishing ---------------------------------------------------------------------------------

def publish_store(path, footprints, taxonomy, config: LabelConfig | None = None, *,
                  history: pd.DataFrame | None = None, as_of=None, shards: int = 16,
                  retain: int = 3, workers: int | None = None) -> str:
    """Publish a new store snapshot from a footprints table; returns the snapshot name.

    ``footprints`` is what :func:`labeler.build_footprints` returns (or a :class:`LabelRun`).
    Its ``history_len`` and ``recent_us`` columns let lookups apply ``warmup`` and memory windows;
    ``history`` (user_id, history_len) adds users whose every interaction was unplaced. Shards
    are written in parallel by ``workers`` threads (default: one per core).
    """
    from .labelling import LabelRun
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
    gone = _tombstones(root)
    fp = footprints.copy()
    if gone:
        fp = fp[~fp["user_id"].map(user_digest).isin(gone)]
    users = fp.groupby("user_id", sort=True)["history_len"].max().rename("history_len").reset_index()
    if history is not None:
        extra = history[~history["user_id"].isin(users["user_id"])]
        if gone:
            extra = extra[~extra["user_id"].map(user_digest).isin(gone)]
        users = pd.concat([users, extra[["user_id", "history_len"]]], ignore_index=True)
    watermark = _us(as_of) if as_of is not None else _us(fp["last_ts"].max()) if len(fp) else None

    previous = _read_manifest(root, _current_name(root)) if (root / "CURRENT").exists() else None
    seq = (previous["sequence"] + 1) if previous else 1
    name = f"snap-{seq:06d}-{uuid.uuid4().hex[:8]}"
    tmp = root / "snapshots" / f".{name}.tmp"
    tmp.mkdir()
    _write_items(tmp / "items.sqlite", taxonomy)
    fp["_shard"] = [shard_of(u, shards) for u in fp["user_id"]]
    users["_shard"] = [shard_of(u, shards) for u in users["user_id"]]
    shard_info, to_write = {}, []
    by_shard_fp, by_shard_users = dict(tuple(fp.groupby("_shard"))), dict(tuple(users.groupby("_shard")))
    for k in range(shards):
        f_k = by_shard_fp.get(k, fp.iloc[:0])
        u_k = by_shard_users.get(k, users.iloc[:0])
        digest = _shard_digest(f_k, u_k)
        fname = f"users-{k:02d}.sqlite"
        prev = (previous or {}).get("shards", {}).get(fname)
        if prev and prev["digest"] == digest and previous["n_shards"] == shards:
            os.link(root / "snapshots" / previous["name"] / fname, tmp / fname)
        else:
            to_write.append((tmp / fname, f_k, u_k))
        shard_info[fname] = {"digest": digest, "users": int(len(u_k)), "rows": int(len(f_k))}
    with ThreadPoolExecutor(max_workers=max(1, min(workers or os.cpu_count() or 1, len(to_write) or 1))) as pool:
        for fut in [pool.submit(_write_shard, *job) for job in to_write]:
            fut.result()  # re-raises a failed write before anything is published
    manifest = {"format": FORMAT, "name": name, "sequence": seq, "tool_version": __version__,
                "created": dt.datetime.now(dt.timezone.utc).isoformat(), "watermark_us": watermark,
                "taxonomy_version": taxonomy.version, "config": json.loads(cfg.canonical_json()),
                "n_shards": shards, "shards": shard_info, "users": int(len(users)),
                "rewritten_shards": sorted(f for f in shard_info if not (previous and previous.get(
                    "shards", {}).get(f, {}).get("digest") == shard_info[f]["digest"]))}
    (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")
    for f in tmp.iterdir():
        with open(f, "rb") as fh:
            os.fsync(fh.fileno())
    _fsync_dir(tmp)
    os.replace(tmp, root / "snapshots" / name)
    _fsync_dir(root / "snapshots")
    pointer = root / f".CURRENT.{uuid.uuid4().hex}"
    with open(pointer, "w") as fh:
        fh.write(name + "\n")
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(pointer, root / "CURRENT")
    _fsync_dir(root)
    _clean(root, keep=retain)
    log.info("published store snapshot %s: %d users, %d footprint rows, %d of %d shards rewritten", name,
             len(users), len(fp), len(manifest["rewritten_shards"]), shards)
    return name


def _shard_digest(fp: pd.DataFrame, users: pd.DataFrame) -> str:
    """Order-independent content hash of one shard's rows (sum of pandas' 64-bit row hashes)."""
    cols = [c for c in ("user_id", "level", "topic_id", "interactions", "engaged_interactions", "known",
                        "first_ts", "last_ts", "known_since") if c in fp.columns]
    parts = [fp[cols], fp["recent_us"].map(lambda v: ",".join(map(str, sorted(v))) if v is not None else "")]
    rows = pd.util.hash_pandas_object(pd.concat(parts, axis=1), index=False).to_numpy(np.uint64)
    urows = pd.util.hash_pandas_object(users[["user_id", "history_len"]], index=False).to_numpy(np.uint64)
    total = (int(rows.sum(dtype=np.uint64)), int(urows.sum(dtype=np.uint64)), len(rows), len(urows))
    return hashlib.sha256(repr(total).encode()).hexdigest()


def _write_shard(path: Path, fp: pd.DataFrame, users: pd.DataFrame) -> None:
    con = sqlite3.connect(path)
    con.executescript("""
        PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF;
        CREATE TABLE users (user_id TEXT PRIMARY KEY, history_len INTEGER NOT NULL) WITHOUT ROWID;
        CREATE TABLE topics (user_id TEXT NOT NULL, level INTEGER NOT NULL, topic_id TEXT NOT NULL,
            interactions INTEGER, engaged_interactions INTEGER, known INTEGER, first_us INTEGER,
            last_us INTEGER, known_since_us INTEGER, recent TEXT,
            PRIMARY KEY (user_id, level, topic_id)) WITHOUT ROWID;""")
    con.executemany("INSERT INTO users VALUES (?, ?)",
                    zip(users["user_id"].astype(str), users["history_len"].fillna(0).astype(int).tolist()))
    rows = zip(fp["user_id"].astype(str), fp["level"].astype(int).tolist(), fp["topic_id"].astype(str),
               fp["interactions"].astype(int).tolist(),
               fp.get("engaged_interactions", fp["interactions"]).astype(int).tolist(),
               fp["known"].astype(bool).astype(int).tolist(),
               [_us(v) for v in fp.get("first_ts", fp["last_ts"])], [_us(v) for v in fp["last_ts"]],
               [_us(v) for v in fp.get("known_since", pd.Series([None] * len(fp)))],
               [json.dumps(sorted(int(x) for x in v)) if v is not None else "[]" for v in fp["recent_us"]])
    con.executemany("INSERT INTO topics VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
    con.commit()
    con.close()


def _write_items(path: Path, taxonomy) -> None:
    it = taxonomy.item_topics.copy()
    it = it.sort_values(["item_id", "level", "confidence", "topic_id"], ascending=[True, True, False, True])
    vf = it["valid_from"] if "valid_from" in it.columns else pd.Series([None] * len(it), index=it.index)
    it["valid_from_us"] = [NEVER if v is None or v is pd.NaT or (isinstance(v, float) and np.isnan(v))
                           else _us(v) for v in vf]
    it["pos"] = it.groupby(["item_id", "level", "valid_from_us"]).cumcount()
    con = sqlite3.connect(path)
    con.executescript("""
        PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF;
        CREATE TABLE item_topics (item_id TEXT NOT NULL, level INTEGER NOT NULL, valid_from_us INTEGER NOT NULL,
            pos INTEGER NOT NULL, topic_id TEXT NOT NULL, PRIMARY KEY (item_id, level, valid_from_us, pos))
            WITHOUT ROWID;
        CREATE TABLE topics (topic_id TEXT PRIMARY KEY, level INTEGER, parent_id TEXT, name TEXT) WITHOUT ROWID;""")
    con.executemany("INSERT INTO item_topics VALUES (?, ?, ?, ?, ?)",
                    zip(it["item_id"].astype(str), it["level"].astype(int).tolist(),
                        it["valid_from_us"].astype(int).tolist(), it["pos"].astype(int).tolist(),
                        it["topic_id"].astype(str)))
    t = taxonomy.topics
    con.executemany("INSERT INTO topics VALUES (?, ?, ?, ?)",
                    zip(t["topic_id"].astype(str), t["level"].astype(int).tolist(),
                        [None if p is None or (isinstance(p, float) and np.isnan(p)) else str(p)
                         for p in t["parent_id"]], t["name"].astype(str)))
    con.commit()
    con.close()


def _current_name(root: Path) -> str:
    try:
        return (root / "CURRENT").read_text().strip()
    except FileNotFoundError:
        raise ArtifactError(f"{root}: not a store (no CURRENT). Publish one with `labeler label --store` "
                            "or labeler.publish_store().") from None


def _read_manifest(root: Path, name: str) -> dict:
    p = root / "snapshots" / name / "manifest.json"
    try:
        m = json.loads(p.read_text())
    except (FileNotFoundError, json.JSONDecodeError) as exc:
        raise ArtifactError(f"{p}: snapshot manifest missing or unreadable ({exc}). The store is damaged; "
                            "publish a new snapshot.") from None
    if m.get("format") != FORMAT:
        raise ArtifactError(f"{p}: unknown store format {m.get('format')!r}; expected {FORMAT!r}.")
    return m


def _clean(root: Path, keep: int) -> None:
    """Remove snapshots beyond the newest ``keep`` (never the current one) and stale temp folders."""
    current = _current_name(root)
    snaps = sorted((p for p in (root / "snapshots").iterdir() if p.name.startswith("snap-")), key=lambda p: p.name)
    for p in snaps[:-max(keep, 1)]:
        if p.name != current:
            shutil.rmtree(p, ignore_errors=True)
    for p in (root / "snapshots").glob(".snap-*.tmp"):
        if p.name != f".{current}.tmp":
            shutil.rmtree(p, ignore_errors=True)


# -- reading ------------------------------------------------------------------------------------

@dataclasses.dataclass(frozen=True)
class TopicState:
    """One topic of a user's footprint."""

    topic_id: str
    level: int
    name: str
    known: bool
    interactions: int
    engaged_interactions: int
    first_ts: pd.Timestamp | None
    last_ts: pd.Timestamp | None
    known_since: pd.Timestamp | None


@dataclasses.dataclass(frozen=True)
class Footprint:
    """A user's footprint in one snapshot: ``topics`` holds every topic touched, ``known`` the known ones."""

    user_id: str
    history_len: int
    topics: tuple[TopicState, ...]
    watermark: pd.Timestamp | None
    taxonomy_version: str
    snapshot: str

    @property
    def known(self) -> tuple[TopicState, ...]:
        return tuple(t for t in self.topics if t.known)


@dataclasses.dataclass(frozen=True)
class Classification:
    """The label an item would get if the user met it at ``at``."""

    item_id: str
    level: int
    label: str
    topic_id: str | None
    topic_name: str | None


def _ts(us) -> pd.Timestamp | None:
    return None if us is None else pd.Timestamp(us, unit="us", tz="UTC")


class Store:
    """Read-only access to the current snapshot of a store; safe to share between threads."""

    def __init__(self, path):
        self.root = Path(path)
        self._local = threading.local()
        self._lock = threading.Lock()
        self._load(_current_name(self.root))

    def _load(self, name: str) -> None:
        manifest = _read_manifest(self.root, name)
        folder = self.root / "snapshots" / name
        for f in ["items.sqlite", *manifest["shards"]]:
            if not (folder / f).exists():
                raise ArtifactError(f"{folder}: file '{f}' is missing; the snapshot is damaged. Publish again.")
        with self._lock:
            self.name, self.manifest, self._folder = name, manifest, folder
            self.config = LabelConfig.model_validate(manifest["config"])

    def refresh(self) -> bool:
        """Switch to the newest snapshot if one was published; True when it changed."""
        name = _current_name(self.root)
        if name == self.name:
            return False
        self._load(name)
        return True

    @property
    def watermark(self) -> pd.Timestamp | None:
        return _ts(self.manifest["watermark_us"])

    def _con(self, fname: str) -> sqlite3.Connection:
        cache = getattr(self._local, "cons", None)
        if cache is None or self._local.snapshot != self.name:
            for c in (cache or {}).values():
                c.close()
            cache = self._local.cons = {}
            self._local.snapshot = self.name
        con = cache.get(fname)
        if con is None:
            uri = f"file:{self._folder / fname}?mode=ro&immutable=1"
            con = cache[fname] = sqlite3.connect(uri, uri=True)
        return con

    def _user(self, user_id: str):
        con = self._con(f"users-{shard_of(user_id, self.manifest['n_shards']):02d}.sqlite")
        row = con.execute("SELECT history_len FROM users WHERE user_id = ?", (user_id,)).fetchone()
        topics = con.execute("SELECT level, topic_id, interactions, engaged_interactions, known, first_us, last_us, "
                             "known_since_us, recent FROM topics WHERE user_id = ?", (user_id,)).fetchall()
        return (row[0] if row else 0), topics

    def _names(self, topic_ids: Iterable[str]) -> dict[str, str]:
        ids = sorted(set(topic_ids))
        if not ids:
            return {}
        q = f"SELECT topic_id, name FROM topics WHERE topic_id IN ({','.join('?' * len(ids))})"
        return dict(self._con("items.sqlite").execute(q, ids).fetchall())

    def footprint(self, user_id: str, level: int | None = None) -> Footprint:
        """The user's topics as of the snapshot's watermark; an unknown user gets an empty footprint."""
        history, rows = self._user(str(user_id))
        rows = [r for r in rows if level is None or r[0] == level]
        names = self._names(r[1] for r in rows)
        topics = tuple(TopicState(r[1], r[0], names.get(r[1], r[1]), bool(r[4]), r[2], r[3], _ts(r[5]), _ts(r[6]),
                                  _ts(r[7])) for r in sorted(rows, key=lambda r: (r[0], -r[2], r[1])))
        return Footprint(str(user_id), history, topics, self.watermark, self.manifest["taxonomy_version"], self.name)

    def _catalog(self) -> tuple[dict, dict]:
        """Item topics and topic names of the snapshot, loaded once per snapshot and reader.

        {item_id: {level: [(valid_from_us, (topic_id, ...)), ...]}} (validity ascending, topics by
        priority) and {topic_id: name}. Item topics are small next to per-user footprints, so each
        reader keeps them in memory.
        """
        with self._lock:
            cached = getattr(self, "_catalog_cache", None)
            if cached is not None and cached[0] == self.name:
                return cached[1], cached[2]
            con = sqlite3.connect(f"file:{self._folder / 'items.sqlite'}?mode=ro&immutable=1", uri=True)
            items: dict = {}
            for item, level, vf, topic in con.execute(
                    "SELECT item_id, level, valid_from_us, topic_id FROM item_topics "
                    "ORDER BY item_id, level, valid_from_us, pos"):
                periods = items.setdefault(item, {}).setdefault(level, [])
                if periods and periods[-1][0] == vf:
                    periods[-1] = (vf, periods[-1][1] + (topic,))
                else:
                    periods.append((vf, (topic,)))
            names = dict(con.execute("SELECT topic_id, name FROM topics").fetchall())
            levels = sorted(r[0] for r in con.execute("SELECT DISTINCT level FROM topics"))
            con.close()
            self._catalog_cache = (self.name, items, names)
            self._catalog_levels = levels
            return items, names

    @staticmethod
    def _topics_at(periods, at_us: int) -> tuple[str, ...]:
        for vf, topics in reversed(periods or ()):
            if vf <= at_us:
                return topics
        return ()

    def classify(self, user_id: str, item_ids: Iterable[str], level: int | None = None, at=None) -> list[Classification]:
        """Per item and level, the label it would get if the user met it at ``at`` (default: just
        after the watermark), by the same rules as :func:`labeler.label_interactions`."""
        at_us = self._at(at)
        items, names = self._catalog()
        history, rows = self._user(str(user_id))
        known = _known_set(rows, at_us, self.config)
        levels = self._levels(level)
        out = []
        for item in map(str, item_ids):
            for lv in levels:
                label, topic = _classify_one(self._topics_at(items.get(item, {}).get(lv), at_us), lv, known,
                                             history, self.config)
                out.append(Classification(item, lv, label, topic, names.get(topic) if topic else None))
        return out

    def _at(self, at) -> int:
        wm = self.manifest["watermark_us"]
        at_us = _us(at) if at is not None else (wm + 1 if wm is not None else 0)
        if wm is not None and at_us <= wm:
            raise InputError(f"'at' must be after the snapshot's watermark {_ts(wm)}; a lookup answers for "
                             "times the snapshot has fully seen.", source="classify", column="at")
        return at_us

    def classify_many(self, pairs: pd.DataFrame, level: int | None = None, at=None) -> pd.DataFrame:
        """Vectorised classify: (user_id, item_id[, at]) in; user_id, item_id, level, label, topic_id,
        topic_name out, one row per pair and level, in input order."""
        p = pairs.reset_index(drop=True)
        users = p["user_id"].astype(str).to_numpy()
        items_of = p["item_id"].astype(str).to_numpy()
        ats = np.asarray([self._at(v) for v in p["at"]] if "at" in p.columns else [self._at(at)] * len(p),
                         dtype=np.int64)
        items, names = self._catalog()
        levels = self._levels(level)
        out: list = [None] * len(p)
        for (user, at_us), positions in pd.DataFrame({"u": users, "a": ats}).groupby(
                ["u", "a"], sort=False).indices.items():
            history, rows = self._user(user)
            known = _known_set(rows, int(at_us), self.config)
            for i in positions:
                item = items_of[i]
                out[i] = [(user, item, lv, *_classify_one(self._topics_at(items.get(item, {}).get(lv), int(at_us)),
                                                          lv, known, history, self.config))
                          for lv in levels]
        df = pd.DataFrame([r for rs in out for r in rs], columns=["user_id", "item_id", "level", "label", "topic_id"])
        df["topic_id"] = df["topic_id"].astype(object).where(df["topic_id"].notna(), None)
        df["topic_name"] = [names.get(t) if t is not None else None for t in df["topic_id"]]
        return df

    def _levels(self, level: int | None = None) -> list[int]:
        if level is not None:
            return [level]
        configured = self.manifest["config"].get("levels")
        if configured:
            return list(configured)
        self._catalog()
        return list(self._catalog_levels)


def _known(row, at_us: int, cfg: LabelConfig) -> bool:
    if row is None:
        return False
    if cfg.memory_us is None:
        return row[2] >= cfg.min_support
    recent = json.loads(row[8])
    return sum(1 for s in recent if at_us - cfg.memory_us <= s < at_us) >= cfg.min_support


def _known_set(rows, at_us: int, cfg: LabelConfig) -> set[tuple[int, str]]:
    """(level, topic_id) pairs of a user's footprint rows that are known at ``at_us``."""
    return {(r[0], r[1]) for r in rows if _known(r, at_us, cfg)}


def _classify_one(topics, level: int, known_set: set, history: int, cfg: LabelConfig):
    """The label rules of DESIGN.md for one item (topics in priority order) at one level."""
    if not topics:
        return "unplaced", None
    if history < cfg.warmup:
        return "cold_start", topics[0]
    known = [(level, t) in known_set for t in topics]
    in_profile = any(known) if cfg.multi_topic == "all_new" else all(known)
    if in_profile:
        return "in_profile", next(t for t, k in zip(topics, known) if k)
    return "new_interest", next(t for t, k in zip(topics, known) if not k)


def open_store(path) -> Store:
    """Open a store for lookups (see :class:`Store`)."""
    return Store(path)


def forget_users(path, user_ids: Iterable[str], outputs: Iterable = ()) -> str:
    """Erase users: tombstone them, publish a snapshot without them, drop every older snapshot, and
    rewrite the Parquet files under each folder in ``outputs`` (e.g. `labeler label --out` folders)
    without their rows. Returns the new snapshot's name. Later publishes skip tombstoned users.
    """
    import pyarrow.compute as pc
    import pyarrow.parquet as pq
    user_ids = [str(u) for u in user_ids]
    for folder in outputs:
        for f in sorted(Path(folder).rglob("*.parquet")):
            table = pq.read_table(f)
            if "user_id" not in table.column_names:
                continue
            keep = table.filter(pc.invert(pc.is_in(table.column("user_id"), value_set=_strings(user_ids))))
            if keep.num_rows != table.num_rows:
                tmp = f.with_name(f".{f.name}.{uuid.uuid4().hex}")
                pq.write_table(keep, tmp)
                os.replace(tmp, f)
    root = Path(path)
    store = Store(root)
    digests = {user_digest(str(u)) for u in user_ids}
    tomb = _tombstones(root) | digests
    tmp = root / f".tombstones.{uuid.uuid4().hex}"
    tmp.write_text(json.dumps(sorted(tomb)))
    os.replace(tmp, root / "tombstones.json")
    frames, users = [], []
    for fname in store.manifest["shards"]:
        con = store._con(fname)
        f = pd.read_sql_query("SELECT * FROM topics", con)
        u = pd.read_sql_query("SELECT * FROM users", con)
        frames.append(f)
        users.append(u)
    fp = pd.concat(frames, ignore_index=True)
    fp = fp.rename(columns={"first_us": "first_ts", "last_us": "last_ts", "known_since_us": "known_since"})
    for c in ("first_ts", "last_ts", "known_since"):
        fp[c] = pd.to_datetime(fp[c], unit="us", utc=True)
    fp["recent_us"] = fp.pop("recent").map(json.loads)
    fp["known"] = fp["known"].astype(bool)
    hist = pd.concat(users, ignore_index=True)
    fp = fp.merge(hist, on="user_id", how="left")
    tax = _StoredTaxonomy(store)
    name = publish_store(root, fp, tax, store.config, history=hist, as_of=store.watermark,
                         shards=store.manifest["n_shards"], retain=1)
    log.info("forgot %d user(s); published %s and removed older snapshots", len(digests), name)
    return name


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
