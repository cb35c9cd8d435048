"""Benchmark of the taxonomy build on real text at scale: WordNet 3.0 noun synsets.

N synsets drawn at random (not class-balanced), lemma + gloss as text, embedded with the packaged
model (content-hash cache under the test-data cache, so a second run skips the embedding). The
build with the current defaults is timed against, in the same run, the fine-topic method before
it (HDBSCAN's excess-of-mass clusters kept as they are, min_cluster_size 10); both are scored by
AMI against the lexicographer files (unplaced items as one group). WordNet is fetched as the
tests fetch it (Debian package `wordnet-base`, `apt-get download`).

    .venv/bin/python bench/taxonomy_wordnet.py [--items 50000]
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

METHODS = {"defaults": {},
           "previous method": {"min_cluster_size": 10, "cluster_selection": "eom", "fine_count": "clusters"}}


def main() -> None:
    from external import cache_dir, wordnet_nouns
    from sklearn.metrics import adjusted_mutual_info_score
    from labeler import TaxonomyConfig, build_taxonomy
    from labeler.embed import EmbeddingCache, SentenceEmbedder, embed_texts
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--items", type=int, default=50_000)
    args = ap.parse_args()
    wn = wordnet_nouns()
    wn = wn.sample(min(args.items, len(wn)), random_state=11).reset_index(drop=True)
    wn = wn.assign(title=wn["lemma"] + ": " + wn["gloss"])
    emb, cache = SentenceEmbedder(), str(cache_dir() / "embeddings")
    t0 = time.perf_counter()
    _, stats = embed_texts(wn["title"].tolist(), emb, EmbeddingCache(cache, emb.name), progress=True)
    print(f"embedding {len(wn):,} synsets: {time.perf_counter() - t0:.1f}s ({stats.hits:,} from the cache)")
    times = {}
    for name, kw in METHODS.items():
        t0 = time.perf_counter()
        tax = build_taxonomy(wn[["item_id", "title"]], TaxonomyConfig(text_columns=("title",), embedding_cache=cache,
                             **kw), embedder=emb, progress=False)
        times[name] = time.perf_counter() - t0
        placed = tax.item_topics[tax.item_topics["level"] == 1].set_index("item_id")["topic_id"]
        ami = adjusted_mutual_info_score(wn["lexfile"], wn["item_id"].map(placed).fillna("(unplaced)"))
        print(f"{name}: build {times[name]:.1f}s given embeddings, {tax.manifest['topics_per_level']['1']} fine / "
              f"{tax.manifest['topics_per_level']['0']} coarse topics, "
              f"{100 * tax.manifest['n_unplaced'] / len(wn):.1f}% unplaced, AMI vs lexicographer files {ami:.3f}")
    print(f"build time ratio defaults / previous method: {times['defaults'] / times['previous method']:.2f}")


if __name__ == "__main__":
    main()
