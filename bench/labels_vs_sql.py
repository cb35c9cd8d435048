"""Benchmark: label_interactions against a hand-written DuckDB query giving the same columns.

Synthetic log: N interactions of U users over 90 days on items in 300 topics (one topic per item).
Two paths: both sides read the same Parquet file (``labeler label``'s path), or both start from
the same pandas DataFrame in memory (``label_interactions``'s path: our intake validates and
hashes it, the hand-written query reads it as it is). Each side materialises its (unsorted)
result as an Arrow table, and the first repeat checks they hold the same rows (equal digests of the row hashes). The two are
timed in alternation ``--repeats`` times and the ratio (ours / hand-written) is taken between the
medians, so a burst of other work on a shared machine moves both sides or only one sample.

    .venv/bin/python bench/labels_vs_sql.py --rows 5000000 --users 200000 [--source both] [--repeats 3] [--matrix]
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
import pyarrow.compute as pc
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from labeler import LabelConfig, Taxonomy  # noqa: E402
from labeler.labels.intake import rows_hash  # noqa: E402
from labeler.labels.plan import plan_labels  # noqa: E402

# The fastest query for the default settings we could write by hand (it also beat the first one
# this benchmark used, a support window plus a timeline of first times joined back, by 1.5x at
# 5M rows): one sort per (user, topic) gives each topic's first time and first row, one sort per
# user gives history_len and the running count of first rows. It skips what our rules must also
# do on any input: collapsing duplicate events (this log has none) and the other label settings.
HAND_SQL = """
WITH j AS (
    SELECT ev.user_id, ev.item_id, ev.ts, epoch_us(ev.ts) AS t, ev.engagement, ev.event_id, it.topic_id
    FROM {source} ev LEFT JOIN item_topics it ON it.item_id = ev.item_id
),
f AS (
    SELECT *, min(t) OVER (PARTITION BY user_id, topic_id) AS first_t,
           row_number() OVER (PARTITION BY user_id, topic_id ORDER BY t) AS rn
    FROM j
),
g AS (
    SELECT *, rank() OVER w - 1 AS history_len,
           coalesce(sum(CASE WHEN rn = 1 AND topic_id IS NOT NULL THEN 1 ELSE 0 END)
                    OVER (w RANGE BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING), 0) AS known_topics
    FROM f WINDOW w AS (PARTITION BY user_id ORDER BY t)
),
k AS (SELECT *, topic_id IS NOT NULL AND history_len >= 1 AND first_t >= t AS is_new FROM g)
SELECT user_id, item_id, ts, event_id, topic_id,
       CASE WHEN topic_id IS NULL THEN 'unplaced' WHEN history_len < 1 THEN 'cold_start'
            WHEN first_t < t THEN 'in_profile' ELSE 'new_interest' END AS label,
       engagement >= 1.0 AS engaged, is_new AND engagement >= 1.0 AS discovery,
       CASE WHEN is_new AND engagement > 0 THEN 2.0 ELSE 1.0 END AS reward_multiplier,
       engagement * CASE WHEN is_new AND engagement > 0 THEN 2.0 ELSE 1.0 END AS shaped_reward,
       history_len, known_topics
FROM k
"""


def _ids(prefix: str, numbers: np.ndarray, width: int) -> pa.Array:
    """f"{prefix}{x:0{width}d}" for each number, in Arrow (a billion-row log is 500 chunks)."""
    digits = pc.utf8_lpad(pc.cast(pa.array(numbers), pa.string()), width, "0")
    return pc.binary_join_element_wise(prefix, digits, "")


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
            "user_id": _ids("u", u, 7),
            "item_id": _ids("i", rng.integers(0, items, n), 6),
            "ts": pa.array(start + rng.integers(0, 90 * 86_400, n) * 1_000_000, pa.timestamp("us", tz="UTC")),
            "engagement": pa.array(rng.choice([0.0, 0.5, 1.0, 2.0], n)),
            "event_id": _ids("e", np.arange(off, off + n), 1)})
        writer = writer or pq.ParquetWriter(path, t.schema)
        writer.write_table(t)
    writer.close()
    ids = [f"i{x:06d}" for x in range(items)]
    it = pd.DataFrame({"item_id": ids, "level": 0, "topic_id": [f"t{x % topics:04d}" for x in range(items)],
                       "confidence": 1.0})
    top = pd.DataFrame({"topic_id": sorted(set(it["topic_id"])), "level": 0})
    top["name"] = top["topic_id"]
    return Taxonomy.from_tables(top, it, name="bench")


def time_ours(data, tax, cfg: LabelConfig) -> tuple[float, pa.Table]:
    """plan_labels on a Parquet path (the CLI's path) or a DataFrame (label_interactions's), the
    labels as Arrow, unsorted: the same work as the hand-written query's."""
    t0 = time.perf_counter()
    run = plan_labels(data, tax, cfg)
    out = run.labels_unordered()
    return time.perf_counter() - t0, out


