"""A fast encoder distilled from the sentence model: one vector per vocabulary token, averaged.

``taxonomy.encoder = "distilled"`` trades a little topic quality for speed on large catalogs. It
takes in the catalog's texts and the sentence model, and gives out an encoder whose vectors a
taxonomy is built from and new items are placed with. How it is made:

1. Token vectors. Every token of the model's vocabulary goes through the model alone
   (``[CLS] token [SEP]``); its mean-pooled output, centred and scaled, is the token's prior row.
2. Fit. A sample of the catalog (``taxonomy.distill_items``) is embedded with the model (cached by
   content hash). The table is fitted so that the mean of a text's token rows predicts the model's
   vector of that text: ridge regression pulled toward the prior,
   ``min |M W - Y|^2 + ridge |W - T0|^2``, solved by conjugate gradients for all columns at once.
3. Encoding. The model's own fast tokenizer, the mean of the text's token rows (one sparse
   product), unit length, less the mean of the fit texts' vectors, unit length again. Averaged
   token vectors share a large common direction; without removing it the silhouette that counts
   the fine topics sometimes chose two (seen on WordNet nouns). No transformer runs, so placing
   new items needs neither torch nor the model folder: the table (float16), the mean and the
   tokenizer are saved in the taxonomy folder.

Measured on WordNet 3.0 nouns (README, ``bench/encoder_static.py``): about 140x the model's
items/s on 2 cores, AMI within 0.03 of the model's on six seeds.
"""
from __future__ import annotations

import logging
from typing import Sequence

import numpy as np

log = logging.getLogger(__name__)

TABLE_ARRAY = "encoder_table"
MEAN_ARRAY = "encoder_mean"
TOKENIZER_FILE = "encoder_tokenizer.json"


def token_table(model) -> np.ndarray:
    """Step 1: each vocabulary token through ``model`` (a SentenceTransformer) alone, mean-pooled;
    centred, rows scaled to length 0.3."""
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


def mean_matrix(tokenizer, texts: Sequence[str], vocab: int):
    """Sparse rows, one per text, each the mean of the text's one-hot tokens (no [CLS]/[SEP])."""
    import scipy.sparse as sp
    enc = tokenizer.encode_batch(list(texts), add_special_tokens=False)
    lens = np.array([len(e.ids) for e in enc], dtype=np.int64)
    ind = np.concatenate([e.ids for e in enc]).astype(np.int64) if lens.sum() else np.zeros(0, np.int64)
    vals = np.repeat(1.0 / np.maximum(lens, 1), lens).astype(np.float32)
    return sp.csr_matrix((vals, ind, np.concatenate([[0], np.cumsum(lens)])), shape=(len(lens), vocab))


def load_tokenizer(tokenizer_json: str):
    """The model's fast tokenizer from its JSON, with no padding or truncation."""
    from tokenizers import Tokenizer
    tokenizer = Tokenizer.from_str(tokenizer_json)
    tokenizer.no_padding()
    tokenizer.no_truncation()
    return tokenizer


def refine(m, y: np.ndarray, prior: np.ndarray, ridge: float, iterations: int = 100) -> np.ndarray:
    """Step 2: solve (M'M + ridge I) W = M'Y + ridge T0 by conjugate gradients, all columns at once.

    Rows of tokens no text uses stay at the prior exactly (their residual starts and stays zero).
    """
    a = (m.T @ m).tocsr()
    b = m.T @ y + ridge * prior
    w = prior.copy()
    r = b - (a @ w + ridge * w)
    p, rs = r.copy(), (r * r).sum(0)
    for _ in range(iterations):
        ap = a @ p + ridge * p
        step = rs / ((p * ap).sum(0) + 1e-30)
        w += p * step
        r -= ap * step
        rn = (r * r).sum(0)
        if np.sqrt(rn.max()) < 1e-6:
            break
        p, rs = r + p * (rn / (rs + 1e-30)), rn
    return w


class DistilledEncoder:
    """Step 3: texts -> unit vectors from a token table, as an embedder the taxonomy build accepts.

    ``cacheable`` is False: its vectors depend on the fitted table, not on the text alone, and at
    about 20,000 items/s on 2 cores a million items take under a minute.
    """

    cacheable = False

    def __init__(self, tokenizer_json: str, table: np.ndarray, teacher: str, mean: np.ndarray | None = None):
        self.tokenizer_json, self.teacher = tokenizer_json, teacher
        self.table = np.asarray(table, dtype=np.float16)
        self._rows = self.table.astype(np.float32)
        self.mean = np.zeros(self.table.shape[1], np.float32) if mean is None else np.asarray(mean, np.float32)
        self.tokenizer = load_tokenizer(tokenizer_json)
        self.name = f"distilled-{teacher}"

    def _averaged(self, m) -> np.ndarray:
        """Unit-length means of token rows, for the texts of the mean matrix ``m``."""
        x = m @ self._rows
        return x / (np.linalg.norm(x, axis=1, keepdims=True) + 1e-12)

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        x = self._averaged(mean_matrix(self.tokenizer, texts, self._rows.shape[0])) - self.mean
        return (x / (np.linalg.norm(x, axis=1, keepdims=True) + 1e-12)).astype(np.float32)

    @classmethod
    def fit(cls, texts: Sequence[str], teacher, cache=None, ridge: float = 0.03,
            progress: bool = True) -> "DistilledEncoder":
        """Distil ``teacher`` (a :class:`labeler.embed.SentenceEmbedder`) on ``texts``.

        ``cache`` (an :class:`labeler.embed.EmbeddingCache` of the teacher) keeps the teacher's
        vectors of ``texts`` for the next fit.
        """
        import time
        from .embed import embed_texts
        t0 = time.perf_counter()
        tokenizer_json = (teacher.model_folder / "tokenizer.json").read_text(encoding="utf-8")
        prior = token_table(teacher.model)
        y, _ = embed_texts(list(texts), teacher, cache, progress=progress)
        m = mean_matrix(load_tokenizer(tokenizer_json), texts, prior.shape[0])
        fitted = cls(tokenizer_json, refine(m, y, prior, ridge), teacher.name)
        fitted.mean = fitted._averaged(m).mean(axis=0).astype(np.float32)  # the fit texts, tokenised once
        log.info("distilled a %d x %d token table from %s on %d texts in %.1fs", *fitted.table.shape,
                 teacher.name, len(texts), time.perf_counter() - t0)
        return fitted
