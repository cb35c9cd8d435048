"""Output generations: each run writes a complete generation; unchanged files are hard links.

``outputs/gen-NNNNNN/`` holds ``labels/date=YYYY-MM-DD/part-0.parquet``, ``footprints.parquet``
and ``users.parquet`` (every user's history length). A run rewrites only the dates from its
earliest change on, and only the rows of the users it re-labelled; everything else is linked
from the previous generation. The job state names the current generation, so readers and a
re-run after a crash never see a half-written one.
"""
from __future__ import annotations

import bisect
import contextlib
import logging
import os
import shutil
import uuid
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..labels.files import FOOTPRINTS_SCHEMA, LABELS_SCHEMA, ROW_GROUP, RowGroupWriter, join_all, write_whole
from . import failpoints

log = logging.getLogger(__name__)

LABEL_SORT = [(k, "ascending", "at_end") for k in ("user_id", "ts", "event_id", "item_id", "level")]
FOOTPRINT_SORT = [(k, "ascending", "at_end") for k in ("user_id", "level", "topic_id")]
USERS_SCHEMA = pa.schema([("user_id", pa.string()), ("history_len", pa.int64())])


@contextlib.contextmanager
def _atomic(dest: Path, point: str):
    """A temporary path beside ``dest``; on success fsynced and renamed onto ``dest``, on failure removed."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_name(f".{dest.name}.{uuid.uuid4().hex}")
    failpoints.hit(point)
    try:
        yield tmp
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, dest)


def write_table(table: pa.Table, dest: Path, point: str, compression: str = "lz4") -> None:
    """Write one Parquet file atomically (temp file, fsync, rename), fixed row groups."""
    with _atomic(dest, point) as tmp:
        write_whole(table, tmp, compression)


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
                 versions, taxonomy_version: str, people: pa.Array | None = None, compression: str = "lz4"):
        """``users``: whose label rows from ``start_date`` on are replaced (None: everyone's);
        ``people``: whose footprint and history rows are replaced (default: ``users``). Users
        continued from carried state are among ``people`` only: their earlier rows stay.
        ``compression``: the Parquet codec of the files written (EngineConfig.output_compression)."""
        if gen.exists():  # left by a run that crashed before committing: never committed, so rebuilt
            shutil.rmtree(gen)
        gen.mkdir(parents=True)
        self.gen, self.prev, self.users, self.start = gen, prev, users, start_date
        self.people = users if people is None else people
        self.versions, self.taxonomy_version, self.compression = versions, taxonomy_version, compression
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
        self._took(date, DateWriter(self.gen, self.prev, self.users, self.versions, self.taxonomy_version,
                                    compression=self.compression)(date, new_rows))

    def _took(self, date: str, done: dict) -> None:
        self._done.add(date)
        for key, n in done["counts"].items():
            self.counts[key] = self.counts.get(key, 0) + n
        self.rows_written += done["rows"]
        if done["written"]:
            self.dates_written.append(date)
            if len(self.dates_written) == 1:
                failpoints.hit("mid_labels_write")

    def write_stream(self, engine, expr) -> None:
        """Write the re-labelled rows of ``expr`` (with a string ``_date`` column), one date at a
        time, through ``engine.write_groups``: a distributed engine writes them from its workers."""
        writer = DateWriter(self.gen, self.prev, self.users, self.versions, self.taxonomy_version, presorted=True,
                            compression=self.compression)
        for date, done in engine.write_groups(expr, "_date", writer, order=tuple(k for k, _, _ in LABEL_SORT)):
            self._took(date, done)
        self.dates_written.sort()

    def finish_dates(self) -> None:
        """Rewrite the previous dates from the first change on that had no new rows."""
        for date in label_dates(self.prev):
            if date not in self._done:
                self.write_date(date, None)

    def write_people(self, footprints: pa.Table, users: pa.Table, aged, continued: pa.Array | None = None) -> None:
        """footprints.parquet and users.parquet: previous rows of others (aged to the new
        watermark by ``aged``), plus the re-labelled users' new rows.

        ``continued`` users (continued from carried state) may bring only the topics their new
        events touched: their other previous rows stay, aged, with the new ``history_len``.
        The previous files are sorted, so only the new rows are sorted, and the previous file is
        streamed one row group at a time and merged with them: memory follows the new rows, not
        the population. ``footprint_rows`` and ``user_rows`` count all the rows written.
        """
        merge = self.prev is not None and self.people is not None
        if isinstance(footprints, pa.Table):
            fp = _sorted(footprints.cast(FOOTPRINTS_SCHEMA), FOOTPRINT_SORT)
        elif merge:
            raise ValueError("a stream of footprint batches is written only into a generation of its own")
        else:  # batches already in key order (a full run streamed from the engine)
            fp = footprints
        if isinstance(users, pa.Table):
            us = _sorted(users.cast(USERS_SCHEMA), [("user_id", "ascending", "at_end")])
        elif merge:
            raise ValueError("a stream of history batches is written only into a generation of its own")
        else:
            us = (pa.Table.from_batches([b]).cast(USERS_SCHEMA) for b in users)
        if merge and continued is not None and len(continued):
            whole = self.users if self.users is not None else pa.array([], pa.string())
            topped = Topped(us.filter(pc.is_in(us.column("user_id"), value_set=continued)), aged)
        else:
            whole, topped = self.people, aged
        self.footprint_rows = write_merged(self.prev / "footprints.parquet" if merge else None, whole, fp,
                                           topped, FOOTPRINTS_SCHEMA, self.gen / "footprints.parquet",
                                           "write_footprints", FOOTPRINT_SORT, self.compression)
        failpoints.hit("mid_footprints_write")
        self.user_rows = write_merged(self.prev / "users.parquet" if merge else None, self.people, us,
                                      lambda t: t, USERS_SCHEMA, self.gen / "users.parquet", "write_footprints",
                                      [("user_id", "ascending", "at_end")], self.compression)

    def join(self, pieces: list["GenerationWriter"]) -> None:
        """Fill this (new, empty) generation with ``pieces``: generations of disjoint ranges of
        users, in id order, each written from nothing. Each file is the pieces' files concatenated
        in that order, in the same row groups: the bytes one generation of all users would have."""
        dates = sorted({d for w in pieces for d in w.dates_written})
        rows = join_all([([w.gen / "footprints.parquet" for w in pieces], self.gen / "footprints.parquet",
                          FOOTPRINTS_SCHEMA),
                         ([w.gen / "users.parquet" for w in pieces], self.gen / "users.parquet", USERS_SCHEMA)]
                        + [([part_path(w.gen, date) for w in pieces if date in w.dates_written],
                            part_path(self.gen, date), LABELS_SCHEMA) for date in dates], self.compression)
        self.footprint_rows, self.user_rows = rows[0], rows[1]
        for w in pieces:
            for key, n in w.counts.items():
                self.counts[key] = self.counts.get(key, 0) + n
            self.rows_written += w.rows_written
        self.dates_written = dates


class DateWriter:
    """Writes one date's label file of a generation: the previous generation's rows of that date,
    less the re-labelled ``users`` (None: everyone), plus the new rows. Picklable, so a
    distributed engine runs it where the rows are; returns the counts the run manifest needs.
    ``presorted``: the new rows come in the file's order (the engine sorted them, faster than
    here), so a date without previous rows is written as it comes."""

    def __init__(self, gen: Path, prev: Path | None, users: pa.Array | None, versions, taxonomy_version: str,
                 presorted: bool = False, compression: str = "lz4"):
        self.gen, self.prev, self.users, self.compression = gen, prev, users, compression
        self.versions, self.taxonomy_version, self.presorted = versions, taxonomy_version, presorted

    def __call__(self, date: str, new_rows: pa.Table | None) -> dict:
        done = {"counts": {}, "rows": 0, "written": False}
        pieces = []
        old = part_path(self.prev, date) if self.prev is not None else None
        if old is not None and old.exists():
            prev = pq.read_table(old)
            pieces.append(_without(prev, self.users) if self.users is not None else prev.slice(0, 0))
        if new_rows is not None and new_rows.num_rows:
            by = new_rows.group_by(["level", "label"]).aggregate([("label", "count")])
            done["counts"] = {(int(lv), lb): int(n) for lv, lb, n in zip(
                by.column("level").to_pylist(), by.column("label").to_pylist(), by.column("label_count").to_pylist())}
            done["rows"] = n = new_rows.num_rows
            new_rows = new_rows.append_column("taxonomy_version", pa.repeat(pa.scalar(self.taxonomy_version, pa.string()), n))
            pieces.append(new_rows.append_column("labels_version", pa.repeat(pa.scalar("", pa.string()), n)))
        if not pieces:
            return done
        table = pa.concat_tables([p.select(LABELS_SCHEMA.names).cast(LABELS_SCHEMA) for p in pieces])
        if table.num_rows == 0:
            return done
        n = table.num_rows
        table = table.set_column(table.schema.get_field_index("labels_version"), "labels_version",
                                 pa.repeat(pa.scalar(self.versions(date), pa.string()), n))
        in_order = self.presorted and new_rows is not None and new_rows.num_rows == n  # no previous rows
        write_table(table if in_order else _sorted(table, LABEL_SORT), part_path(self.gen, date), "write_labels",
                    self.compression)
        done["written"] = True
        return done


def write_merged(prev: Path | None, drop: pa.Array | None, new: pa.Table, aged, schema: pa.Schema, dest: Path,
                 point: str, keys, compression: str = "lz4") -> int:
    """Write ``dest``: the rows of ``prev`` (sorted by ``keys``, user first; users in ``drop`` left
    out, the rest passed through ``aged``) merged with ``new`` (sorted; its row wins a key in both),
    streaming ``prev`` one row group at a time (without ``prev``, ``new`` may be an iterable of
    record batches in order, written as they come). Row groups hold exactly ``ROW_GROUP`` rows,
    as one ``write_table`` of the whole would, so the bytes do not depend on how the rows arrived.
    Returns the number of rows written."""
    with _atomic(dest, point) as tmp:
        out = RowGroupWriter(tmp, schema, compression)
        try:
            if prev is None:
                for piece in ([new] if isinstance(new, pa.Table) else new):
                    out.add(piece if isinstance(piece, pa.Table) else pa.Table.from_batches([piece]))
            else:
                _merge_previous(out, prev, drop, new, aged, schema, keys)
        except BaseException:
            out.writer.close()
            raise
        out.close()
    return out.rows


def _merge_previous(out: RowGroupWriter, prev: Path, drop: pa.Array | None, new: pa.Table, aged,
                    schema: pa.Schema, keys) -> None:
    """See write_merged. The rows of a batch's last user are held back to the next batch, so a
    user's new and previous rows always meet in one merge."""
    ids = new.column("user_id").to_pylist()
    gone = sorted(drop.to_pylist()) if drop is not None else []
    taken, held = 0, None
    for batch in pq.ParquetFile(prev).iter_batches(batch_size=ROW_GROUP):
        old = pa.Table.from_batches([batch])
        if old.num_rows and gone:  # only the dropped ids inside this batch's range of users
            first, last = old.column("user_id")[0].as_py(), old.column("user_id")[-1].as_py()
            inside = gone[bisect.bisect_left(gone, first):bisect.bisect_right(gone, last)]
            old = _without(old, pa.array(inside, pa.string())) if inside else old
        old = aged(old).cast(schema)
        if held is not None:
            old = pa.concat_tables([held, old])
        if old.num_rows == 0:
            held = None
            continue
        users = old.column("user_id")
        last = users[-1].as_py()
        cut = old.num_rows - pc.sum(pc.equal(users, last)).as_py()  # the last user's rows: held back
        held, old = old.slice(cut), old.slice(0, cut)
        upto = bisect.bisect_left(ids, last)  # new rows of users before the held one
        out.add(_merge_sorted(old, new.slice(taken, upto - taken), keys) if upto > taken else old)
        taken = upto
    rest = new.slice(taken)
    out.add(_merge_sorted(held, rest, keys) if held is not None else rest)


