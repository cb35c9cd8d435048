"""Checking a taxonomy change before rollout: what moves, and a gate that fails when too much does.

``check_rollout(current, candidate, interactions)`` compares two taxonomies on

- assignment agreement per level on the items either places (each item's primary topic; an
  item one side leaves unplaced counts in an "(unplaced)" group): ARI, AMI, NMI (scikit-learn),
  the share of items whose topic id changed, items only one side places;
- a topic map from the contingency table of item memberships (multi-label items count in each
  of their topics). With r = share of a current topic's items that land in a candidate topic and
  s = share of that candidate topic's items that come from it: a current topic is **split** when
  two or more candidate topics draw s >= 0.5 from it (it being their main source) and together
  take r >= 0.5 of it;
  **merged** when it puts r >= 0.5 into a candidate topic that also takes r >= 0.5 of another
  current topic; **kept** (same name) or **renamed** when r >= 0.5 and s >= 0.5 with one
  candidate topic; otherwise **retired**. A candidate topic is **continuing** when some current
  topic maps to it, else **new**;
- label impact on real interactions: labels under both taxonomies with the same LabelConfig,
  flips in each direction, new-interest and discovery rates, total shaped reward, footprint size;
- the candidate's own quality: topic sizes and unplaced share;

and applies the thresholds of :class:`GateConfig`.
"""
from __future__ import annotations

import dataclasses
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..config import GateConfig, LabelConfig
from ..labels.intake import rank_item_topics

UNPLACED = "(unplaced)"
KEEP, PART = 0.5, 0.2


@dataclasses.dataclass
class RolloutResult:
    summary: dict[str, Any]
    topic_map: pd.DataFrame
    flips: pd.DataFrame
    contingency: pd.DataFrame = dataclasses.field(default_factory=pd.DataFrame)
    names_current: dict = dataclasses.field(default_factory=dict)
    names_candidate: dict = dataclasses.field(default_factory=dict)
    candidate_sizes: dict = dataclasses.field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return self.summary["gate"]["passed"]

    def write(self, out_dir: str | os.PathLike) -> Path:
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        self.topic_map.to_csv(out / "topic_map.csv", index=False)
        self.flips.to_csv(out / "label_flips.csv", index=False)
        from .report import render
        (out / ".report.html.tmp").write_text(render(self), encoding="utf-8")
        os.replace(out / ".report.html.tmp", out / "report.html")
        tmp = out / ".summary.json.tmp"
        tmp.write_text(json.dumps(self.summary, indent=2, sort_keys=True, default=str) + "\n")
        os.replace(tmp, out / "summary.json")
        return out


def _primary(tax, level: int) -> pd.Series:
    it = rank_item_topics(tax.item_topics[tax.item_topics["level"] == level])
    # the latest assignment of each item (rows without valid_from are all "forever")
    it = it[it["valid_from_us"] == it.groupby("item_id")["valid_from_us"].transform("max")]
    it = it[(it["pos"] == 0) & it["topic_id"].notna()]
    return it.set_index("item_id")["topic_id"]


def agreement(current, candidate, level: int) -> dict[str, Any]:
    """ARI, AMI, NMI and changed share on the items either taxonomy places at ``level``."""
    from sklearn.metrics import adjusted_mutual_info_score, adjusted_rand_score, normalized_mutual_info_score
    a, b = _primary(current, level), _primary(candidate, level)
    items = a.index.union(b.index)
    x = a.reindex(items).fillna(UNPLACED).to_numpy()
    y = b.reindex(items).fillna(UNPLACED).to_numpy()
    return {"items": int(len(items)), "ari": float(adjusted_rand_score(x, y)),
            "ami": float(adjusted_mutual_info_score(x, y)), "nmi": float(normalized_mutual_info_score(x, y)),
            "changed_share": float(np.mean(x != y)) if len(items) else 0.0,
            "only_current": int(len(a.index.difference(b.index))),
            "only_candidate": int(len(b.index.difference(a.index)))}


