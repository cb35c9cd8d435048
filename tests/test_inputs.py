"""Input contracts: every bad input gives exit code 2 and a message naming the column."""
from __future__ import annotations

import re

import pandas as pd
import pytest

from labeler.config import InputConfig
from labeler.errors import InputError
from labeler.tables import normalize_interactions, normalize_items

BAD_INTERACTIONS = [
    ("misspelled_column.csv", r"'user_id' \(did you mean 'usr_id'\?\)"),
    ("null_user.csv", r"column 'user_id': 1 null id"),
    ("unparsable_ts.csv", r"column 'ts': 1 unparsable timestamp.*yesterday afternoon"),
    ("naive_ts.csv", r"column 'ts': naive timestamps.*input.timezone"),
    ("epoch_no_unit.csv", r"column 'ts': integer epoch timestamps need an explicit unit"),
    ("nan_engagement.csv", r"column 'engagement': 1 null, NaN, infinite"),
    ("inf_engagement.csv", r"column 'engagement': 1 null, NaN, infinite"),
    ("empty.csv", r"no rows"),
]


@pytest.mark.parametrize("name,message", BAD_INTERACTIONS)
def test_bad_interactions_exit_2_naming_the_column(cli, fixtures, tmp_path, name, message):
    """Each broken interactions file stops `labeler label` with exit 2 and names file and column."""
    code, _, err = cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax",
                       "--from-categories", "category", "-q")
    assert code == 0, err
    code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", fixtures / "bad" / name,
                       "--out", tmp_path / "out", "-q")
    assert code == 2
    assert name in err
    assert re.search(message, err), err


def test_duplicate_item_ids_exit_2(cli, fixtures, tmp_path):
    """An items snapshot with a repeated item id is rejected, naming item_id and the rows."""
    code, _, err = cli("taxonomy", "build", "--items", fixtures / "bad" / "duplicate_items.csv",
                       "--out", tmp_path / "tax", "--embedder", "hashing", "-q")
    assert code == 2
    assert "column 'item_id': 1 duplicate item id" in err and "k1" in err


@pytest.mark.parametrize("name,message", [("unknown_key.toml", r"unknown key 'labels.min_suport'"),
                                          ("wrong_type.toml", r"'labels.min_support'.*'two'")])
def test_bad_config_exit_2(cli, fixtures, tmp_path, name, message):
    """Unknown config keys and wrong types stop the run with exit 2 and name the key."""
    code, _, err = cli("label", "--taxonomy", tmp_path, "--interactions", fixtures / "interactions.csv",
                       "--out", tmp_path / "o", "--config", fixtures / "bad" / name)
    assert code == 2
    assert re.search(message, err), err


def test_naive_timestamps_accepted_with_configured_timezone():
    """A configured timezone localises naive timestamps, then converts them to UTC."""
    df = pd.DataFrame({"user_id": ["a"], "item_id": ["x"], "ts": ["2026-03-02 09:00:00"]})
    out, _ = normalize_interactions(df, InputConfig(timezone="Europe/Lisbon"))
    assert str(out["ts"].iloc[0]) == "2026-03-02 09:00:00+00:00"
    out, _ = normalize_interactions(df, InputConfig(timezone="America/New_York"))
    assert str(out["ts"].iloc[0]) == "2026-03-02 14:00:00+00:00"


def test_timestamps_truncated_to_microseconds():
    """Digits finer than a microsecond are truncated, so every engine sees the same ties."""
    df = pd.DataFrame({"user_id": ["a", "a"], "item_id": ["x", "y"],
                       "ts": ["2026-03-02T09:00:00.1234567Z", "2026-03-02T09:00:00.1234561Z"]})
    out, _ = normalize_interactions(df)
    assert out["ts"].iloc[0] == out["ts"].iloc[1]
    assert out["ts"].iloc[0].microsecond == 123456


@pytest.mark.parametrize("unit,value", [("s", 1772442000), ("ms", 1772442000000), ("us", 1772442000000000),
                                        ("ns", 1772442000000000999)])
def test_epochs_with_explicit_unit(unit, value):
    """Integer epochs are read in the configured unit."""
    df = pd.DataFrame({"user_id": ["a"], "item_id": ["x"], "ts": [value]})
    out, _ = normalize_interactions(df, InputConfig(epoch_unit=unit))
    assert out["ts"].iloc[0] == pd.Timestamp("2026-03-02T09:00:00Z")


def test_integer_ids_cast_and_said_so():
    """Integer ids become strings and the intake report says so."""
    df = pd.DataFrame({"user_id": [1, 2], "item_id": [10, 11], "ts": ["2026-03-02T09:00:00Z"] * 2})
    out, intake = normalize_interactions(df)
    assert out["user_id"].tolist() == ["1", "2"]
    assert any("user_id" in n and "cast to strings" in n for n in intake.notes)


def test_offsets_other_than_utc_are_converted():
    """Mixed offsets are all converted to UTC."""
    df = pd.DataFrame({"user_id": ["a", "a"], "item_id": ["x", "y"],
                       "ts": ["2026-03-02T10:00:00+01:00", "2026-03-02T09:00:00Z"]})
    out, _ = normalize_interactions(df)
    assert out["ts"].iloc[0] == out["ts"].iloc[1]


