"""The sort-and-scan label plan (labeler/labels/scan.py): when it is taken, and what it does with duplicates.

Its results are held to the relational windows by the golden cases, the MovieLens oracle and the
carried-state tests (each runs on "duckdb" and "duckdb-windows", see conftest.py) and by the
property test ``test_the_sorted_pass_equals_the_windows``.
"""
from __future__ import annotations

import pandas as pd

from labeler import LabelConfig
from labeler.config import EngineConfig
from labeler.engines import make_engine
from labeler.labels.plan import plan_labels
from labeler.labels.scan import applies, scanned_rows
from labelcases import T0, log, taxonomy

TAX = taxonomy({"k1": [("knit", 1.0)], "k2": [("knit", 1.0)], "b1": [("bonsai", 1.0)]})


def test_the_plan_is_taken_only_where_counts_only_grow():
    """DuckDB with the default label_plan takes the pass from scan_min_rows interactions on; a memory
    window, max_user_events or label_plan = "windows" keep the relational windows."""
    scan, windows = make_engine(EngineConfig(scan_min_rows=0)), make_engine(EngineConfig(label_plan="windows"))
    assert applies(scan, LabelConfig(), 10) and applies(scan, LabelConfig(min_support=3, multi_topic="any_new"), 10)
    assert not applies(scan, LabelConfig(memory_days=30), 10)
    assert not applies(scan, LabelConfig(max_user_events=100), 10)
    assert not applies(windows, LabelConfig(), 10)
    default = make_engine(EngineConfig())
    assert not applies(default, LabelConfig(), 999_999) and applies(default, LabelConfig(), 1_000_000)


def test_duplicate_events_are_handed_to_the_collapse():
    """A log holding one event twice (same user, item, time and event id; the copy with a higher
    engagement) is not scanned as it came: the pass sees the pair side by side and declines, and the
    labels come from the collapsed rows, equal to the windows' (one row, the higher engagement)."""
    df = log(("u", "k1", 0, 1.0, "e1"), ("u", "b1", 5, 0.5, "e2"), ("u", "b1", 5, 2.0, "e2"), ("u", "k2", 9))
    eng = make_engine(EngineConfig(scan_min_rows=0))
    run = plan_labels(df, TAX, LabelConfig(), engine=eng)
    assert scanned_rows(eng, run._raw_rows, LabelConfig()) is None
    got = run.labels_frame()
    want = plan_labels(df, TAX, LabelConfig(), engine=make_engine(EngineConfig(label_plan="windows"))).labels_frame()
    pd.testing.assert_frame_equal(got, want)
    assert len(got) == 3 and got.loc[got["item_id"] == "b1", "shaped_reward"].tolist() == [4.0]


def test_a_log_without_duplicates_is_scanned_as_it_came():
    """Without duplicates the pass runs over the uncollapsed rows (the collapse is never computed)."""
    df = log(("u", "k1", 0), ("u", "b1", 5), ("v", "k2", 5), ("u", "k2", 9))
    eng = make_engine(EngineConfig(scan_min_rows=0))
    run = plan_labels(df, TAX, LabelConfig(), engine=eng)
    assert scanned_rows(eng, run._raw_rows, LabelConfig()).table is not None
    assert run.labels_frame()["label"].tolist() == ["cold_start", "new_interest", "in_profile", "cold_start"]
    assert not run.base_shared


def test_chunks_beyond_the_budget_go_to_a_scratch_file(monkeypatch, tmp_path):
    """Streamed two rows at a time with no memory budget, every labelled chunk goes to a scratch
    Arrow file in temp_dir; the labels equal the windows' (read through the engine, and as Arrow
    from the file), and releasing the run removes the file."""
    import labeler.labels.scan as scan
    monkeypatch.setattr(scan, "BATCH_ROWS", 2)
    monkeypatch.setattr(scan, "_bytes", lambda limit: 0)
    df = log(("u", "k1", 0), ("u", "b1", 5), ("v", "k2", 5), ("u", "k2", 9), ("u", "b1", 9), ("v", "b1", 12))
    eng = make_engine(EngineConfig(scan_min_rows=0, temp_dir=str(tmp_path)))
    run = plan_labels(df, TAX, LabelConfig(), engine=eng)
    got = run.labels_frame()
    assert run._scanned.path is not None and run._scanned.path.exists()
    want = plan_labels(df, TAX, LabelConfig(), engine=make_engine(EngineConfig(label_plan="windows"))).labels_frame()
    pd.testing.assert_frame_equal(got, want)
    keys = ["user_id", "ts", "item_id"]
    unordered = run.labels_unordered().to_pandas().drop(columns="ts_us").sort_values(keys).reset_index(drop=True)
    pd.testing.assert_frame_equal(unordered, want[unordered.columns].sort_values(keys).reset_index(drop=True),
                                  check_dtype=False)
    path = run._scanned.path
    run.release()
    assert not path.exists()


