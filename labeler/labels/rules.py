"""Footprints and interaction labels: the rules of DESIGN.md, written once as Ibis expressions.

Every function here maps table expressions to table expressions and never asks which engine runs
them. Time is handled as integer microseconds since the epoch (``ts_us``), so "strictly before t"
is the range frame ``[.., t - 1]`` and the memory window ``[t - M, t)`` is ``[t - M, t - 1]`` on
every engine alike.

Steps, for each interaction e = (u, i, t) and level L:

1. ``prepare``: drop rows whose ``event_type`` is not listed, collapse duplicate events (same
   user, item, ts and event_id become one row with the highest engagement), and count them;
   ``history_len`` starts at 0 (or the carried count).
2. ``topic_rows``: one row per (interaction, level, item topic), as of t; no topic = unplaced.
3. ``support``: qualifying interactions of u on topic T in the window before t; T is known at t
   when support >= ``min_support``.
4. ``known_transitions``: the moments each (u, L, T) becomes known or stops being known; their
   running sum gives ``known_topics`` = |F_u(t)| at any t (``with_known_topics``: without memory,
   the same count as one window over the rows, which also adds the user's interactions before t
   to ``history_len``).
5. ``label_rows``: the label, the topic named, discovery, boost, multiplier and shaped reward.

Continuing from carried state (the job's daily path): the rules read a user's history only through
(a) ``history_len`` and (b) the qualifying times of each (user, level, topic) inside the window
before t. For every t after a watermark W, (a) is the count up to W plus the new events before t,
and (b) needs only the last ``min_support`` qualifying times up to W: a window [t - M, t) that holds
any older time also holds all of the last ``min_support``, so counting only those gives
min(count, min_support), which reaches ``min_support`` exactly when the full count does. So
``carried_rows`` turns each carried footprint row into ``min_support`` stand-in topic rows (no item,
qualifying, at their real times), the new events get ``history_len`` offset by the carried count
(``continue_history``), and the same expressions label the new events exactly as a full
recomputation would. ``footprint_rows`` merges the carried counts with the new ones.
"""
from __future__ import annotations

import ibis
import ibis.expr.types as ir

from ..config import LabelConfig

INTERACTION_KEY = ("user_id", "item_id", "ts_us", "event_id")


def _i64(value) -> ir.Value:
    return ibis.literal(value, type="int64")


def prepare(ev: ir.Table, cfg: LabelConfig, collapse: bool = True) -> ir.Table:
    """Filter event types, collapse duplicate events, and add ``history_len`` = 0 (the user's
    interactions before these rows: ``continue_history`` sets the carried count; ``with_known_topics``
    adds the rows' own).

    ``ev`` has user_id, item_id, ts, ts_us, engagement, event_id, event_type. Duplicates (same
    user, item, ts and event_id) become one row with the highest engagement and the smallest
    event_type and arm. ``collapse=False`` leaves them (the same columns): for a plan that proves
    there are none (:mod:`labeler.labels.scan`), on which the collapse changes nothing.
    """
    if cfg.event_types is not None:
        ev = ev.filter(ev.event_type.isin(list(cfg.event_types)))
    if not collapse:
        return ev.select(*INTERACTION_KEY, "ts", "engagement", "event_type", "arm", history_len=_i64(0))
    ev = ev.group_by(list(INTERACTION_KEY)).aggregate(
        ts=ev.ts.min(), engagement=ev.engagement.max(), event_type=ev.event_type.min(), arm=ev.arm.min())
    return ev.mutate(history_len=_i64(0))


def continue_history(prepared: ir.Table, carried_users: ir.Table) -> ir.Table:
    """``history_len`` of new events starts from each user's carried count (user_id, history_len)."""
    c = carried_users.select(_uid="user_id", _h0="history_len")
    j = prepared.left_join(c, prepared.user_id == c._uid)
    return j.select(*[j[k] for k in prepared.columns if k != "history_len"],
                    history_len=j._h0.fill_null(0).cast("int64"))


