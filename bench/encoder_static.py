"""Experiment toward a fast encoder (issue 16, item 4): a static token table distilled from the packaged model.

Not a product option yet: this bench records how far the method gets, so the next step starts from figures.

The method, step by step:
1. Token vectors. Every token of the model's vocabulary goes through the model alone
   ([CLS] token [SEP]); its mean-pooled output is the token's vector. These are centred and
   scaled to form the prior table.
2. Refinement. A distillation corpus is embedded once with the model. The table is then fitted so
   that the mean of a text's token vectors predicts the model's vector of that text: a ridge
   regression pulled toward the prior, min |M W - Y|^2 + lam |W - T0|^2, solved by conjugate
   gradients. The corpus here is WordNet 3.0's verb, adjective and adverb glosses, so no noun text
   is seen; ``--fit-nouns N`` adds N noun glosses, none of them in a scored sample (what a catalog
   would do: distil on a part of itself embedded with the model, encode the rest), and
   ``--nouns-only`` keeps those alone.
3. Encoding. Tokenise with the model's own fast tokenizer, average the token rows (a sparse
   product), L2-normalise. No transformer runs.

Measured in the same run on class-balanced WordNet noun samples (120 synsets per lexicographer
file, the samples test_taxonomy_quality.py uses):
- items/s of the model (cold, no cache) and of the static encoder;
- AMI against the 26 lexicographer files (scikit-learn) of KMeans told k = 26 (median of 3 starts)
  and of the taxonomy's fine level, for the model's vectors and the static encoder's.

Source of the data: WordNet 3.0 (Princeton University), Debian package `wordnet-base`, fetched as
the tests fetch it. The model's vectors are cached by content hash under the test-data cache.

With ``--sif A`` a text's tokens are averaged with smooth inverse frequency weights (tried at
A = 0.001 on 2026-12-04: no gain, see the README).

    .venv/bin/python bench/encoder_static.py [--seeds 0 1 2] [--lam 0.03] [--speed-items 3000] [--sif A]
        [--fit-nouns N [--nouns-only]]
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))


def token_table(model) -> np.ndarray:
    """Step 1: each vocabulary token through the model alone, mean-pooled; centred, rows scaled to 0.3."""
    import torch
    encoder, tok = model[0].auto_model, model.tokenizer
    out = np.zeros((tok.vocab_size, encoder.config.hidden_size), np.float32)
    with torch.inference_mode():
        for start in range(0, tok.vocab_size, 1024):
            ids = torch.arange(start, min(tok.vocab_size, start + 1024))
            x = torch.stack([torch.full_like(ids, tok.cls_token_id), ids, torch.full_like(ids, tok.sep_token_id)], 1)
            out[start:start + len(ids)] = encoder(input_ids=x, attention_mask=torch.ones_like(x)).last_hidden_state.mean(1)
    out -= out.mean(0)
    return 0.3 * out / (np.linalg.norm(out, axis=1, keepdims=True) + 1e-12)


def mean_matrix(tokenizer, texts: list[str], vocab: int, weights: np.ndarray | None = None) -> sp.csr_matrix:
    """Rows: texts; each row averages the text's tokens (no [CLS]/[SEP]), weighted by ``weights``
    (one per vocabulary token; None: all equal)."""
    enc = tokenizer.encode_batch(texts, add_special_tokens=False)
    lens = np.array([len(e.ids) for e in enc])
    ind = np.concatenate([e.ids for e in enc]).astype(np.int64) if len(enc) else np.zeros(0, np.int64)
    w = np.ones(len(ind), np.float64) if weights is None else weights[ind].astype(np.float64)
    starts = np.concatenate([[0], np.cumsum(lens)])
    totals = np.bincount(np.repeat(np.arange(len(texts)), lens), weights=w, minlength=len(texts))
    vals = (w / np.repeat(np.where(lens > 0, totals, 1.0), lens)).astype(np.float32)
    return sp.csr_matrix((vals, ind, starts), shape=(len(texts), vocab))


def sif_weights(tokenizer, texts: list[str], vocab: int, a: float) -> np.ndarray:
    """Smooth inverse frequency weights a / (a + p(token)), p counted on ``texts`` (Arora, Liang and
    Ma, ICLR 2017); a token never seen gets weight 1."""
    enc = tokenizer.encode_batch(texts, add_special_tokens=False)
    counts = np.bincount(np.concatenate([e.ids for e in enc]), minlength=vocab).astype(np.float64)
    return a / (a + counts / counts.sum())


def refine(m: sp.csr_matrix, y: np.ndarray, prior: np.ndarray, lam: float, iters: int = 100) -> np.ndarray:
    """Step 2: (M'M + lam I) W = M'Y + lam T0 by conjugate gradients, all columns at once."""
    a = (m.T @ m).tocsr()
    b = m.T @ y + lam * prior
    w = prior.copy()
    r = b - (a @ w + lam * w)
    p, rs = r.copy(), (r * r).sum(0)
    for _ in range(iters):
        ap = a @ p + lam * p
        step = rs / ((p * ap).sum(0) + 1e-30)
        w += p * step
        r -= ap * step
        rn = (r * r).sum(0)
        if np.sqrt(rn.max()) < 1e-6:
            break
        p, rs = r + p * (rn / (rs + 1e-30)), rn
    return w


class StaticEncoder:
    """Step 3, as an embedder the taxonomy build accepts."""

    def __init__(self, tokenizer, table: np.ndarray, name: str, weights: np.ndarray | None = None):
        self.tokenizer, self.table, self.name, self.weights = tokenizer, table, name, weights

    def encode(self, texts):
        x = mean_matrix(self.tokenizer, list(texts), self.table.shape[0], self.weights) @ self.table
        return (x / (np.linalg.norm(x, axis=1, keepdims=True) + 1e-12)).astype(np.float32)


def main() -> None:
    os.environ["HF_HUB_OFFLINE"] = "1"
    from external import cache_dir, wordnet_synsets
    from sklearn.cluster import KMeans
    from sklearn.metrics import adjusted_mutual_info_score
    from tokenizers import Tokenizer
    from labeler import TaxonomyConfig, build_taxonomy
    from labeler.embed import EmbeddingCache, SentenceEmbedder, embed_texts

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    ap.add_argument("--lam", type=float, default=0.03)
    ap.add_argument("--speed-items", type=int, default=3000)
    ap.add_argument("--fit-nouns", type=int, default=0, metavar="N",
                    help="add N noun glosses to the distillation corpus, none of them in a scored sample (a "
                         "catalog distilling on a part of itself and encoding the rest)")
    ap.add_argument("--nouns-only", action="store_true",
                    help="with --fit-nouns: leave the verb/adjective/adverb glosses out of the corpus")
    ap.add_argument("--sif", type=float, default=None, metavar="A",
                    help="weight tokens by smooth inverse frequency a / (a + p), p from the distillation corpus")
    args = ap.parse_args()

    model_embedder = SentenceEmbedder()
    model = model_embedder._load()
    tokenizer = Tokenizer.from_file(str(model_embedder._path / "tokenizer.json"))
    tokenizer.no_padding()
    tokenizer.no_truncation()
    cache = cache_dir() / "embeddings"

    t0 = time.perf_counter()
    prior = token_table(model)
    print(f"token table: {prior.shape[0]:,} tokens in {time.perf_counter() - t0:.1f}s")
    other = [wordnet_synsets(pos) for pos in ("verb", "adj", "adv")]
    corpus = [f"{r.lemma}: {r.gloss}" for df in other for r in df.itertuples()]
    nouns = wordnet_synsets("noun")
    nouns = nouns.assign(title=nouns["lemma"] + ": " + nouns["gloss"])
    samples = {seed: nouns.sample(frac=1.0, random_state=seed).groupby("lexfile").head(120).reset_index(drop=True)
               for seed in args.seeds}
    if args.fit_nouns:
        scored = set().union(*(set(x["item_id"]) for x in samples.values()))
        # drawn as bench/taxonomy_wordnet.py draws its 50,000 (their vectors are cached), then cut
        pool = nouns.sample(min(50_000, len(nouns)), random_state=11)
        held_out = pool[~pool["item_id"].isin(scored)]["title"].head(args.fit_nouns).tolist()
        corpus = held_out if args.nouns_only else corpus + held_out
    t0 = time.perf_counter()
    y, stats = embed_texts(corpus, model_embedder, EmbeddingCache(cache, model_embedder.name), progress=True)
    print(f"distillation corpus: {len(corpus):,} glosses ({args.fit_nouns:,} of them nouns) embedded in "
          f"{time.perf_counter() - t0:.1f}s ({stats.hits:,} from the cache)")
    t0 = time.perf_counter()
    weights = None if args.sif is None else sif_weights(tokenizer, corpus, prior.shape[0], args.sif)
    table = refine(mean_matrix(tokenizer, corpus, prior.shape[0], weights), y, prior, args.lam)
    print(f"refinement (lam {args.lam}, token weights {'SIF a=%g' % args.sif if weights is not None else 'equal'}): "
          f"{time.perf_counter() - t0:.1f}s")
    static = StaticEncoder(tokenizer, table, f"static-wordnet-other-pos-lam{args.lam}-sif{args.sif}", weights)

    speed = nouns.sample(args.speed_items, random_state=123)["title"].tolist()
    rates = {}
    for name, enc in (("model", model_embedder), ("static", static), ("model", model_embedder), ("static", static)):
        t0 = time.perf_counter()
        for start in range(0, len(speed), 256):
            enc.encode(speed[start:start + 256])
        rates.setdefault(name, []).append(len(speed) / (time.perf_counter() - t0))
    model_rate, static_rate = max(rates["model"]), max(rates["static"])
    print(f"items/s on {len(speed):,} noun glosses (best of 2, alternating): model {model_rate:,.0f}, "
          f"static {static_rate:,.0f}: {static_rate / model_rate:.0f}x")

    for seed in args.seeds:
        sample = samples[seed]
        texts, truth = sample["title"].tolist(), sample["lexfile"]
        scores = {}
        for name, enc in (("model", model_embedder), ("static", static)):
            x, _ = embed_texts(texts, enc, EmbeddingCache(cache, enc.name) if name == "model" else None, progress=False)
            km = [adjusted_mutual_info_score(truth, KMeans(26, n_init=10, random_state=r).fit_predict(x))
                  for r in range(3)]
            cached = str(cache) if name == "model" else None
            tax = build_taxonomy(sample[["item_id", "title"]], TaxonomyConfig(text_columns=("title",),
                                 embedding_cache=cached), embedder=enc, progress=False)
            placed = tax.item_topics[tax.item_topics["level"] == 1].set_index("item_id")["topic_id"]
            ours = sample["item_id"].map(placed).fillna("(unplaced)")
            scores[name] = (float(np.median(km)), adjusted_mutual_info_score(truth, ours))
        print(f"seed {seed} ({len(sample):,} nouns): KMeans k=26 AMI model {scores['model'][0]:.4f}, static "
              f"{scores['static'][0]:.4f} (loss {scores['model'][0] - scores['static'][0]:+.4f}); taxonomy fine AMI "
              f"model {scores['model'][1]:.4f}, static {scores['static'][1]:.4f} "
              f"(loss {scores['model'][1] - scores['static'][1]:+.4f})", flush=True)


if __name__ == "__main__":
    main()
