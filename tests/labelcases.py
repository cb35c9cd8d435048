"""Helpers to write label cases by hand: a small taxonomy and a log from compact tuples."""
from __future__ import annotations

import pandas as pd

from labeler.taxonomy import Taxonomy

T0 = pd.Timestamp("2026-03-02T00:00:00Z")


def taxonomy(assignments: dict[str, list[tuple[str, float]]], parents: dict[str, str] | None = None,
             level: int = 0) -> Taxonomy:
    """{item: [(topic, confidence), ...]} at one level; with ``parents``, a level above them too."""
    rows = [(i, level, t, c) for i, ts in assignments.items() for t, c in ts]
    topics = sorted({t for ts in assignments.values() for t, _ in ts})
    top = pd.DataFrame({"topic_id": topics, "level": level, "name": topics,
                        "parent_id": [(parents or {}).get(t) for t in topics]})
    if parents:
        rows += [(i, 0, parents[t], c) for i, ts in assignments.items() for t, c in ts]
        top = pd.concat([top, pd.DataFrame({"topic_id": sorted(set(parents.values())), "level": 0,
                                            "name": sorted(set(parents.values())), "parent_id": None})])
    it = pd.DataFrame(rows, columns=["item_id", "level", "topic_id", "confidence"]).drop_duplicates(
        ["item_id", "level", "topic_id"])
    return Taxonomy.from_tables(top, it)


def log(*events) -> pd.DataFrame:
    """Events as (user, item, minutes after T0[, engagement[, event_id[, event_type]]])."""
    rows = []
    for e in events:
        u, i, minutes, *rest = e
        eng = rest[0] if len(rest) > 0 else 1.0
        eid = rest[1] if len(rest) > 1 else None
        etype = rest[2] if len(rest) > 2 else None
        rows.append({"user_id": u, "item_id": i, "ts": T0 + pd.Timedelta(minutes=minutes),
                     "engagement": eng, "event_id": eid, "event_type": etype})
    return pd.DataFrame(rows)


def rows(labels: pd.DataFrame, *cols: str) -> list[tuple]:
    cols = cols or ("item_id", "label", "topic_id")
    return [tuple(None if (isinstance(v, float) and v != v) else v for v in r)
            for r in labels[list(cols)].itertuples(index=False)]
