"""Offline evaluation of recommendation lists and experiment arms, on the labels' ground truth.

Per list (one user's recommendations at one request time), at k:

- accuracy, with relevance = the user's engaged interactions (engagement >= ``engaged_min``) in
  (request time, request time + horizon]: precision@k = hits / k; recall@k = hits / |R|;
  AP@k = sum over relevant ranks i <= k of precision@i, divided by |R| (trec_eval's ``map_cut``
  normalisation); NDCG@k with binary gains 1 / log2(rank + 1) and the ideal ranking of
  min(|R|, k) hits. Lists with no relevant item are left out of these four (their count is
  reported);
- intra-list diversity (Ziegler et al., WWW 2005): by topic, the share of item pairs whose primary
  topics differ (placed items only); by embedding, the mean pairwise cosine distance;
- novelty (Zhou et al., PNAS 2010): mean self-information -log2 p(i), with p(i) the share of users
  active before the request who had interacted with i, Laplace-smoothed ((n_i + 1) / (n + 1)) so
  unseen items stay finite;
- unexpectedness: the share of items outside the user's known topics at request time (the same
  footprint rules as the labels: an item is outside when it would not be ``in_profile``; unplaced
  items count as not outside);
- serendipity (Ge et al., RecSys 2010; Kotkov et al. 2016): the share of items both relevant and
  unexpected.

Means are over lists; 95% intervals are percentile bootstraps over users (a resampled user brings
all their lists). Catalog and topic coverage are per group, without intervals.
"""
from __future__ import annotations

import dataclasses
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..config import InputConfig, LabelConfig
from ..errors import ConfigError, InputError
from ..tables import normalize_ids, normalize_interactions, normalize_timestamps, require_columns, Intake

LIST_METRICS = ("precision", "recall", "map", "ndcg", "ild_topic", "ild_embedding", "novelty",
                "unexpectedness", "serendipity")
ACCURACY = ("precision", "recall", "map", "ndcg")


# -- the published definitions, one list at a time (also used by the tests' worked examples) -------
def average_precision(rel: np.ndarray, n_relevant: int) -> float:
    """AP@k of a 0/1 relevance vector over ranks 1..k, divided by |R| (trec_eval map_cut)."""
    if n_relevant == 0:
        return float("nan")
    hits = np.cumsum(rel)
    ranks = np.arange(1, len(rel) + 1)
    return float(np.sum((hits / ranks) * rel) / n_relevant)


def ndcg(rel: np.ndarray, n_relevant: int) -> float:
    if n_relevant == 0:
        return float("nan")
    gains = 1.0 / np.log2(np.arange(2, len(rel) + 2))
    ideal = gains[: min(n_relevant, len(rel))].sum()
    return float((rel * gains).sum() / ideal)


def ild_topic(topics: list) -> float:
    """Share of pairs of placed items in different topics (NaN with fewer than two)."""
    t = [x for x in topics if x is not None and x == x]
    n = len(t)
    if n < 2:
        return float("nan")
    same = sum(c * (c - 1) / 2 for c in pd.Series(t).value_counts())
    return float(1 - same / (n * (n - 1) / 2))


def ild_embedding(vectors: np.ndarray) -> float:
    """Mean pairwise cosine distance (1 - cos) of the items' vectors."""
    if len(vectors) < 2:
        return float("nan")
    v = vectors / np.maximum(np.linalg.norm(vectors, axis=1, keepdims=True), 1e-12)
    sims = v @ v.T
    iu = np.triu_indices(len(v), 1)
    return float(np.mean(1 - sims[iu]))


def novelty(item_users: np.ndarray, active_users: int) -> float:
    """Mean self-information -log2((n_i + 1) / (n + 1)) of the list's items."""
    p = (np.asarray(item_users, dtype=float) + 1) / (active_users + 1)
    return float(np.mean(-np.log2(p))) if len(p) else float("nan")


