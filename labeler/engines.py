"""Where the relational label expressions run. Only this module knows which engine is used.

The label rules (``labels/rules.py``) are Ibis expressions; an :class:`Engine` supplies a connection,
turns inputs into tables and writes results. DuckDB is the embedded default (bounded memory,
spilling to a temp folder); Spark comes with the ``spark`` extra.
"""
from __future__ import annotations

import hashlib
import logging
import os
import sys
import tempfile
import uuid
from pathlib import Path

import ibis
import ibis.expr.datatypes as dt
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .config import EngineConfig
from .errors import ConfigError, EngineError

log = logging.getLogger(__name__)

EPOCH = ibis.timestamp("1970-01-01T00:00:00+00:00")
UTC_US = dt.Timestamp(timezone="UTC", scale=6)


@ibis.udf.scalar.builtin(name="epoch_us")
def _duckdb_epoch_us(ts: UTC_US) -> dt.int64:
    """DuckDB's microseconds since the epoch."""


@ibis.udf.scalar.builtin(name="unix_micros")
def _spark_unix_micros(ts: UTC_US) -> dt.int64:
    """Spark's microseconds since the epoch."""


class Engine:
    """A backend that runs Ibis expressions: tables in, tables out."""

    name = "abstract"

    def __init__(self, config: EngineConfig):
        self.config = config
        self.con = self._connect()

    def _connect(self):  # pragma: no cover - abstract
        raise NotImplementedError

    def table(self, data: pd.DataFrame | pa.Table, prefix: str = "t"):
        """Register in-memory data as a table expression."""
        name = f"_{prefix}_{uuid.uuid4().hex[:8]}"
        return self.con.create_table(name, data, temp=True)

    def read_parquet(self, path):
        """A lazy table over a Parquet file, a folder of them (read recursively) or a list of files."""
        if isinstance(path, (list, tuple)):
            return self.con.read_parquet([str(p) for p in path])
        if Path(path).is_dir():
            return self.con.read_parquet(str(Path(path) / "**" / "*.parquet"))
        return self.con.read_parquet(str(path))

    def epoch_us(self, ts):
        """Microseconds since the epoch of a UTC timestamp column (``timestamp('UTC', 6)``)."""
        return ts.delta(EPOCH, unit="microsecond")

    def to_arrow(self, expr) -> pa.Table:
        return self.con.to_pyarrow(expr)

    def to_pandas(self, expr) -> pd.DataFrame:
        return self.to_arrow(expr).to_pandas()

    def to_batches(self, expr, rows: int = 65_536):
        return self.con.to_pyarrow_batches(expr, chunk_size=rows)

    def sorted_batches(self, expr, keys: list[str], rows: int = 65_536):
        """The rows of ``expr`` ordered by ``keys`` (nulls last), as Arrow record batches that
        arrive one at a time: memory follows a batch, not the table."""
        return self.to_batches(expr.order_by([ibis.asc(expr[k], nulls_first=False) for k in keys]), rows)

    def write_groups(self, expr, key: str, write, order: tuple[str, ...] = ()):
        """For each distinct value of the string column ``key``: ``write(value, rows)`` with all of that
        value's rows (an Arrow table, ``key`` dropped, ordered by the columns ``order``, ascending,
        nulls last), once; yields (value, what it returned) as each group is done. Here the rows
        stream through this process in key order; a distributed engine calls ``write`` on its
        workers (so it must be picklable, and its files reachable)."""
        keys = [key, *order]
        yield from _groups(self.to_batches(expr.order_by([ibis.asc(expr[k], nulls_first=False) for k in keys])),
                           key, write)


# sets of rows written by one pass of DuckDBEngine.scatter (its partitioned write keeps each open)
SCATTER_SETS = 48