def time_hand(data, tax) -> tuple[float, pa.Table]:
    t0 = time.perf_counter()
    con = duckdb.connect(config={"memory_limit": "4GB", "preserve_insertion_order": False})
    con.register("item_topics_df", tax.item_topics[["item_id", "topic_id"]])
    con.execute("CREATE TEMP TABLE item_topics AS SELECT * FROM item_topics_df")
    if isinstance(data, pd.DataFrame):
        con.register("log_df", data)
        source = "log_df"
    else:
        source = f"read_parquet('{data}')"
    out = con.sql(HAND_SQL.format(source=source)).to_arrow_table()
    return time.perf_counter() - t0, out


COMPARED = pa.schema([("user_id", pa.string()), ("item_id", pa.string()), ("ts", pa.timestamp("us", tz="UTC")),
                      ("event_id", pa.string()), ("topic_id", pa.string()), ("label", pa.string()),
                      ("engaged", pa.bool_()), ("discovery", pa.bool_()), ("reward_multiplier", pa.float64()),
                      ("shaped_reward", pa.float64()), ("history_len", pa.int64()), ("known_topics", pa.int64())])


def rows_digest(table: pa.Table) -> str:
    """The intake's order-independent row hash over the compared columns: equal digests mean the
    same rows in any order (a sorted copy of two 50M-row results would not fit in memory)."""
    return rows_hash(table.select(COMPARED.names).cast(COMPARED))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--users", type=int, default=20_000)
    ap.add_argument("--activity", choices=["lognormal", "zipf"], default="lognormal")
    ap.add_argument("--source", choices=["parquet", "pandas", "both"], default="both",
                    help="the CLI's path (a Parquet file) and/or the API's (a DataFrame in memory)")
    ap.add_argument("--matrix", action="store_true", help="also time min_support=2, memory_days=30, any_new")
    ap.add_argument("--repeats", type=int, default=3, help="alternating timings of each side")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "interactions.parquet"
        t0 = time.perf_counter()
        tax = synthesize(path, args.rows, args.users, activity=args.activity)
        print(f"synthesised {args.rows:,} interactions of up to {args.users:,} users ({args.activity}) in "
              f"{time.perf_counter() - t0:.1f}s ({os.path.getsize(path) / 2**20:.0f} MiB Parquet)")
        sources = ["parquet", "pandas"] if args.source == "both" else [args.source]
        for source in sources:
            data = pq.read_table(path).to_pandas() if source == "pandas" else path
            hands, ours_all = [], []
            for k in range(args.repeats):
                hand, a = time_hand(data, tax)
                want = rows_digest(a) if k == 0 else None
                del a  # one result in memory at a time
                ours, b = time_ours(data, tax, LabelConfig())
                if k == 0:
                    assert rows_digest(b) == want, "the hand-written query and labeler disagree"
                del b
                hands.append(hand)
                ours_all.append(ours)
                print(f"  {source} repeat {k + 1}: labeler {ours:.1f}s, hand-written SQL {hand:.1f}s", flush=True)
            hand, ours = float(np.median(hands)), float(np.median(ours_all))
            print(f"{source}, defaults: labeler {ours:.1f}s, hand-written SQL {hand:.1f}s (medians of "
                  f"{args.repeats}), ratio {ours / hand:.2f} (goal <= 1.0)", flush=True)
            if args.matrix:
                for name, cfg in (("min_support=2", LabelConfig(min_support=2)),
                                  ("memory_days=30", LabelConfig(memory_days=30)),
                                  ("any_new", LabelConfig(multi_topic="any_new"))):
                    t, _ = time_ours(data, tax, cfg)
                    print(f"  {source} {name}: labeler {t:.1f}s, ratio to hand-written defaults {t / hand:.2f}")
            del data
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    print(f"peak RSS of this process: {peak:.2f} GiB")


if __name__ == "__main__":
    main()
