"""Benchmark: the scheduled job's daily run against a full recompute, in the same process and run.

Writes a synthetic log of ``--days`` daily partitions of ``--daily`` interactions (items in 300
editorial categories, user activity drawn from a log-normal so that a few users are heavy, each
user mostly in five favourite categories), runs
the job once over them (setup), adds one more day, times the incremental run, then times
`--full` over the same data and prints the ratio, with the stage durations of both and the share
of users the new day touched (users whose new events all follow the watermark are continued
from the carried state; the rest are re-labelled over their whole history). With
``--consecutive N`` it then adds N more days one run at a time and prints the first and last of
those runs' times (a daily run's cost must not grow with the history). Each run of the job goes
in a child process, so the peak RSS printed is that run's alone.

    .venv/bin/python bench/job_daily.py [--days 50 --daily 1000000 --users 1000000 --consecutive 10]
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


def run_job_child(cfg: JobConfig, full: bool = False) -> tuple[dict, float, float]:
    """One run of the job in a child process: (manifest, wall seconds, peak RSS in GiB)."""
    import subprocess
    code = ("import json, resource, sys; from labeler import JobConfig; from labeler.job import run_job\n"
            "m = run_job(JobConfig.model_validate_json(sys.argv[1]), full=sys.argv[2] == '1').manifest\n"
            "print('RESULT', json.dumps({'manifest': m, 'rss_kib': resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}))")
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", code, cfg.model_dump_json(), "1" if full else "0"],
                         check=True, capture_output=True, text=True).stdout
    got = json.loads([line for line in out.splitlines() if line.startswith("RESULT ")][-1][len("RESULT "):])
    return got["manifest"], time.perf_counter() - t0, got["rss_kib"] / 2**20


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
    ap.add_argument("--consecutive", type=int, default=0, help="then N more daily runs, one day each")
    ap.add_argument("--keep", action="store_true", help="keep --workdir, with a copy of the state after the "
                    "first run (work-base), for --reuse")
    ap.add_argument("--reuse", action="store_true", help="start from --workdir's work-base (same arguments): "
                    "skip writing the history and the first run")
    args = ap.parse_args()
    root = Path(args.workdir or tempfile.mkdtemp(prefix="labeler-job-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(0)
    weights = rng.lognormal(0.0, 1.5, args.users)
    weights /= weights.sum()
    pd.DataFrame({"item_id": [f"i{x:06d}" for x in range(args.items)],
                  "category": [f"c{x % 300:03d}" for x in range(args.items)]}).to_parquet(root / "items.parquet")
    inter = root / "interactions"
    cfg = JobConfig(items=str(root / "items.parquet"), interactions=str(inter), work_dir=str(root / "work"),
                    run={"taxonomy_from": "categories"},
                    engine={"memory_limit": args.memory_limit, "temp_dir": str(root / "spill")})
    if args.reuse and (root / "work-base").is_dir():
        for d in range(args.days, args.days + 1 + args.consecutive):  # the days after the first run's
            date = pd.Timestamp("2026-01-01T00:00:00Z") + pd.Timedelta(days=d)
            shutil.rmtree(inter / f"date={date.strftime('%Y-%m-%d')}", ignore_errors=True)
        for name in ("work", "work-full"):
            shutil.rmtree(root / name, ignore_errors=True)
        shutil.copytree(root / "work-base", root / "work", copy_function=os.link)
        print("reusing the first run's state in work-base", flush=True)
    else:
        t0 = time.perf_counter()
        for d in range(args.days):
            write_day(inter, d, args.daily, weights, args.items, seed=1)
        print(f"wrote {args.days} x {args.daily:,} interactions in {time.perf_counter() - t0:.0f}s", flush=True)
        first, t_first, rss_first = run_job_child(cfg)
        print(f"setup: first run over {args.days * args.daily:,} interactions {t_first:.0f}s, peak RSS "
              f"{rss_first:.2f} GiB {json.dumps(first['durations_s'])}", flush=True)
        if args.keep:
            shutil.copytree(root / "work", root / "work-base", copy_function=os.link)
    write_day(inter, args.days, args.daily, weights, args.items, seed=1)
    # the full recompute starts from the same committed state (a hard-linked copy: the job never
    # changes a file in place), so both publish the same changed store
    shutil.copytree(root / "work", root / "work-full", copy_function=os.link)
    daily, t_inc, rss_inc = run_job_child(cfg)
    full, t_full, rss_full = run_job_child(cfg.model_copy(update={"work_dir": str(root / "work-full")}), full=True)
    total_users = full["users"]
    touched = daily["relabelled_users"] + daily.get("continued_users", 0)
    print(f"daily run (1 new partition of {args.daily:,} on top of {args.days * args.daily:,}): {t_inc:.1f}s, "
          f"peak RSS {rss_inc:.2f} GiB {json.dumps(daily['durations_s'])}; touched {touched:,} of {total_users:,} "
          f"users ({100 * touched / total_users:.0f}%): {daily.get('continued_users', 0):,} continued from state, "
          f"{daily['relabelled_users']:,} re-labelled over their history; {len(daily['dates_rewritten'])} dates "
          f"rewritten, {daily['dates_linked']} linked")
    print(f"full recompute over the same data: {t_full:.1f}s, peak RSS {rss_full:.2f} GiB "
          f"{json.dumps(full['durations_s'])}")
    print(f"ratio daily / full = {t_inc / t_full:.3f}", flush=True)
    times = []
    for k in range(args.consecutive):
        write_day(inter, args.days + 1 + k, args.daily, weights, args.items, seed=1)
        m, t, rss = run_job_child(cfg)
        times.append(t)
        print(f"  consecutive daily run {k + 1}: {t:.1f}s, peak RSS {rss:.2f} GiB {json.dumps(m['durations_s'])}",
              flush=True)
    if times:
        print(f"consecutive daily runs: last / first = {times[-1] / times[0]:.2f} "
              f"(median {sorted(times)[len(times) // 2]:.1f}s)")
    if not args.keep:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