def bootstrap_mean(sums: np.ndarray, counts: np.ndarray, n_boot: int = 1000, seed: int = 0,
                   level: float = 0.95) -> tuple[float, float, float]:
    """Mean of per-item values pooled over users (sum/count per user) with a percentile bootstrap
    interval over users."""
    sums, counts = np.asarray(sums, float), np.asarray(counts, float)
    if counts.sum() == 0:
        return float("nan"), float("nan"), float("nan")
    est = sums.sum() / counts.sum()
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, len(sums), (n_boot, len(sums)))
    with np.errstate(invalid="ignore", divide="ignore"):
        boots = sums[idx].sum(axis=1) / counts[idx].sum(axis=1)
    boots = boots[np.isfinite(boots)]
    lo, hi = np.quantile(boots, [(1 - level) / 2, 1 - (1 - level) / 2])
    return float(est), float(lo), float(hi)


def item_vectors(items: pd.DataFrame, tax, taxonomy_config=None, embedder=None) -> dict:
    """{item_id: unit vector} for the embedding diversity: the learned taxonomy's own model and
    settings, or the configured model for an editorial taxonomy (both through the embedding cache)."""
    from ..config import TaxonomyConfig
    from ..embed import SentenceEmbedder, embed_items
    from ..tables import normalize_items
    if tax.kind == "learned":
        cfg = tax.manifest["config"]
        embedder = embedder or tax.embedder()
    else:
        tc = taxonomy_config or TaxonomyConfig()
        cfg = tc.model_dump()
        embedder = embedder or SentenceEmbedder(tc.model, tc.model_path, tc.batch_size)
    its, _ = normalize_items(items, text_columns=tuple(cfg["text_columns"]))
    vectors, _ = embed_items(its, cfg, embedder=embedder, progress=False)
    return dict(zip(its["item_id"], vectors))


# -- the evaluation ------------------------------------------------------------------------------
@dataclasses.dataclass
class Evaluation:
    per_list: pd.DataFrame
    table: pd.DataFrame
    summary: dict[str, Any]
    growth: pd.DataFrame | None = None
    cohorts: pd.DataFrame | None = None

    def write(self, out_dir: str | os.PathLike) -> Path:
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        self.table.to_parquet(out / "metrics.parquet", index=False)
        self.table.to_csv(out / "metrics.csv", index=False)
        self.per_list.to_parquet(out / "per_list.parquet", index=False)
        if self.growth is not None:
            self.growth.to_csv(out / "growth.csv", index=False)
        if self.cohorts is not None:
            self.cohorts.to_csv(out / "cohorts.csv", index=False)
        from .report import render
        (out / ".report.html.tmp").write_text(render(self), encoding="utf-8")
        os.replace(out / ".report.html.tmp", out / "report.html")
        (out / ".summary.json.tmp").write_text(json.dumps(self.summary, indent=2, sort_keys=True, default=float) + "\n")
        os.replace(out / ".summary.json.tmp", out / "summary.json")
        return out


def _check_settings(k, horizon_days, level, tax) -> None:
    """The evaluation's settings, each refused with the option it came from."""
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise ConfigError(f"--k must be a whole number of at least 1 (the list cut-off); got {k!r}.")
    if not isinstance(horizon_days, (int, float)) or not np.isfinite(horizon_days) or horizon_days <= 0:
        raise ConfigError(f"--horizon-days must be a positive number of days; got {horizon_days!r}.")
    if level is not None and level not in tax.levels:
        raise ConfigError(f"--level {level} is not a level of taxonomy {tax.version[:12]} (it has {tax.levels}).")


