"""The invented demo scenario: a hobby-tutorial video site, generated with its ground truth.

``generate_scenario(seed)`` returns items, interactions and the truth (each item's theme, each
user's true new-interest events). Deterministic for a seed. Everything here is invented.
"""
from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd

from .demo_catalog import (DESCRIPTION_FORMS, OFF_TOPIC_DESCRIPTIONS, OFF_TOPIC_TAGS,
                           OFF_TOPIC_TITLES, THEMES, TITLE_FORMS)

START = dt.datetime(2026, 3, 2, tzinfo=dt.timezone.utc)  # a Monday
THEME_LIST = [(hobby, theme) for hobby, themes in THEMES.items() for theme in themes]


@dataclasses.dataclass
class Scenario:
    items: pd.DataFrame          # item_id, title, description, tags, category, updated_at
    interactions: pd.DataFrame   # user_id, item_id, ts, engagement, event_id, event_type, arm
    truth_items: pd.DataFrame    # item_id, theme, hobby, kind (regular | mixed | off_topic), theme2
    truth_events: pd.DataFrame   # user_id, item_id, ts, event_id, theme: true new-interest events
    users: pd.DataFrame          # user_id, kind (explorer | homebody | churner), arm, churn_week


def _typo(rng: np.random.Generator, text: str, p: float) -> str:
    if rng.random() >= p or len(text) < 6:
        return text
    i = int(rng.integers(1, len(text) - 2))
    return text[:i] + text[i + 1] + text[i] + text[i + 2:]


def _fill(rng, form: str, vocab, n: int | None = None) -> str:
    subjects, techniques, tools, _ = vocab
    t1, t2 = rng.choice(len(techniques), size=2, replace=len(techniques) < 2)
    o1, o2 = rng.choice(len(tools), size=2, replace=len(tools) < 2)
    subject = subjects[int(rng.integers(len(subjects)))]
    return form.format(subject=subject, subject_c=subject.capitalize(), technique=techniques[t1],
                       technique_c=techniques[t1].capitalize(), technique2=techniques[t2],
                       tool=tools[o1], tool2=tools[o2], n=n or int(rng.integers(3, 11)))