def test_items_without_any_text_column_rejected():
    """An items table with none of the text columns is rejected with the columns present."""
    with pytest.raises(InputError, match=r"none of the text columns.*Columns present: item_id, name"):
        normalize_items(pd.DataFrame({"item_id": ["a"], "name": ["x"]}))


def test_non_utf8_csv_rejected(tmp_path):
    """A CSV file that is not UTF-8 gives a clear error, not a decoding traceback."""
    from labeler.tables import read_table
    p = tmp_path / "latin1.csv"
    p.write_bytes("item_id,title\nk1,Tricot d\xe9butant\n".encode("latin-1"))
    with pytest.raises(InputError, match="not valid UTF-8"):
        read_table(p)


PARQUET_CASES = {
    "empty_user": (lambda d: d.assign(user_id=["u", ""]), "column 'user_id': 1 null or empty id"),
    "blank_user": (lambda d: d.assign(user_id=["u", "  "]), "column 'user_id': 1 null or empty id"),
    "null_item": (lambda d: d.assign(item_id=["a", None]), "column 'item_id': 1 null or empty id"),
    "nan_engagement": (lambda d: d.assign(engagement=[1.0, float("nan")]), "column 'engagement': 1 null, NaN"),
    "inf_engagement": (lambda d: d.assign(engagement=[1.0, float("inf")]), "column 'engagement': 1 null, NaN"),
}


@pytest.mark.parametrize("name", list(PARQUET_CASES))
def test_lazy_parquet_path_checks_the_same_contract(tmp_path, name):
    """A Parquet file read lazily (native types) is checked like an in-memory table, statistics or not,
    and its error says what to do, as the in-memory path's does."""
    from labelcases import taxonomy
    from labeler import label_interactions
    tax = taxonomy({"a": [("x", 1.0)]})
    good = pd.DataFrame({"user_id": ["u", "v"], "item_id": ["a", "a"], "engagement": [1.0, 2.0],
                         "ts": pd.to_datetime(["2026-03-02T00:00:00Z"] * 2).astype("datetime64[us, UTC]")})
    change, message = PARQUET_CASES[name]
    for stats in (True, False):
        p = tmp_path / f"{name}-{stats}.parquet"
        change(good).to_parquet(p, write_statistics=stats)
        with pytest.raises(InputError, match=re.escape(message)) as err:
            label_interactions(p, tax)
        assert err.value.hint
    good.to_parquet(tmp_path / "good.parquet")
    assert len(label_interactions(tmp_path / "good.parquet", tax)) == 2


_TS = ["2026-03-01T00:00:00Z"] * 2
BAD_FRAMES = {  # name: (interactions, extra flags, message)
    "epoch_ms_read_as_s": (dict(ts=[1_700_000_000_000, 1_700_000_100_000]), ["--epoch-unit", "s"],
                           r"column 'ts': 2 epoch value\(s\) read as 's' fall outside 1970-2100"),
    "float_epoch_with_nan": (dict(ts=[1.7e9, float("nan")]), ["--epoch-unit", "s"], r"column 'ts': null or non-finite"),
    "naive_time_in_dst_gap": (dict(ts=["2026-03-29T01:30:00", "2026-03-29T05:00:00"]), ["--timezone", "Europe/Lisbon"],
                              r"column 'ts': 1 naive time\(s\) that do not exist, or exist twice"),
    "naive_time_in_dst_overlap": (dict(ts=["2026-10-25T01:30:00", "2026-10-25T05:00:00"]),
                                  ["--timezone", "Europe/Lisbon"], r"column 'ts': 1 naive time\(s\)"),
    "boolean_engagement": (dict(ts=_TS, engagement=[True, False]), [], r"column 'engagement': engagement holds booleans"),
    "engagement_overflowing": (dict(ts=_TS, engagement=[1e308, 1.0]), [], r"column 'engagement': 1 engagement value"),
    "list_ids": (dict(ts=_TS, user_id=[[1], [2]]), [], r"column 'user_id': holds list"),
    "binary_ids": (dict(ts=_TS, user_id=[b"u1", b"u2"]), [], r"column 'user_id': holds binary"),
    "struct_ids": (dict(ts=_TS, user_id=[{"a": 1}, {"a": 2}]), [], r"column 'user_id': holds struct"),
}


@pytest.mark.parametrize("name", sorted(BAD_FRAMES))
def test_bad_parquet_inputs_exit_2_naming_the_column(cli, fixtures, tmp_path, name):
    """Epochs off by 1000x, NaN epochs, naive times in a DST gap or overlap, boolean or overflowing
    engagement, and ids that are lists, bytes or structs: exit 2, file and column named, no traceback."""
    columns, extra, message = BAD_FRAMES[name]
    frame = pd.DataFrame({"user_id": ["u1", "u2"], "item_id": ["a1", "a2"], **columns})
    frame.to_parquet(tmp_path / f"{name}.parquet")
    cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax", "--from-categories",
        "category", "-q")
    code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", tmp_path / f"{name}.parquet",
                       "--out", tmp_path / "out", "-q", *extra)
    assert code == 2 and f"{name}.parquet" in err and "Traceback" not in err, err
    assert re.search(message, err), err


