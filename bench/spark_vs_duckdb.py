"""Benchmark: the label rules on Spark (local mode) against DuckDB, on the same Parquet log, in one run.

The synthetic log is labels_vs_sql.py's (Zipf-distributed users, so a few users are very heavy).
For each engine: plan, compute and count the labels (default LabelConfig), then print the time
ratio. From Spark's own status API it reports the shuffle bytes written and the task-time skew
of the slowest stage (max / median task run time); it then runs Spark again with
``labels.max_user_events`` set, which sets the heaviest users aside, to show what they cost.

    .venv/bin/python bench/spark_vs_duckdb.py [--rows 10000000] [--users 200000] [--cores 2]
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parent))
from labels_vs_sql import synthesize  # noqa: E402

from labeler import LabelConfig  # noqa: E402
from labeler.config import EngineConfig  # noqa: E402
from labeler.engines import make_engine  # noqa: E402
from labeler.labels.plan import plan_labels  # noqa: E402


def timed(path, tax, cfg, engine) -> tuple[float, int]:
    t0 = time.perf_counter()
    run = plan_labels(path, tax, cfg, engine=engine)
    t = run.labels
    n = int(engine.to_pandas(t.aggregate(n=t.count()))["n"].iloc[0])
    return time.perf_counter() - t0, n


def spark_stages(session) -> list[dict]:
    url = session.sparkContext.uiWebUrl
    app = session.sparkContext.applicationId
    with urllib.request.urlopen(f"{url}/api/v1/applications/{app}/stages?status=complete") as r:
        return json.load(r)


def stage_skew(session, stage: dict) -> float:
    url = session.sparkContext.uiWebUrl
    app = session.sparkContext.applicationId
    q = f"{url}/api/v1/applications/{app}/stages/{stage['stageId']}/{stage['attemptId']}/taskSummary?quantiles=0.5,1.0"
    with urllib.request.urlopen(q) as r:
        run_time = json.load(r)["executorRunTime"]
    return run_time[1] / max(run_time[0], 1.0)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--users", type=int, default=200_000)
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--max-user-events", type=int, default=None,
                    help="limit for the second Spark run (default: the 99.9th percentile of events per user)")
    args = ap.parse_args()
    root = Path(tempfile.mkdtemp(prefix="labeler-spark-bench-"))
    path = root / "interactions.parquet"
    tax = synthesize(path, args.rows, args.users)
    per_user = pq.read_table(path, columns=["user_id"]).column("user_id").to_pandas().value_counts()
    print(f"{args.rows:,} interactions, {len(per_user):,} users; events per user: median "
          f"{int(per_user.median())}, p99 {int(per_user.quantile(0.99))}, max {int(per_user.max()):,} "
          f"({100 * per_user.max() / args.rows:.1f}% of all)", flush=True)
    cfg = LabelConfig()
    t_duck, n_duck = timed(str(path), tax, cfg, make_engine(EngineConfig(memory_limit="6GB")))
    print(f"duckdb: {t_duck:.1f}s, {n_duck:,} label rows", flush=True)
    spark = make_engine(EngineConfig(engine="spark", spark_master=f"local[{args.cores}]", driver_memory="8g",
                                     shuffle_partitions=max(8, 4 * args.cores),
                                     spark_conf={"spark.ui.enabled": "true", "spark.ui.port": "4050"}))
    before = {s["stageId"] for s in spark_stages(spark.session)}
    t_spark, n_spark = timed(str(path), tax, cfg, spark)
    stages = [s for s in spark_stages(spark.session) if s["stageId"] not in before]
    shuffle = sum(s.get("shuffleWriteBytes", 0) for s in stages)
    slowest = max(stages, key=lambda s: s.get("executorRunTime", 0))
    print(f"spark local[{args.cores}]: {t_spark:.1f}s, {n_spark:,} label rows; shuffle written "
          f"{shuffle / 2**30:.2f} GiB over {len(stages)} stages; slowest stage: max/median task time "
          f"{stage_skew(spark.session, slowest):.1f}x", flush=True)
    print(f"ratio spark / duckdb = {t_spark / t_duck:.2f}")
    limit = args.max_user_events or int(np.ceil(per_user.quantile(0.999)))
    heavy = int((per_user > limit).sum())
    before = {s["stageId"] for s in spark_stages(spark.session)}
    t_cap, n_cap = timed(str(path), tax, LabelConfig(max_user_events=limit), spark)
    stages = [s for s in spark_stages(spark.session) if s["stageId"] not in before]
    slowest = max(stages, key=lambda s: s.get("executorRunTime", 0))
    print(f"spark with max_user_events={limit} ({heavy} users, {int(per_user[per_user > limit].sum()):,} "
          f"interactions set aside): {t_cap:.1f}s (x{t_cap / t_spark:.2f}), slowest stage max/median task "
          f"time {stage_skew(spark.session, slowest):.1f}x")


if __name__ == "__main__":
    main()