def carried_rows(carried: ir.Table, like: ir.Table, cfg: LabelConfig) -> ir.Table:
    """Stand-in topic rows for history up to a watermark, shaped like the topic rows ``like``.

    ``carried`` has user_id, level, topic_id and recent_us (the last ``min_support`` qualifying
    times, in microseconds). Each time becomes one qualifying row with no item and no event, so it
    counts towards support and known topics but is never labelled and never counted as an
    interaction of its own (see the module docstring for why this is exact).
    """
    one = carried.select("user_id", "level", "topic_id", "recent_us").unnest("recent_us")
    schema = like.schema()
    values = {"user_id": one.user_id, "level": one.level, "topic_id": one.topic_id, "ts_us": one.recent_us,
              "engagement": ibis.literal(float(cfg.engaged_min), type="float64"), "pos": _i64(0),
              "nb": ibis.literal(False), "history_len": _i64(0), "known_before": _i64(0)}
    return one.select(*[(values[k] if k in values else ibis.null(schema[k])).cast(schema[k]).name(k)
                        for k in like.columns])


_TOPIC_KEYS = ["user_id", "level", "topic_id"]


def _named(rows: ir.Table) -> ir.Table:
    """The distinct (user, level, topic) the topic rows ``rows`` name."""
    return rows.filter(rows.topic_id.notnull()).select(*_TOPIC_KEYS).distinct()


def touched_carried(rows: ir.Table, carried: ir.Table) -> ir.Table:
    """The rows of ``carried`` whose (user, level, topic) the topic rows ``rows`` name."""
    return carried.semi_join(_named(rows), _TOPIC_KEYS)


def with_carried(rows: ir.Table, carried: ir.Table, cfg: LabelConfig, touched: ir.Table | None = None) -> ir.Table:
    """The new topic rows and what labelling them needs of the carried footprints ``carried``.

    Each (user, level, topic) the new rows name gets its stand-ins (``carried_rows``). Without
    memory, a carried topic the new rows do not name is known at every new event if it was known
    at the watermark, and at none otherwise, so it adds one to the ``known_before`` of the user's
    new rows at that level instead of rows of its own. With memory a topic can be forgotten after
    the watermark, so every carried topic keeps its stand-ins. ``touched``: ``touched_carried(rows,
    carried)`` when the caller has it (computed once, as a table of its own, for several reads).
    """
    if cfg.memory_us is not None:
        return rows.union(carried_rows(carried, rows, cfg), distinct=False)
    named = _named(rows)
    rest = carried.anti_join(named, _TOPIC_KEYS)
    rest = rest.filter(rest.known)
    before = rest.group_by(["user_id", "level"]).aggregate(_kb=rest.count()).rename(_u="user_id", _l="level")
    j = rows.left_join(before, [rows.user_id == before._u, rows.level == before._l])
    rows = j.select(*[(j._kb.fill_null(0) + j.known_before).cast("int64").name(c) if c == "known_before" else j[c]
                      for c in rows.columns])
    touched = carried.semi_join(named, _TOPIC_KEYS) if touched is None else touched  # = touched_carried
    return rows.union(carried_rows(touched, rows, cfg), distinct=False)


def heavy_users(ev: ir.Table, cfg: LabelConfig) -> ir.Table:
    """(user_id, events): users with more than ``max_user_events`` prepared interactions."""
    counts = ev.group_by("user_id").aggregate(events=ev.count())
    return counts.filter(counts.events > cfg.max_user_events)


def topic_rows(ev: ir.Table, item_topics: ir.Table, levels: ir.Table, as_of: bool) -> ir.Table:
    """One row per (interaction, level, topic valid at its time); topic_id null when unplaced.
    ``known_before`` (0 here) counts known topics the rows do not show (see ``with_carried``).

    ``item_topics`` has item_id, level, topic_id, pos (0 = primary), nb (no-boost flag) and, when
    ``as_of``, valid_from_us / valid_to_us.
    """
    grid = ev.cross_join(levels)
    it = item_topics.rename(it_item_id="item_id", it_level="level")
    preds = [grid.item_id == it.it_item_id, grid.level == it.it_level]
    if as_of:
        preds += [it.valid_from_us <= grid.ts_us, grid.ts_us < it.valid_to_us]
    joined = grid.left_join(it, preds)
    return joined.select(*[c for c in joined.columns if c not in (
        "it_item_id", "it_level", "valid_from_us", "valid_to_us")], known_before=_i64(0))


