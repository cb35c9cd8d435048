"""Three simple recommendation policies, for the demo's offline evaluation and for baselines.

Each takes the interaction history before a request time and returns lists (user_id, ts,
item_id, rank, policy) of ``k`` items the user has not interacted with yet.
"""
from __future__ import annotations

import pandas as pd


def _popular(history: pd.DataFrame) -> pd.Series:
    return history.groupby("item_id").size().sort_values(ascending=False, kind="stable")


def _lists(rows, ts, name) -> pd.DataFrame:
    out = pd.DataFrame(rows, columns=["user_id", "item_id", "rank"])
    out.insert(1, "ts", ts)
    out["policy"] = name
    return out


def recommend(history: pd.DataFrame, tax, users, ts, k: int = 10, level: int | None = None,
              explore: int = 3) -> pd.DataFrame:
    """Lists from three policies for ``users`` at ``ts``: ``popularity`` (most played unseen items),
    ``in_profile`` (most played unseen items of the topics the user has played), and ``explore_mix``
    (in_profile with its last ``explore`` slots given to the most played items of topics the user
    has not played)."""
    level = max(tax.levels) if level is None else level
    it = tax.item_topics[tax.item_topics["level"] == level].sort_values(["item_id", "confidence"], ascending=[True, False])
    topic = it.drop_duplicates("item_id").set_index("item_id")["topic_id"]
    pop = _popular(history)
    ranked = pd.DataFrame({"item_id": pop.index, "plays": pop.to_numpy()})
    ranked["topic"] = ranked["item_id"].map(topic)
    seen = history.groupby("user_id")["item_id"].apply(set)
    played = history.assign(topic=history["item_id"].map(topic)).dropna(subset=["topic"]) \
        .groupby("user_id")["topic"].apply(set)
    out = {"popularity": [], "in_profile": [], "explore_mix": []}
    for u in users:
        s, mine = seen.get(u, set()), played.get(u, set())
        fresh = ranked[~ranked["item_id"].isin(s)]
        pop_list = fresh["item_id"].head(k).tolist()
        inside = fresh[fresh["topic"].isin(mine)]["item_id"].head(k).tolist()
        outside = fresh[fresh["topic"].notna() & ~fresh["topic"].isin(mine)]["item_id"].head(explore).tolist()
        mix = inside[: k - len(outside)] + outside
        for name, items in (("popularity", pop_list), ("in_profile", inside), ("explore_mix", mix)):
            out[name] += [(u, i, r + 1) for r, i in enumerate(items)]
    return pd.concat([_lists(rows, ts, name) for name, rows in out.items()], ignore_index=True)