class DuckDBEngine(Engine):
    name = "duckdb"

    def _connect(self):
        temp = self.config.temp_dir or os.path.join(tempfile.gettempdir(), "labeler-duckdb")
        Path(temp).mkdir(parents=True, exist_ok=True)
        self.temp_dir = temp
        kwargs = {"memory_limit": self.config.memory_limit, "temp_directory": temp,
                  "preserve_insertion_order": False}
        if self.config.threads:
            kwargs["threads"] = self.config.threads
        con = ibis.duckdb.connect(**kwargs)
        quiet(con.con)
        # return the memory of finished queries and dropped tables to the system as it goes (the
        # allocator's background threads), so that the process's RSS follows what DuckDB holds:
        # measured on the daily benchmark's run, peak RSS 2.14 -> 1.57 GiB, time unchanged
        con.con.execute("SET allocator_background_threads = true")
        return con

    def raw_sql(self, sql: str):
        return self.con.con.execute(sql)

    def scatter(self, expr, column: str, bounds: list, folder: Path) -> list[list[str]]:
        """Write the rows of ``expr`` into Parquet files, one set per range of ``column`` cut at the
        ascending ``bounds`` (set k: bounds[k-1] <= value < bounds[k]), in one pass over the input;
        returns each set's files. Pieces then read only their own rows, not the whole input again.

        At most SCATTER_SETS sets are written by one pass (a pass over the ranges of the next sets
        follows): with hundreds of sets at once DuckDB spilled about as much as the input (31 GB
        from a 1B-row log in two minutes) before writing any."""
        sets = len(bounds) + 1
        folder.mkdir(parents=True, exist_ok=True)
        target = str(folder).replace("'", "''")
        for first in range(0, sets, SCATTER_SETS):
            last = min(first + SCATTER_SETS, sets)  # the sets [first, last)
            part = expr
            if first:
                part = part.filter(part[column] >= bounds[first - 1])
            if last < sets:
                part = part.filter(part[column] < bounds[last - 1])
            col = part[column]
            piece = ibis.cases(*[(col < bounds[k], k) for k in range(first, last - 1)], else_=last - 1) \
                if last - first > 1 else ibis.literal(first)
            sql = self.con.compile(part.mutate(_piece=piece.cast("int32")))
            self.raw_sql(f"COPY ({sql}) TO '{target}' (FORMAT parquet, PARTITION_BY (_piece), OVERWRITE_OR_IGNORE)")
        return [sorted(str(f) for f in (folder / f"_piece={k}").glob("*.parquet")) for k in range(sets)]

    def epoch_us(self, ts):
        # the generic date difference costs about a tenth of a label run here
        return _duckdb_epoch_us(ts)

    def table(self, data, prefix: str = "t"):
        """Register in-memory data (a DataFrame, an Arrow table, or an Arrow dataset of files, read as
        they are scanned) as a view over its Arrow form: read where it is, not copied into the
        database first (a copy of a 5M-row log cost about 0.3 s and its memory again)."""
        name = f"_{prefix}_{uuid.uuid4().hex[:8]}"
        arrow = data if not isinstance(data, pd.DataFrame) else pa.Table.from_pandas(data, preserve_index=False)
        self.con.con.register(name, arrow)  # the connection holds the table while the view exists
        return self.con.table(name)

    def query_each(self, build):
        """A function that runs the query ``build(table)`` over an Arrow table and returns its result
        as Arrow: the query is compiled once, for the first table's schema, and runs on a cursor of
        its own, so it can run while a streamed result (``to_batches``) is open on the connection."""
        sql, cur = None, self.con.con.cursor()

        def run(data: pa.Table) -> pa.Table:
            nonlocal sql
            if sql is None:
                sql = ibis.to_sql(build(ibis.table(ibis.Schema.from_pyarrow(data.schema), name="_each")),
                                  dialect="duckdb")
            # in batches of 64k rows, which the query reads on every thread (one batch is one task):
            # 0.52 s for 5M scanned rows against 0.74 s as whole chunks
            cur.register("_each", pa.Table.from_batches(data.to_batches(max_chunksize=1 << 16), data.schema))
            try:
                return cur.sql(sql).to_arrow_table()
            finally:
                cur.unregister("_each")
        return run

    def drop_table(self, table) -> None:
        """Forget ``table``, made by ``table()`` (its Arrow data is no longer held) or ``read_parquet``."""
        name = table.get_name()
        self.con.con.unregister(name)  # a registered Arrow table (a no-op for a plain view)
        self.con.drop_view(name, force=True)  # a view over files (a no-op once unregistered)

    def scratch_path(self, prefix: str, suffix: str) -> Path:
        """A new file name in the engine's temp_dir (the caller removes the file)."""
        return Path(self.temp_dir) / f"{prefix}-{uuid.uuid4().hex}{suffix}"

    def to_batches(self, expr, rows: int = 65_536):
        """Stream the result as Arrow record batches (ibis 12's streaming predates duckdb 2.0)."""
        sql = self.con.compile(expr)
        return self.con.con.sql(sql).to_arrow_reader(rows)

    def content_sums(self, expr, columns) -> tuple[int, int, int]:
        """(rows, sum of upper and of lower MD5 halves) of ``expr`` over ``columns``: additive over
        disjoint parts of a table, so pieces can be hashed apart and combined (see content_hash).

        Each row is rendered canonically (integers in decimal, floats with 9 decimals, booleans as
        0/1, null as \\N), hashed with MD5 once, and the two 64-bit halves are summed (upper: the
        low 64 bits of DuckDB's ``md5_number``, as ``md5_number_upper`` reads them; lower: the high).
        """
        view = f"_hash_{uuid.uuid4().hex[:8]}"
        self.con.create_view(view, expr.select(*columns), overwrite=True)
        row = canonical_row(expr.select(*columns).schema(), "duckdb")
        n, hi, lo = self.raw_sql(
            f"SELECT count(*), sum((h & {(1 << 64) - 1}::UHUGEINT)::HUGEINT), sum((h >> 64)::HUGEINT) "
            f"FROM (SELECT md5_number({row}) AS h FROM {view})").fetchone()
        self.con.drop_view(view)
        return int(n), int(hi or 0), int(lo or 0)

    def content_hash(self, expr, columns, extra: str = "") -> str:
        """Order-independent hash of the rows of ``expr`` over ``columns``, alike on every engine."""
        return sums_digest(self.content_sums(expr, columns), extra)