def _merge_sorted(a: pa.Table, b: pa.Table, keys) -> pa.Table:
    """Two tables sorted by ``keys`` (unique in each, never null) as one sorted table; where a key
    is in both, the row of ``b`` replaces that of ``a``.

    The keys are sorted as one integer: each key column becomes its values' ranks (the distinct
    values are few next to the rows), combined in key order. That is twice as fast as sorting
    the rows by the columns themselves, in the same (byte-wise) order.
    """
    if a.num_rows == 0 or b.num_rows == 0:
        return b if a.num_rows == 0 else a
    both = pa.concat_tables([a, b])
    key, span = np.zeros(both.num_rows, np.int64), 1
    for name, order, _ in reversed(keys):
        col = both.column(name)
        values = pc.unique(col)
        if span * len(values) >= 2 ** 62:  # too many distinct keys to count in one integer
            return _merge_sorted_by_columns(both, keys)
        values = values.take(pc.sort_indices(values))
        rank = pc.index_in(col, value_set=values).to_numpy(zero_copy_only=False).astype(np.int64)
        key += span * (rank if order == "ascending" else len(values) - 1 - rank)
        span *= len(values)
    at = np.argsort(key, kind="stable")  # stable: a's row just before b's of the same key
    key = key[at]
    newest = np.ones(len(key), bool)
    newest[:-1] = key[1:] != key[:-1]
    return both.take(at[newest])


