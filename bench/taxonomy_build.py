"""Benchmarks of the taxonomy build.

1. Embedding throughput with the real model, cold (empty cache) and warm (every text cached):
   items/s each, and the ratio warm / cold measured in the same run.
2. Build time given embeddings for 10k, 50k and 200k items (synthetic unit vectors around 300
   centres in 384 dimensions, fed through a precomputed embedder), each in its own process so
   its peak RSS is its own; times are printed as ratios to the 10k build of the same run.

    .venv/bin/python bench/taxonomy_build.py [--sizes 10000 50000 200000] [--texts 2000]
"""
from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


class Precomputed:
    """An embedder that returns stored vectors for texts of the form 'item <n>'."""

    name = "precomputed"

    def __init__(self, vectors: np.ndarray):
        self.vectors = vectors

    def encode(self, texts):
        return self.vectors[[int(t.split()[1]) for t in texts]]


def synthetic(n: int, centres: int = 300, dim: int = 384, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    c = rng.normal(size=(centres, dim))
    c /= np.linalg.norm(c, axis=1, keepdims=True)
    x = c[rng.integers(0, centres, n)] + rng.normal(scale=0.045, size=(n, dim))
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)


def build_once(n: int) -> dict:
    from labeler import TaxonomyConfig, build_taxonomy
    vecs = synthetic(n)
    items = pd.DataFrame({"item_id": [f"i{k:07d}" for k in range(n)], "title": [f"item {k}" for k in range(n)]})
    t0 = time.perf_counter()
    tax = build_taxonomy(items, TaxonomyConfig(text_columns=("title",)), embedder=Precomputed(vecs), progress=False)
    secs = time.perf_counter() - t0
    return {"items": n, "seconds": secs, "fine_topics": tax.manifest["topics_per_level"]["1"],
            "unplaced": tax.manifest["n_unplaced"],
            "peak_rss_gib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20}


def embedding_throughput(n_texts: int) -> None:
    from labeler.demo import generate_scenario
    from labeler.embed import EmbeddingCache, SentenceEmbedder, embed_texts
    from labeler.tables import item_text
    texts = item_text(generate_scenario(seed=11, n_items=n_texts, n_users=1, weeks=1).items,
                      ("title", "description", "tags")).tolist()
    emb = SentenceEmbedder()
    emb.encode(texts[:8])  # load the model outside the timing
    with tempfile.TemporaryDirectory() as d:
        t0 = time.perf_counter()
        embed_texts(texts, emb, EmbeddingCache(d, emb.name), progress=False)
        cold = time.perf_counter() - t0
        t0 = time.perf_counter()
        _, stats = embed_texts(texts, emb, EmbeddingCache(d, emb.name), progress=False)
        warm = time.perf_counter() - t0
    n = len(set(texts))
    print(f"embedding {n} texts: cold {n / cold:.0f} items/s, warm (all {stats.hits} cached) "
          f"{n / warm:.0f} items/s, warm/cold speed-up {cold / warm:.0f}x")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[10_000, 50_000, 200_000])
    ap.add_argument("--texts", type=int, default=2000)
    ap.add_argument("--one", type=int, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        print(json.dumps(build_once(args.one)))
        return
    embedding_throughput(args.texts)
    results = []
    for n in args.sizes:
        out = subprocess.run([sys.executable, __file__, "--one", str(n)], capture_output=True, text=True,
                             check=True)
        results.append(json.loads(out.stdout.strip().splitlines()[-1]))
    base = results[0]["seconds"]
    for r in results:
        print(f"build {r['items']:>7,} items given embeddings: {r['seconds']:.1f}s "
              f"(x{r['seconds'] / base:.1f} the {results[0]['items']:,} build), {r['fine_topics']} fine topics, "
              f"{r['unplaced']} unplaced, peak RSS {r['peak_rss_gib']:.2f} GiB")


if __name__ == "__main__":
    main()
