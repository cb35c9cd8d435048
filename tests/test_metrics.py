"""Offline evaluation: ranking metrics against trec_eval, the published definitions on worked
examples, bootstrap coverage, interest growth, and the report.

Outside checks:
- MAP@k, NDCG@k, P@k, recall@k equal trec_eval's ``map_cut``, ``ndcg_cut``, ``P``, ``recall`` through
  its Python binding (PyPI ``pytrec_eval-terrier``) on random cases with binary relevance and no
  tied scores, where the definitions coincide (AP divided by |R|; lists without relevant items
  are not evaluated).
- Worked examples computed by hand from the published formulas: novelty as mean self-information
  (Zhou et al., PNAS 2010), intra-list diversity (Ziegler et al., WWW 2005), serendipity as
  relevant and unexpected (Ge et al., RecSys 2010; Kotkov et al. 2016).
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from labeler import Taxonomy
from labeler.evaluation.metrics import average_precision, bootstrap_mean, evaluate, ild_embedding, ild_topic, ndcg, novelty


def _tax(topic_of: dict[str, str]) -> Taxonomy:
    items = pd.DataFrame({"item_id": list(topic_of), "category": list(topic_of.values())})
    return Taxonomy.from_categories(items)


T0 = pd.Timestamp("2026-03-10T12:00:00Z")


@pytest.mark.parametrize("seed", range(6))
def test_ranking_metrics_equal_trec_eval(seed):
    """Per list, our P@k, recall@k, AP@k and NDCG@k are trec_eval's on the same runs and qrels."""
    pytrec_eval = pytest.importorskip("pytrec_eval")
    rng = np.random.default_rng(seed)
    k = 5
    items = [f"i{j}" for j in range(40)]
    tax = _tax({i: f"t{j % 4}" for j, i in enumerate(items)})
    recs, log, qrels, run = [], [], {}, {}
    for u in range(30):
        user = f"u{u}"
        ranked = list(rng.choice(items, size=8, replace=False))
        for r, i in enumerate(ranked):
            recs.append((user, T0, i, r + 1))
        run[user] = {i: float(8 - r) for r, i in enumerate(ranked)}  # no ties
        rel = set(rng.choice(items, size=rng.integers(0, 6), replace=False))
        for i in rel:
            log.append((user, i, T0 + pd.Timedelta(hours=int(rng.integers(1, 100)))))
        log.append((user, items[0], T0 - pd.Timedelta(days=3)))  # some history
        if rel:
            qrels[user] = {i: 1 for i in rel}
    recs = pd.DataFrame(recs, columns=["user_id", "ts", "item_id", "rank"])
    log = pd.DataFrame(log, columns=["user_id", "item_id", "ts"])
    res = evaluate(recs, log, tax, k=k, horizon_days=7, n_boot=50, growth=False)
    want = pytrec_eval.RelevanceEvaluator(qrels, {f"map_cut.{k}", f"ndcg_cut.{k}", f"P.{k}", f"recall.{k}"}) \
        .evaluate({u: run[u] for u in qrels})
    got = res.per_list.set_index("user_id")
    for u, m in want.items():
        assert got.loc[u, "map"] == pytest.approx(m[f"map_cut_{k}"])
        assert got.loc[u, "ndcg"] == pytest.approx(m[f"ndcg_cut_{k}"])
        assert got.loc[u, "precision"] == pytest.approx(m[f"P_{k}"])
        assert got.loc[u, "recall"] == pytest.approx(m[f"recall_{k}"])
    no_rel = set(got.index) - set(qrels)
    assert got.loc[list(no_rel), "map"].isna().all()


def test_ap_and_ndcg_worked_example():
    """Relevant at ranks 1 and 3 of 3, |R| = 3: AP = (1/1 + 2/3) / 3 = 0.5556;
    NDCG = (1 + 1/log2(4)) / (1 + 1/log2(3) + 1/log2(4)) = 0.7039 (hand computed)."""
    rel = np.array([1, 0, 1])
    assert average_precision(rel, 3) == pytest.approx((1 + 2 / 3) / 3)
    assert ndcg(rel, 3) == pytest.approx((1 + 0.5) / (1 + 1 / math.log2(3) + 0.5))


def test_novelty_diversity_serendipity_worked_example():
    """Hand computed from the published formulas.

    Novelty (Zhou et al. 2010, with Laplace smoothing): 10 users active before the request; the
    three items had 4, 1 and 0 of them: -log2(5/11) = 1.1375, -log2(2/11) = 2.4594,
    -log2(1/11) = 3.4594; mean 2.3521.
    Topic ILD (Ziegler et al. 2005): topics A, A, B: 2 of 3 pairs differ = 0.6667.
    Embedding ILD: (1,0), (0,1), (1,1)/sqrt2: distances 1, 1 - 0.7071, 1 - 0.7071; mean 0.5286.
    """
    assert novelty(np.array([4, 1, 0]), 10) == pytest.approx(2.3521, abs=1e-4)
    assert ild_topic(["A", "A", "B"]) == pytest.approx(2 / 3)
    assert ild_topic(["A", None]) != ild_topic(["A", None])  # NaN: fewer than two placed items
    v = np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    assert ild_embedding(v) == pytest.approx((1 + 2 * (1 - 1 / math.sqrt(2))) / 3)