def _recs_frame(recs: pd.DataFrame, k: int, group_by: str | None) -> pd.DataFrame:
    source = "recs"
    require_columns(recs, ("user_id", "ts", "item_id", "rank"), source)
    intake = Intake(source=source)
    out = pd.DataFrame({"user_id": normalize_ids(recs, "user_id", source, intake),
                        "item_id": normalize_ids(recs, "item_id", source, intake),
                        "ts": normalize_timestamps(recs, "ts", source, InputConfig())})
    rank = pd.to_numeric(recs["rank"], errors="coerce")
    if rank.isna().any():
        raise InputError("non-numeric rank(s).", source=source, column="rank",
                         sample=recs.loc[rank.isna(), ["user_id", "rank"]].head(5).astype(str).agg(", ".join, axis=1).tolist())
    bad = ~np.isfinite(rank.to_numpy(dtype=float)) | (rank.to_numpy(dtype=float) <= 0)
    if bad.any():
        raise InputError(f"{int(bad.sum())} rank(s) that are not positive numbers.", source=source, column="rank",
                         sample=recs.loc[bad, ["user_id", "ts", "rank"]].head(5).astype(str).agg(", ".join, axis=1).tolist(),
                         hint="Ranks start at 1 (the top of the list).")
    out["rank"] = rank.to_numpy()
    if group_by is not None:
        if group_by not in recs.columns:
            raise InputError(f"no column '{group_by}' to group by.", source=source, column=group_by,
                             hint=f"Columns present: {', '.join(map(str, recs.columns))}.")
        out["group"] = recs[group_by].astype(str).to_numpy()
    else:
        out["group"] = "all"
    out["ts_us"] = out["ts"].astype("datetime64[us, UTC]").astype("int64")
    dup = out.duplicated(["group", "user_id", "ts_us", "rank"], keep=False)
    if dup.any():
        raise InputError(f"{int(dup.sum())} rows share a rank with another item of the same list.", source=source,
                         column="rank", sample=recs.loc[dup.to_numpy(), ["user_id", "ts", "item_id", "rank"]].head(5)
                         .astype(str).agg(", ".join, axis=1).tolist(),
                         hint="A list (user_id, ts) ranks each item once: give each item its own rank.")
    out = out.sort_values(["group", "user_id", "ts_us", "rank", "item_id"]).drop_duplicates(
        ["group", "user_id", "ts_us", "item_id"])
    out["pos"] = out.groupby(["group", "user_id", "ts_us"]).cumcount() + 1
    return out[out["pos"] <= k].reset_index(drop=True)


def _known_at(run, requests: pd.DataFrame, level: int) -> pd.DataFrame:
    """(user_id, ts_us, topic_id): topics known at each request time, by the label rules."""
    eng = run.engine
    req = eng.table(requests[["user_id", "ts_us"]].drop_duplicates().reset_index(drop=True), "requests")
    tr = run.transitions.filter(run.transitions.level == level)
    j = req.join(tr, [req.user_id == tr.user_id, tr.p <= req.ts_us])
    g = j.group_by(["user_id", "ts_us", "topic_id"]).aggregate(state=j.d.sum())
    return eng.to_pandas(g.filter(g.state > 0).select("user_id", "ts_us", "topic_id"))


def _popularity(ev: pd.DataFrame, lists: pd.DataFrame) -> pd.DataFrame:
    """For each (list, item): users who had interacted with the item before the request, and
    users active before it."""
    first_ui = ev.groupby(["item_id", "user_id"])["ts_us"].min().reset_index()
    first_u = np.sort(ev.groupby("user_id")["ts_us"].min().to_numpy())
    by_item = {i: np.sort(g["ts_us"].to_numpy()) for i, g in first_ui.groupby("item_id")}
    ts = lists["ts_us"].to_numpy()
    n_item = np.array([np.searchsorted(by_item.get(i, np.empty(0, np.int64)), t, side="left")
                       for i, t in zip(lists["item_id"], ts)])
    n_active = np.searchsorted(first_u, ts, side="left")
    return pd.DataFrame({"item_users": n_item, "active_users": n_active}, index=lists.index)