def _members(tax, level: int) -> pd.DataFrame:
    it = tax.item_topics[(tax.item_topics["level"] == level) & tax.item_topics["topic_id"].notna()]
    return it[["item_id", "topic_id"]].drop_duplicates()


def contingency(current, candidate, level: int):
    """(pairs, current sizes, candidate sizes): items shared by each (current, candidate) topic
    pair, with r = n / current size and s = n / candidate size."""
    a, b = _members(current, level), _members(candidate, level)
    joint = a.merge(b, on="item_id", suffixes=("_cur", "_cand"))
    c = joint.groupby(["topic_id_cur", "topic_id_cand"]).size().rename("n").reset_index()
    size_a, size_b = a.groupby("topic_id").size(), b.groupby("topic_id").size()
    c["r"] = c["n"] / c["topic_id_cur"].map(size_a)
    c["s"] = c["n"] / c["topic_id_cand"].map(size_b)
    return c, size_a, size_b


def check_value(check: dict) -> str:
    """A gate check's value for messages ("-" when there was nothing to judge)."""
    return "-" if check["value"] is None else f"{check['value']:.4g}"


def changed_topics(current, candidate, level: int) -> set[str]:
    """Candidate topic ids at ``level`` whose item set is not exactly one of the current taxonomy's
    topics (whatever its id): the topics a rollout adds or changes."""
    def sets(tax):
        it = tax.item_topics
        it = it[(it["level"] == level) & it["topic_id"].notna()]
        return it.groupby("topic_id")["item_id"].apply(lambda s: frozenset(s.astype(str)))
    before = set(sets(current).tolist())
    return {t for t, members in sets(candidate).items() if members not in before}


def same_name(a: str | None, b: str | None) -> bool:
    """Names equal up to the order of their " / "-separated keywords and letter case: a topic whose
    keywords were only reordered keeps its name."""
    def words(x):
        return None if x is None else sorted(w.strip().casefold() for w in str(x).split("/"))
    return words(a) == words(b)


def topic_map(current, candidate, level: int) -> pd.DataFrame:
    """One row per current topic (status kept/renamed/split/merged/retired and its targets) and per
    new candidate topic (status new), from item memberships (see the module docstring)."""
    c, size_a, size_b = contingency(current, candidate, level)
    names_a, names_b = current.names(), candidate.names()
    rows, continuing = [], set()
    # each current topic's main target (most of its items; ties: the target it makes up most of)
    target = c.sort_values(["r", "s", "topic_id_cand"], ascending=[False, False, True]) \
        .drop_duplicates("topic_id_cur")
    into = target[target["r"] >= KEEP].groupby("topic_id_cand")["topic_id_cur"].apply(list).to_dict()
    # each candidate topic's main source: the current topic that makes up most of it
    source = c.sort_values(["s", "topic_id_cur"], ascending=[False, True]).drop_duplicates("topic_id_cand") \
        .set_index("topic_id_cand")["topic_id_cur"]
    for t in sorted(size_a.index):
        ct = c[c["topic_id_cur"] == t].sort_values(["r", "s", "topic_id_cand"], ascending=[False, False, True])
        best = ct.iloc[0] if len(ct) else None
        parts = ct[(ct["s"] >= KEEP) & (ct["topic_id_cand"].map(source) == t)]
        if len(parts) >= 2 and parts["r"].sum() >= KEEP:
            status, to = "split", sorted(parts["topic_id_cand"])
        elif best is not None and best["r"] >= KEEP and len(into.get(best["topic_id_cand"], [])) >= 2:
            status, to = "merged", [best["topic_id_cand"]]
        elif best is not None and best["r"] >= KEEP and best["s"] >= KEEP:
            to = [best["topic_id_cand"]]
            status = "kept" if same_name(names_b.get(to[0]), names_a.get(t)) else "renamed"
        else:
            status, to = "retired", []
        continuing.update(to)
        rows.append({"side": "current", "topic_id": t, "name": names_a.get(t, t), "size": int(size_a[t]),
                     "status": status, "to": "|".join(to), "to_names": "|".join(names_b.get(x, x) for x in to)})
    merged = [r for r in rows if r["status"] == "merged"]
    for r in merged:  # name the other current topics merged into the same candidate topic
        r["with"] = "|".join(o["topic_id"] for o in merged if o["to"] == r["to"] and o is not r)
    for t in sorted(size_b.index):
        if t not in continuing:
            rows.append({"side": "candidate", "topic_id": t, "name": names_b.get(t, t), "size": int(size_b[t]),
                         "status": "new", "to": "", "to_names": ""})
    out = pd.DataFrame(rows)
    out.insert(0, "level", level)
    if "with" not in out.columns:
        out["with"] = ""
    out["with"] = out["with"].fillna("")
    return out


