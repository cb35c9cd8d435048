"""Labelling in pieces of users (large full runs) writes the same bytes as one pass.

A run over more than ``engine.bucket_rows`` interactions is labelled one range of user ids at a
time; every rule is per user, so the label files, the footprints and the summary must be exactly
those of a single pass, for every setting that acts across a user's history.
"""
from __future__ import annotations

import json

import pandas as pd
import pyarrow as pa
import pytest

from labeler import LabelConfig, Taxonomy
from labeler.config import EngineConfig
from labeler.engines import make_engine
from labeler.labels.pieces import user_pieces
from labeler.labels.plan import plan_labels

CONFIGS = {
    "defaults": {},
    "support2_memory7": {"min_support": 2, "memory_days": 7},
    "any_new_warmup3_engaged": {"multi_topic": "any_new", "warmup": 3, "footprint_from": "engaged"},
    "heavy_users_set_aside": {"max_user_events": 60},
    "event_types_label_from": {"event_types": ["play"], "label_from": "2026-03-20T00:00:00Z"},
}


@pytest.fixture(scope="module")
def scenario():
    from labeler.demo import generate_scenario
    s = generate_scenario(7, n_items=600, n_users=150, weeks=6)
    ev = s.interactions.copy()
    ev.loc[ev.index % 9 == 4, "event_type"] = "impression"
    ev.loc[ev.ts.idxmax(), "event_type"] = "impression"  # the latest event is one event_types drops
    return ev, Taxonomy.from_categories(s.items)


def _files(folder):
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*.parquet"))}


@pytest.mark.parametrize("name", sorted(CONFIGS))
def test_pieces_write_the_bytes_of_one_pass(tmp_path, scenario, name):
    """With pieces of about 500 interactions (13+ pieces) the files equal a single pass's, byte for
    byte, and the summary is the same (labels content hash included)."""
    ev, tax = scenario
    cfg = LabelConfig(**CONFIGS[name])
    one = plan_labels(ev, tax, cfg, engine=make_engine(EngineConfig(bucket_rows=None)))
    a = one.write(tmp_path / "one")
    many = plan_labels(ev, tax, cfg, engine=make_engine(EngineConfig(bucket_rows=500)))
    b = many.write(tmp_path / "many")
    assert many.written is not None and one.written is None
    assert _files(tmp_path / "one") == _files(tmp_path / "many")
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)
    pd.testing.assert_frame_equal(one.history_frame().sort_values("user_id").reset_index(drop=True),
                                  many.history_frame().sort_values("user_id").reset_index(drop=True),
                                  check_dtype=False)


def test_a_cut_from_a_sample_of_rows_writes_the_same_bytes(tmp_path, scenario, monkeypatch):
    """A large log's pieces are cut from a sample of its rows (counting every user's rows of 1B
    interactions ran out of memory) and its input cut into the pieces' files a few sets a pass:
    the cut is then approximate, the files still one pass's."""
    from labeler import engines
    from labeler.labels import pieces
    ev, tax = scenario
    monkeypatch.setattr(pieces, "SAMPLE_ROWS", 800)
    monkeypatch.setattr(engines, "SCATTER_SETS", 2)  # the input cut in several passes
    cfg = LabelConfig(min_support=2, memory_days=7)
    plan_labels(ev, tax, cfg, engine=make_engine(EngineConfig(bucket_rows=None))).write(tmp_path / "one")
    many = plan_labels(ev, tax, cfg, engine=make_engine(EngineConfig(bucket_rows=900)))
    many.write(tmp_path / "many")
    assert many.written["pieces"] > 3
    assert _files(tmp_path / "one") == _files(tmp_path / "many")
    sampled = pieces.cut_users(many.engine, many.ev, len(ev), 900)
    assert sum(p.rows for p in sampled) != len(ev)  # estimates from the sample, not counts


def test_user_pieces_match_the_greedy_rule():
    """The ranges found by binary search equal the plain greedy loop (a range takes the next user
    while its interactions stay within the limit, and always takes one), on random counts."""
    import numpy as np
    rng = np.random.default_rng(3)
    for _ in range(200):
        n = int(rng.integers(0, 30))
        ns = [int(x) for x in rng.integers(1, 12, n)]
        ids = [f"u{k:03d}" for k in range(n)]
        limit = int(rng.integers(1, 25))
        expected, lo, held, users = [], None, 0, 0
        for user, c in zip(ids, ns):
            if held and held + c > limit:
                expected.append((lo, user, held, users))
                lo, held, users = user, 0, 0
            held += c
            users += 1
        expected.append((lo, None, held, users))
        got = user_pieces(pa.table({"user_id": pa.array(ids, pa.string()), "n": pa.array(ns, pa.int64())}), limit)
        assert [tuple(p) for p in got] == expected


