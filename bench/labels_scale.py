"""Benchmark: `labeler label` from Parquet at growing sizes, streaming its outputs to disk.

For each size (default 1M, 10M, 100M interactions) it writes a synthetic log (as in
labels_vs_sql.py, users scaled with the size), runs the command in a child process with a
bounded DuckDB memory limit, and reports wall time, the time ratio to the smallest size, and the
child's peak RSS (the whole process tree: the command starts no further processes).

With ``--activity lognormal`` users' activity is log-normal (the heaviest user holds about 0.1% of
the events), the realistic case; the default Zipf draw puts about a quarter of all events on one user.
``--bucket-rows`` sets engine.bucket_rows (full runs over more interactions go in pieces of users).

    .venv/bin/python bench/labels_scale.py [--sizes 1000000 10000000 100000000] [--memory-limit 2GB]
        [--activity lognormal] [--bucket-rows 10000000] [--workdir DIR --keep-data]

``--keep-data`` keeps each size's synthetic log in ``--workdir`` and reuses one found there (a log
of a billion rows takes about as long to write as to label).
"""
from __future__ import annotations

import argparse
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from labels_vs_sql import synthesize  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[1_000_000, 10_000_000, 100_000_000])
    ap.add_argument("--memory-limit", default="2GB")
    ap.add_argument("--workdir", default=None, help="where the data goes (needs ~25 bytes per row)")
    ap.add_argument("--activity", choices=["zipf", "lognormal"], default="zipf")
    ap.add_argument("--bucket-rows", type=int, default=2_500_000)
    ap.add_argument("--keep-data", action="store_true", help="keep (and reuse) the synthetic logs in --workdir")
    ap.add_argument("--compression", choices=["lz4", "zstd"], default="lz4", help="engine.output_compression")
    ap.add_argument("--log", default=None, help="the command's messages (pieces done) go to this file, not away")
    args = ap.parse_args()
    root = Path(args.workdir or tempfile.mkdtemp(prefix="labeler-scale-"))
    exe = Path(sys.executable).parent / "labeler"
    base = None
    for n in args.sizes:
        d = root / f"n{n}"
        d.mkdir(parents=True, exist_ok=True)
        if not (args.keep_data and (d / "tax").exists()):
            t0 = time.perf_counter()
            tax = synthesize(d / "interactions.parquet", n, max(20_000, n // 50), activity=args.activity)
            tax.save(d / "tax")
            print(f"{n:>12,} interactions written in {time.perf_counter() - t0:.1f}s", flush=True)
        (d / "job.toml").write_text(f'[engine]\nmemory_limit = "{args.memory_limit}"\ntemp_dir = "{d / "spill"}"\n'
                                    f'bucket_rows = {args.bucket_rows}\noutput_compression = "{args.compression}"\n')
        before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
        t0 = time.perf_counter()
        log = open(args.log, "a") if args.log else subprocess.DEVNULL
        subprocess.run([str(exe), "label", "--taxonomy", str(d / "tax"), "--interactions",
                        str(d / "interactions.parquet"), "--out", str(d / "out"), "--config", str(d / "job.toml")]
                       + ([] if args.log else ["-q"]), check=True, stdout=log, stderr=log if args.log else None)
        out_gb = sum(f.stat().st_size for f in (d / "out").rglob("*") if f.is_file()) / 2**30
        secs = time.perf_counter() - t0
        peak = max(before, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss) / 2**20
        base = base or secs
        print(f"{n:>12,} interactions ({args.activity}): {secs:7.1f}s (x{secs / base:.1f} the {args.sizes[0]:,} run, "
              f"{secs / base / (n / args.sizes[0]):.2f} of linear), "
              f"peak RSS of the child {peak:.2f} GiB (memory_limit {args.memory_limit}), "
              f"outputs {out_gb:.1f} GiB ({args.compression})", flush=True)
        shutil.rmtree(d / "out", ignore_errors=True)
        shutil.rmtree(d / "spill", ignore_errors=True)
        if not args.keep_data:
            shutil.rmtree(d, ignore_errors=True)
    if not args.keep_data:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