@pytest.mark.parametrize("kind", ["csv", "parquet"])
def test_a_header_naming_a_column_twice_exits_2(cli, fixtures, tmp_path, kind):
    """A CSV or Parquet header with 'ts' twice is refused, naming the column (CSV readers would
    otherwise rename the second one and take the first silently)."""
    import pyarrow as pa
    import pyarrow.parquet as pq
    path = tmp_path / f"dup.{kind}"
    if kind == "csv":
        path.write_text("user_id,item_id,ts,ts\nu1,a1,2026-03-01T00:00:00Z,2026-03-02T00:00:00Z\n")
    else:
        pq.write_table(pa.Table.from_arrays([pa.array(["u1"]), pa.array(["a1"]), pa.array(["2026-03-01T00:00:00Z"]),
                                             pa.array(["x"])], names=["user_id", "item_id", "ts", "ts"]), path)
    cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax", "--from-categories",
        "category", "-q")
    code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", path, "--out", tmp_path / "o", "-q")
    assert code == 2 and "column 'ts': the header names column 'ts' more than once" in err, err


TYPED_BAD = {  # a frame already typed as validation makes it, broken in one value: name -> (change, message)
    "null_user": (lambda d: d.assign(user_id=pd.Series(["u", None], dtype="str")), "column 'user_id': 1 null id"),
    "blank_item": (lambda d: d.assign(item_id=pd.Series(["a", " \t"], dtype="str")), "column 'item_id': 1 empty id"),
    "empty_user": (lambda d: d.assign(user_id=pd.Series(["u", ""], dtype="str")), "column 'user_id': 1 empty id"),
    "wide_space_user": (lambda d: d.assign(user_id=pd.Series(["u", "\u3000"], dtype="str")),
                        "column 'user_id': 1 empty id"),
    "null_ts": (lambda d: d.assign(ts=d.ts.where([True, False])), "column 'ts': 1 null timestamp"),
    "nan_engagement": (lambda d: d.assign(engagement=[1.0, float("nan")]), "column 'engagement': 1 null, NaN"),
    "huge_engagement": (lambda d: d.assign(engagement=[1.0, -1e301]), "column 'engagement': 1 engagement value"),
}


def test_typed_frame_with_an_id_starting_with_whitespace_takes_the_general_path():
    """The one-pass check looks only at an id's first character: an id that starts with whitespace
    but is not blank is left to the general path, whose result it then gets."""
    from labeler.engines import make_engine
    from labeler.labels.intake import _COLUMNS, _arrow_schema, _clean_typed, interactions_table, rows_hash
    import pyarrow as pa
    frame = pd.DataFrame({"user_id": pd.Series(["u", " v"], dtype="str"), "item_id": pd.Series(["a", "b"], dtype="str"),
                          "engagement": [1.0, 2.0], "ts": pd.to_datetime(_TS).astype("datetime64[us, UTC]")})
    assert _clean_typed(frame, "frame") is None
    _, intake = interactions_table(make_engine(), frame, source="frame")
    general, _ = normalize_interactions(frame)
    want = pa.Table.from_pandas(general[list(_COLUMNS)], schema=_arrow_schema(), preserve_index=False)
    assert intake.rows_out == 2 and intake.content_hash == rows_hash(want)


@pytest.mark.parametrize("name", sorted(TYPED_BAD))
def test_typed_frames_are_checked_in_one_pass_to_the_same_result(name):
    """A frame whose columns are typed already (text ids, UTC microsecond times, float engagement)
    is proven clean in one pass: the same table and content hash as the general path; one bad
    value sends it to the general path, which names the column."""
    from labeler.engines import make_engine
    from labeler.labels.intake import _COLUMNS, _arrow_schema, _clean_typed, interactions_table, rows_hash
    import pyarrow as pa
    good = pd.DataFrame({"user_id": pd.Series(["u", "v"], dtype="str"), "item_id": pd.Series(["a", "b"], dtype="str"),
                         "engagement": [1.0, -0.0], "event_id": pd.Series(["e1", None], dtype="str"),
                         "ts": pd.to_datetime(_TS).astype("datetime64[us, UTC]")})
    arrow, intake = _clean_typed(good, "frame")
    general, gen_intake = normalize_interactions(good)
    want = pa.Table.from_pandas(general[list(_COLUMNS)], schema=_arrow_schema(), preserve_index=False)
    assert arrow.equals(want)
    assert intake.content_hash == rows_hash(want) and intake.rows_out == gen_intake.rows_out == 2
    change, message = TYPED_BAD[name]
    bad = change(good)
    assert _clean_typed(bad, "frame") is None
    with pytest.raises(InputError, match=re.escape(message)):
        interactions_table(make_engine(), bad, source="frame")