def qualifies(rows: ir.Table, cfg: LabelConfig) -> ir.Value:
    """Placed, and engaged when footprints are built from engaged interactions only."""
    placed = rows.topic_id.notnull()
    if cfg.footprint_from == "engaged":
        return placed & (rows.engagement >= cfg.engaged_min)
    return placed


def with_support(rows: ir.Table, cfg: LabelConfig) -> ir.Table:
    """Add ``known``: qualifying interactions of (u, L, T) strictly before t reach min_support.

    Without memory, also ``_kth``: 1 on the one row at which the qualifying count of (u, L, T)
    reaches min_support (a running count over rows in time order; among rows of equal time the
    order is arbitrary, but exactly one qualifying row takes the count to min_support), so the
    topic is known from just after that row's time on: ``with_known_topics`` sums these.
    """
    lower = None if cfg.memory_us is None else -cfg.memory_us
    keys = [rows.user_id, rows.level, rows.topic_id]
    w = ibis.window(group_by=keys, order_by=rows.ts_us, range=(lower, -1))
    q = qualifies(rows, cfg).cast("int64")
    windows = {"_support": q.sum().over(w).fill_null(0)}
    if cfg.memory_us is None:  # the same partition and order, in the same select: one sort
        windows["_upto"] = q.sum().over(ibis.window(group_by=keys, order_by=rows.ts_us, rows=(None, 0)))
    out = rows.mutate(_q=q, **windows)
    out = out.mutate(known=out.topic_id.notnull() & (out._support >= cfg.min_support))
    if cfg.memory_us is None:
        out = out.mutate(_kth=((out._q == 1) & (out._upto == cfg.min_support)).cast("int64"))
    return out.drop(*[c for c in ("_q", "_support", "_upto") if c in out.columns])


def known_transitions(rows: ir.Table, cfg: LabelConfig) -> ir.Table:
    """(user_id, level, topic_id, p, d): at time p the topic becomes known (d=+1) or not (d=-1).

    A topic is known at t when d summed over p <= t is 1. Without memory it becomes known once,
    just after its min_support-th qualifying interaction.
    """
    qual = rows.filter(qualifies(rows, cfg)).select("user_id", "level", "topic_id", "ts_us")
    keys = [qual.user_id, qual.level, qual.topic_id]
    if cfg.memory_us is None and cfg.min_support == 1:
        first = qual.group_by(keys).aggregate(p=qual.ts_us.min() + 1)
        return first.select("user_id", "level", "topic_id", "p", d=_i64(1))
    if cfg.memory_us is None:
        nth = ibis.row_number().over(group_by=keys, order_by=qual.ts_us)
        kth = qual.mutate(_n=nth).filter(lambda t: t._n == cfg.min_support - 1)
        return kth.select("user_id", "level", "topic_id", p=kth.ts_us + 1, d=_i64(1))
    enter = qual.select("user_id", "level", "topic_id", p=qual.ts_us + 1, d=_i64(1))
    leave = qual.select("user_id", "level", "topic_id", p=qual.ts_us + (cfg.memory_us + 1), d=_i64(-1))
    steps = enter.union(leave, distinct=False).group_by(["user_id", "level", "topic_id", "p"]).aggregate(
        d=lambda t: t.d.sum())
    w = ibis.cumulative_window(group_by=[steps.user_id, steps.level, steps.topic_id], order_by=steps.p)
    steps = steps.mutate(_known=(steps.d.sum().over(w) >= cfg.min_support).cast("int64"))
    prev = steps._known.lag().over(group_by=[steps.user_id, steps.level, steps.topic_id],
                                   order_by=steps.p).fill_null(0)
    steps = steps.mutate(_delta=steps._known - prev)
    return steps.filter(steps._delta != 0).select("user_id", "level", "topic_id", "p", d=steps._delta)


def known_topic_counts(points: ir.Table, transitions: ir.Table) -> ir.Table:
    """known_topics at each distinct (user_id, level, ts_us) of ``points``."""
    pts = points.select("user_id", "level", "ts_us").distinct()
    tl = pts.select("user_id", "level", p=pts.ts_us, d=_i64(0), is_point=ibis.literal(True)).union(
        transitions.select("user_id", "level", "p", "d", is_point=ibis.literal(False)), distinct=False)
    w = ibis.window(group_by=[tl.user_id, tl.level], order_by=tl.p, range=(None, 0))
    tl = tl.mutate(known_topics=tl.d.sum().over(w))
    return tl.filter(tl.is_point).select("user_id", "level", ts_us=tl.p, known_topics=tl.known_topics)