def test_evaluate_end_to_end_worked_example():
    """One user, history in topic A; the list [a2, b1, c1, b2] at T0; later plays of a2 and b1.

    Known topics at T0: {A}. Unexpected: b1, c1, b2 -> 3/4. Relevant: a2, b1 -> precision@4 = 2/4,
    recall = 2/2, AP = (1/1 + 2/2) / 2 = 1. Serendipity: relevant and unexpected = b1 -> 1/4.
    Topic ILD: A, B, C, B -> 5 of 6 pairs differ. Novelty: 2 users active before T0 (u1, u2);
    a2 was played by u2 only -> counts 1, 0, 0, 0 -> mean of -log2(2/3), -log2(1/3) x3.
    """
    tax = _tax({"a1": "A", "a2": "A", "b1": "B", "b2": "B", "c1": "C"})
    log = pd.DataFrame({"user_id": ["u1", "u1", "u2", "u1", "u1"], "item_id": ["a1", "a1", "a2", "a2", "b1"],
                        "ts": [T0 - pd.Timedelta(days=2), T0 - pd.Timedelta(days=1), T0 - pd.Timedelta(days=1),
                               T0 + pd.Timedelta(hours=1), T0 + pd.Timedelta(hours=2)]})
    recs = pd.DataFrame({"user_id": "u1", "ts": T0, "item_id": ["a2", "b1", "c1", "b2"], "rank": [1, 2, 3, 4]})
    res = evaluate(recs, log, tax, k=4, n_boot=50, growth=False)
    row = res.per_list[res.per_list["user_id"] == "u1"].iloc[0]
    assert row["unexpectedness"] == pytest.approx(0.75)
    assert row["precision"] == pytest.approx(0.5) and row["recall"] == pytest.approx(1.0)
    assert row["map"] == pytest.approx(1.0)
    assert row["serendipity"] == pytest.approx(0.25)
    assert row["ild_topic"] == pytest.approx(5 / 6)
    expected = np.mean([-math.log2(2 / 3)] + [-math.log2(1 / 3)] * 3)
    assert row["novelty"] == pytest.approx(expected)


def test_bootstrap_intervals_cover_the_true_mean_about_95_percent():
    """2,000 simulated data sets (200 users, normal values, known mean 0.3, fixed seed): the 95%
    percentile bootstrap interval covers the mean between 93.5% and 96.5% of the time."""
    rng = np.random.default_rng(12345)
    hits = 0
    for s in range(2000):
        x = rng.normal(0.3, 1.0, 200)
        _, lo, hi = bootstrap_mean(x, np.ones_like(x), n_boot=1000, seed=s)
        hits += lo <= 0.3 <= hi
    assert 0.935 <= hits / 2000 <= 0.965, hits / 2000


@pytest.fixture(scope="module")
def demo_eval():
    from labeler.demo import generate_scenario
    from labeler.evaluation.policies import recommend
    s = generate_scenario(7, n_items=600, n_users=300, weeks=8)
    tax = Taxonomy.from_categories(s.items)
    ev = s.interactions
    t = pd.Timestamp(ev["ts"].min()).normalize() + pd.Timedelta(days=35)
    hist = ev[ev["ts"] < t]
    users = sorted(set(hist["user_id"]) & set(ev.loc[ev["ts"] >= t, "user_id"]))
    recs = recommend(hist, tax, users, t, k=10)
    recs.loc[recs["policy"] == "popularity", "policy"] = "<b>popularity</b>"  # markup in a group name
    return evaluate(recs, ev, tax, k=10, group_by="policy", control="<b>popularity</b>", horizon_days=14,
                    n_boot=200)


def test_policies_order_as_expected(demo_eval):
    """in_profile recommends only known topics (unexpectedness 0); explore_mix sits between it and
    popularity; popularity is the least novel."""
    g = demo_eval.summary["groups"]
    un = {k: v["unexpectedness"]["mean"] for k, v in g.items()}
    assert un["in_profile"] == 0 < un["explore_mix"] < un["<b>popularity</b>"]
    nov = {k: v["novelty"]["mean"] for k, v in g.items()}
    assert nov["<b>popularity</b>"] < min(nov["in_profile"], nov["explore_mix"])
    d = demo_eval.summary["differences_vs_control"]["explore_mix"]["unexpectedness"]
    assert d["lo"] <= d["diff"] <= d["hi"] < 0


def test_interest_growth_by_arm(demo_eval):
    growth = demo_eval.growth
    assert set(growth["arm"]) == {"control", "explore_boost"}
    assert {"known_topics_per_user", "new_interest_per_active_user", "discovery_per_active_user",
            "share_active"} == set(growth["metric"])
    c = demo_eval.cohorts
    shares = c.groupby(["arm", "from"])["share"].sum().dropna()
    assert np.allclose(shares, 1.0)  # each starting cohort ends somewhere


