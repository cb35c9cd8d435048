"""A labelling run's output files: their schemas and encoding, row groups of a fixed size
whatever the batches that feed them, one labels file per UTC date, and the joins of pieces' files.

Row groups of exactly ``ROW_GROUP`` rows make a file's bytes depend on its rows alone, not on how
an engine batched them: the promise that a run in pieces, an incremental run and a full run write
the same bytes rests on it.
"""
from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import ibis
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..errors import EngineError
from ..tables import FOOTPRINTS_COLUMNS, LABELS_COLUMNS

LABELS_SCHEMA = pa.schema([
    ("user_id", pa.string()), ("item_id", pa.string()), ("ts", pa.timestamp("us", tz="UTC")),
    ("event_id", pa.string()), ("level", pa.int32()), ("topic_id", pa.string()), ("label", pa.string()),
    ("engaged", pa.bool_()), ("discovery", pa.bool_()), ("reward_multiplier", pa.float64()),
    ("shaped_reward", pa.float64()), ("history_len", pa.int64()), ("known_topics", pa.int64()),
    ("taxonomy_version", pa.string()), ("labels_version", pa.string())])
FOOTPRINTS_SCHEMA = pa.schema([
    ("user_id", pa.string()), ("level", pa.int32()), ("topic_id", pa.string()),
    ("first_ts", pa.timestamp("us", tz="UTC")), ("last_ts", pa.timestamp("us", tz="UTC")),
    ("interactions", pa.int64()), ("engaged_interactions", pa.int64()), ("known", pa.bool_()),
    ("known_since", pa.timestamp("us", tz="UTC")), ("history_len", pa.int64()),
    ("recent_us", pa.list_(pa.int64()))])
SORT_KEYS = ("user_id", "ts_us", "event_id", "item_id", "level")
ROW_GROUP = 262_144
DAY_US = 86_400_000_000
# how every output table is encoded: LZ4 (raw) pages, dictionaries only for the columns of few
# distinct values (a dictionary of user or item ids costs time and saves nothing). Measured on a
# footprints file of 8.3M rows: written in half the time and read in a quarter of it of
# pyarrow's defaults (Snappy, every column in a dictionary), and 3% smaller.
FEW_VALUES = ("level", "topic_id", "label", "taxonomy_version", "labels_version")
# pieces' files are joined one output file a thread (Arrow encodes a file on one thread, without
# the GIL); each thread holds up to a row group, so their number is capped
JOIN_THREADS = min(4, os.cpu_count() or 1)


def parquet_options(schema: pa.Schema, compression: str = "lz4") -> dict:
    """How an output table is encoded (``compression``: EngineConfig.output_compression)."""
    return {"compression": compression, "use_dictionary": [n for n in schema.names if n in FEW_VALUES]}


def write_whole(table: pa.Table, dest: Path, compression: str = "lz4") -> None:
    """``table`` as one Parquet file in ``ROW_GROUP``-row groups: the bytes a :class:`RowGroupWriter`
    fed the same rows in any batches writes."""
    pq.write_table(table, dest, row_group_size=ROW_GROUP, **parquet_options(table.schema, compression))