def label_impact(current, candidate, interactions, label_config: LabelConfig | None = None,
                 window_days: float | None = None, engine=None) -> tuple[dict[str, Any], pd.DataFrame]:
    """Labels under both taxonomies (same settings), compared on the interactions of the last
    ``window_days`` (all when None), each user's full prior history counted."""
    from ..labels.plan import plan_labels
    cfg = label_config or LabelConfig()
    keys = ["user_id", "item_id", "ts", "event_id", "level"]
    runs = [plan_labels(interactions, tax, cfg, engine=engine) for tax in (current, candidate)]
    a, b = (r.labels_frame() for r in runs)
    if window_days is not None and len(a):
        since = pd.to_datetime(a["ts"]).max() - pd.Timedelta(days=window_days)
        a, b = a[pd.to_datetime(a["ts"]) >= since], b[pd.to_datetime(b["ts"]) >= since]
    j = a.merge(b, on=keys, how="inner", suffixes=("_cur", "_cand"))
    flips = j.groupby(["level", "label_cur", "label_cand"]).size().rename("rows").reset_index()
    flipped = j[j["label_cur"] != j["label_cand"]]
    per_level = {}
    for level, g in j.groupby("level"):
        n = len(g)
        per_level[str(int(level))] = {
            "rows": int(n), "flip_share": float((g["label_cur"] != g["label_cand"]).mean()) if n else 0.0,
            "in_profile_to_new_interest": int(((g.label_cur == "in_profile") & (g.label_cand == "new_interest")).sum()),
            "new_interest_to_in_profile": int(((g.label_cur == "new_interest") & (g.label_cand == "in_profile")).sum()),
            "to_unplaced": int(((g.label_cur != "unplaced") & (g.label_cand == "unplaced")).sum()),
            "from_unplaced": int(((g.label_cur == "unplaced") & (g.label_cand != "unplaced")).sum()),
            "new_interest_rate": [float((g.label_cur == "new_interest").mean()), float((g.label_cand == "new_interest").mean())],
            "discovery_rate": [float(g.discovery_cur.mean()), float(g.discovery_cand.mean())],
            "shaped_reward_total": [float(g.shaped_reward_cur.sum()), float(g.shaped_reward_cand.sum())]}
    sizes = []
    for r in runs:
        fp = r.footprints_frame()
        known = fp[fp["known"]].groupby(["level", "user_id"]).size()
        sizes.append({str(int(lv)): {"median": float(s.median()), "p90": float(s.quantile(0.9))}
                      for lv, s in known.groupby(level=0)})
    summary = {"rows_compared": int(len(j)), "levels": per_level,
               "flip_share": float((j["label_cur"] != j["label_cand"]).mean()) if len(j) else 0.0,
               "footprint_known_topics": {"current": sizes[0], "candidate": sizes[1]},
               "users_most_affected": flipped.groupby("user_id").size().sort_values(ascending=False)
               .head(10).to_dict(),
               "topics_most_affected": flipped.groupby("topic_id_cur").size().sort_values(ascending=False)
               .head(10).to_dict()}
    return summary, flips