class SparkEngine(Engine):
    """The same Ibis expressions on Spark (Ibis's PySpark backend), local or on a cluster.

    An existing SparkSession (e.g. under spark-submit) is reused; otherwise one is started with
    the settings of :class:`EngineConfig`. The session time zone is UTC, so timestamps mean the
    same thing as on DuckDB.
    """

    name = "spark"

    def _connect(self):
        try:
            from pyspark.sql import SparkSession
        except ImportError:
            from .errors import ConfigError
            raise ConfigError("engine 'spark' needs PySpark: install the extra with "
                              "`pip install -e '.[spark]'` (and Java 17).") from None
        cfg = self.config
        active = SparkSession.getActiveSession()
        if active is not None:
            session = active
        else:
            conf = {"spark.sql.session.timeZone": "UTC", "spark.ui.showConsoleProgress": "false",
                    "spark.sql.shuffle.partitions": str(cfg.shuffle_partitions),
                    "spark.sql.execution.arrow.pyspark.enabled": "true",
                    "spark.sql.adaptive.enabled": "true", "spark.sql.adaptive.skewJoin.enabled": "true",
                    # item topics (one row per item and level) are broadcast to every task when small
                    "spark.sql.autoBroadcastJoinThreshold": str(256 * 2**20),
                    "spark.sql.parquet.outputTimestampType": "TIMESTAMP_MICROS"}
            if cfg.executor_memory:
                conf["spark.executor.memory"] = cfg.executor_memory
            if cfg.driver_memory:
                conf["spark.driver.memory"] = cfg.driver_memory
            if cfg.temp_dir:
                conf["spark.local.dir"] = cfg.temp_dir
            conf.update(cfg.spark_conf)
            master = cfg.spark_master or os.environ.get("SPARK_MASTER") or "local[*]"
            if master.startswith("local"):  # the workers run this interpreter, which has labeler installed
                os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
            builder = SparkSession.builder.appName("labeler").master(master)
            for k, v in conf.items():
                builder = builder.config(k, v)
            session = builder.getOrCreate()
            session.sparkContext.setLogLevel("ERROR")
        session.conf.set("spark.sql.session.timeZone", "UTC")
        self.session = session
        return ibis.pyspark.connect(session)

    def table(self, data: pd.DataFrame | pa.Table, prefix: str = "t"):
        name = f"_{prefix}_{uuid.uuid4().hex[:8]}"
        arrow = data if isinstance(data, pa.Table) else pa.Table.from_pandas(data, preserve_index=False)
        arrow = arrow.replace_schema_metadata(None)
        self.session.createDataFrame(arrow).createOrReplaceTempView(name)
        return self.con.table(name)

    def epoch_us(self, ts):
        return _spark_unix_micros(ts)

    def read_parquet(self, path):
        paths = [str(p) for p in path] if isinstance(path, (list, tuple)) else [str(path)]
        name = f"_pq_{uuid.uuid4().hex[:8]}"
        self.session.read.option("recursiveFileLookup", "true").parquet(*paths).createOrReplaceTempView(name)
        return self.con.table(name)

    def write_partitioned(self, expr, root: Path, sort_keys, schema: pa.Schema) -> int:
        """Write ``expr`` (with a string ``date`` column) as Parquet under ``root/date=.../`` from
        the executors: one task per date, rows sorted by ``sort_keys`` (nulls last), columns cast
        to ``schema``. Returns the row count."""
        from pyspark.sql import functions as F
        sdf = self.session.sql(self.con.compile(expr))
        casts = {f.name: _spark_type(f.type) for f in schema}
        sdf = sdf.select(*[F.col(c).cast(casts[c]).alias(c) if c in casts else F.col(c) for c in sdf.columns])
        order = [F.col("date").asc()] + [F.col(k).asc_nulls_last() for k in sort_keys]
        sdf = sdf.repartition("date").sortWithinPartitions(*order).persist()
        n = sdf.count()
        codec = {"lz4": "lz4_raw", "zstd": "zstd"}[self.config.output_compression]  # Arrow's lz4 is LZ4_RAW
        sdf.select(*schema.names, "date").write.option("compression", codec).partitionBy("date").parquet(str(root))
        sdf.unpersist()
        return n

    def sorted_batches(self, expr, keys: list[str], rows: int = 65_536):
        """Sorted on the executors (a range shuffle), each task writing its range of rows to a
        Parquet file in a scratch folder (``temp_dir``; on a cluster, storage the driver can
        read), then read back here one batch at a time, in range order: nothing is collected."""
        import shutil
        from pyspark.sql import functions as F
        sdf = self.session.sql(self.con.compile(expr))
        order = [F.col(k).asc_nulls_last() for k in keys]
        scratch = Path(self.config.temp_dir or tempfile.gettempdir())
        scratch.mkdir(parents=True, exist_ok=True)
        folder = Path(tempfile.mkdtemp(prefix="labeler-sorted-", dir=scratch))
        try:
            sdf.repartitionByRange(*order).sortWithinPartitions(*order).mapInArrow(
                _RangeWriter(str(folder)), "part int, rows long").collect()
            for path in sorted(folder.glob("part-*.parquet")):
                yield from pq.ParquetFile(path).iter_batches(batch_size=rows)
        finally:
            shutil.rmtree(folder, ignore_errors=True)

    def write_groups(self, expr, key: str, write, order: tuple[str, ...] = ()):
        """One shuffle by ``key``; each executor task calls ``write`` on its groups' rows (sorted by
        ``order`` within) and sends back only what ``write`` returns (pickled): the rows never reach
        the driver."""
        import pickle
        from pyspark.sql import functions as F
        sdf = self.session.sql(self.con.compile(expr))
        sdf = sdf.repartition(F.col(key)).sortWithinPartitions(*[F.col(k).asc_nulls_last() for k in (key, *order)])
        got = sdf.mapInArrow(_GroupWriter(key, write), "value string, result binary").collect()
        for row in sorted(got, key=lambda r: r["value"]):
            yield row["value"], pickle.loads(row["result"])

    def content_sums(self, expr, columns) -> tuple[int, int, int]:
        """The same canonical row sums as DuckDBEngine.content_sums, in Spark SQL."""
        view = f"_hash_{uuid.uuid4().hex[:8]}"
        sub = expr.select(*columns)
        self.session.sql(self.con.compile(sub)).createOrReplaceTempView(view)
        row = canonical_row(sub.schema(), "spark")
        def half(start: int) -> str:  # DuckDB reads each 8-byte half of the digest little-endian
            rev = ", ".join(f"substr(h, {start + 2 * b}, 2)" for b in range(7, -1, -1))
            return f"sum(CAST(conv(concat({rev}), 16, 10) AS DECIMAL(38, 0)))"
        n, hi, lo = self.session.sql(
            f"SELECT count(*), {half(1)}, {half(17)} FROM (SELECT md5({row}) AS h FROM {view})").collect()[0]
        return int(n), int(hi or 0), int(lo or 0)

    def content_hash(self, expr, columns, extra: str = "") -> str:
        """The same canonical row hash as DuckDBEngine.content_hash."""
        return sums_digest(self.content_sums(expr, columns), extra)


