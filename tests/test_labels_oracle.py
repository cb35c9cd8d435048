"""The label rules against an independent DuckDB SQL oracle (tests/oracle.py).

Outside check: MovieLens 100K (GroupLens; Harper & Konstan, ACM TiiS 2015), genres as an editorial
multi-label taxonomy and ratings as engagement, row for row, for several configurations.
"""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from labeler import LabelConfig, Taxonomy, label_interactions
from oracle import oracle_labels

COMPARE = ["user_id", "item_id", "ts", "event_id", "level", "topic_id", "label", "engaged", "discovery",
           "reward_multiplier", "shaped_reward", "history_len", "known_topics"]


def assert_same(ours: pd.DataFrame, theirs: pd.DataFrame) -> None:
    a = ours[COMPARE].reset_index(drop=True)
    b = theirs[COMPARE].reset_index(drop=True)
    assert len(a) == len(b)
    for col in COMPARE:
        x, y = a[col], b[col]
        if col in ("reward_multiplier", "shaped_reward"):
            assert np.allclose(x.astype(float), y.astype(float)), col
        elif col == "ts":
            assert (pd.to_datetime(x, utc=True) == pd.to_datetime(y, utc=True)).all(), col
        else:
            xs = x.astype(object).where(x.notna(), None).tolist()
            ys = y.astype(object).where(y.notna(), None).tolist()
            if xs != ys:
                bad = next(k for k in range(len(xs)) if xs[k] != ys[k])
                raise AssertionError(f"column {col} differs first at row {bad}:\nours\n{a.iloc[bad]}\n"
                                     f"oracle\n{b.iloc[bad]}")


CONFIGS = {
    "defaults": {},
    "support2_memory30": {"min_support": 2, "memory_days": 30},
    "engaged_footprints": {"footprint_from": "engaged", "engaged_min": 4},
    "any_new": {"multi_topic": "any_new"},
    "warmup5": {"warmup": 5},
    "label_from_midpoint": {"label_from": dt.datetime(1998, 1, 1, tzinfo=dt.timezone.utc)},
    "boost_on_discovery_no_boost": {"boost_on": "discovery", "engaged_min": 4, "no_boost_topics": ("Horror",)},
}


@pytest.fixture(scope="module")
def movielens():
    from external import movielens_100k
    ratings, movies = movielens_100k()
    return ratings, movies


@pytest.mark.external
def test_movielens_published_facts(movielens):
    """MovieLens 100K has 100,000 ratings by 943 users on 1,682 movies, each user with >= 20 (GroupLens README)."""
    ratings, movies = movielens
    assert len(ratings) == 100_000
    assert ratings["user_id"].nunique() == 943
    assert movies["item_id"].nunique() == 1682 and ratings["item_id"].nunique() == 1682
    assert ratings.groupby("user_id").size().min() == 20


@pytest.mark.external
@pytest.mark.parametrize("name", list(CONFIGS))
def test_movielens_labels_equal_the_sql_oracle(movielens, name, on_engine):
    """Labels on MovieLens 100K (genres as topics, rating as engagement) equal the DuckDB SQL oracle row for row."""
    ratings, movies = movielens
    # genre ids are the genre names themselves, so no_boost_topics can name them
    topics = pd.DataFrame({"topic_id": sorted(set("|".join(movies["genres"]).split("|")))})
    topics = topics.assign(level=0, name=topics["topic_id"], parent_id=None)
    it = movies.assign(topic_id=movies["genres"].str.split("|")).explode("topic_id")
    it = it.assign(level=0, confidence=1.0 - 1e-3 * it.groupby("item_id").cumcount())
    tax = Taxonomy.from_tables(topics, it[["item_id", "level", "topic_id", "confidence"]], name="ml100k-genres")
    log = ratings.rename(columns={"rating": "engagement"})
    cfg = CONFIGS[name]
    ours = label_interactions(log, tax, LabelConfig(**cfg))
    theirs = oracle_labels(log, tax.item_topics, tax.topics, **cfg)
    assert len(ours) == (100_000 if "label_from" not in cfg else int((ratings["ts"] >= cfg["label_from"]).sum()))
    assert_same(ours, theirs)


def _random_log(seed: int, n: int = 400):
    rng = np.random.default_rng(seed)
    base = pd.Timestamp("2026-03-02T00:00:00Z")
    items = [f"i{k}" for k in range(12)]
    log = pd.DataFrame({
        "user_id": rng.choice(["a", "b", "c", "d"], n),
        "item_id": rng.choice(items + ["unknown"], n),
        "ts": base + pd.to_timedelta(rng.integers(0, 40, n) * 6, unit="h"),  # dense ties
        "engagement": rng.choice([-1.0, 0.0, 0.5, 1.0, 2.0, 4.0], n),
        "event_id": rng.choice(["e1", "e2", None], n),
        "event_type": rng.choice(["play", "preview"], n)})
    rows = []
    for k, item in enumerate(items):
        fine = [f"f{k % 5}"] + ([f"f{(k + 2) % 5}"] if k % 4 == 0 else [])
        for j, f in enumerate(fine):
            rows.append((item, 1, f, 0.9 - 0.1 * j))
            rows.append((item, 0, {"f0": "c0", "f1": "c0", "f2": "c1", "f3": "c1", "f4": "c2"}[f], 0.9 - 0.1 * j))
    it = pd.DataFrame(rows, columns=["item_id", "level", "topic_id", "confidence"]).drop_duplicates(
        ["item_id", "level", "topic_id"])
    topics = pd.DataFrame({"topic_id": [f"f{k}" for k in range(5)] + ["c0", "c1", "c2"],
                           "level": [1] * 5 + [0] * 3,
                           "parent_id": ["c0", "c0", "c1", "c1", "c2", None, None, None]})
    topics["name"] = topics["topic_id"]
    return log, Taxonomy.from_tables(topics, it)


RANDOM_CONFIGS = [
    {}, {"min_support": 3}, {"memory_days": 2}, {"min_support": 2, "memory_days": 3.5},
    {"footprint_from": "engaged", "engaged_min": 1.0}, {"multi_topic": "any_new", "warmup": 3},
    {"event_types": ("play",)}, {"levels": (1,), "no_boost_topics": ("c1",)},
    {"boost_on": "discovery", "multiplier": 3.0},
    {"label_from": dt.datetime(2026, 3, 5, tzinfo=dt.timezone.utc), "memory_days": 1},
]


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("cfg", RANDOM_CONFIGS, ids=lambda c: ",".join(f"{k}={v}" for k, v in c.items()) or "defaults")
def test_random_logs_equal_the_sql_oracle(seed, cfg):
    """On small random logs with dense ties, duplicates and two levels, labels equal the SQL oracle."""
    log, tax = _random_log(seed)
    ours = label_interactions(log, tax, LabelConfig(**cfg))
    theirs = oracle_labels(log, tax.item_topics, tax.topics, **cfg)
    assert_same(ours, theirs)
