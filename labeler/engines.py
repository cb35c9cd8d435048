"""Where the relational label expressions run. Only this module knows which engine is used.

The label rules (``labels.py``) are Ibis expressions; an :class:`Engine` supplies a connection,
turns inputs into tables and writes results. DuckDB is the embedded default (bounded memory,
spilling to a temp folder); Spark comes with the ``spark`` extra.
"""
from __future__ import annotations

import hashlib
import logging
import os
import tempfile
import uuid
from pathlib import Path

import ibis
import pandas as pd
import pyarrow as pa

from .config import EngineConfig
from .errors import ConfigError, EngineError

log = logging.getLogger(__name__)


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
        """A lazy table over one Parquet path (a glob allowed) or a list of paths."""
        if isinstance(path, (list, tuple)):
            return self.con.read_parquet([str(p) for p in path])
        return self.con.read_parquet(str(path))

    def to_arrow(self, expr) -> pa.Table:
        return self.con.to_pyarrow(expr)

    def to_pandas(self, expr) -> pd.DataFrame:
        return self.to_arrow(expr).to_pandas()

    def to_batches(self, expr, rows: int = 65_536):
        return self.con.to_pyarrow_batches(expr, chunk_size=rows)


class DuckDBEngine(Engine):
    name = "duckdb"

    def _connect(self):
        temp = self.config.temp_dir or os.path.join(tempfile.gettempdir(), "labeler-duckdb")
        Path(temp).mkdir(parents=True, exist_ok=True)
        kwargs = {"memory_limit": self.config.memory_limit, "temp_directory": temp,
                  "preserve_insertion_order": False}
        if self.config.threads:
            kwargs["threads"] = self.config.threads
        return ibis.duckdb.connect(**kwargs)

    def raw_sql(self, sql: str):
        return self.con.con.execute(sql)

    def to_batches(self, expr, rows: int = 65_536):
        """Stream the result as Arrow record batches (ibis 12's streaming predates duckdb 2.0)."""
        sql = self.con.compile(expr)
        return self.con.con.sql(sql).to_arrow_reader(rows)

    def content_hash(self, expr, columns, extra: str = "") -> str:
        """Order-independent hash of the rows of ``expr`` over ``columns``.

        Each row is rendered canonically (integers in decimal, floats with 9 decimals, booleans as
        0/1, null as \\N), hashed with MD5, and the two 64-bit halves are summed: the same rows give
        the same hash on any engine that renders them alike.
        """
        view = f"_hash_{uuid.uuid4().hex[:8]}"
        self.con.create_view(view, expr.select(*columns), overwrite=True)
        schema = expr.select(*columns).schema()
        parts = []
        for name, dtype in schema.items():
            col = f'"{name}"'
            if dtype.is_floating():
                txt = f"printf('%.9f', {col})"
            elif dtype.is_boolean():
                txt = f"CAST(CAST({col} AS INTEGER) AS VARCHAR)"
            else:
                txt = f"CAST({col} AS VARCHAR)"
            parts.append(f"COALESCE({txt}, '\\N')")
        row = " || chr(31) || ".join(parts)
        n, hi, lo = self.raw_sql(
            f"SELECT count(*), sum(md5_number_upper(s)::HUGEINT), sum(md5_number_lower(s)::HUGEINT) "
            f"FROM (SELECT {row} AS s FROM {view})").fetchone()
        self.con.drop_view(view)
        digest = hashlib.sha256(f"{extra}\x00{n}\x00{hi or 0}\x00{lo or 0}".encode()).hexdigest()
        return digest


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
        raise ConfigError("engine 'spark' is not available yet in this version; use engine = \"duckdb\".")
    raise ConfigError(f"unknown engine {config.engine!r}; choose 'duckdb' or 'spark'.")