def test_labels_read_unordered_equal_the_labels():
    """labels_unordered (the pass keeps every labelled chunk in memory for it, or the windows' query
    read as it comes) holds the same rows as the sorted labels, on both plans, with multi-topic
    items and carried-free filters (label_from) alike."""
    multi = taxonomy({"k1": [("knit", 0.9), ("bonsai", 0.8)], "k2": [("knit", 1.0)], "b1": [("bonsai", 1.0)]})
    df = log(("u", "k1", 0), ("u", "b1", 5), ("v", "k2", 5), ("u", "k2", 9), ("u", "b1", 9), ("v", "k1", 12))
    keys = ["user_id", "ts", "item_id", "level"]
    for plan in ("scan", "windows"):
        cfg = LabelConfig(label_from=(T0 + pd.Timedelta(minutes=6)).isoformat())
        run = plan_labels(df, multi, cfg, engine=make_engine(EngineConfig(scan_min_rows=0, label_plan=plan)))
        got = run.labels_unordered().to_pandas().drop(columns="ts_us")
        want = plan_labels(df, multi, cfg, engine=make_engine(EngineConfig(label_plan="windows"))).labels_frame()
        assert len(got) == len(want) == 3
        pd.testing.assert_frame_equal(got.sort_values(keys).reset_index(drop=True),
                                      want[got.columns].sort_values(keys).reset_index(drop=True), check_dtype=False)


def test_memory_limits_read_as_bytes():
    """DuckDB's memory_limit strings, decimal and binary units (DuckDB's documentation: "1GB", "1GiB")."""
    from labeler.labels.scan import _bytes
    assert _bytes("4GB") == 4 * 10**9 and _bytes("500MiB") == 500 * 2**20 and _bytes("1.5 GB") == 1_500_000_000
    assert _bytes("lots") == 2**30


def test_rows_taken_back_by_row_id_equal_a_take():
    """The interaction's own columns are taken back by the row ids the per-chunk projection returns:
    as zero-copy slices when the ids run in ascending stretches (batches returned out of order), by
    a copy otherwise (rows filtered out); either way the rows of ``Table.take``."""
    import numpy as np
    import pyarrow as pa
    from labeler.labels.plan import _rows_at
    table = pa.table({"n": np.arange(200_000), "s": pa.array(np.arange(200_000).astype(str))})
    blocks = [np.arange(a, min(a + 65_536, 200_000)) for a in range(0, 200_000, 65_536)]
    rng = np.random.default_rng(7)
    cases = [np.arange(200_000), np.concatenate(blocks[::-1]), np.concatenate([blocks[2], blocks[0]]),
             np.sort(rng.choice(200_000, 5_000, replace=False)), np.arange(0)]
    for rows in cases:
        assert _rows_at(table, rows).equals(table.take(rows))


def test_a_user_longer_than_a_chunk_is_scanned_in_parts():
    """A sequence past ``LONG_ROWS`` (one heavy user, a bot) is scanned in parts cut at a change of
    time, its counts carried into the next part by stand-in rows: memory follows the parts, and the
    labels and footprints equal the relational windows' for settings that read counts differently
    (support above one, engaged-only footprints, multi-topic items, two levels)."""
    from unittest import mock

    import numpy as np

    import labeler.labels.scan as scan
    tax = taxonomy({"a": [("x", 1.0)], "b": [("y", 1.0)], "c": [("x", 0.9), ("z", 0.8)], "d": [("z", 1.0)]},
                   parents={"x": "p", "y": "p", "z": "q"}, level=1)
    rng = np.random.default_rng(3)
    heavy = [("bot", str(rng.choice(list("abcdq"))), int(m), float(rng.choice([0.0, 0.5, 1.0, 2.0])), f"e{k}")
             for k, m in enumerate(np.sort(rng.integers(0, 120, 300)))]  # ties: several events a minute
    df = log(*heavy, ("u1", "a", 5), ("u1", "d", 9), ("u2", "b", 1))
    for cfg in (LabelConfig(), LabelConfig(min_support=3), LabelConfig(footprint_from="engaged", engaged_min=1.0),
                LabelConfig(multi_topic="any_new", warmup=2)):
        want = plan_labels(df, tax, cfg, engine=make_engine(EngineConfig(label_plan="windows")))
        with mock.patch.object(scan, "BATCH_ROWS", 16), mock.patch.object(scan, "LONG_ROWS", 20), \
                mock.patch.object(scan, "_stand_ins", wraps=scan._stand_ins) as stand_ins:
            got = plan_labels(df, tax, cfg, engine=make_engine(EngineConfig(scan_min_rows=0)))
            labels, footprints = got.labels_frame(), got.footprints_frame()
        assert got.scan and stand_ins.call_count >= 10
        pd.testing.assert_frame_equal(labels, want.labels_frame())
        pd.testing.assert_frame_equal(footprints, want.footprints_frame())