def _items(rng: np.random.Generator, n_items: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    rows, truth = [], []
    n_off = max(1, n_items // 40)
    n_mixed = max(1, n_items // 15)
    kinds = ["off_topic"] * n_off + ["mixed"] * n_mixed + ["regular"] * (n_items - n_off - n_mixed)
    rng.shuffle(kinds)
    for k, kind in enumerate(kinds):
        item_id = f"v{k:05d}"
        if kind == "off_topic":
            title = OFF_TOPIC_TITLES[int(rng.integers(len(OFF_TOPIC_TITLES)))].format(
                year=int(rng.integers(2019, 2027)), n=int(rng.integers(1, 100)))
            desc = OFF_TOPIC_DESCRIPTIONS[int(rng.integers(len(OFF_TOPIC_DESCRIPTIONS)))]
            tags = list(rng.choice(OFF_TOPIC_TAGS, size=2, replace=False))
            rows.append((item_id, title, desc, " ".join(f"#{t.replace(' ', '')}" for t in tags), None))
            truth.append((item_id, None, None, kind, None))
            continue
        a = int(rng.integers(len(THEME_LIST)))
        hobby, theme = THEME_LIST[a]
        vocab = THEMES[hobby][theme]
        title = _fill(rng, TITLE_FORMS[int(rng.integers(len(TITLE_FORMS)))], vocab)
        desc = _fill(rng, DESCRIPTION_FORMS[int(rng.integers(len(DESCRIPTION_FORMS)))], vocab)
        tags = list(rng.choice(vocab[3], size=min(3, len(vocab[3])), replace=False))
        theme2 = None
        if kind == "mixed":
            b = int(rng.integers(len(THEME_LIST)))
            while b == a:
                b = int(rng.integers(len(THEME_LIST)))
            hobby2, theme2 = THEME_LIST[b]
            other = THEMES[hobby2][theme2]
            desc += " " + _fill(rng, "Bonus: a bit of {technique} with a {tool}.", other)
            tags.append(other[3][0])
        title = _typo(rng, title, 0.08)
        desc = _typo(rng, desc, 0.08)
        category = hobby if theme2 is None else f"{hobby}|{[h for h, t in THEME_LIST if t == theme2][0]}"
        rows.append((item_id, title, desc, " ".join(f"#{t.replace(' ', '')}" for t in tags),
                     category if hobby != category.split("|")[-1] or theme2 is None else hobby))
        truth.append((item_id, theme, hobby, kind, theme2))
    items = pd.DataFrame(rows, columns=["item_id", "title", "description", "tags", "category"])
    items["updated_at"] = pd.Timestamp(START - dt.timedelta(days=30)).as_unit("us")
    truth_df = pd.DataFrame(truth, columns=["item_id", "theme", "hobby", "kind", "theme2"])
    return items, truth_df


def generate_scenario(seed: int = 7, n_items: int = 3200, n_users: int = 1200,
                      weeks: int = 12) -> Scenario:
    """Generate the demo catalog and 12 weeks of viewing with latent, sometimes widening interests.

    >>> s = generate_scenario(seed=1, n_items=200, n_users=20, weeks=2)
    >>> sorted(s.interactions.columns)[:3]
    ['arm', 'engagement', 'event_id']
    """
    rng = np.random.default_rng(seed)
    items, truth_items = _items(rng, n_items)
    by_theme = {t: g.item_id.to_numpy() for t, g in truth_items[truth_items.kind != "off_topic"]
                .groupby("theme")}
    off_topic = truth_items.loc[truth_items.kind == "off_topic", "item_id"].to_numpy()
    themes = [t for _, t in THEME_LIST]
    hobby_of = {t: h for h, t in THEME_LIST}
    popularity = {t: rng.zipf(1.6, size=len(v)).astype(float) for t, v in by_theme.items()}

    events, truth_events, users = [], [], []
    for u in range(n_users):
        user_id = f"u{u:04d}"
        kind = rng.choice(["explorer", "homebody", "churner"], p=[0.6, 0.25, 0.15])
        arm = "explore_boost" if rng.random() < 0.5 else "control"
        # a churner leaves after week 2 (or week 1 in very short scenarios); the same draw as before
        churn_week = int(rng.integers(min(2, weeks - 1), weeks)) if kind == "churner" and weeks > 1 else weeks
        first = themes[int(rng.integers(len(themes)))]
        interests = [first]
        for _ in range(int(rng.integers(0, 3))):
            same = [t for t in themes if hobby_of[t] == hobby_of[first] and t not in interests]
            pool = same if (rng.random() < 0.7 and same) else [t for t in themes if t not in interests]
            interests.append(pool[int(rng.integers(len(pool)))])
        weights = list(rng.uniform(0.5, 1.5, size=len(interests)))
        sessions_per_week = float(rng.lognormal(0.6, 0.6))
        p_explore = {"explorer": 0.10, "homebody": 0.0, "churner": 0.05}[kind]
        p_explore *= 1.6 if arm == "explore_boost" else 1.0
        pending_new: set[str] = set()
        users.append((user_id, kind, arm, churn_week))
        for week in range(churn_week):
            if rng.random() < p_explore:
                same = [t for t in themes if hobby_of[t] == hobby_of[interests[0]] and t not in interests]
                pool = same if (rng.random() < 0.5 and same) else [t for t in themes if t not in interests]
                if pool:
                    new = pool[int(rng.integers(len(pool)))]
                    interests.append(new)
                    weights.append(2.0)
                    pending_new.add(new)
            for _ in range(int(rng.poisson(sessions_per_week))):
                day = int(rng.integers(0, 7))
                t0 = START + dt.timedelta(days=7 * week + day, seconds=int(rng.integers(6 * 3600, 86_000)))
                for j in range(int(rng.integers(1, 7))):
                    ts = t0 + dt.timedelta(seconds=int(rng.integers(0, 240)) * j)
                    r = rng.random()
                    if r < 0.85 or kind == "homebody":
                        w = np.asarray(weights) / np.sum(weights)
                        theme = interests[int(rng.choice(len(interests), p=w))]
                        if theme in pending_new:
                            engagement = float(rng.choice([1.0, 2.0]))
                        else:
                            engagement = float(rng.choice([0.5, 1.0, 2.0], p=[0.2, 0.5, 0.3]))
                    elif r < 0.95:
                        theme = themes[int(rng.integers(len(themes)))]
                        engagement = float(rng.choice([-1.0, 0.0, 0.5, 1.0], p=[0.15, 0.45, 0.3, 0.1]))
                    else:
                        theme = None
                        engagement = float(rng.choice([0.0, 0.5]))
                    if theme is None:
                        item = off_topic[int(rng.integers(len(off_topic)))]
                    else:
                        pop = popularity[theme]
                        item = by_theme[theme][int(rng.choice(len(pop), p=pop / pop.sum()))]
                    event_id = f"e{len(events):07d}"
                    if theme in pending_new:
                        pending_new.discard(theme)
                        truth_events.append((user_id, item, ts, event_id, theme))
                    events.append((user_id, item, ts, engagement, event_id, "play", arm))
    inter = pd.DataFrame(events, columns=["user_id", "item_id", "ts", "engagement", "event_id",
                                          "event_type", "arm"])
    inter["ts"] = pd.to_datetime(inter["ts"], utc=True).astype("datetime64[us, UTC]")
    inter = inter.sort_values(["ts", "user_id", "event_id"], kind="stable").reset_index(drop=True)
    tev = pd.DataFrame(truth_events, columns=["user_id", "item_id", "ts", "event_id", "theme"])
    tev["ts"] = pd.to_datetime(tev["ts"], utc=True).astype("datetime64[us, UTC]")
    users_df = pd.DataFrame(users, columns=["user_id", "kind", "arm", "churn_week"])
    return Scenario(items, inter, truth_items, tev, users_df)


def write_scenario(s: Scenario, data_dir) -> dict[str, str]:
    """Write the scenario's tables as Parquet; returns their paths."""
    from pathlib import Path
    d = Path(data_dir)
    d.mkdir(parents=True, exist_ok=True)
    paths = {}
    for name in ("items", "interactions", "truth_items", "truth_events", "users"):
        p = d / f"{name}.parquet"
        getattr(s, name).to_parquet(p, index=False)
        paths[name] = str(p)
    return paths


def run_demo(out_dir, seed: int = 7, embedder=None, progress: bool = True, small: bool = False) -> dict:
    """Generate the scenario and run every stage on it; returns (and writes) a summary."""
    import json
    from pathlib import Path

    from sklearn.metrics import adjusted_mutual_info_score

    from .config import LabelConfig, TaxonomyConfig
    from .labels.plan import plan_labels
    from .tables import normalize_interactions, normalize_items
    from .taxonomy import Taxonomy, build_taxonomy

    out = Path(out_dir)
    sizes = dict(n_items=600, n_users=150, weeks=6) if small else {}
    scenario = generate_scenario(seed, **sizes)
    paths = write_scenario(scenario, out / "data")
    _, item_intake = normalize_items(scenario.items, source=paths["items"])
    _, inter_intake = normalize_interactions(scenario.interactions, source=paths["interactions"])

    import time
    started = time.perf_counter()
    tax = build_taxonomy(scenario.items, TaxonomyConfig(embedding_cache=str(out / "cache" / "embeddings")),
                         embedder=embedder, progress=progress, source=paths["items"])
    model_seconds = time.perf_counter() - started
    tax.save(out / "taxonomy")
    editorial = Taxonomy.from_categories(scenario.items, column="category")
    editorial.save(out / "taxonomy-editorial")

    truth = scenario.truth_items.set_index("item_id")
    fit = {}
    for level, col in ((1, "theme"), (0, "hobby")):
        placed = tax.item_topics[tax.item_topics["level"] == level].drop_duplicates("item_id")
        m = truth.join(placed.set_index("item_id")["topic_id"], how="left")
        m = m[m["kind"] != "off_topic"]
        fit[f"level{level}_ami_vs_true_{col}"] = round(float(adjusted_mutual_info_score(
            m[col], m["topic_id"].fillna("(unplaced)"))), 4)

    fast_encoder = _fast_encoder(out, scenario, tax, embedder, progress, model_seconds)

    burn_in = START + dt.timedelta(days=14)
    cfg = LabelConfig(label_from=burn_in)
    run = plan_labels(paths["interactions"], tax, cfg)
    label_summary = run.write(out / "labels")
    labels = run.labels_frame()
    fine = labels[labels["level"] == 1]
    ev = scenario.truth_events[scenario.truth_events["ts"] >= burn_in]
    hit = ev.merge(fine[["event_id", "label"]], on="event_id", how="left")
    recall = float((hit["label"] == "new_interest").mean()) if len(hit) else 0.0
    plans = _label_plans(paths["interactions"], tax, cfg, run.content_hash())
    plans["pieces"] = _label_in_pieces(paths["interactions"], tax, cfg, out / "labels",
                                       bucket_rows=len(scenario.interactions) // 5)
    from .store import open_store, publish_store
    import hashlib
    key = hashlib.sha256(f"{run.taxonomy_version}\x00{run.labels_version}".encode()).hexdigest()
    snapshot = publish_store(out / "store", run, tax, cfg, content_key=key)  # the same demo, the same name
    store = open_store(out / "store")
    busiest = scenario.interactions["user_id"].value_counts().index[0]
    fp = store.footprint(busiest, level=1)
    fine_items = tax.item_topics[tax.item_topics["level"] == 1].drop_duplicates("topic_id")
    candidates = fine_items["item_id"].head(5).tolist()  # one item from each of five fine topics
    lookup = {"user_id": busiest, "known_fine_topics": [t.name for t in fp.known][:5],
              "candidates": {c.item_id: c.label for c in store.classify(busiest, candidates, level=1)}}
    job = _run_job_twice(out, paths, scenario, cfg, embedder, progress, labels)
    evaluation = _evaluate_policies(out, scenario, tax, cfg, embedder)
    summary = {
        "seed": seed, "data": paths, "job": job, "evaluation": evaluation, "fast_encoder": fast_encoder,
        "store": {"dir": str(out / "store"), "snapshot": snapshot, "example_lookup": lookup},
        "items": int(len(scenario.items)), "interactions": int(len(scenario.interactions)),
        "users": int(scenario.interactions["user_id"].nunique()),
        "validation_notes": item_intake.notes + inter_intake.notes,
        "taxonomy": {"dir": str(out / "taxonomy"), "version": tax.version,
                     "topics_per_level": tax.manifest["topics_per_level"],
                     "unplaced": tax.manifest["n_unplaced"], "warnings": tax.manifest.get("warnings", []), **fit},
        "labels": {"dir": str(out / "labels"), "label_from": burn_in.isoformat(), "plans": plans,
                   "true_new_interest_events_after_burn_in": int(len(ev)),
                   "share_labelled_new_interest_level1": round(recall, 4),
                   "levels": {k: {"labels": v["labels"], "new_interest_share": v["new_interest_share"],
                                  "discovery_share": v["discovery_share"]}
                              for k, v in label_summary["levels"].items()}},
    }
    (out / "demo-summary.json").write_text(json.dumps(summary, indent=2, sort_keys=True) + "\n")
    return summary


def _label_plans(interactions, tax, cfg, want: str) -> dict:
    """The demo's labels again by each DuckDB plan (the sorted pass of labeler/labels/scan.py is taken from
    1M interactions on; here it is asked for), timed, and whether both equal the labels written."""
    import time

    from .config import EngineConfig
    from .engines import make_engine
    from .labels.plan import plan_labels
    out = {}
    for plan in ("scan", "windows"):
        started = time.perf_counter()
        run = plan_labels(interactions, tax, cfg, engine=make_engine(EngineConfig(label_plan=plan, scan_min_rows=0)))
        same = run.content_hash() == want
        out[plan] = {"seconds": round(time.perf_counter() - started, 2), "same_labels": same}
    return out


def _label_in_pieces(interactions, tax, cfg, written: Path, bucket_rows: int) -> dict:
    """The demo's labels again as a large run writes them, in pieces of users of about
    ``bucket_rows`` interactions (each date's file appended to piece by piece), and whether the
    files are the bytes of the one pass written to ``written``."""
    import shutil
    import time

    from .config import EngineConfig
    from .engines import make_engine
    from .labels.plan import plan_labels
    folder = written.parent / ".labels-in-pieces"
    started = time.perf_counter()
    run = plan_labels(interactions, tax, cfg, engine=make_engine(EngineConfig(bucket_rows=bucket_rows)))
    run.write(folder)

    def files(root: Path) -> dict:
        return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*.parquet"))}
    same = files(folder) == files(written)
    shutil.rmtree(folder)
    return {"seconds": round(time.perf_counter() - started, 2), "bucket_rows": bucket_rows,
            "pieces": run.written["pieces"] if run.written else 1, "same_files": same}


def _fast_encoder(out, scenario, tax, embedder, progress, model_seconds) -> dict:
    """The same catalog with ``taxonomy.encoder = "distilled"`` (fitted on a third of the items),
    beside the model's taxonomy: time, fine-level AMI against the true themes, agreement (ARI)."""
    import time
    from sklearn.metrics import adjusted_mutual_info_score, adjusted_rand_score
    from .config import TaxonomyConfig
    from .taxonomy import build_taxonomy
    if embedder is not None:
        return {"skipped": "the distilled encoder is fitted from the sentence model; run without --embedder hashing"}
    cfg = TaxonomyConfig(embedding_cache=str(out / "cache" / "embeddings"), encoder="distilled",
                         distill_items=max(100, len(scenario.items) // 3))
    started = time.perf_counter()
    fast = build_taxonomy(scenario.items, cfg, progress=progress)
    seconds = time.perf_counter() - started
    fast.save(out / "taxonomy-distilled")
    truth = scenario.truth_items[scenario.truth_items["kind"] != "off_topic"]

    def fine(t):
        placed = t.item_topics[t.item_topics["level"] == 1].drop_duplicates("item_id").set_index("item_id")
        return truth["item_id"].map(placed["topic_id"]).fillna("(unplaced)")
    return {"dir": str(out / "taxonomy-distilled"), "version": fast.version, "distilled_on": cfg.distill_items,
            "seconds": round(seconds, 1), "model_seconds": round(model_seconds, 1),
            "topics_per_level": fast.manifest["topics_per_level"],
            "level1_ami_vs_true_theme": round(float(adjusted_mutual_info_score(truth["theme"], fine(fast))), 4),
            "level1_ari_vs_model_taxonomy": round(float(adjusted_rand_score(fine(tax), fine(fast))), 4)}


def write_daily(interactions, folder, since=None, until=None) -> list[str]:
    """Write interactions as one Parquet partition per UTC date (``date=YYYY-MM-DD/``), from
    ``since`` (inclusive) up to ``until`` (exclusive); returns the dates written."""
    from pathlib import Path
    import pandas as pd
    day = pd.to_datetime(interactions["ts"], utc=True).dt.strftime("%Y-%m-%d")
    written = []
    for d in sorted(day.unique()):
        if (until is not None and d >= until) or (since is not None and d < since):
            continue
        part = Path(folder) / f"date={d}"
        part.mkdir(parents=True, exist_ok=True)
        interactions[day == d].to_parquet(part / "part-0.parquet", index=False)
        written.append(d)
    return written


def _run_job_twice(out, paths, scenario, label_cfg, embedder, progress, labels) -> dict:
    """The scheduled job on daily partitions: a first run on all but the last week, then the
    incremental run the next week would bring; its labels must be the batch labels."""
    import pandas as pd
    import pyarrow.parquet as pq

    from .config import JobConfig
    from .job import current_outputs, run_job
    daily = out / "data" / "daily"
    last = pd.to_datetime(scenario.interactions["ts"], utc=True).max().normalize() - pd.Timedelta(days=6)
    cut = last.strftime("%Y-%m-%d")
    write_daily(scenario.interactions, daily, until=cut)
    cfg = JobConfig(items=paths["items"], interactions=str(daily), work_dir=str(out / "job"),
                    taxonomy={"embedding_cache": str(out / "cache" / "embeddings")}, labels=label_cfg)
    first = run_job(cfg, embedder=embedder, progress=progress).manifest
    write_daily(scenario.interactions, daily, since=cut)
    second = run_job(cfg, embedder=embedder, progress=progress).manifest
    got = pq.read_table(current_outputs(out / "job") / "labels").to_pandas()
    keys = ["user_id", "ts", "event_id", "item_id", "level"]
    cols = keys + ["topic_id", "label", "shaped_reward", "history_len", "known_topics"]
    a = got[cols].sort_values(keys, na_position="last").reset_index(drop=True).astype(object)
    b = labels[cols].sort_values(keys, na_position="last").reset_index(drop=True).astype(object)
    same = len(a) == len(b) and bool((a.fillna("-") == b.fillna("-")).all().all())
    return {"work_dir": str(out / "job"), "runs": [
        {k: m.get(k) for k in ("run", "mode", "why", "relabelled_users", "continued_users", "relabelled_from",
                               "label_rows_written", "dates_linked", "durations_s")} for m in (first, second)],
        "labels_equal_batch_labels": same}


def _evaluate_policies(out, scenario, tax, label_cfg, embedder) -> dict:
    """Three simple policies asked for 10 items per user at the start of week 9, judged on the next
    two weeks; and the experiment arms' interest growth over the whole log."""
    import pandas as pd

    from .evaluation.metrics import evaluate, item_vectors
    from .evaluation.policies import recommend
    ev = scenario.interactions
    weeks = max(1, int((ev["ts"].max() - ev["ts"].min()).days // 7))
    at = pd.Timestamp(ev["ts"].min()).normalize() + pd.Timedelta(days=7 * max(1, min(8, weeks - 2)))
    history = ev[ev["ts"] < at]
    users = sorted(set(history["user_id"]) & set(ev.loc[ev["ts"] >= at, "user_id"]))
    recs = recommend(history, tax, users, at, k=10)
    recs_path = out / "data" / "recs.parquet"  # so `labeler evaluate --recs` can be tried on the same lists
    recs.to_parquet(recs_path, index=False)
    vectors = item_vectors(scenario.items, tax, embedder=embedder)
    res = evaluate(recs, ev, tax, k=10, group_by="policy", control="popularity", horizon_days=14,
                   label_config=label_cfg.model_copy(update={"label_from": None}), item_vectors=vectors,
                   n_boot=500)
    res.write(out / "evaluation")
    shown = ("precision", "ndcg", "ild_topic", "ild_embedding", "novelty", "unexpectedness", "serendipity")
    policies = {g: {m: round(v[m]["mean"], 4) for m in shown} for g, v in res.summary["groups"].items()}
    un = {g: v["unexpectedness"] for g, v in policies.items()}
    growth = res.summary.get("growth", {}).get("last_week", {})
    return {"dir": str(out / "evaluation"), "recs": str(recs_path), "request_time": at.isoformat(),
            "lists": res.summary["lists"],
            "policies": policies,
            # in_profile never leaves the known topics, explore_mix does by design; popular items are
            # the least novel by the definition of novelty
            "expected_order_holds": bool(un["in_profile"] == 0 < un["explore_mix"]
                                         and policies["popularity"]["novelty"] < min(
                                             policies["in_profile"]["novelty"], policies["explore_mix"]["novelty"])),
            "arms_last_week": {arm: {m: round(v["mean"], 4) for m, v in g.items()} for arm, g in growth.items()}}