def evaluate(recs: pd.DataFrame, interactions: pd.DataFrame, tax, k: int = 10, *, group_by: str | None = None,
             control: str | None = None, horizon_days: float = 7.0, label_config: LabelConfig | None = None,
             level: int | None = None, item_vectors: dict | None = None, n_boot: int = 1000,
             seed: int = 0, growth: bool = True) -> Evaluation:
    """Metrics at ``k`` per list, averaged per group with bootstrap intervals (see module docstring).

    ``group_by`` names a column of ``recs`` (e.g. ``arm``); ``control`` the group the others are
    compared with. With an ``arm`` column in ``interactions`` and ``growth``, interest growth by arm
    and week and activity-cohort movement are added.
    """
    from ..labels.plan import plan_labels
    cfg = label_config or LabelConfig()
    _check_settings(k, horizon_days, level, tax)
    level = max(tax.levels) if level is None else level
    lists = _recs_frame(recs, k, group_by)
    if control is not None and control not in set(lists["group"]):
        raise ConfigError(f"--control {control!r} is not a group of the lists (grouped by {group_by or 'nothing'}); "
                          f"groups: {', '.join(sorted(set(lists['group']))[:10])}. Name one of them.")
    ev, _ = normalize_interactions(interactions, InputConfig(), "interactions")
    ev = ev.assign(ts_us=ev["ts"].astype("datetime64[us, UTC]").astype("int64"))
    run = plan_labels(ev, tax, cfg)

    # topics of items at the level: primary (for diversity) and all (for unexpectedness)
    from ..labels.intake import rank_item_topics
    it = rank_item_topics(tax.item_topics[tax.item_topics["level"] == level])
    it = it[it["topic_id"].notna() & (it["valid_from_us"] == it.groupby("item_id")["valid_from_us"].transform("max"))]
    primary = it[it["pos"] == 0].set_index("item_id")["topic_id"]
    item_topic_sets = it.groupby("item_id")["topic_id"].apply(frozenset)

    known = _known_at(run, lists, level)
    known_sets = known.groupby(["user_id", "ts_us"])["topic_id"].apply(frozenset)
    empty = frozenset()
    keys = list(zip(lists["user_id"], lists["ts_us"]))
    tsets = lists["item_id"].map(item_topic_sets)
    ksets = [known_sets.get(key, empty) for key in keys]
    if cfg.multi_topic == "all_new":
        unexpected = [isinstance(t, frozenset) and not (t & kn) for t, kn in zip(tsets, ksets)]
    else:
        unexpected = [isinstance(t, frozenset) and not t <= kn for t, kn in zip(tsets, ksets)]
    lists["unexpected"] = np.array(unexpected, dtype=bool)
    lists["topic"] = lists["item_id"].map(primary)

    # relevance: engaged interactions within the horizon after the request
    h_us = int(horizon_days * 86_400_000_000)
    eng_ev = ev[ev["engagement"] >= cfg.engaged_min][["user_id", "item_id", "ts_us"]]
    req = lists[["group", "user_id", "ts_us"]].drop_duplicates()
    win = req.merge(eng_ev.rename(columns={"ts_us": "ev_us"}), on="user_id")
    win = win[(win["ev_us"] > win["ts_us"]) & (win["ev_us"] <= win["ts_us"] + h_us)]
    relevant = win[["group", "user_id", "ts_us", "item_id"]].drop_duplicates()
    n_rel = relevant.groupby(["group", "user_id", "ts_us"]).size().rename("n_relevant")
    relevant["rel"] = 1
    lists = lists.merge(relevant, on=["group", "user_id", "ts_us", "item_id"], how="left")
    lists["rel"] = lists["rel"].fillna(0).astype(int)
    lists = lists.join(_popularity(ev, lists))

    rows = []
    for (group, user, ts_us), g in lists.groupby(["group", "user_id", "ts_us"], sort=True):
        g = g.sort_values("pos")
        rel = g["rel"].to_numpy()
        nr = int(n_rel.get((group, user, ts_us), 0))
        vec = None
        if item_vectors is not None:
            have = [item_vectors[i] for i in g["item_id"] if i in item_vectors]
            vec = np.vstack(have) if len(have) else np.empty((0, 1))
        rows.append({
            "group": group, "user_id": user, "ts": pd.Timestamp(ts_us, unit="us", tz="UTC"), "items": len(g),
            "n_relevant": nr, "hits": int(rel.sum()),
            "precision": rel.sum() / k if nr else np.nan, "recall": rel.sum() / nr if nr else np.nan,
            "map": average_precision(rel, nr), "ndcg": ndcg(rel, nr),
            "ild_topic": ild_topic(g["topic"].tolist()),
            "ild_embedding": ild_embedding(vec) if vec is not None else np.nan,
            "novelty": novelty(g["item_users"].to_numpy(), int(g["active_users"].iloc[0])),
            "unexpectedness": float(g["unexpected"].mean()),
            "serendipity": float((g["unexpected"].to_numpy() & (rel == 1)).mean())})
    per_list = pd.DataFrame(rows)
    table = _aggregate(per_list, lists, tax, level, control, n_boot, seed)
    summary = {"k": k, "level": level, "horizon_days": horizon_days, "lists": int(len(per_list)),
               "users": int(per_list["user_id"].nunique()) if len(per_list) else 0,
               "lists_without_relevant_items": int((per_list["n_relevant"] == 0).sum()) if len(per_list) else 0,
               "ap_normalisation": "sum of precision@i at relevant ranks i <= k, divided by |R| (trec_eval map_cut)",
               "groups": {g: {r.metric: {"mean": r.mean, "lo": r.lo, "hi": r.hi}
                              for r in t.itertuples()} for g, t in table[table["kind"] == "mean"].groupby("group")}}
    diffs = table[table["kind"] == "difference"]
    if len(diffs):
        summary["differences_vs_control"] = {g: {r.metric: {"diff": r.mean, "lo": r.lo, "hi": r.hi}
                                                 for r in t.itertuples()} for g, t in diffs.groupby("group")}
    out = Evaluation(per_list, table, summary)
    if growth and "arm" in interactions.columns:
        out.growth, out.cohorts, summary["growth"] = interest_growth(run, ev, level, n_boot, seed)
    return out


