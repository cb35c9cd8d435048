"""Topic keywords by class-based TF-IDF and short readable names from them.

Class-based TF-IDF treats all text of one topic as one document: the weight of term t in class c
is tf(t, c) * log(1 + A / f(t)), with A the average number of words per class and f(t) the
frequency of t across all classes.
"""
from __future__ import annotations

import numpy as np
import pandas as pd


def class_tfidf_keywords(texts: pd.Series, classes: pd.Series, top_n: int = 10) -> dict[str, list[str]]:
    """Top ``top_n`` keywords per class; classes with no usable words get an empty list."""
    frame = pd.DataFrame({"text": texts.astype(str).to_numpy(), "cls": classes.to_numpy()})
    frame = frame[frame["cls"].notna()]
    if frame.empty:
        return {}
    docs = frame.groupby("cls", sort=True)["text"].apply(" ".join)
    try:
        from sklearn.feature_extraction.text import CountVectorizer  # only a build needs it (0.5 s)
        vec = CountVectorizer(stop_words="english", ngram_range=(1, 2), token_pattern=r"(?u)\b[a-zA-Z][a-zA-Z]+\b",
                              min_df=1)
        counts = vec.fit_transform(docs.to_numpy())
    except ValueError:  # nothing but stop words
        return {c: [] for c in docs.index}
    terms = np.asarray(vec.get_feature_names_out())
    counts = counts.astype(np.float64)
    words_per_class = np.asarray(counts.sum(axis=1)).ravel()
    avg = max(words_per_class.mean(), 1.0)
    freq = np.asarray(counts.sum(axis=0)).ravel()
    idf = np.log1p(avg / np.maximum(freq, 1.0))
    tf = counts.multiply(1.0 / np.maximum(words_per_class, 1.0)[:, None]).tocsr()
    out = {}
    for row, cls in enumerate(docs.index):
        r = tf.getrow(row)
        scores = r.data * idf[r.indices]
        order = np.lexsort((terms[r.indices], -scores))  # score desc, then term for ties
        out[cls] = [str(t) for t in terms[r.indices][order][:top_n]]
    return out


def readable_name(keywords: list[str], words: int = 3) -> str:
    """A short name from the top keywords, skipping words already covered by an earlier one.

    >>> readable_name(["sourdough", "sourdough bread", "bread", "starter"], 3)
    'sourdough bread / starter'
    """
    chosen: list[str] = []
    for kw in keywords:
        toks = set(kw.split())
        if any(toks <= set(c.split()) for c in chosen):
            continue
        chosen = [c for c in chosen if not set(c.split()) <= toks]
        chosen.append(kw)
        if len(chosen) >= words:
            break
    return " / ".join(chosen) if chosen else "(unnamed)"
