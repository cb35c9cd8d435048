"""Output generations: each run writes a complete generation; unchanged files are hard links.

``outputs/gen-NNNNNN/`` holds ``labels/date=YYYY-MM-DD/part-0.parquet``, ``footprints.parquet``
and ``users.parquet`` (every user's history length). A run rewrites only the dates from its
earliest change on, and only the rows of the users it re-labelled; everything else is linked
from the previous generation. The job state names the current generation, so readers and a
re-run after a crash never see a half-written one.
"""
from __future__ import annotations

import logging
import os
import shutil
import uuid
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..labelling import FOOTPRINTS_SCHEMA, LABELS_SCHEMA, ROW_GROUP
from . import failpoints

log = logging.getLogger(__name__)

LABEL_SORT = [(k, "ascending", "at_end") for k in ("user_id", "ts", "event_id", "item_id", "level")]
FOOTPRINT_SORT = [(k, "ascending", "at_end") for k in ("user_id", "level", "topic_id")]
USERS_SCHEMA = pa.schema([("user_id", pa.string()), ("history_len", pa.int64())])


def write_table(table: pa.Table, dest: Path, point: str) -> None:
    """Write one Parquet file atomically (temp file, fsync, rename), fixed row groups."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_name(f".{dest.name}.{uuid.uuid4().hex}")
    failpoints.hit(point)
    pq.write_table(table, tmp, row_group_size=ROW_GROUP)
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, dest)


def _sorted(table: pa.Table, keys) -> pa.Table:
    idx = pc.sort_indices(table, sort_keys=keys)
    return table.take(idx)


def _without(table: pa.Table, users: pa.Array) -> pa.Table:
    return table.filter(pc.invert(pc.is_in(table.column("user_id"), value_set=users)))


def label_dates(gen: Path | None) -> list[str]:
    if gen is None or not (gen / "labels").is_dir():
        return []
    return sorted(p.name[len("date="):] for p in (gen / "labels").iterdir() if p.name.startswith("date="))


def part_path(gen: Path, date: str) -> Path:
    return gen / "labels" / f"date={date}" / "part-0.parquet"


def link(src: Path, dest: Path) -> None:
    dest.parent.mkdir(parents=True, exist_ok=True)
    os.link(src, dest)


class GenerationWriter:
    """Builds generation ``gen`` from ``prev`` (or from nothing) and the re-labelled users' rows."""

    def __init__(self, gen: Path, prev: Path | None, users: pa.Array | None, start_date: str | None,
                 versions, taxonomy_version: str, people: pa.Array | None = None):
        """``users``: whose label rows from ``start_date`` on are replaced (None: everyone's);
        ``people``: whose footprint and history rows are replaced (default: ``users``). Users
        continued from carried state are among ``people`` only: their earlier rows stay."""
        if gen.exists():  # left by a run that crashed before committing: never committed, so rebuilt
            shutil.rmtree(gen)
        gen.mkdir(parents=True)
        self.gen, self.prev, self.users, self.start = gen, prev, users, start_date
        self.people = users if people is None else people
        self.versions, self.taxonomy_version = versions, taxonomy_version
        self.counts: dict[tuple[int, str], int] = {}
        self.rows_written = 0
        self.dates_written: list[str] = []
        self._done: set[str] = set()

    def _rewrites(self, date: str) -> bool:
        return self.start is not None and date >= self.start

    def link_unchanged(self) -> int:
        """Hard-link every previous date before the first change."""
        n = 0
        for date in label_dates(self.prev):
            if not self._rewrites(date):
                link(part_path(self.prev, date), part_path(self.gen, date))
                self._done.add(date)
                n += 1
        return n

    def write_date(self, date: str, new_rows: pa.Table | None) -> None:
        """Date ``date``: the previous rows of users not re-labelled, plus ``new_rows``."""
        pieces = []
        old = part_path(self.prev, date) if self.prev is not None else None
        if old is not None and old.exists():
            prev = pq.read_table(old)
            pieces.append(_without(prev, self.users) if self.users is not None else prev.slice(0, 0))
        if new_rows is not None and new_rows.num_rows:
            pieces.append(self._finish(new_rows, date))
        self._done.add(date)
        if not pieces:
            return
        table = pa.concat_tables([p.select(LABELS_SCHEMA.names).cast(LABELS_SCHEMA) for p in pieces])
        if table.num_rows == 0:
            return
        n = table.num_rows
        version = self.versions(date)
        table = table.set_column(table.schema.get_field_index("labels_version"), "labels_version",
                                 pa.array([version] * n, pa.string()))
        table = _sorted(table, LABEL_SORT)
        write_table(table, part_path(self.gen, date), "write_labels")
        self.dates_written.append(date)
        if len(self.dates_written) == 1:
            failpoints.hit("mid_labels_write")

    def write_stream(self, batches) -> None:
        """Write the re-labelled rows from Arrow batches ordered by a string ``_date`` column."""
        pending, current = [], None
        for batch in batches:
            tb = pa.Table.from_batches([batch])
            dates = tb.column("_date")
            for date in pc.unique(dates).to_pylist():
                if date != current and pending:
                    self.write_date(current, pa.concat_tables(pending))
                    pending = []
                current = date
                pending.append(tb.filter(pc.equal(dates, date)).drop_columns(["_date", "ts_us"]))
        if pending:
            self.write_date(current, pa.concat_tables(pending))

    def _finish(self, rows: pa.Table, date: str) -> pa.Table:
        n = rows.num_rows
        for level, label in zip(rows.column("level").to_pylist(), rows.column("label").to_pylist()):
            self.counts[(level, label)] = self.counts.get((level, label), 0) + 1
        self.rows_written += n
        rows = rows.append_column("taxonomy_version", pa.array([self.taxonomy_version] * n, pa.string()))
        return rows.append_column("labels_version", pa.array([""] * n, pa.string()))

    def finish_dates(self) -> None:
        """Rewrite the previous dates from the first change on that had no new rows."""
        for date in label_dates(self.prev):
            if date not in self._done:
                self.write_date(date, None)

    def write_people(self, footprints: pa.Table, users: pa.Table, aged) -> None:
        """footprints.parquet and users.parquet: previous rows of others (aged to the new
        watermark by ``aged``), plus the re-labelled users' new rows.

        The previous files are sorted and hold no row of the users written anew, so only the new
        rows are sorted, and the two are merged by user."""
        fp = _sorted(footprints.cast(FOOTPRINTS_SCHEMA), FOOTPRINT_SORT)
        us = _sorted(users.cast(USERS_SCHEMA), [("user_id", "ascending", "at_end")])
        if self.prev is not None and self.people is not None:
            kept = aged(_without(pq.read_table(self.prev / "footprints.parquet"), self.people))
            fp = merge_by_user(kept.cast(FOOTPRINTS_SCHEMA), fp)
            us = merge_by_user(_without(pq.read_table(self.prev / "users.parquet"), self.people).cast(USERS_SCHEMA), us)
        write_table(fp, self.gen / "footprints.parquet", "write_footprints")
        failpoints.hit("mid_footprints_write")
        write_table(us, self.gen / "users.parquet", "write_footprints")
        self.footprints, self.people = fp, us