def sample_users(interactions, n: int):
    """The interactions of ``n`` users chosen by the SHA-256 of their id (the same users every
    time), each with their full history."""
    import hashlib
    from ..labels.intake import Staged
    if isinstance(interactions, Staged):
        t = interactions.table
        users = sorted(t.select("user_id").distinct().execute()["user_id"],
                       key=lambda u: hashlib.sha256(str(u).encode()).hexdigest())[:n]
        return dataclasses.replace(interactions, table=t.filter(t.user_id.isin(users)))
    if isinstance(interactions, (str, os.PathLike)):
        from ..tables import read_table
        interactions = read_table(Path(interactions))
    users = sorted(interactions["user_id"].astype(str).unique(),
                   key=lambda u: hashlib.sha256(u.encode()).hexdigest())[:n]
    return interactions[interactions["user_id"].astype(str).isin(users)]


def silhouette(tax, items: pd.DataFrame, level: int, sample: int = 2000, seed: int = 0) -> float | None:
    """Cosine silhouette of ``tax``'s topics at ``level`` on a sample of its placed items, in its own
    embedding space; None when the taxonomy has no embedding model (editorial) or too few topics."""
    if tax.kind != "learned" or items is None:
        return None
    from sklearn.metrics import silhouette_score
    from ..embed import embed_items
    from ..tables import normalize_items
    prim = _primary(tax, level)
    its, _ = normalize_items(items, text_columns=tuple(tax.manifest["config"]["text_columns"]))
    its = its[its["item_id"].isin(prim.index)]
    if len(its) > sample:
        its = its.sample(sample, random_state=seed)
    labels = prim.reindex(its["item_id"]).to_numpy()
    if len(set(labels)) < 2 or len(its) < 3:
        return None
    vectors, _ = embed_items(its, tax.manifest["config"], embedder=tax.embedder(), progress=False)
    return float(silhouette_score(vectors, labels, metric="cosine"))


