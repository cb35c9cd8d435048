"""The fast encoder (issue 16, item 4): ``taxonomy.encoder = "distilled"`` against the model.

``labeler/distilled.py`` says how the encoder is made. This bench fits it as a catalog would (on a
part of the catalog embedded with the model) and measures, in the same run:
- items/s of the model cold (no cache), of the model from the content-hash cache, and of the
  distilled encoder (which has no cache: it is faster than reading one), alternating, best of 2;
- AMI against the 26 lexicographer files (scikit-learn) of KMeans told k = 26 (median of 3 starts)
  and of the taxonomy's fine level, model vectors against distilled vectors.

Data: WordNet 3.0 nouns (Princeton University; Debian package `wordnet-base`, fetched as the tests
fetch it). Scored samples are class-balanced (120 synsets per lexicographer file, the samples
test_taxonomy_quality.py uses); the fit texts are ``--fit-nouns`` noun glosses that no scored sample
holds. ``--general`` adds WordNet's 35,544 verb, adjective and adverb glosses to the fit texts (the
corpus of the first trials). The model's vectors are cached by content hash under the test-data cache.

    .venv/bin/python bench/encoder_static.py [--seeds 0 1 2] [--fit-nouns 20000] [--ridge 0.03]
        [--speed-items 3000] [--general]
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))


def rates(encoders: dict, texts: list[str]) -> dict[str, float]:
    """items/s of each encoder (a callable of a list of texts), alternating, best of 2."""
    out: dict[str, list[float]] = {}
    for _ in range(2):
        for name, encode in encoders.items():
            t0 = time.perf_counter()
            encode(texts)
            out.setdefault(name, []).append(len(texts) / (time.perf_counter() - t0))
    return {name: max(v) for name, v in out.items()}


def main() -> None:
    os.environ["HF_HUB_OFFLINE"] = "1"
    import tempfile
    from external import cache_dir, wordnet_noun_glosses_outside, wordnet_synsets
    from sklearn.cluster import KMeans
    from sklearn.metrics import adjusted_mutual_info_score
    from labeler import TaxonomyConfig, build_taxonomy
    from labeler.distilled import DistilledEncoder
    from labeler.embed import EmbeddingCache, SentenceEmbedder, embed_texts

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    ap.add_argument("--fit-nouns", type=int, default=20_000, metavar="N")
    ap.add_argument("--ridge", type=float, default=0.03)
    ap.add_argument("--speed-items", type=int, default=3000)
    ap.add_argument("--general", action="store_true", help="add the verb/adjective/adverb glosses to the fit texts")
    args = ap.parse_args()

    teacher = SentenceEmbedder()
    cache = cache_dir() / "embeddings"
    nouns = wordnet_synsets("noun")
    nouns = nouns.assign(title=nouns["lemma"] + ": " + nouns["gloss"])
    samples = {seed: nouns.sample(frac=1.0, random_state=seed).groupby("lexfile").head(120).reset_index(drop=True)
               for seed in args.seeds}
    scored = set().union(*(set(x["item_id"]) for x in samples.values()))
    corpus = wordnet_noun_glosses_outside(scored, args.fit_nouns)
    if args.general:
        corpus += [f"{r.lemma}: {r.gloss}" for pos in ("verb", "adj", "adv") for r in wordnet_synsets(pos).itertuples()]
    t0 = time.perf_counter()
    enc = DistilledEncoder.fit(corpus, teacher, EmbeddingCache(cache, teacher.name), ridge=args.ridge)
    print(f"fit on {len(corpus):,} texts (ridge {args.ridge}): {time.perf_counter() - t0:.1f}s "
          f"(the model's vectors of them from the cache where present)")

    speed = nouns.sample(args.speed_items, random_state=123)["title"].tolist()
    with tempfile.TemporaryDirectory() as tmp:
        warm = EmbeddingCache(tmp, teacher.name)
        embed_texts(speed, teacher, warm, progress=False)
        got = rates({"model (cold)": lambda t: embed_texts(t, teacher, None, progress=False),
                     "model (cached)": lambda t: embed_texts(t, teacher, EmbeddingCache(tmp, teacher.name),
                                                             progress=False),
                     "distilled": lambda t: embed_texts(t, enc, None, progress=False)}, speed)
    base = got["model (cold)"]
    print(f"items/s on {len(speed):,} noun glosses (best of 2, alternating): "
          + ", ".join(f"{k} {v:,.0f} ({v / base:.0f}x)" for k, v in got.items()))

    for seed in args.seeds:
        sample = samples[seed]
        texts, truth = sample["title"].tolist(), sample["lexfile"]
        scores = {}
        for name, e in (("model", teacher), ("distilled", enc)):
            x, _ = embed_texts(texts, e, EmbeddingCache(cache, e.name) if name == "model" else None, progress=False)
            km = [adjusted_mutual_info_score(truth, KMeans(26, n_init=10, random_state=r).fit_predict(x))
                  for r in range(3)]
            tax = build_taxonomy(sample[["item_id", "title"]], TaxonomyConfig(
                text_columns=("title",), embedding_cache=str(cache) if name == "model" else None),
                embedder=e, progress=False)
            placed = tax.item_topics[tax.item_topics["level"] == 1].set_index("item_id")["topic_id"]
            ours = sample["item_id"].map(placed).fillna("(unplaced)")
            scores[name] = (float(np.median(km)), adjusted_mutual_info_score(truth, ours))
        (mk, mf), (dk, df) = scores["model"], scores["distilled"]
        print(f"seed {seed} ({len(sample):,} nouns): KMeans k=26 AMI model {mk:.4f}, distilled {dk:.4f} "
              f"(loss {mk - dk:+.4f}); taxonomy fine AMI model {mf:.4f}, distilled {df:.4f} (loss {mf - df:+.4f})",
              flush=True)


if __name__ == "__main__":
    main()
