"""An independent oracle for the label rules, written directly in DuckDB SQL.

It shares no code with ``labeler``: it reads DESIGN.md's rules literally, by self-joins and
counting (for each interaction, count the user's earlier qualifying interactions per topic),
where the implementation uses window frames and known/unknown transitions.
"""
from __future__ import annotations

import duckdb
import pandas as pd

ORACLE_SQL = """
WITH raw AS (
    SELECT user_id, item_id, ts, epoch_us(ts) AS t, coalesce(engagement, 1.0) AS engagement, event_id,
           event_type
    FROM interactions
    WHERE {type_filter}
),
ev AS (  -- one row per (user, item, ts, event_id): the highest engagement
    SELECT user_id, item_id, ts, t, event_id, max(engagement) AS engagement
    FROM raw GROUP BY user_id, item_id, ts, t, event_id
),
hist AS (
    SELECT e.user_id, e.item_id, e.t, e.event_id, count(f.t) AS history_len
    FROM ev e LEFT JOIN ev f ON f.user_id = e.user_id AND f.t < e.t
    GROUP BY e.user_id, e.item_id, e.t, e.event_id
),
levels AS (SELECT DISTINCT level FROM item_topics WHERE {level_filter}),
et AS (
    SELECT e.*, l.level, it.topic_id, it.confidence
    FROM ev e CROSS JOIN levels l
    LEFT JOIN item_topics it ON it.item_id = e.item_id AND it.level = l.level
),
q AS (  -- qualifying interactions, one row per topic of the item
    SELECT user_id, level, topic_id, t FROM et
    WHERE topic_id IS NOT NULL AND {qualify}
),
sup AS (
    SELECT et.user_id, et.item_id, et.t, et.event_id, et.level, et.topic_id, et.confidence,
           count(q.t) AS support
    FROM et LEFT JOIN q ON q.user_id = et.user_id AND q.level = et.level AND q.topic_id = et.topic_id
                        AND q.t < et.t AND {mem_et}
    WHERE et.topic_id IS NOT NULL
    GROUP BY ALL
),
ranked AS (
    SELECT *, support >= {min_support} AS known,
           row_number() OVER (PARTITION BY user_id, item_id, t, event_id, level
                              ORDER BY confidence DESC, topic_id) AS rn
    FROM sup
),
per_level AS (
    SELECT user_id, item_id, t, event_id, level,
           count(*) AS n_topics, count(*) FILTER (WHERE known) AS n_known,
           arg_min(topic_id, rn) AS primary_topic,
           arg_min(topic_id, rn) FILTER (WHERE known) AS first_known,
           arg_min(topic_id, rn) FILTER (WHERE NOT known) AS first_unknown,
           bool_or(topic_id IN ({no_boost}) OR parent_id IN ({no_boost})) AS blocked
    FROM ranked LEFT JOIN topics USING (topic_id)
    GROUP BY ALL
),
points AS (SELECT DISTINCT user_id, level, t FROM et),
kt AS (
    SELECT user_id, level, t, count(*) AS known_topics FROM (
        SELECT p.user_id, p.level, p.t, q.topic_id
        FROM points p JOIN q ON q.user_id = p.user_id AND q.level = p.level
                             AND q.t < p.t AND {mem_p}
        GROUP BY ALL HAVING count(*) >= {min_support})
    GROUP BY ALL
),
lab AS (
    SELECT e.user_id, e.item_id, e.ts, e.t, e.event_id, l.level, e.engagement, h.history_len,
           coalesce(kt.known_topics, 0) AS known_topics, pl.n_topics, pl.n_known, pl.primary_topic,
           pl.first_known, pl.first_unknown, coalesce(pl.blocked, false) AS blocked,
           CASE WHEN pl.n_topics IS NULL THEN 'unplaced'
                WHEN h.history_len < {warmup} THEN 'cold_start'
                WHEN {in_profile} THEN 'in_profile'
                ELSE 'new_interest' END AS label
    FROM ev e CROSS JOIN levels l
    JOIN hist h ON h.user_id = e.user_id AND h.item_id = e.item_id AND h.t = e.t
                AND h.event_id IS NOT DISTINCT FROM e.event_id
    LEFT JOIN per_level pl ON pl.user_id = e.user_id AND pl.item_id = e.item_id AND pl.t = e.t
                AND pl.event_id IS NOT DISTINCT FROM e.event_id AND pl.level = l.level
    LEFT JOIN kt ON kt.user_id = e.user_id AND kt.level = l.level AND kt.t = e.t
)
SELECT user_id, item_id, ts, event_id, level,
       CASE label WHEN 'in_profile' THEN first_known WHEN 'new_interest' THEN first_unknown
                  ELSE primary_topic END AS topic_id,
       label, engagement >= {engaged_min} AS engaged,
       label = 'new_interest' AND engagement >= {engaged_min} AS discovery,
       CASE WHEN label = 'new_interest' AND engagement > 0 AND NOT blocked AND {boost_extra}
            THEN {multiplier} ELSE 1.0 END AS reward_multiplier,
       engagement * CASE WHEN label = 'new_interest' AND engagement > 0 AND NOT blocked AND {boost_extra}
            THEN {multiplier} ELSE 1.0 END AS shaped_reward,
       history_len, known_topics
FROM lab
WHERE {from_filter}
ORDER BY user_id, t, event_id NULLS LAST, item_id, level
"""


def oracle_labels(interactions: pd.DataFrame, item_topics: pd.DataFrame, topics: pd.DataFrame, *,
                  min_support=1, memory_days=None, footprint_from="all", engaged_min=1.0, warmup=1,
                  multi_topic="all_new", multiplier=2.0, boost_on="new_interest", levels=None,
                  event_types=None, label_from=None, no_boost_topics=()) -> pd.DataFrame:
    """The labels table by DESIGN.md's rules (interactions' ts must be UTC timestamps)."""
    con = duckdb.connect()
    inter = interactions.copy()
    for col in ("engagement", "event_id", "event_type"):
        if col not in inter.columns:
            inter[col] = None if col != "engagement" else 1.0
    con.register("interactions", inter[["user_id", "item_id", "ts", "engagement", "event_id", "event_type"]])
    con.register("item_topics", item_topics[["item_id", "level", "topic_id", "confidence"]])
    con.register("topics", topics[["topic_id", "parent_id"]])
    m = None if memory_days is None else int(round(memory_days * 86_400_000_000))
    quote = lambda xs: ", ".join("'" + str(x).replace("'", "''") + "'" for x in xs) or "NULL"
    sql = ORACLE_SQL.format(
        type_filter="true" if event_types is None else f"event_type IN ({quote(event_types)})",
        level_filter="true" if levels is None else f"level IN ({', '.join(map(str, levels))})",
        qualify="true" if footprint_from == "all" else f"engagement >= {engaged_min}",
        mem_et="true" if m is None else f"q.t >= et.t - {m}",
        mem_p="true" if m is None else f"q.t >= p.t - {m}", min_support=min_support, warmup=warmup, engaged_min=engaged_min,
        in_profile="pl.n_known >= 1" if multi_topic == "all_new" else "pl.n_known = pl.n_topics",
        multiplier=float(multiplier),
        boost_extra="true" if boost_on == "new_interest" else f"engagement >= {engaged_min}",
        no_boost=quote(no_boost_topics),
        from_filter="true" if label_from is None else f"ts >= TIMESTAMPTZ '{pd.Timestamp(label_from).isoformat()}'")
    out = con.execute(sql).df()
    out["level"] = out["level"].astype("int32")
    return out