def check_rollout(current, candidate, interactions, config: GateConfig | None = None, *,
                  label_config: LabelConfig | None = None, window_days: float | None = None,
                  sample: int | None = None, items: pd.DataFrame | None = None,
                  engine=None) -> RolloutResult:
    """Compare ``candidate`` with ``current`` and apply the gate (see the module docstring).

    ``window_days`` compares only the last days' labels (all history still counts); ``sample``
    compares ``sample`` users (chosen by a hash of their id, each with their full history);
    ``items`` (the items table) adds newly (un)placed counts and the candidate's silhouette.
    """
    gate = config or GateConfig()
    levels = sorted(set(current.levels) & set(candidate.levels))
    if not levels:
        from ..errors import ConfigError
        raise ConfigError(f"the taxonomies share no level (current {current.levels}, candidate {candidate.levels}).")
    if sample is not None:
        interactions = sample_users(interactions, sample)
    agree = {str(lv): agreement(current, candidate, lv) for lv in levels}
    if items is not None:
        universe = set(items["item_id"].astype(str))
        for lv in levels:
            a, b = set(_primary(current, lv).index), set(_primary(candidate, lv).index)
            agree[str(lv)].update(newly_unplaced=len((a - b) & universe), newly_placed=len((b - a) & universe))
    tmap = pd.concat([topic_map(current, candidate, lv) for lv in levels], ignore_index=True)
    impact, flips = label_impact(current, candidate, interactions,
                                 (label_config or LabelConfig()).model_copy(update={"levels": tuple(levels)}),
                                 window_days, engine)
    cur_topics = tmap[tmap["side"] == "current"]
    sizes = candidate.item_topics[candidate.item_topics["topic_id"].notna()].groupby(["level", "topic_id"]).size()
    names = candidate.names()
    n_items = int(candidate.manifest.get("n_items") or candidate.item_topics["item_id"].nunique())
    unplaced_share = float(candidate.manifest.get("n_unplaced", 0)) / n_items if n_items else 0.0
    quality = {"topics_per_level": {str(lv): int((sizes.index.get_level_values(0) == lv).sum()) for lv in levels},
               "unplaced_share": unplaced_share, "silhouette": silhouette(candidate, items, max(levels)),
               "smallest": [{"topic_id": t, "name": names.get(t, t), "size": int(n)}
                            for (_, t), n in sizes.sort_values().head(5).items()],
               "largest": [{"topic_id": t, "name": names.get(t, t), "size": int(n)}
                           for (_, t), n in sizes.sort_values(ascending=False).head(5).items()]}
    judged = [lv for lv in levels if gate.levels is None or lv in gate.levels]
    if not judged:
        from ..errors import ConfigError
        raise ConfigError(f"gate.levels {list(gate.levels)} names no level both taxonomies have ({levels}).")
    checks, warnings = {}, []
    for lv in judged:
        at = f" (level {lv})"
        flip = impact["levels"].get(str(lv), {}).get("flip_share", 0.0)
        cur_lv = cur_topics[cur_topics["level"] == lv]
        retired = float((cur_lv["status"] == "retired").mean()) if len(cur_lv) else 0.0
        changed = changed_topics(current, candidate, lv)
        lv_sizes = sizes.loc[lv] if lv in sizes.index.get_level_values(0) else pd.Series(dtype=int)
        judged_sizes = lv_sizes[lv_sizes.index.isin(changed)]
        small_kept = lv_sizes[~lv_sizes.index.isin(changed) & (lv_sizes < gate.min_topic_size)]
        if len(small_kept):
            warnings.append(f"level {lv}: {len(small_kept)} topic(s) under min_topic_size that the candidate does not "
                            f"change (already so in the current taxonomy): " + ", ".join(
                                f"{names.get(t, t)} ({n})" for t, n in small_kept.sort_values().head(5).items()))
        checks["flip_share" + at] = (flip, flip <= gate.max_flip_share, f"<= {gate.max_flip_share}")
        checks["ami" + at] = (agree[str(lv)]["ami"], agree[str(lv)]["ami"] >= gate.min_ami, f">= {gate.min_ami}")
        checks["retired_share" + at] = (retired, retired <= gate.max_retired_share, f"<= {gate.max_retired_share}")
        smallest = int(judged_sizes.min()) if len(judged_sizes) else None
        checks["min_topic_size" + at] = (smallest, smallest is None or smallest >= gate.min_topic_size,
                                         f">= {gate.min_topic_size} (topics the candidate adds or changes: "
                                         f"{len(judged_sizes)})")
    cur_unplaced = float(current.manifest.get("n_unplaced", 0)) / n_items if n_items else 0.0
    ok = unplaced_share <= gate.max_unplaced_share or unplaced_share <= cur_unplaced
    if unplaced_share > gate.max_unplaced_share and ok:
        warnings.append(f"unplaced share {unplaced_share:.3g} is over {gate.max_unplaced_share}, but no worse than the "
                        f"current taxonomy's ({cur_unplaced:.3g})")
    checks["unplaced_share"] = (unplaced_share, ok, f"<= {gate.max_unplaced_share} or no worse than current")
    only = sorted(set(current.levels) ^ set(candidate.levels))
    note = (f"levels compared: {levels} (current has {current.levels}, candidate {candidate.levels}: "
            f"level(s) {only} exist on one side only and cannot be compared)") if only else f"levels compared: {levels}"
    gate_out = {k: {"value": v, "passed": bool(ok), "threshold": th} for k, (v, ok, th) in checks.items()}
    summary = {"current": current.version, "candidate": candidate.version, "levels": levels,
               "agreement": agree, "topic_map_counts": {
                   str(lv): tmap[tmap["level"] == lv]["status"].value_counts().to_dict() for lv in levels},
               "labels": impact, "candidate_quality": quality,
               "gate": {"passed": all(c["passed"] for c in gate_out.values()), "checks": gate_out,
                        "levels_judged": judged, "levels_note": note, "warnings": warnings,
                        "config": json.loads(gate.canonical_json())}}
    cont = pd.concat([contingency(current, candidate, lv)[0].assign(level=lv) for lv in levels], ignore_index=True)
    return RolloutResult(summary, tmap, flips, cont, current.names(), candidate.names(),
                         {lv: sizes.loc[lv].tolist() for lv in levels if lv in sizes.index.get_level_values(0)})