def merge_by_user(a: pa.Table, b: pa.Table) -> pa.Table:
    """Two tables sorted by user_id (then their other keys), with no user in both, merged into one
    sorted table: each row keeps its place among its own user's rows."""
    import numpy as np
    both = pa.concat_tables([a, b])
    users = both.column("user_id")
    distinct = pc.unique(users)
    rank = pc.index_in(users, value_set=distinct.take(pc.sort_indices(distinct)))  # position in id order
    take = np.argsort(rank.to_numpy(zero_copy_only=False), kind="stable")
    return both.take(pa.array(take))


def age_footprints(table: pa.Table, watermark_us: int, min_support: int, memory_us: int | None) -> pa.Table:
    """Footprint rows of users with no new interactions, seen from a later watermark: a topic
    stays known only while its last ``min_support`` qualifying times are inside the memory window."""
    if memory_us is None or table.num_rows == 0:
        return table
    recent = table.column("recent_us")
    oldest = pc.list_element(recent, 0)  # the times are sorted: the oldest of the last min_support
    full = pc.greater_equal(pc.list_value_length(recent), min_support)
    inside = pc.greater_equal(pc.fill_null(oldest, -(2 ** 62)), watermark_us + 1 - memory_us)
    known = pc.and_(table.column("known"), pc.and_(pc.fill_null(full, False), pc.fill_null(inside, False)))
    since = pc.if_else(known, table.column("known_since"), pa.scalar(None, FOOTPRINTS_SCHEMA.field("known_since").type))
    table = table.set_column(table.schema.get_field_index("known"), "known", known)
    return table.set_column(table.schema.get_field_index("known_since"), "known_since", since)
