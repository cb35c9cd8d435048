"""Topic keywords by class-based TF-IDF and short readable names from them.

Class-based TF-IDF treats all text of one topic as one document: the weight of term t in class c
is tf(t, c) * log(1 + A / f(t)), with A the average number of words per class and f(t) the
frequency of t across all classes.

Terms are single words and pairs of words that stand next to each other in the text (a pair
is never made across a dropped word). English stop words (scikit-learn's list) and a short list
of common fillers (``FILLERS``: words any text uses, such as "just", "really" or "make") never
count. Only *distinctive* terms are ranked: a term must be in at least ``min_share`` of the topic's
items (a word of one item's text says nothing of the topic) and in at least ``min_lift`` times
as large a share of them as of the other topics' items (a word every topic uses, such as the
phrasing of a template, is filler whatever its count). A name is up to ``words`` of those
keywords, listed alphabetically, so the same keywords give the same name in whatever order they
rank; names are made distinct within a level.
"""
from __future__ import annotations

import re

import numpy as np
import pandas as pd

MIN_SHARE = 0.05
MIN_LIFT = 2.0
# words of no topic that stop-word lists leave in (from memory of common English filler; extend
# it in a fork if a catalog's language needs more)
FILLERS = frozenset("""
    actually also really just simply quite very pretty maybe
    thing things stuff way ways lot lots bit kind sort
    today new good great best better nice awesome amazing
    like make makes making made use uses using used get gets getting got go going know want need
    let lets try trying tried start starting started step steps
    video videos part episode vs ok okay
""".split())
_WORD = re.compile(r"(?u)\b[a-zA-Z][a-zA-Z]+\b")
_CLAUSE = re.compile(r"[.,;:!?()\[\]{}\"|/]+")


def terms_of(text: str, stop: frozenset[str]) -> list[str]:
    """The words of ``text`` (lower case, two letters or more) and the pairs of neighbouring
    words inside one clause, leaving out any with a word from ``stop``.

    >>> terms_of("Honest review. Follow along: questions answered", FILLERS)
    ['honest', 'review', 'follow', 'along', 'questions', 'answered', 'honest review', 'follow along', 'questions answered']
    """
    out, pairs = [], []
    for clause in _CLAUSE.split(text.lower()):  # a pair never spans punctuation
        words = _WORD.findall(clause)
        keep = [w not in stop for w in words]
        out += [w for w, k in zip(words, keep) if k]
        pairs += [f"{a} {b}" for (a, ka), (b, kb) in zip(zip(words, keep), zip(words[1:], keep[1:])) if ka and kb]
    return out + pairs


def class_tfidf_keywords(texts: pd.Series, classes: pd.Series, top_n: int = 10, min_share: float = MIN_SHARE,
                         min_lift: float = MIN_LIFT) -> dict[str, list[str]]:
    """Top ``top_n`` distinctive keywords per class (see the module docstring); a class with no
    distinctive words keeps its best plain c-TF-IDF terms; one with no usable words gets []."""
    frame = pd.DataFrame({"text": texts.astype(str).to_numpy(), "cls": classes.to_numpy()})
    frame = frame[frame["cls"].notna()]
    if frame.empty:
        return {}
    labels = np.asarray(sorted(frame["cls"].unique()), dtype=object)
    try:
        from scipy import sparse
        from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS, CountVectorizer  # a build's only (0.5 s)
        stop = frozenset(ENGLISH_STOP_WORDS) | FILLERS
        vec = CountVectorizer(analyzer=lambda text: terms_of(text, stop), min_df=1)
        counts = vec.fit_transform(frame["text"].to_numpy())  # items x terms
    except ValueError:  # nothing but stop words
        return {c: [] for c in labels}
    terms = np.asarray(vec.get_feature_names_out())
    row_class = np.searchsorted(labels, frame["cls"].to_numpy())
    member = sparse.csr_matrix((np.ones(len(frame)), (row_class, np.arange(len(frame)))),
                               shape=(len(labels), len(frame)))
    class_counts = (member @ counts).tocsr().astype(np.float64)             # classes x terms: occurrences
    class_items = (member @ (counts > 0).astype(np.float64)).tocsr()        # classes x terms: items using it
    n_items = np.asarray(member.sum(axis=1)).ravel()
    all_items = np.asarray(class_items.sum(axis=0)).ravel()
    words_per_class = np.asarray(class_counts.sum(axis=1)).ravel()
    avg = max(words_per_class.mean(), 1.0)
    idf = np.log1p(avg / np.maximum(np.asarray(class_counts.sum(axis=0)).ravel(), 1.0))
    out = {}
    for row, cls in enumerate(labels):
        r, used = class_counts.getrow(row), class_items.getrow(row)
        idx = r.indices
        scores = r.data / max(words_per_class[row], 1.0) * idf[idx]
        share_in = np.asarray(used[:, idx].todense()).ravel() / max(n_items[row], 1.0)
        others = max(len(frame) - n_items[row], 1.0)
        share_out = (all_items[idx] - share_in * n_items[row]) / others
        distinct = (share_in >= min_share) & (share_in >= min_lift * share_out)
        pick = np.flatnonzero(distinct) if distinct.any() else np.arange(len(idx))
        order = pick[np.lexsort((terms[idx][pick], -scores[pick]))]  # score desc, then term for ties
        out[cls] = [str(t) for t in terms[idx][order][:top_n]]
    return out


def readable_name(keywords: list[str], words: int = 3) -> str:
    """A short name from the top keywords: among the first ``2 * words``, a pair of words takes
    the place of its single words, and a word already in a chosen pair is skipped; the first
    ``words`` left are listed alphabetically (the same keywords ranked otherwise give the same name).

    >>> readable_name(["sourdough", "sourdough bread", "bread", "starter"], 3)
    'sourdough bread / starter'
    >>> readable_name(["starter", "sourdough bread"], 3)
    'sourdough bread / starter'
    >>> readable_name(["answered", "catch", "questions", "questions answered", "chat"], 2)
    'catch / questions answered'
    """
    chosen: list[str] = []
    for kw in keywords[:2 * words]:
        toks = set(kw.split())
        if any(toks <= set(c.split()) for c in chosen):
            continue
        chosen = [c for c in chosen if not set(c.split()) <= toks]
        chosen.append(kw)
    return " / ".join(sorted(chosen[:words])) if chosen else "(unnamed)"


def distinct_names(keywords: dict[str, list[str]], words: int = 3) -> dict[str, str]:
    """A readable name per topic, distinct among ``keywords``' topics: where names collide, each
    topic adds its next keyword not yet in its name, up to twice ``words``; a collision left after
    that is told apart by the topic's id.

    >>> distinct_names({"a": ["bread", "rye"], "b": ["bread", "cake"]}, 1)
    {'a': 'bread / rye', 'b': 'bread / cake'}
    """
    size = {t: words for t in keywords}
    names = {t: readable_name(kw, words) for t, kw in keywords.items()}
    for _ in range(words):
        seen: dict[str, list[str]] = {}
        for t, n in names.items():
            seen.setdefault(n.casefold(), []).append(t)
        clashes = [t for ts in seen.values() if len(ts) > 1 for t in ts]
        if not clashes:
            return names
        for t in clashes:
            size[t] += 1
            names[t] = readable_name(keywords[t], size[t])
    seen = {}
    for t, n in sorted(names.items()):
        seen.setdefault(n.casefold(), []).append(t)
    return {t: (f"{n} ({t})" if len(seen[n.casefold()]) > 1 else n) for t, n in names.items()}