def _aggregate(per_list, lists, tax, level, control, n_boot, seed) -> pd.DataFrame:
    rows = []
    users_of = {}
    for group, g in per_list.groupby("group"):
        users_of[group] = g
        for m in LIST_METRICS:
            vals = g[["user_id", m]].dropna()
            s = vals.groupby("user_id")[m].agg(["sum", "count"])
            mean, lo, hi = bootstrap_mean(s["sum"].to_numpy(), s["count"].to_numpy(), n_boot, seed)
            rows.append({"group": group, "kind": "mean", "metric": m, "mean": mean, "lo": lo, "hi": hi,
                         "lists": int(len(vals)), "users": int(len(s))})
        rec = lists[lists["group"] == group]
        catalog = tax.item_topics["item_id"].nunique()
        n_topics = int((tax.topics["level"] == level).sum())
        for m, v in (("catalog_coverage", rec["item_id"].nunique() / catalog if catalog else np.nan),
                     ("topic_coverage", rec["topic"].dropna().nunique() / n_topics if n_topics else np.nan)):
            rows.append({"group": group, "kind": "mean", "metric": m, "mean": float(v), "lo": np.nan, "hi": np.nan,
                         "lists": int(rec[["user_id", "ts_us"]].drop_duplicates().shape[0]),
                         "users": int(rec["user_id"].nunique())})
    if control is not None and control in users_of:
        base = users_of[control]
        for group, g in users_of.items():
            if group == control:
                continue
            for m in LIST_METRICS:
                a = g[["user_id", m]].dropna().groupby("user_id")[m].agg(["sum", "count"])
                b = base[["user_id", m]].dropna().groupby("user_id")[m].agg(["sum", "count"])
                d, lo, hi = bootstrap_difference(a, b, n_boot, seed)
                rows.append({"group": group, "kind": "difference", "metric": m, "mean": d, "lo": lo, "hi": hi,
                             "lists": int(a["count"].sum()), "users": int(len(a))})
    return pd.DataFrame(rows)


def bootstrap_difference(a: pd.DataFrame, b: pd.DataFrame, n_boot: int, seed: int) -> tuple[float, float, float]:
    """Difference of pooled means (a - b), users resampled independently within each side."""
    if a["count"].sum() == 0 or b["count"].sum() == 0:
        return float("nan"), float("nan"), float("nan")
    rng = np.random.default_rng(seed)
    sa, ca, sb, cb = (x.to_numpy(float) for x in (a["sum"], a["count"], b["sum"], b["count"]))
    ia = rng.integers(0, len(sa), (n_boot, len(sa)))
    ib = rng.integers(0, len(sb), (n_boot, len(sb)))
    with np.errstate(invalid="ignore", divide="ignore"):
        boots = sa[ia].sum(1) / ca[ia].sum(1) - sb[ib].sum(1) / cb[ib].sum(1)
    boots = boots[np.isfinite(boots)]
    lo, hi = np.quantile(boots, [0.025, 0.975])
    return float(sa.sum() / ca.sum() - sb.sum() / cb.sum()), float(lo), float(hi)