def sums_digest(sums: tuple[int, int, int], extra: str = "") -> str:
    """The canonical content hash from (rows, upper sum, lower sum), however the rows were split."""
    n, hi, lo = sums
    return hashlib.sha256(f"{extra}\x00{n}\x00{hi}\x00{lo}".encode()).hexdigest()


_DIALECTS = {  # quoting, float formatting, integer and text types, the null marker
    "duckdb": ('"{}"', "printf('%.9f', CAST({} AS DOUBLE))", "INTEGER", "VARCHAR", "'\\N'"),
    "spark": ("`{}`", "format_string('%.9f', CAST({} AS DOUBLE))", "INT", "STRING", "'\\\\N'"),
}


def canonical_row(schema, dialect: str) -> str:
    """SQL rendering one row of ``schema`` as text, alike on every engine: integers in decimal,
    floats with 9 decimals, booleans as 0/1, null as \\N, fields joined by chr(31). One
    ``concat`` call, not a chain of ``||``: DuckDB renders it about twice as fast."""
    quote, floats, int_type, text_type, null = _DIALECTS[dialect]
    parts = []
    for name, dtype in schema.items():
        col = quote.format(name)
        if dtype.is_floating() or dtype.is_decimal():
            txt = floats.format(col)
        elif dtype.is_boolean():
            txt = f"CAST(CAST({col} AS {int_type}) AS {text_type})"
        else:
            txt = f"CAST({col} AS {text_type})"
        parts.append(f"COALESCE({txt}, {null})")
    return "concat(" + ", chr(31), ".join(parts) + ")"


