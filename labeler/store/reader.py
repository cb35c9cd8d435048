"""Reading a snapshot: footprints, and classification of candidates by the label rules."""
from __future__ import annotations

import dataclasses
import json
import sqlite3
import threading
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd

from ..config import LabelConfig
from ..errors import ArtifactError, InputError
from .layout import check_file, current_name, read_manifest, shard_files, shard_of, to_us

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


_TOPICS = ("SELECT level, topic_id, interactions, engaged_interactions, known, first_us, last_us, known_since_us, "
           "recent, history_len FROM topics WHERE user_id = ?")


_HISTORY = "SELECT history_len, whole FROM users WHERE user_id = ?"


def _ts(us) -> pd.Timestamp | None:
    return None if us is None else pd.Timestamp(us, unit="us", tz="UTC")


class Store:
    """Read-only access to the current snapshot of a store; safe to share between threads.

    Every file of the snapshot is checked against the size and SHA-256 its manifest recorded at
    publish: sizes when the snapshot is opened, contents the first time a file is read (about
    1 GB/s; once per file and process). A damaged snapshot is refused with an
    :class:`~labeler.errors.ArtifactError`, never served. ``verify=False`` checks sizes only.
    """

    def __init__(self, path, verify: bool = True):
        self.root = Path(path)
        self.verify = verify
        self._local = threading.local()
        self._lock = threading.Lock()
        self._load(current_name(self.root))

    def _load(self, name: str) -> None:
        manifest = read_manifest(self.root, name)
        folder = self.root / "snapshots" / name
        files = [f for shard in manifest["shards"] for f in shard_files(manifest, shard)]
        for f in ["items.sqlite", *files]:
            check_file(folder / f, manifest["files"].get(f), content=False)
        with self._lock:
            self.name, self.manifest, self._folder = name, manifest, folder
            self.config = LabelConfig.model_validate(manifest["config"])

    def refresh(self) -> bool:
        """Switch to the newest snapshot if one was published; True when it changed."""
        name = current_name(self.root)
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
            uri = f"file:{self.path(fname)}?mode=ro&immutable=1"
            con = cache[fname] = sqlite3.connect(uri, uri=True)
        return con

    def path(self, fname: str) -> Path:
        """A file of the current snapshot, checked against its manifest record."""
        return check_file(self._folder / fname, self.manifest["files"].get(fname), content=self.verify)

    def _query(self, fname: str, sql: str, args=()) -> list:
        try:
            return self._con(fname).execute(sql, args).fetchall()
        except sqlite3.DatabaseError as exc:
            raise ArtifactError(f"{self._folder / fname}: cannot be read ({exc}); the snapshot is damaged. "
                                "Publish a new snapshot, e.g. `labeler run --full`.") from None

    def _user(self, user_id: str):
        """(history length, topic rows) of one user. In the base file this is one range read of the
        clustered topics table (only a user without topic rows is looked up in ``users``). Delta
        layers are asked first, newest first, since most users are in none: the newest layer
        holding the user gives the history; a layer where the user is ``whole`` ends the search,
        one that holds only their changed rows lets older files fill in the other topics."""
        shard = f"users-{shard_of(user_id, self.manifest['n_shards']):02d}.sqlite"
        history, rows = None, {}
        for layer in reversed(self.manifest.get("deltas", {}).get(shard, ())):
            got = self._query(layer, _HISTORY, (user_id,))
            if not got:
                continue
            history = got[0][0] if history is None else history
            for r in self._query(layer, _TOPICS, (user_id,)):
                rows.setdefault((r[0], r[1]), r)
            if got[0][1]:
                return history, list(rows.values())
        topics = self._query(shard, _TOPICS, (user_id,))
        if history is None:
            if topics:
                return topics[0][9], topics
            got = self._query(shard, _HISTORY, (user_id,))
            return (got[0][0] if got else 0), topics
        for r in topics:
            rows.setdefault((r[0], r[1]), r)
        return history, list(rows.values())

    def _names(self, topic_ids: Iterable[str]) -> dict[str, str]:
        ids = sorted(set(topic_ids))
        if not ids:
            return {}
        q = f"SELECT topic_id, name FROM topics WHERE topic_id IN ({','.join('?' * len(ids))})"
        return dict(self._query("items.sqlite", q, ids))

    def footprint(self, user_id: str, level: int | None = None) -> Footprint:
        """The user's topics as of the snapshot's watermark; an unknown user gets an empty footprint."""
        history, rows = self._user(str(user_id))
        rows = [r for r in rows if level is None or r[0] == level]
        names = self._names(r[1] for r in rows)
        now = self._at(None)  # rows published earlier are aged to this snapshot's watermark
        known = {(r[0], r[1]) for r in rows if r[4] and _known(r, now, self.config)}
        topics = tuple(TopicState(r[1], r[0], names.get(r[1], r[1]), (r[0], r[1]) in known, r[2], r[3], _ts(r[5]),
                                  _ts(r[6]), _ts(r[7]) if (r[0], r[1]) in known else None)
                       for r in sorted(rows, key=lambda r: (r[0], -r[2], r[1])))
        return Footprint(str(user_id), history, topics, self.watermark, self.manifest["taxonomy_version"], self.name)

    def preload(self) -> "Store":
        """Load the snapshot's item catalog now, so that the first ``classify`` is not the slow one.

        A service calls this once after opening (and after a ``refresh`` that switched snapshots).
        """
        self._catalog()
        return self

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
            rows = self._query("items.sqlite", "SELECT item_id, level, valid_from_us, topic_id FROM item_topics "
                               "ORDER BY item_id, level, valid_from_us, pos")
            items: dict = {}
            for item, level, vf, topic in rows:
                periods = items.setdefault(item, {}).setdefault(level, [])
                got = (topic,) if topic is not None else ()  # null: no topic from valid_from on
                if periods and periods[-1][0] == vf:
                    periods[-1] = (vf, periods[-1][1] + got)
                else:
                    periods.append((vf, got))
            names = dict(self._query("items.sqlite", "SELECT topic_id, name FROM topics"))
            levels = sorted(r[0] for r in self._query("items.sqlite", "SELECT DISTINCT level FROM topics"))
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
        out, decided, cfg, none = [], {}, self.config, {}
        for item in map(str, item_ids):
            per_level = items.get(item, none)
            for lv in levels:
                periods = per_level.get(lv)
                topics = periods[-1][1] if periods and periods[-1][0] <= at_us else self._topics_at(periods, at_us)
                key = (lv, topics)
                got = decided.get(key)  # items sharing topics share the answer within one call
                if got is None:
                    label, topic = _classify_one(topics, lv, known, history, cfg)
                    got = decided[key] = (label, topic, names.get(topic) if topic else None)
                out.append(Classification(item, lv, *got))
        return out

    def _at(self, at) -> int:
        wm = self.manifest["watermark_us"]
        at_us = to_us(at) if at is not None else (wm + 1 if wm is not None else 0)
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


def open_store(path, verify: bool = True) -> Store:
    """Open a store for lookups (see :class:`Store`)."""
    return Store(path, verify=verify)