class RowGroupWriter:
    """Writes tables, however they arrive, in row groups of exactly ``ROW_GROUP`` rows, so the bytes
    of a file do not depend on the batch sizes that fed it (an empty file gets the one empty row
    group ``pq.write_table`` gives it)."""

    def __init__(self, dest: Path, schema: pa.Schema, compression: str = "lz4"):
        self.writer = pq.ParquetWriter(dest, schema, **parquet_options(schema, compression))
        self.schema, self.pending, self.buffered, self.rows = schema, [], 0, 0
        self.parked: list[Path] = []  # earlier rows not yet written, on disk (before ``pending``)

    def add(self, table: pa.Table) -> None:
        if table.num_rows == 0:
            return
        self.pending.append(table.cast(self.schema))
        self.buffered += table.num_rows
        self.rows += table.num_rows
        if self.buffered >= ROW_GROUP:
            whole = pa.concat_tables(self._unpark() + self.pending)
            full = (whole.num_rows // ROW_GROUP) * ROW_GROUP
            self.writer.write_table(whole.slice(0, full), row_group_size=ROW_GROUP)
            rest = whole.slice(full)
            self.pending, self.buffered = ([rest] if rest.num_rows else []), rest.num_rows

    def park(self, dest: Path) -> None:
        """Move the rows held in memory, not yet written, into ``dest`` (an Arrow IPC file, LZ4); they
        are read back when a row group fills, or at ``close``."""
        if self.pending:
            with pa.ipc.new_file(dest, self.schema, options=pa.ipc.IpcWriteOptions(compression="lz4")) as out:
                for table in self.pending:
                    out.write_table(table)
            self.parked.append(dest)
            self.pending = []

    def _unpark(self) -> list[pa.Table]:
        tables = []
        for path in self.parked:
            with pa.OSFile(str(path), "rb") as source:
                tables.append(pa.ipc.open_file(source).read_all())
            path.unlink()
        self.parked = []
        return tables

    def close(self) -> None:
        self.pending = self._unpark() + self.pending
        if self.pending or self.rows == 0:
            self.writer.write_table(pa.concat_tables(self.pending) if self.pending else self.schema.empty_table(),
                                    row_group_size=ROW_GROUP)
        self.pending = []  # a file is closed while others stay open: hold none of its rows
        self.writer.close()


class DateFiles:
    """One labels file per UTC date under ``root``, fed in date order.

    Without ``parked`` (one pass) a date's file is closed when the next date starts. With it (a
    run in pieces) every date's file stays open until :meth:`close`, so each piece appends its
    rows of a date after the earlier pieces' rows of it, and the files are the pieces' rows in
    piece order, cut into the same row groups as one pass: the same bytes, written as the pieces
    go, with no scratch copy of the labels and no join at the end. Between pieces a date's
    unwritten remainder (less than a row group) waits in a file in ``parked``, not in memory.
    """

    name = "part-0.parquet"

    def __init__(self, root: Path, parked: Path | None = None, compression: str = "lz4"):
        self.root, self.parked, self.compression = root, parked, compression
        self.files: dict[str, RowGroupWriter] = {}
        self.current: str | None = None
        self.pieces = 0
        root.mkdir(parents=True, exist_ok=True)
        if parked is not None:
            parked.mkdir(parents=True, exist_ok=True)

    def add(self, date: str, table: pa.Table) -> None:
        if date != self.current:
            self._leave()
            if date not in self.files:
                (self.root / f"date={date}").mkdir()
                self.files[date] = RowGroupWriter(self.root / f"date={date}" / self.name, LABELS_SCHEMA,
                                                  self.compression)
            self.current = date
        self.files[date].add(table)

    def _leave(self) -> None:
        """Done with the current date for now: closed (one pass) or its remainder parked (pieces)."""
        if self.current is None:
            return
        out = self.files[self.current]
        if self.parked is None:
            out.close()
            del self.files[self.current]
        else:
            out.park(self.parked / f"{self.current}.{self.pieces:06d}.arrow")
        self.current = None

    def end_piece(self) -> None:
        self._leave()
        self.pieces += 1

    def close(self) -> None:
        """Write every open file's rest and close it, one file a thread on JOIN_THREADS threads
        (when dates hold less than a row group, the whole run's labels are encoded here)."""
        self._leave()
        files, self.files = list(self.files.values()), {}
        with ThreadPoolExecutor(max_workers=JOIN_THREADS) as pool:
            list(pool.map(RowGroupWriter.close, files))


def allow_open_files(dates: int, rows: int) -> None:
    """Let this process keep a labels file open per date (a run in pieces does): the soft limit on
    open files is raised toward the hard one; past the hard one, a clear error."""
    try:
        import resource
    except ImportError:  # not a POSIX system: nothing to raise
        return
    need = dates + 256  # the engine's own files beside them
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft == resource.RLIM_INFINITY or soft >= need:
        return
    if hard != resource.RLIM_INFINITY and hard < need:
        raise EngineError(
            f"a run in pieces keeps one labels file open per date, and these {rows:,} interactions span "
            f"{dates:,} dates while this process may open at most {hard:,} files: raise the open-file limit "
            f"(ulimit -n {need}) or set [engine] bucket_rows above {rows:,} to label in one pass")
    resource.setrlimit(resource.RLIMIT_NOFILE, (need if hard == resource.RLIM_INFINITY else hard, hard))


def join_all(joins: list[tuple[list[Path], Path, pa.Schema]], compression: str = "lz4") -> list[int]:
    """``join_pieces(files, dest, schema)`` for each of ``joins``, one output file a thread on
    JOIN_THREADS threads (Arrow encodes a file on one thread, without the GIL: put the largest
    first). Returns the rows of each, in order."""
    with ThreadPoolExecutor(max_workers=JOIN_THREADS) as pool:
        return list(pool.map(lambda job: join_pieces(*job, compression), joins))


def join_pieces(files: list[Path], dest: Path, schema: pa.Schema, compression: str = "lz4") -> int:
    """Concatenate Parquet files into ``dest`` in ROW_GROUP-row groups, streaming. Returns the rows."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    out = RowGroupWriter(dest, schema, compression)
    for f in files:
        pf = pq.ParquetFile(f)
        for i in range(pf.num_row_groups):
            out.add(pf.read_row_group(i))
    out.close()
    return out.rows


# the columns a labels content hash covers (the versions are hashed beside them)
CONTENT_COLUMNS = ("user_id", "item_id", "ts_us", "event_id", "level", "topic_id", "label", "engaged",
                  "discovery", "reward_multiplier", "shaped_reward", "history_len", "known_topics")


def output_compression(engine) -> str:
    """The Parquet codec of ``engine``'s outputs (EngineConfig.output_compression)."""
    return engine.config.output_compression


def finish_labels(t: pa.Table, tax_version: str, labels_version: str) -> pa.Table:
    """Label rows from the engine as the labels table: with both versions, in its columns and types."""
    n = t.num_rows
    t = t.append_column("taxonomy_version", pa.array([tax_version] * n, pa.string()))
    t = t.append_column("labels_version", pa.array([labels_version] * n, pa.string()))
    return t.select(list(LABELS_COLUMNS)).cast(LABELS_SCHEMA)


def finish_footprints(t: pa.Table) -> pa.Table:
    """Footprint rows from the engine as the footprints table, in its columns and types."""
    since = pc.cast(t.column("known_since_us"), pa.timestamp("us", tz="UTC"))
    t = t.drop_columns(["known_since_us"]).append_column("known_since", since)
    return t.select([*FOOTPRINTS_COLUMNS, "history_len", "recent_us"]).cast(FOOTPRINTS_SCHEMA)


def write_by_date(run, root: Path, files: DateFiles | None = None) -> int:
    """Stream the labels of ``run`` (a :class:`~labeler.labels.plan.LabelRun`), sorted by (date,
    user, ts, ...), into one Parquet file per UTC date.

    Row groups have a fixed size whatever the engine's batch sizes, so the bytes are repeatable.
    ``files``: a run in pieces' open date files (this piece's rows are appended to them).
    """
    t = run.labels.mutate(date=run.labels.ts.date().cast("string"))
    t = t.order_by([t.date] + [ibis.asc(t[k], nulls_first=False) for k in SORT_KEYS])
    out = files or DateFiles(root, compression=output_compression(run.engine))
    total = 0
    for batch in run.engine.to_batches(t):
        dates = batch.column(batch.schema.get_field_index("date"))
        for date in pc.unique(dates).to_pylist():
            part = pa.Table.from_batches([batch.filter(pc.equal(dates, date))]).drop_columns(
                ["date", "ts_us"])
            out.add(date, finish_labels(part, run.taxonomy_version, run.labels_version))
            total += part.num_rows
    if files is None:
        out.close()
    else:
        out.end_piece()
    return total