def quiet(con):
    """A DuckDB connection that never draws its progress bar (on stdout, which belongs to the
    caller: the job's JSON output, a scheduler's log)."""
    con.execute("SET enable_progress_bar = false")
    return con


def _groups(batches, key: str, write):
    """Runs of equal ``key`` in batches ordered by it: (value, write(value, rows)) for each run."""
    pending, current = [], None
    for batch in batches:
        tb = pa.Table.from_batches([batch]) if isinstance(batch, pa.RecordBatch) else batch
        values = tb.column(key)
        distinct = pc.unique(values).to_pylist()
        for value in distinct:
            if value != current and pending:
                yield current, write(current, pa.concat_tables(pending))
                pending = []
            current = value
            rows = tb if len(distinct) == 1 else tb.filter(pc.equal(values, value))
            pending.append(rows.drop_columns([key]))
    if pending:
        yield current, write(current, pa.concat_tables(pending))


class _GroupWriter:
    """The executor side of SparkEngine.write_groups (a picklable callable for mapInArrow)."""

    def __init__(self, key: str, write):
        self.key, self.write = key, write

    def __call__(self, batches):
        import pickle
        for value, result in _groups(batches, self.key, self.write):
            yield pa.RecordBatch.from_pydict({"value": [value], "result": [pickle.dumps(result)]})


class _RangeWriter:
    """The executor side of SparkEngine.sorted_batches: a task's rows, as they come, into one file."""

    def __init__(self, folder: str):
        self.folder = folder

    def __call__(self, batches):
        from pyspark import TaskContext
        part = TaskContext.get().partitionId()
        writer, rows = None, 0
        for batch in batches:
            if batch.num_rows == 0:
                continue
            if writer is None:
                writer = pq.ParquetWriter(os.path.join(self.folder, f"part-{part:06d}.parquet"), batch.schema)
            writer.write_batch(batch)
            rows += batch.num_rows
        if writer is not None:
            writer.close()
        yield pa.RecordBatch.from_pydict({"part": pa.array([part], pa.int32()), "rows": pa.array([rows], pa.int64())})


def _spark_type(t: pa.DataType) -> str:
    if pa.types.is_timestamp(t):
        return "timestamp"
    return {pa.string(): "string", pa.int32(): "int", pa.int64(): "bigint", pa.float64(): "double",
            pa.bool_(): "boolean"}.get(t, "string")


def engine_error(exc: BaseException) -> EngineError | None:
    """A clear EngineError for an engine's own failure, or None if ``exc`` is not one."""
    import duckdb
    if isinstance(exc, duckdb.OutOfMemoryException):
        return EngineError(f"DuckDB ran out of memory ({str(exc).splitlines()[0]}). Raise "
                           "engine.memory_limit, set engine.threads = 1, or point engine.temp_dir at a "
                           "disk with more free space.")
    if isinstance(exc, duckdb.IOException):
        return EngineError(f"DuckDB could not read or write a file ({str(exc).splitlines()[0]}). Check the "
                           "paths, permissions and free disk space (engine.temp_dir).")
    if isinstance(exc, duckdb.Error):
        return EngineError(f"DuckDB failed: {str(exc).splitlines()[0]}")
    return None


def make_engine(config: EngineConfig | str | None = None) -> Engine:
    """The one factory that picks the engine."""
    if config is None or isinstance(config, str):
        config = EngineConfig(engine=config or "duckdb")
    if config.engine == "duckdb":
        return DuckDBEngine(config)
    if config.engine == "spark":
        return SparkEngine(config)
    raise ConfigError(f"unknown engine {config.engine!r}; choose 'duckdb' or 'spark'.")