def with_known_topics(rows: ir.Table, transitions: ir.Table, cfg: LabelConfig, topics: int) -> ir.Table:
    """Add ``known_topics`` = |F_u(t)| at level L to each row of ``with_support``, and complete
    ``history_len`` with the user's own interactions strictly before t.

    One window over the user's rows at the level, in time order: the interactions before t are
    the rows before t that are an interaction's first (or only) topic row at the level (carried
    stand-ins have no item). Without memory a topic stays known once it is, so known_topics is the
    running sum of ``_kth`` before t in the same window: both sums are taken as one, the topic
    count in the low bits (it is at most ``topics``, the taxonomy's number of topics) and the
    interactions above them, which halves the window's work. With memory topics are also
    forgotten, so the counts come from the transitions' timeline.
    """
    w = ibis.window(group_by=[rows.user_id, rows.level], order_by=rows.ts_us, range=(None, -1))
    once = (rows.item_id.notnull() & (rows.pos.isnull() | (rows.pos == 0))).cast("int64")
    if cfg.memory_us is None:
        low = _i64(2 ** max(int(topics).bit_length(), 1))  # > any count of known topics
        both = (once * low + rows._kth).sum().over(w).fill_null(0)
        return rows.mutate(history_len=rows.history_len + both // low,
                           known_topics=rows.known_before + both % low).drop("_kth")
    rows = rows.mutate(history_len=rows.history_len + once.sum().over(w).fill_null(0))
    counts = known_topic_counts(rows, transitions)
    j = rows.left_join(counts, ["user_id", "level", "ts_us"])
    return j.select(*rows.columns, known_topics=j.known_topics.fill_null(0))


# the labels' columns that are the interaction's own (a label run copies them from its input)
INTERACTION_COLUMNS = ("user_id", "item_id", "ts", "ts_us", "event_id", "level")


def per_interaction(rows: ir.Table, single_topic: bool, row_id: str | None = None) -> ir.Table:
    """One row per (interaction, level) with topic counts and the topics a label can name.

    With ``single_topic`` (every item has at most one topic per level) this is a projection;
    otherwise the item's topic rows are aggregated, "first" meaning lowest ``pos``. ``row_id``:
    a column to keep (for an aggregated interaction, its smallest value).
    """
    placed = rows.topic_id.notnull()
    keep = {} if row_id is None else {row_id: rows[row_id] if single_topic else rows[row_id].min()}
    if single_topic:
        return rows.select(
            "user_id", "item_id", "ts_us", "event_id", "level", "ts", "engagement", "history_len", **keep,
            n_topics=placed.cast("int64"), n_known=(placed & rows.known).cast("int64"),
            first_known=ibis.ifelse(rows.known, rows.topic_id, ibis.null("string")),
            first_unknown=ibis.ifelse(rows.known, ibis.null("string"), rows.topic_id),
            primary=rows.topic_id, blocked=(placed & rows.nb.fill_null(False)).cast("int64"),
            known_topics=rows.known_topics)
    return rows.group_by(["user_id", "item_id", "ts_us", "event_id", "level"]).aggregate(
        ts=rows.ts.max(), engagement=rows.engagement.max(), history_len=rows.history_len.max(),
        n_topics=placed.cast("int64").sum(),
        n_known=(placed & rows.known).cast("int64").sum(),
        first_known=rows.topic_id.argmin(rows.pos, where=placed & rows.known),
        first_unknown=rows.topic_id.argmin(rows.pos, where=placed & ~rows.known),
        primary=rows.topic_id.argmin(rows.pos, where=placed),
        blocked=(placed & rows.nb).cast("int64").max(), known_topics=rows.known_topics.max(), **keep)