def test_pieces_cut_row_groups_across_pieces(tmp_path, scenario, monkeypatch):
    """With row groups smaller than a piece's rows of a date, a date's row groups span pieces: the
    remainder each piece leaves is parked on disk and taken up by the next piece, and the files are
    still a single pass's, byte for byte (several row groups a file), with nothing parked left over."""
    import pyarrow.parquet as pq

    from labeler.labels import files
    monkeypatch.setattr(files, "ROW_GROUP", 37)
    ev, tax = scenario
    plan_labels(ev, tax, engine=make_engine(EngineConfig(bucket_rows=None))).write(tmp_path / "one")
    plan_labels(ev, tax, engine=make_engine(EngineConfig(bucket_rows=300))).write(tmp_path / "many")
    files = _files(tmp_path / "many")
    assert files == _files(tmp_path / "one")
    groups = [pq.ParquetFile(tmp_path / "many" / name).num_row_groups for name in files]
    assert max(groups) > 2
    assert sorted(p.name for p in (tmp_path / "many").iterdir()) == ["footprints.parquet", "labels", "summary.json"]


def test_zstd_pieces_write_the_bytes_of_one_pass_and_the_rows_of_lz4(tmp_path, scenario):
    """engine.output_compression = "zstd": pieces and one pass give the same bytes, every file is
    ZSTD-coded, and the tables equal the default codec's."""
    import pyarrow.parquet as pq
    ev, tax = scenario
    for name, conf in (("one", {"bucket_rows": None}), ("many", {"bucket_rows": 300}), ("lz4", {})):
        conf = conf if name == "lz4" else {**conf, "output_compression": "zstd"}
        plan_labels(ev, tax, engine=make_engine(EngineConfig(**conf))).write(tmp_path / name)
    files = _files(tmp_path / "many")
    assert files == _files(tmp_path / "one")
    for name in files:
        assert pq.ParquetFile(tmp_path / "many" / name).metadata.row_group(0).column(0).compression == "ZSTD"
        assert pq.read_table(tmp_path / "many" / name).equals(pq.read_table(tmp_path / "lz4" / name)), name


def test_many_dates_beyond_the_open_file_limit_say_what_to_do(monkeypatch):
    """A run in pieces keeps a file open per date: past the hard limit on open files it stops with
    what to change, and under it the soft limit is raised."""
    import resource

    from labeler.errors import EngineError
    from labeler.labels.files import allow_open_files
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    monkeypatch.setattr(resource, "getrlimit", lambda _: (100, 1000))
    raised = []
    monkeypatch.setattr(resource, "setrlimit", lambda _, limits: raised.append(limits))
    allow_open_files(500, 10)
    assert raised == [(1000, 1000)]
    with pytest.raises(EngineError, match="ulimit -n 5256.*bucket_rows above 123"):
        allow_open_files(5000, 123)


def test_cli_label_in_pieces_publishes_the_same_store(cli, fixtures, tmp_path):
    """`labeler label --store` after a run in pieces publishes a store that answers like one pass's."""
    from labeler import open_store
    cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax", "--from-categories",
        "category", "-q")
    for name, rows in (("one", 1_000_000), ("many", 3)):
        (tmp_path / f"{name}.toml").write_text(f"[engine]\nbucket_rows = {rows}\n")
        code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", fixtures / "interactions.csv",
                           "--out", tmp_path / name, "--store", tmp_path / f"store-{name}", "--config",
                           tmp_path / f"{name}.toml", "-q")
        assert code == 0, err
    assert _files(tmp_path / "one") == _files(tmp_path / "many")
    a, b = open_store(tmp_path / "store-one"), open_store(tmp_path / "store-many")
    users = sorted(set(pd.read_csv(fixtures / "interactions.csv")["user_id"]))
    items = sorted(set(pd.read_csv(fixtures / "interactions.csv")["item_id"]))
    for u in users:
        fa, fb = a.footprint(u), b.footprint(u)
        assert (fa.history_len, fa.topics, fa.watermark) == (fb.history_len, fb.topics, fb.watermark)
        assert a.classify(u, items) == b.classify(u, items)


def test_user_pieces_cover_every_user_once_in_order():
    """Ranges [lo, hi) partition the ids in order, each near the limit; a heavy user stands alone;
    each piece counts its interactions and users."""
    counts = pa.table({"user_id": ["d", "a", "c", "b", "e"], "n": [1, 2, 10, 3, 1]})
    pieces = user_pieces(counts, 5)
    assert [(p.lo, p.hi) for p in pieces] == [(None, "c"), ("c", "d"), ("d", None)]
    assert [(p.rows, p.users) for p in pieces] == [(5, 2), (10, 1), (2, 2)]
