"""Job outputs: the streaming merge of the previous generation's sorted file with new rows."""
from __future__ import annotations

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import labeler.job.outputs as outputs
import labeler.labels.files as files

SCHEMA = pa.schema([("user_id", pa.string()), ("k", pa.int64())])
KEYS = [("user_id", "ascending", "at_end"), ("k", "ascending", "at_end")]


def assert_merge_is_one_write(tmp, old_t, new_t, drop, aged, expected, group) -> None:
    """Merge ``new_t`` into the file of ``old_t`` (row groups of ``group`` rows) and check the bytes
    equal one write of ``expected``."""
    mp = pytest.MonkeyPatch()
    mp.setattr(outputs, "ROW_GROUP", group)
    mp.setattr(files, "ROW_GROUP", group)
    try:
        pq.write_table(old_t, tmp / "prev.parquet", row_group_size=group)
        n = outputs.write_merged(tmp / "prev.parquet", drop, new_t, aged, old_t.schema, tmp / "out.parquet",
                                 "write_footprints", KEYS)
    finally:
        mp.undo()
    pq.write_table(expected, tmp / "expected.parquet", row_group_size=group,
                   **files.parquet_options(expected.schema))
    assert n == expected.num_rows
    assert (tmp / "out.parquet").read_bytes() == (tmp / "expected.parquet").read_bytes()


def _rows(pairs) -> pa.Table:
    pairs = sorted(pairs)
    return pa.table({"user_id": [u for u, _ in pairs], "k": [k for _, k in pairs]}, schema=SCHEMA)


@settings(max_examples=60, deadline=None)
@given(old=st.dictionaries(st.text("abcé", min_size=1, max_size=4), st.integers(1, 5), max_size=40),
       new=st.dictionaries(st.text("abcé", min_size=1, max_size=4), st.integers(1, 5), max_size=15),
       drop_share=st.integers(0, 3), group=st.integers(1, 9))
def test_streamed_merge_writes_the_bytes_of_one_sorted_write(tmp_path_factory, old, new, drop_share, group):
    """Streaming the previous file row group by row group, dropping the replaced users, ageing the
    rest and merging the new rows by user gives, byte for byte, the file one write_table of the
    sorted whole gives (random users and row-group sizes, non-ASCII ids included)."""
    tmp = tmp_path_factory.mktemp("merge")
    new = {u: n for u, n in new.items() if u not in old or drop_share}  # a user in both is replaced
    drop = [u for i, u in enumerate(sorted(old)) if u in new or (drop_share and i % 4 < drop_share - 1)]
    old_t = _rows((u, k) for u, n in old.items() for k in range(n))
    new_t = _rows((u, 10 + k) for u, n in new.items() for k in range(n))
    aged = lambda t: t.set_column(1, "k", pa.compute.add(t.column("k"), 100))  # noqa: E731
    kept = [(u, k + 100) for u, c in old.items() if u not in drop for k in range(c)]
    expected = _rows(kept + [(u, 10 + k) for u, c in new.items() for k in range(c)])
    assert_merge_is_one_write(tmp, old_t, new_t, pa.array(drop, pa.string()), aged, expected, group)


@settings(max_examples=60, deadline=None)
@given(old=st.dictionaries(st.text("abcé", min_size=1, max_size=3), st.sets(st.integers(0, 9), min_size=1, max_size=6),
                           max_size=30),
       new=st.dictionaries(st.text("abcé", min_size=1, max_size=3), st.sets(st.integers(0, 9), min_size=1, max_size=4),
                           max_size=12),
       group=st.integers(1, 7))
def test_streamed_merge_interleaves_a_users_new_and_kept_rows_by_key(tmp_path_factory, old, new, group):
    """Users with rows in both (a continued user's touched topics and the rest of their earlier
    rows): the merge interleaves them by key and a new row replaces an earlier one of the same
    key, whatever the row groups, even when a user's earlier rows span several of them: the
    bytes of one write_table of the sorted whole."""
    tmp = tmp_path_factory.mktemp("interleave")
    schema = pa.schema([("user_id", pa.string()), ("k", pa.int64()), ("v", pa.int64())])

    def rows(triples):
        triples = sorted(triples)
        return pa.table({"user_id": [u for u, _, _ in triples], "k": [k for _, k, _ in triples],
                         "v": [v for _, _, v in triples]}, schema=schema)
    old_t = rows((u, k, 0) for u, ks in old.items() for k in ks)
    new_t = rows((u, k, 1) for u, ks in new.items() for k in ks)
    aged = lambda t: t.set_column(2, "v", pa.compute.add(t.column("v"), 100))  # noqa: E731
    expected = rows([(u, k, 100) for u, ks in old.items() for k in ks if k not in new.get(u, ())]
                    + [(u, k, 1) for u, ks in new.items() for k in ks])
    assert_merge_is_one_write(tmp, old_t, new_t, None, aged, expected, group)


@settings(max_examples=80, deadline=None)
@given(a=st.sets(st.tuples(st.text("abcé", min_size=1, max_size=3), st.integers(-3, 3)), max_size=30),
       b=st.sets(st.tuples(st.text("abcé", min_size=1, max_size=3), st.integers(-3, 3)), max_size=30),
       descending=st.booleans())
def test_merging_by_integer_ranks_equals_sorting_by_the_columns(a, b, descending):
    """The merge's one-integer sort key (each key column's rank among its distinct values) orders
    rows as sorting by the columns themselves does, byte-wise for text, ascending or descending,
    and keeps the second table's row of a key found in both."""
    keys = [("user_id", "ascending", "at_end"), ("k", "descending" if descending else "ascending", "at_end")]

    def table(pairs, v):
        t = pa.table({"user_id": [u for u, _ in pairs], "k": [k for _, k in pairs], "v": [v] * len(pairs)},
                     schema=pa.schema([("user_id", pa.string()), ("k", pa.int64()), ("v", pa.int64())]))
        return t.take(pa.compute.sort_indices(t, sort_keys=keys))
    ta, tb = table(sorted(a), 0), table(sorted(b), 1)
    want = outputs._merge_sorted_by_columns(pa.concat_tables([ta, tb]), keys) if ta.num_rows and tb.num_rows \
        else (tb if ta.num_rows == 0 else ta)
    assert outputs._merge_sorted(ta, tb, keys).equals(want)
