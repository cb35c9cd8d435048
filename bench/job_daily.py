"""Benchmark: the scheduled job's daily run against a full recompute, in the same process and run.

Writes a synthetic log of ``--days`` daily partitions of ``--daily`` interactions (items in 300
editorial categories, user activity drawn from a log-normal so that a few users are heavy, each
user mostly in five favourite categories), runs
the job once over them (setup), adds one more day, times the incremental run, then times
`--full` over the same data and prints the ratio, with the stage durations of both and the share
of users the new day touched (the incremental run re-labels exactly those users).

    .venv/bin/python bench/job_daily.py [--days 50 --daily 1000000 --users 1000000]
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from labeler import JobConfig
from labeler.job import run_job


def write_day(folder: Path, day: int, rows: int, weights: np.ndarray, items: int, seed: int) -> None:
    rng = np.random.default_rng(seed + day)
    start = pd.Timestamp("2026-01-01T00:00:00Z").value // 1000 + day * 86_400_000_000
    users = rng.choice(len(weights), size=rows, p=weights)
    # each user has five favourite topics (of 300) that draw 90% of their interactions
    fav = (users[:, None] * np.array([7, 31, 101, 151, 211]) + 13) % 300
    topic = np.where(rng.random(rows) < 0.9, fav[np.arange(rows), rng.integers(0, 5, rows)],
                     rng.integers(0, 300, rows))
    item = topic + 300 * rng.integers(0, items // 300, rows)
    t = pa.table({
        "user_id": pa.array([f"u{x:07d}" for x in users]),
        "item_id": pa.array([f"i{x:06d}" for x in item]),
        "ts": pa.array(start + np.sort(rng.integers(0, 86_400_000_000, rows)), pa.timestamp("us", tz="UTC")),
        "engagement": pa.array(rng.choice([0.0, 0.5, 1.0, 2.0], rows)),
        "event_id": pa.array([f"e{day}-{k}" for k in range(rows)])})
    date = pd.Timestamp(start, unit="us", tz="UTC").strftime("%Y-%m-%d")
    (folder / f"date={date}").mkdir(parents=True)
    pq.write_table(t, folder / f"date={date}" / "part-0.parquet")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--days", type=int, default=50)
    ap.add_argument("--daily", type=int, default=1_000_000)
    ap.add_argument("--users", type=int, default=1_000_000)
    ap.add_argument("--items", type=int, default=100_000)
    ap.add_argument("--memory-limit", default="6GB")
    ap.add_argument("--workdir", default=None)
    args = ap.parse_args()
    root = Path(args.workdir or tempfile.mkdtemp(prefix="labeler-job-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(0)
    weights = rng.lognormal(0.0, 1.5, args.users)
    weights /= weights.sum()
    pd.DataFrame({"item_id": [f"i{x:06d}" for x in range(args.items)],
                  "category": [f"c{x % 300:03d}" for x in range(args.items)]}).to_parquet(root / "items.parquet")
    inter = root / "interactions"
    t0 = time.perf_counter()
    for d in range(args.days):
        write_day(inter, d, args.daily, weights, args.items, seed=1)
    print(f"wrote {args.days} x {args.daily:,} interactions in {time.perf_counter() - t0:.0f}s", flush=True)
    cfg = JobConfig(items=str(root / "items.parquet"), interactions=str(inter), work_dir=str(root / "work"),
                    run={"taxonomy_from": "categories"},
                    engine={"memory_limit": args.memory_limit, "temp_dir": str(root / "spill")})
    t0 = time.perf_counter()
    first = run_job(cfg).manifest
    print(f"setup: first run over {args.days * args.daily:,} interactions {time.perf_counter() - t0:.0f}s "
          f"{json.dumps(first['durations_s'])}", flush=True)
    write_day(inter, args.days, args.daily, weights, args.items, seed=1)
    # the full recompute starts from the same committed state (a hard-linked copy: the job never
    # changes a file in place), so both publish the same changed store
    shutil.copytree(root / "work", root / "work-full", copy_function=os.link)
    t0 = time.perf_counter()
    daily = run_job(cfg).manifest
    t_inc = time.perf_counter() - t0
    t0 = time.perf_counter()
    full = run_job(cfg.model_copy(update={"work_dir": str(root / "work-full")}), full=True).manifest
    t_full = time.perf_counter() - t0
    total_users = full["users"]
    print(f"daily run (1 new partition of {args.daily:,} on top of {args.days * args.daily:,}): {t_inc:.1f}s "
          f"{json.dumps(daily['durations_s'])}; re-labelled {daily['relabelled_users']:,} of {total_users:,} "
          f"users ({100 * daily['relabelled_users'] / total_users:.0f}%), {len(daily['dates_rewritten'])} dates "
          f"rewritten, {daily['dates_linked']} linked")
    print(f"full recompute over the same data: {t_full:.1f}s {json.dumps(full['durations_s'])}")
    print(f"ratio daily / full = {t_inc / t_full:.3f}")
    shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
