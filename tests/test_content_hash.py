"""The canonical content hash of labels rows (engines.content_sums): each row rendered as text,
hashed with MD5, the two 64-bit halves of the digest summed. The SQL that computes it may change
for speed; the value may not. These tests hold it to an independent rendering hashed by Python's
hashlib, and to the MD5 test suite of RFC 1321 (appendix A.5)."""
from __future__ import annotations

import hashlib
import math

import pyarrow as pa

from labeler.config import EngineConfig
from labeler.engines import make_engine


def reference_sums(rows: list[tuple]) -> tuple[int, int, int]:
    """The same sums from plain Python: integers in decimal, floats with 9 decimals, booleans 0/1,
    null as \\N, fields joined by chr(31); each digest's halves read little-endian (as DuckDB's
    md5_number_upper / md5_number_lower read bytes 0-7 and 8-15)."""
    def text(v) -> str:
        if v is None:
            return "\\N"
        if isinstance(v, bool):
            return str(int(v))
        if isinstance(v, float):
            return f"{v:.9f}"
        return str(v)
    hi = lo = 0
    for row in rows:
        d = hashlib.md5(chr(31).join(text(v) for v in row).encode()).digest()
        hi += int.from_bytes(d[:8], "little")
        lo += int.from_bytes(d[8:], "little")
    return len(rows), hi, lo


def test_the_md5_of_abc_from_rfc_1321():
    """One row of one text column "abc": the sums are the halves of RFC 1321's digest
    900150983cd24fb0d6963f7d28e17f72 (its test suite, appendix A.5)."""
    eng = make_engine(EngineConfig())
    n, hi, lo = eng.content_sums(eng.table(pa.table({"s": ["abc"]})), ["s"])
    digest = bytes.fromhex("900150983cd24fb0d6963f7d28e17f72")
    assert (n, hi, lo) == (1, int.from_bytes(digest[:8], "little"), int.from_bytes(digest[8:], "little"))


def test_duckdb_sums_equal_python_hashlib_over_the_canonical_text():
    """Rows with every column type the labels carry (text, integers, booleans, floats, nulls in
    each) give the same sums on DuckDB as the reference rendering hashed by hashlib."""
    rows = [("u1", 7, True, 1.5, -3), ("u2", None, False, 0.1 + 0.2, 0), (None, -1, None, None, None),
            ("ü ✓", 2 ** 40, True, math.pi, 12)]
    table = pa.table({c: list(v) for c, v in zip("sibfk", zip(*rows))},
                     schema=pa.schema([("s", pa.string()), ("i", pa.int64()), ("b", pa.bool_()),
                                       ("f", pa.float64()), ("k", pa.int32())]))
    eng = make_engine(EngineConfig())
    assert eng.content_sums(eng.table(table), list("sibfk")) == reference_sums(rows)