def label_rows(rows: ir.Table, cfg: LabelConfig, single_topic: bool = False, row_id: str | None = None) -> ir.Table:
    """Collapse topic rows (with ``known`` and ``known_topics``) to one row per (interaction, level)
    and apply the label rules. With ``row_id``, that column stands in for the interaction's own
    columns (``INTERACTION_COLUMNS``), for a caller that holds them already (the rows of one
    interaction are the same in those columns)."""
    g = per_interaction(rows, single_topic, row_id)
    in_profile = (g.n_known >= 1) if cfg.multi_topic == "all_new" else (g.n_known == g.n_topics)
    label = ibis.cases((g.n_topics == 0, "unplaced"), (g.history_len < cfg.warmup, "cold_start"),
                       (in_profile, "in_profile"), else_="new_interest")
    g = g.mutate(label=label)
    topic = ibis.cases((g.label == "in_profile", g.first_known),
                       (g.label == "new_interest", g.first_unknown), else_=g.primary)
    engaged = g.engagement >= cfg.engaged_min
    is_new = g.label == "new_interest"
    boosted = is_new & (g.engagement > 0) & (g.blocked.fill_null(0) == 0)
    if cfg.boost_on == "discovery":
        boosted = boosted & engaged
    multiplier = ibis.ifelse(boosted, ibis.literal(float(cfg.multiplier), type="float64"),
                             ibis.literal(1.0, type="float64"))
    out = g.mutate(topic_id=topic, engaged=engaged, discovery=is_new & engaged,
                   reward_multiplier=multiplier, shaped_reward=g.engagement * multiplier)
    if cfg.label_from is not None:
        from_us = int(cfg.label_from.timestamp() * 1_000_000)
        out = out.filter(out.ts_us >= from_us)
    own = list(INTERACTION_COLUMNS) if row_id is None else [row_id]
    return out.select(*own, "topic_id", "label", "engaged", "discovery", "reward_multiplier", "shaped_reward",
                      out.history_len.cast("int64").name("history_len"),
                      out.known_topics.cast("int64").name("known_topics"))


def each_interaction_once(rows: ir.Table) -> ir.Table:
    """Topic rows cut to one per interaction: the first level's primary (or unplaced) row."""
    first_level = rows.level.min().as_scalar()
    return rows.filter((rows.level == first_level) & (rows.pos.isnull() | (rows.pos == 0))
                       & rows.item_id.notnull())  # carried stand-in rows have no item


def user_history(rows: ir.Table, as_of_us: int) -> ir.Table:
    """(user_id, history_len): each user's interactions up to ``as_of_us``, unplaced ones included."""
    once = each_interaction_once(rows)
    once = once.filter(once.ts_us <= as_of_us)
    return once.group_by("user_id").aggregate(history_len=once.count())


def continued_history(rows: ir.Table, carried_users: ir.Table, as_of_us: int) -> ir.Table:
    """(user_id, history_len): the carried count plus the user's new interactions up to ``as_of_us``."""
    new = user_history(rows, as_of_us).select(_uid="user_id", _new="history_len")
    j = carried_users.outer_join(new, carried_users.user_id == new._uid)
    return j.select(user_id=j.user_id.fill_null(j._uid),
                    history_len=(j.history_len.fill_null(0) + j._new.fill_null(0)).cast("int64"))