def test_evaluation_report_escapes_and_has_no_overlapping_text(demo_eval, tmp_path):
    from labeler import report
    from labeler.evaluation.report import figures
    out = demo_eval.write(tmp_path / "eval")
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "<b>popularity</b>" not in page and "&lt;b&gt;popularity&lt;/b&gt;" in page
    for name in ("metrics.parquet", "metrics.csv", "summary.json"):
        assert (out / name).exists()
    for name, fig in figures(demo_eval).items():
        assert report.overlapping_texts(fig) == [], name
        report.close(fig)


def test_cli_evaluate(cli, tmp_path):
    tax = _tax({"a1": "A", "a2": "A", "b1": "B"})
    tax.save(tmp_path / "tax")
    pd.DataFrame({"user_id": ["u1", "u1"], "item_id": ["a1", "b1"],
                  "ts": [T0 - pd.Timedelta(days=1), T0 + pd.Timedelta(hours=1)]}).to_csv(tmp_path / "log.csv", index=False)
    pd.DataFrame({"user_id": "u1", "ts": T0, "item_id": ["a2", "b1"], "rank": [1, 2],
                  "arm": "a"}).to_csv(tmp_path / "recs.csv", index=False)
    code, out, err = cli("evaluate", "--recs", tmp_path / "recs.csv", "--interactions", tmp_path / "log.csv",
                         "--taxonomy", tmp_path / "tax", "--k", "2", "--group-by", "arm", "--out", tmp_path / "o")
    assert code == 0, err
    assert "serendipity" in out and (tmp_path / "o" / "report.html").exists()


@pytest.mark.parametrize("extra, recs_rank, names", [
    (["--control", "b"], [1, 2], "--control 'b'"),
    (["--k", "0"], [1, 2], "--k"),
    (["--k", "-3"], [1, 2], "--k"),
    (["--horizon-days", "nan"], [1, 2], "--horizon-days"),
    (["--horizon-days", "-1"], [1, 2], "--horizon-days"),
    (["--level", "7"], [1, 2], "--level 7"),
    ([], [1, 1], "column 'rank'"),
    ([], [0, 2], "column 'rank'"),
    ([], [-1, 2], "column 'rank'"),
])
def test_cli_evaluate_refuses_bad_settings_and_ranks(cli, tmp_path, extra, recs_rank, names):
    """Unknown control group, k < 1, a horizon that is NaN or negative, an unknown level, duplicate
    ranks in one list and ranks <= 0 are each refused with exit 2, naming the option or column."""
    tax = _tax({"a1": "A", "a2": "A", "b1": "B"})
    tax.save(tmp_path / "tax")
    pd.DataFrame({"user_id": ["u1", "u1"], "item_id": ["a1", "b1"],
                  "ts": [T0 - pd.Timedelta(days=1), T0 + pd.Timedelta(hours=1)]}).to_csv(tmp_path / "log.csv", index=False)
    pd.DataFrame({"user_id": "u1", "ts": T0, "item_id": ["a2", "b1"], "rank": recs_rank,
                  "arm": "a"}).to_csv(tmp_path / "recs.csv", index=False)
    code, out, err = cli("evaluate", "--recs", tmp_path / "recs.csv", "--interactions", tmp_path / "log.csv",
                         "--taxonomy", tmp_path / "tax", "--group-by", "arm", "--out", tmp_path / "o", *extra)
    assert code == 2, (out, err)
    assert names in err and "Traceback" not in err


def test_embedding_diversity_from_a_learned_taxonomy(hashing):
    """item_vectors embeds with the learned taxonomy's own model; ILD by embedding is then filled."""
    from labeler import TaxonomyConfig, build_taxonomy
    from labeler.evaluation.metrics import item_vectors
    words = ["sourdough bread", "bonsai wiring", "knitting socks"]
    items = pd.DataFrame({"item_id": [f"i{k}" for k in range(60)], "title": [f"{words[k % 3]} {k}" for k in range(60)]})
    tax = build_taxonomy(items, TaxonomyConfig(min_cluster_size=5), embedder=hashing, progress=False)
    vec = item_vectors(items, tax)
    assert len(vec) == 60
    log = pd.DataFrame({"user_id": ["u1"] * 2, "item_id": ["i0", "i1"], "ts": [T0 - pd.Timedelta(days=1), T0 + pd.Timedelta(hours=1)]})
    recs = pd.DataFrame({"user_id": "u1", "ts": T0, "item_id": ["i1", "i2", "i3"], "rank": [1, 2, 3]})
    res = evaluate(recs, log, tax, k=3, item_vectors=vec, n_boot=20, growth=False)
    expected = ild_embedding(np.vstack([vec["i1"], vec["i2"], vec["i3"]]))
    assert res.per_list["ild_embedding"].iloc[0] == pytest.approx(expected)