def _merge_sorted_by_columns(both: pa.Table, keys) -> pa.Table:
    both = both.take(pc.sort_indices(both, sort_keys=keys))  # stable: a's row just before b's
    same = None
    for name, _, _ in keys:
        col = both.column(name)
        eq = pc.fill_null(pc.equal(col.slice(0, len(col) - 1), col.slice(1)), False)
        same = eq if same is None else pc.and_(same, eq)
    if not pc.any(same).as_py():
        return both
    return both.filter(pa.concat_arrays([pc.invert(same).combine_chunks(), pa.array([True])]))


class Topped:
    """``aged`` for the previous footprints when continued users bring only their touched topics:
    a continued user's other previous rows take the user's new ``history_len`` (from ``users``),
    then every row is aged. (Their rows of the touched topics meet the new ones in the merge,
    which keeps the new.)"""

    def __init__(self, users: pa.Table, aged):
        users = users.sort_by("user_id")
        self.aged, self.history = aged, users.column("history_len")
        self.users, self.ids = users.column("user_id"), users.column("user_id").to_pylist()

    def __call__(self, table: pa.Table) -> pa.Table:
        if table.num_rows and len(self.users):
            # the table is sorted by user: look up only the users inside its range (a lookup set of
            # every continued user, built again for each row group, cost more than the merge)
            ids = table.column("user_id")
            lo = bisect.bisect_left(self.ids, ids[0].as_py())
            hi = bisect.bisect_right(self.ids, ids[-1].as_py())
            at = pc.index_in(ids, value_set=self.users.slice(lo, hi - lo))
            if at.null_count < len(at):
                fresh = pc.take(self.history.slice(lo, hi - lo), pc.fill_null(at, 0))
                col = table.schema.get_field_index("history_len")
                table = table.set_column(col, "history_len", pc.if_else(pc.is_valid(at), fresh, table.column(col)))
        return self.aged(table)


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
