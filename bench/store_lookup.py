"""Benchmark of the lookup store: build, open, and lookup latency.

U users with T topics each (synthetic footprints, 300 topics, 100k items), users asked for drawn
Zipf-distributed with 10% unknown ids. Reports build time and size on disk, open time, reader
RSS, p50/p99 of `footprint` and of `classify` with 500 candidates, and `classify_many` pairs/s.
Cold: before the pass the store's files are dropped from the OS page cache (posix_fadvise
DONTNEED; where the platform lacks it, only SQLite's cache is fresh) and a fresh Store is opened;
warm: the same pass again on that Store.

    .venv/bin/python bench/store_lookup.py [--users 1000000] [--topics-per-user 20] [--queries 2000]
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from labeler import LabelConfig, Taxonomy, open_store, publish_store  # noqa: E402

N_TOPICS, N_ITEMS = 300, 100_000


def synthetic(users: int, per_user: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    n = users * per_user
    uid = np.repeat(np.arange(users), per_user)
    topic = (rng.integers(0, N_TOPICS, n) + np.tile(np.arange(per_user) * 7, users)) % N_TOPICS
    t0 = pd.Timestamp("2026-01-01T00:00:00Z").value // 1000
    last = t0 + rng.integers(0, 90 * 86_400, n) * 1_000_000
    ids = np.char.add("u", np.char.zfill(uid.astype(str), 7))
    fp = pd.DataFrame({"user_id": ids, "level": 0, "topic_id": np.char.add("t", np.char.zfill(topic.astype(str), 4)),
                       "interactions": rng.integers(1, 30, n), "known": True,
                       "first_ts": pd.to_datetime(last - 86_400_000_000, unit="us", utc=True),
                       "last_ts": pd.to_datetime(last, unit="us", utc=True)})
    fp["engaged_interactions"] = fp["interactions"] // 2
    fp["known_since"] = fp["first_ts"]
    fp["history_len"] = 40
    fp["recent_us"] = [[int(x)] for x in last]
    fp = fp.drop_duplicates(["user_id", "level", "topic_id"])
    items = [f"i{k:06d}" for k in range(N_ITEMS)]
    it = pd.DataFrame({"item_id": items, "level": 0, "topic_id": [f"t{k % N_TOPICS:04d}" for k in range(N_ITEMS)],
                       "confidence": 1.0})
    top = pd.DataFrame({"topic_id": sorted(set(it["topic_id"])), "level": 0})
    top["name"] = "topic " + top["topic_id"]
    return fp, Taxonomy.from_tables(top, it, name="bench-store"), items


def drop_page_cache(root: Path) -> bool:
    """Ask the OS to forget the cached pages of every file under ``root`` (True if it could)."""
    if not hasattr(os, "posix_fadvise"):
        return False
    for f in root.rglob("*"):
        if f.is_file():
            fd = os.open(f, os.O_RDONLY)
            try:
                os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
            finally:
                os.close(fd)
    return True


def cold_store(root: Path, verify: bool = True):
    """A fresh Store over a store whose files were just dropped from the OS page cache (and whose
    checksums this process has not verified yet)."""
    from labeler.store import layout
    layout._VERIFIED.clear()
    dropped = drop_page_cache(root)
    return open_store(root, verify=verify), dropped


def pct(xs, q):
    return float(np.percentile(np.asarray(xs) * 1000, q))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--users", type=int, default=1_000_000)
    ap.add_argument("--topics-per-user", type=int, default=20)
    ap.add_argument("--queries", type=int, default=2000)
    args = ap.parse_args()
    rng = np.random.default_rng(1)
    fp, tax, items = synthetic(args.users, args.topics_per_user)
    with tempfile.TemporaryDirectory() as d:
        t0 = time.perf_counter()
        publish_store(Path(d) / "s", fp, tax, LabelConfig())
        build = time.perf_counter() - t0
        size = sum(f.stat().st_size for f in (Path(d) / "s").rglob("*") if f.is_file()) / 2**20
        print(f"build: {len(fp):,} footprint rows of {args.users:,} users in {build:.1f}s, {size:.0f} MiB on disk")
        del fp
        import gc
        gc.collect()
        t0 = time.perf_counter()
        store = open_store(Path(d) / "s")
        print(f"open: {1000 * (time.perf_counter() - t0):.1f} ms")
        ranks = np.minimum(rng.zipf(1.2, args.queries), args.users) - 1
        asked = [f"u{r:07d}" if rng.random() >= 0.1 else f"unknown{r}" for r in ranks]
        store, _ = cold_store(Path(d) / "s")
        t0 = time.perf_counter()
        for f in store.manifest["files"]:
            store.path(f)
        secs = time.perf_counter() - t0
        print(f"checksums: every file of the snapshot verified from a cold page cache in {secs:.2f}s "
              f"({size / secs:,.0f} MiB/s); a reader does this once per file, at its first read")
        for label in ("cold, sizes only", "cold", "warm"):
            if label.startswith("cold"):
                store, dropped = cold_store(Path(d) / "s", verify=label == "cold")
                print(f"{label} pass: OS page cache {'dropped' if dropped else 'NOT dropped'}, fresh Store")
            lat = []
            for u in asked:
                t0 = time.perf_counter()
                store.footprint(u)
                lat.append(time.perf_counter() - t0)
            print(f"footprint ({label}): p50 {pct(lat, 50):.3f} ms, p99 {pct(lat, 99):.3f} ms (goal p99 < 1 ms)")
        cands = [list(rng.choice(items, 500, replace=False)) for _ in range(min(200, args.queries))]
        for label in ("cold", "warm"):
            if label == "cold":
                store, _ = cold_store(Path(d) / "s")
                t0 = time.perf_counter()
                store.preload()
                print(f"item catalog load (once per reader and snapshot): {1000 * (time.perf_counter() - t0):.0f} ms")
            lat = []
            for u, c in zip(asked, cands):
                t0 = time.perf_counter()
                store.classify(u, c)
                lat.append(time.perf_counter() - t0)
            print(f"classify 500 candidates ({label}): p50 {pct(lat, 50):.2f} ms, p99 {pct(lat, 99):.2f} ms "
                  f"(goal p99 < 5 ms)")
        pairs = pd.DataFrame({"user_id": np.repeat(asked[:200], 500), "item_id": np.concatenate(cands)})
        t0 = time.perf_counter()
        store.classify_many(pairs)
        secs = time.perf_counter() - t0
        print(f"classify_many: {len(pairs) / secs:,.0f} pairs/s")
        # a reader in its own process: its peak RSS is the reader's alone, not the build's
        probe = (f"import numpy as np; from labeler import open_store; s = open_store({str(Path(d) / 's')!r}); "
                 f"items = {list(map(str, items[:5000]))!r}; rng = np.random.default_rng(2)\n"
                 f"for k in range(200): s.footprint(f'u{{k:07d}}'); s.classify(f'u{{k:07d}}', list(rng.choice(items, 500)))\n"
                 # VmHWM: this process's own peak (ru_maxrss would carry the forking parent's over exec)
                 "print([int(l.split()[1]) for l in open('/proc/self/status') if l.startswith('VmHWM')][0] / 1024)")
        import subprocess
        import sys
        peak = float(subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                                    check=True).stdout.strip().splitlines()[-1])
        print(f"reader peak RSS (own process: import, open, 200 footprints and 200 classify calls): {peak:.0f} MiB")


if __name__ == "__main__":
    main()