def interest_growth(run, ev: pd.DataFrame, level: int, n_boot: int = 1000, seed: int = 0,
                    pre_weeks: int = 2, core_days_per_week: float = 2.0):
    """Per arm and week: known topics per user (at the week's end), new-interest and discovery events
    per active user, share of the arm's users active; and movement between activity cohorts
    (inactive / casual / core by active days per week) from the first ``pre_weeks`` weeks to the
    last ``pre_weeks`` weeks, with bootstrap intervals over users."""
    labels = run.labels_frame()
    labels = labels[labels["level"] == level]
    arm_of = ev.groupby("user_id")["arm"].agg(lambda s: s.dropna().min() if s.notna().any() else "(none)")
    start = ev["ts"].min().normalize()
    week = lambda ts: ((pd.to_datetime(ts, utc=True) - start).dt.days // 7).astype(int)  # noqa: E731
    ev = ev.assign(week=week(ev["ts"]), day=pd.to_datetime(ev["ts"], utc=True).dt.normalize())
    labels = labels.assign(week=week(labels["ts"]))
    weeks = sorted(ev["week"].unique())
    tr = run.engine.to_pandas(run.transitions.filter(run.transitions.level == level)).sort_values("p")
    tr["count"] = tr.groupby("user_id")["d"].cumsum()
    users = arm_of.index.to_numpy()
    rows = []
    for w in weeks:
        end_us = int((start + pd.Timedelta(days=7 * (w + 1))).value // 1000)
        known = tr[tr["p"] <= end_us].groupby("user_id")["count"].last().reindex(users).fillna(0)
        active = ev[ev["week"] == w].groupby("user_id").size().reindex(users).fillna(0) > 0
        lw = labels[labels["week"] == w]
        new = lw[lw["label"] == "new_interest"].groupby("user_id").size().reindex(users).fillna(0)
        disc = lw[lw["discovery"]].groupby("user_id").size().reindex(users).fillna(0)
        for arm in sorted(arm_of.unique()):
            m = (arm_of == arm).to_numpy()
            act = active.to_numpy()[m]
            for metric, sums, counts in (
                    ("known_topics_per_user", known.to_numpy()[m], np.ones(m.sum())),
                    ("new_interest_per_active_user", new.to_numpy()[m] * act, act.astype(float)),
                    ("discovery_per_active_user", disc.to_numpy()[m] * act, act.astype(float)),
                    ("share_active", act.astype(float), np.ones(m.sum()))):
                mean, lo, hi = bootstrap_mean(sums, counts, n_boot, seed)
                rows.append({"arm": arm, "week": int(w), "metric": metric, "mean": mean, "lo": lo, "hi": hi})
    growth = pd.DataFrame(rows)

    def cohort(ws):
        days = ev[ev["week"].isin(ws)].groupby("user_id")["day"].nunique().reindex(users).fillna(0) / max(len(ws), 1)
        return pd.Series(np.where(days == 0, "inactive", np.where(days < core_days_per_week, "casual", "core")),
                         index=users)
    pre, post = cohort(weeks[:pre_weeks]), cohort(weeks[-pre_weeks:])
    crow = []
    for arm in sorted(arm_of.unique()):
        m = (arm_of == arm).to_numpy()
        for a in ("inactive", "casual", "core"):
            base = (pre.to_numpy()[m] == a)
            for b in ("inactive", "casual", "core"):
                moved = (post.to_numpy()[m] == b) & base
                mean, lo, hi = bootstrap_mean(moved.astype(float), base.astype(float), n_boot, seed)
                crow.append({"arm": arm, "from": a, "to": b, "users": int(moved.sum()), "share": mean, "lo": lo, "hi": hi})
    cohorts = pd.DataFrame(crow)
    last = growth[growth["week"] == weeks[-1]]
    summary = {"weeks": len(weeks), "arms": sorted(arm_of.unique().tolist()),
               "last_week": {arm: {r.metric: {"mean": r.mean, "lo": r.lo, "hi": r.hi} for r in g.itertuples()}
                             for arm, g in last.groupby("arm")},
               "cohort_rule": f"active days per week: 0 inactive, under {core_days_per_week} casual, else core; "
                              f"first {pre_weeks} weeks vs last {pre_weeks} weeks"}
    return growth, cohorts, summary
