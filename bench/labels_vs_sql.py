"""Benchmark: label_interactions against a hand-written DuckDB query giving the same columns.

Synthetic log: N interactions of U users over 90 days on items in 300 topics (one topic per item).
Both sides read the same Parquet file and materialise their (unsorted) result as an Arrow table,
through the same DuckDB call (``con.sql(...).to_arrow_table()``), in the same run. The two are
timed in alternation ``--repeats`` times and the ratio (ours / hand-written) is taken between the
medians, so a burst of other work on a shared machine moves both sides or only one sample.

    .venv/bin/python bench/labels_vs_sql.py --rows 10000000 --users 200000 [--repeats 3] [--matrix]
"""
from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from labeler import LabelConfig, Taxonomy  # noqa: E402
from labeler.labelling import plan_labels  # noqa: E402

HAND_SQL = """
WITH ev AS (
    SELECT user_id, item_id, ts, epoch_us(ts) AS t, engagement, event_id FROM read_parquet('{path}')
),
h AS (SELECT *, rank() OVER (PARTITION BY user_id ORDER BY t) - 1 AS history_len FROM ev),
j AS (SELECT h.*, it.topic_id FROM h LEFT JOIN item_topics it ON it.item_id = h.item_id),
s AS (
    SELECT *, coalesce(count(topic_id) OVER (PARTITION BY user_id, topic_id ORDER BY t
                       RANGE BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING), 0) AS support
    FROM j
),
firsts AS (SELECT user_id, min(t) + 1 AS p FROM j WHERE topic_id IS NOT NULL GROUP BY user_id, topic_id),
timeline AS (
    SELECT user_id, t AS p, 0 AS d, true AS is_point FROM (SELECT DISTINCT user_id, t FROM j)
    UNION ALL SELECT user_id, p, 1 AS d, false AS is_point FROM firsts
),
kt AS (
    SELECT user_id, p AS t, sum(d) OVER (PARTITION BY user_id ORDER BY p
                                         RANGE BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS known_topics,
           is_point
    FROM timeline
)
SELECT s.user_id, s.item_id, s.ts, s.event_id, s.topic_id,
       CASE WHEN s.topic_id IS NULL THEN 'unplaced' WHEN s.history_len < 1 THEN 'cold_start'
            WHEN s.support >= 1 THEN 'in_profile' ELSE 'new_interest' END AS label,
       CASE WHEN s.topic_id IS NOT NULL AND s.history_len >= 1 AND s.support < 1 AND s.engagement > 0
            THEN 2.0 ELSE 1.0 END AS reward_multiplier,
       s.engagement * CASE WHEN s.topic_id IS NOT NULL AND s.history_len >= 1 AND s.support < 1
            AND s.engagement > 0 THEN 2.0 ELSE 1.0 END AS shaped_reward,
       s.history_len, coalesce(kt.known_topics, 0) AS known_topics
FROM s LEFT JOIN kt ON kt.user_id = s.user_id AND kt.t = s.t AND kt.is_point
"""


def synthesize(path: Path, rows: int, users: int, topics: int = 300, items: int = 100_000, seed: int = 0,
               activity: str = "zipf"):
    """A synthetic log. ``activity``: "zipf" (a few extremely heavy users: one holds about a quarter of
    all events) or "lognormal" (realistic: the heaviest user holds well under 1%)."""
    rng = np.random.default_rng(seed)
    weights = None
    if activity == "lognormal":
        weights = rng.lognormal(0.0, 1.5, users)
        weights /= weights.sum()
    start = pd.Timestamp("2026-01-01T00:00:00Z").value // 1000
    writer = None
    chunk = 2_000_000
    for off in range(0, rows, chunk):
        n = min(chunk, rows - off)
        u = rng.zipf(1.3, n) % users if weights is None else rng.choice(users, size=n, p=weights)
        t = pa.table({
            "user_id": pa.array([f"u{x:07d}" for x in u]),
            "item_id": pa.array([f"i{x:06d}" for x in rng.integers(0, items, n)]),
            "ts": pa.array(start + rng.integers(0, 90 * 86_400, n) * 1_000_000, pa.timestamp("us", tz="UTC")),
            "engagement": pa.array(rng.choice([0.0, 0.5, 1.0, 2.0], n)),
            "event_id": pa.array([f"e{off + k}" for k in range(n)])})
        writer = writer or pq.ParquetWriter(path, t.schema)
        writer.write_table(t)
    writer.close()
    ids = [f"i{x:06d}" for x in range(items)]
    it = pd.DataFrame({"item_id": ids, "level": 0, "topic_id": [f"t{x % topics:04d}" for x in range(items)],
                       "confidence": 1.0})
    top = pd.DataFrame({"topic_id": sorted(set(it["topic_id"])), "level": 0})
    top["name"] = top["topic_id"]
    return Taxonomy.from_tables(top, it, name="bench")


def time_ours(path: Path, tax, cfg: LabelConfig) -> tuple[float, int]:
    t0 = time.perf_counter()
    run = plan_labels(path, tax, cfg)
    n = run.engine.to_arrow(run.labels).num_rows
    return time.perf_counter() - t0, n


def time_hand(path: Path, tax) -> tuple[float, int]:
    t0 = time.perf_counter()
    con = duckdb.connect(config={"memory_limit": "4GB", "preserve_insertion_order": False})
    con.register("item_topics_df", tax.item_topics[["item_id", "topic_id"]])
    con.execute("CREATE TEMP TABLE item_topics AS SELECT * FROM item_topics_df")
    n = con.sql(HAND_SQL.format(path=path)).to_arrow_table().num_rows
    return time.perf_counter() - t0, n


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--users", type=int, default=20_000)
    ap.add_argument("--matrix", action="store_true", help="also time min_support=2, memory_days=30, any_new")
    ap.add_argument("--repeats", type=int, default=3, help="alternating timings of each side")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "interactions.parquet"
        t0 = time.perf_counter()
        tax = synthesize(path, args.rows, args.users)
        print(f"synthesised {args.rows:,} interactions of up to {args.users:,} users in "
              f"{time.perf_counter() - t0:.1f}s ({os.path.getsize(path) / 2**20:.0f} MiB Parquet)")
        hands, ours_all = [], []
        for k in range(args.repeats):
            (hand, n_hand), (ours, n_ours) = time_hand(path, tax), time_ours(path, tax, LabelConfig())
            assert n_hand == n_ours, (n_hand, n_ours)
            hands.append(hand)
            ours_all.append(ours)
            print(f"  repeat {k + 1}: labeler {ours:.1f}s, hand-written SQL {hand:.1f}s", flush=True)
        hand, ours = float(np.median(hands)), float(np.median(ours_all))
        print(f"defaults: labeler {ours:.1f}s, hand-written SQL {hand:.1f}s (medians of {args.repeats}), "
              f"ratio {ours / hand:.2f} (goal <= 1.25)")
        if args.matrix:
            for name, cfg in (("min_support=2", LabelConfig(min_support=2)),
                              ("memory_days=30", LabelConfig(memory_days=30)),
                              ("any_new", LabelConfig(multi_topic="any_new"))):
                t, _ = time_ours(path, tax, cfg)
                print(f"{name}: labeler {t:.1f}s, ratio to hand-written defaults {t / hand:.2f}")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    print(f"peak RSS of this process: {peak:.2f} GiB")


if __name__ == "__main__":
    main()