def footprint_rows(rows: ir.Table, transitions: ir.Table, cfg: LabelConfig, as_of_us: int,
                   history: ir.Table | None = None, carried: ir.Table | None = None,
                   carried_until_us: int | None = None, touched_only: bool = False) -> ir.Table:
    """The footprints table as seen by an interaction just after ``as_of_us``.

    One row per (user, level, topic) touched by a qualifying interaction at or before ``as_of_us``.
    Beyond the contract's columns it carries what a lookup needs to apply the rules later:
    ``history_len`` (the user's interactions up to ``as_of_us``, unplaced ones included) and
    ``recent_us`` (the last ``min_support`` qualifying times, in microseconds).

    With ``carried`` (footprint rows as of ``carried_until_us``, with ``known_since_us``) the rows
    hold carried stand-ins (see :func:`carried_rows`) plus the new events: counts and first times
    add to the carried ones, and a topic known now without a new start of its known period after
    the watermark has been known since the carried ``known_since``. ``history`` (user_id,
    history_len) replaces the count of the rows' own interactions. ``touched_only`` keeps just the
    topics the new events qualify for: every other carried row is the carried one, with the new
    ``history_len``, seen from the later watermark (``job.outputs.age_footprints``), so the job
    fills those in from its previous files instead of recomputing them.
    """
    end = as_of_us + 1
    keys = ["user_id", "level", "topic_id"]
    qual = rows.filter(qualifies(rows, cfg) & (rows.ts_us <= as_of_us))
    if carried is not None and touched_only:
        qual = qual.semi_join(qual.filter(qual.item_id.notnull()).select(keys).distinct(), keys)
    in_window = qual.ts_us >= (end - cfg.memory_us) if cfg.memory_us is not None else qual.ts_us.notnull()
    support = in_window.cast("int64").sum()
    # the last min_support qualifying times (stand-ins' included): with one, the group's latest
    last_one = {"_latest": qual.ts_us.max()} if cfg.min_support == 1 else {}
    if carried is None:
        agg = qual.group_by(keys).aggregate(
            first_ts=qual.ts.min(), last_ts=qual.ts.max(), interactions=qual.count(),
            engaged_interactions=(qual.engagement >= cfg.engaged_min).cast("int64").sum(), _support=support,
            **last_one)
    else:  # counts from the rows' own interactions (stand-ins have no item), support from all
        own = qual.item_id.notnull()
        agg = qual.group_by(keys).aggregate(
            first_ts=qual.ts.min(where=own), last_ts=qual.ts.max(where=own),
            interactions=own.cast("int64").sum(),
            engaged_interactions=(own & (qual.engagement >= cfg.engaged_min)).cast("int64").sum(),
            _support=support, **last_one)
    tr = transitions.filter((transitions.p <= end) & (transitions.d > 0))
    if carried is not None:  # only starts after the watermark are the stand-ins' and the real history's alike
        tr = tr.filter(tr.p > carried_until_us + 1)
    since = tr.group_by(keys).aggregate(_since_us=tr.p.max() - 1)
    history = user_history(rows, as_of_us) if history is None else history
    j = agg.left_join(since, keys)
    out = j.select(*agg.columns, _since_us=j._since_us)
    if last_one:
        out = out.mutate(recent_us=ibis.array([out._latest])).drop("_latest")
    else:
        latest = qual.mutate(_n=ibis.row_number().over(group_by=[qual.user_id, qual.level, qual.topic_id],
                                                       order_by=ibis.desc(qual.ts_us)))
        latest = latest.filter(latest._n < cfg.min_support)
        recent = latest.group_by(keys).aggregate(recent_us=latest.ts_us.collect().sort())
        j = out.left_join(recent, keys)
        out = j.select(*out.columns, recent_us=j.recent_us)
    if carried is not None:
        c = carried.select(_cu="user_id", _cl="level", _ct="topic_id", _cfirst="first_ts", _clast="last_ts",
                           _cn="interactions", _ce="engaged_interactions", _csince="known_since_us")
        j = out.left_join(c, [out.user_id == c._cu, out.level == c._cl, out.topic_id == c._ct])
        ts_type = "timestamp('UTC', 6)"
        out = j.select(
            "user_id", "level", "topic_id",
            first_ts=j._cfirst.cast(ts_type).fill_null(j.first_ts.cast(ts_type)),
            last_ts=j.last_ts.cast(ts_type).fill_null(j._clast.cast(ts_type)),
            interactions=j.interactions.fill_null(0) + j._cn.fill_null(0),
            engaged_interactions=j.engaged_interactions.fill_null(0) + j._ce.fill_null(0),
            _support=j._support, _since_us=j._since_us.fill_null(j._csince), recent_us=j.recent_us)
    j = out.left_join(history, "user_id")
    out = j.select(*out.columns, history_len=j.history_len)
    known = out._support >= cfg.min_support
    return out.select("user_id", "level", "topic_id", "first_ts", "last_ts",
                      out.interactions.cast("int64").name("interactions"),
                      out.engaged_interactions.cast("int64").name("engaged_interactions"),
                      known.name("known"), ibis.ifelse(known, out._since_us, ibis.null("int64"))
                      .name("known_since_us"), out.history_len.cast("int64").name("history_len"),
                      "recent_us")
