"""Stable topic ids across rebuilds: match new topics to old ones by item overlap."""
from __future__ import annotations

import numpy as np
import pandas as pd


def format_id(n: int) -> str:
    return f"t{n:04d}"


def id_number(topic_id: str) -> int:
    return int(topic_id[1:]) if topic_id[:1] == "t" and topic_id[1:].isdigit() else -1


def match_topics(new_members: dict[int, set[str]], old_members: dict[str, set[str]],
                 min_jaccard: float) -> dict[int, str]:
    """Map new cluster keys to old topic ids by Hungarian matching on Jaccard overlap.

    >>> match_topics({0: {"a", "b"}, 1: {"c"}}, {"t0007": {"a", "b", "x"}}, 0.3)
    {0: 't0007'}
    """
    if not new_members or not old_members:
        return {}
    new_keys, old_keys = list(new_members), sorted(old_members)
    jac = np.zeros((len(new_keys), len(old_keys)))
    for i, k in enumerate(new_keys):
        a = new_members[k]
        for j, o in enumerate(old_keys):
            b = old_members[o]
            inter = len(a & b)
            if inter:
                jac[i, j] = inter / len(a | b)
    from scipy.optimize import linear_sum_assignment  # only a rebuild needs it
    rows, cols = linear_sum_assignment(-jac)
    return {new_keys[r]: old_keys[c] for r, c in zip(rows, cols) if jac[r, c] >= min_jaccard}


def members_by_topic(item_topics: pd.DataFrame, level: int) -> dict[str, set[str]]:
    sub = item_topics[item_topics["level"] == level]
    return {t: set(g) for t, g in sub.groupby("topic_id")["item_id"]}
