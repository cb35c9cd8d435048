"""Checking a taxonomy change before rollout: agreement, topic map, label flips and the gate.

Outside checks: scikit-learn's ARI/AMI/NMI on the same assignments; MovieLens 100K genres
(GroupLens; Harper & Konstan, ACM TiiS 2015) with a candidate that merges three genres and one
that splits a genre by release decade, flips recounted directly in DuckDB SQL.
"""
from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import adjusted_mutual_info_score, adjusted_rand_score, normalized_mutual_info_score

from labeler import GateConfig, LabelConfig, Taxonomy, label_interactions
from labeler.rollout.check import agreement, check_rollout


def _tables_tax(assign: dict[str, str], name: str = "t") -> Taxonomy:
    topics = pd.DataFrame({"topic_id": sorted(set(assign.values())), "level": 0})
    topics["name"] = topics["topic_id"]
    it = pd.DataFrame({"item_id": list(assign), "level": 0, "topic_id": list(assign.values())})
    return Taxonomy.from_tables(topics, it, name=name)


@pytest.mark.parametrize("seed", range(5))
def test_agreement_equals_scikit_learn(seed):
    """ARI, AMI and NMI are scikit-learn's on the items' primary topics (reference library)."""
    rng = np.random.default_rng(seed)
    items = [f"i{k}" for k in range(300)]
    a = {i: f"a{rng.integers(0, 6)}" for i in items}
    b = {i: f"b{rng.integers(0, 9)}" for i in items if rng.random() > 0.1}  # some left unplaced
    got = agreement(_tables_tax(a), _tables_tax(b), 0)
    x = [a[i] for i in items]
    y = [b.get(i, "(unplaced)") for i in items]
    assert got["ari"] == pytest.approx(adjusted_rand_score(x, y))
    assert got["ami"] == pytest.approx(adjusted_mutual_info_score(x, y))
    assert got["nmi"] == pytest.approx(normalized_mutual_info_score(x, y))
    assert got["only_current"] == sum(i not in b for i in items)


@pytest.fixture(scope="module")
def movielens():
    from external import movielens_100k
    ratings, movies = movielens_100k()
    return ratings.rename(columns={"rating": "engagement"}), movies


def _recount_flips(a: pd.DataFrame, b: pd.DataFrame) -> int:
    """Label flips counted directly in DuckDB SQL from the two label tables."""
    con = duckdb.connect()
    con.register("a", a[["user_id", "item_id", "ts", "level", "label"]])
    con.register("b", b[["user_id", "item_id", "ts", "level", "label"]])
    return con.execute("SELECT count(*) FROM a JOIN b USING (user_id, item_id, ts, level) "
                       "WHERE a.label <> b.label").fetchone()[0]


def test_identity_and_renamed_ids_change_nothing(movielens):
    """A taxonomy against itself, and against itself under other ids: no flips, all kept, AMI 1."""
    ratings, movies = movielens
    tax = Taxonomy.from_categories(movies, column="genres")
    gate = GateConfig(min_topic_size=2)  # MovieLens 100K's genre "unknown" holds 2 movies (counted here)
    assert int(tax.topics.set_index("name").loc["unknown", "size"]) == 2
    res = check_rollout(tax, tax, ratings, gate)
    cur = res.topic_map[res.topic_map["side"] == "current"]
    assert set(cur["status"]) == {"kept"} and res.summary["labels"]["flip_share"] == 0.0
    assert res.summary["agreement"]["0"]["ami"] == pytest.approx(1.0) and res.passed
    renamed = Taxonomy.from_tables(tax.topics.assign(topic_id="x" + tax.topics["topic_id"]),
                                   tax.item_topics.assign(topic_id="x" + tax.item_topics["topic_id"]), name="ids")
    res = check_rollout(tax, renamed, ratings, gate)
    assert set(res.topic_map.loc[res.topic_map["side"] == "current", "status"]) == {"kept"}
    assert res.summary["labels"]["flip_share"] == 0.0 and res.passed


@pytest.mark.external
def test_a_taxonomy_against_itself_passes_the_default_gate(movielens):
    """MovieLens 100K (GroupLens) genres against themselves pass the default gate: the 'unknown'
    genre's 2 movies are under min_topic_size, but the candidate does not change that topic, so it
    is noted as a warning and not judged."""
    ratings, movies = movielens
    tax = Taxonomy.from_categories(movies, column="genres")
    res = check_rollout(tax, tax, ratings, GateConfig())
    assert res.passed, res.summary["gate"]
    assert any("unknown (2)" in w for w in res.summary["gate"]["warnings"])
    assert res.summary["gate"]["levels_judged"] == [0]


def test_the_gate_judges_every_level():
    """A candidate with the same fine topics but coarse topics regrouped at random fails on the
    coarse level's checks (each check names its level), and passes when the gate judges level 1 only."""
    from labelcases import T0, taxonomy
    fine = {f"i{k:02d}": [(f"f{k % 6}", 1.0)] for k in range(36)}
    current = taxonomy(fine, parents={f"f{j}": f"c{j // 2}" for j in range(6)}, level=1)
    candidate = taxonomy(fine, parents={f"f{j}": f"c{(j * 5) % 3}" for j in range(6)}, level=1)
    log = pd.DataFrame({"user_id": [f"u{k % 5}" for k in range(200)], "item_id": [f"i{(k * 7) % 36:02d}" for k in range(200)],
                        "ts": [T0 + pd.Timedelta(minutes=k) for k in range(200)]})
    gate = GateConfig(min_topic_size=1)
    res = check_rollout(current, candidate, log, gate)
    checks = res.summary["gate"]["checks"]
    assert {k for k in checks if k.endswith("(level 0)")} == {"flip_share (level 0)", "ami (level 0)",
                                                              "retired_share (level 0)", "min_topic_size (level 0)"}
    assert checks["ami (level 1)"]["passed"] and checks["ami (level 1)"]["value"] == pytest.approx(1.0)
    assert not checks["ami (level 0)"]["passed"] and not res.passed
    only_fine = check_rollout(current, candidate, log, gate.model_copy(update={"levels": (1,)}))
    assert only_fine.passed and only_fine.summary["gate"]["levels_judged"] == [1]


def test_movielens_merge_and_split_are_reported_exactly(movielens, tmp_path):
    ratings, movies = movielens
    current = Taxonomy.from_categories(movies, column="genres")
    suspense = {"Thriller", "Crime", "Mystery"}

    def merge(g):
        out = ["Suspense" if x in suspense else x for x in g.split("|")]
        return "|".join(dict.fromkeys(out))
    merged = Taxonomy.from_categories(movies.assign(genres=movies["genres"].map(merge)), column="genres")
    decade = movies["year"].map(lambda y: f"{y[:3]}0s" if y else "unknown")
    split_genres = [("|".join(f"Drama {d}" if x == "Drama" else x for x in g.split("|")))
                    for g, d in zip(movies["genres"], decade)]
    split = Taxonomy.from_categories(movies.assign(genres=split_genres), column="genres")
    names = current.names()

    res = check_rollout(current, merged, ratings)
    m = res.topic_map[res.topic_map["side"] == "current"].assign(name=lambda t: t["topic_id"].map(names))
    assert set(m.loc[m["status"] == "merged", "name"]) == suspense
    assert set(m.loc[m["status"] != "merged", "status"]) == {"kept"}
    a = label_interactions(ratings, current, LabelConfig())
    b = label_interactions(ratings, merged, LabelConfig())
    flips = res.flips
    assert int(flips.loc[flips["label_cur"] != flips["label_cand"], "rows"].sum()) == _recount_flips(a, b) > 0

    res = check_rollout(current, split, ratings)
    m = res.topic_map[res.topic_map["side"] == "current"].assign(name=lambda t: t["topic_id"].map(names))
    assert m.loc[m["status"] == "split", "name"].tolist() == ["Drama"]
    assert set(m.loc[m["status"] != "split", "status"]) == {"kept"}
    targets = m.loc[m["status"] == "split", "to_names"].iloc[0].split("|")
    assert set(targets) <= {f"Drama {d}" for d in decade.unique()} and len(targets) >= 2
    b = label_interactions(ratings, split, LabelConfig())
    flips = res.flips
    assert int(flips.loc[flips["label_cur"] != flips["label_cand"], "rows"].sum()) == _recount_flips(a, b) > 0
    out = res.write(tmp_path / "check")
    assert (out / "summary.json").exists() and (out / "topic_map.csv").exists()


def test_gate_fails_on_a_very_different_candidate(movielens):
    ratings, movies = movielens
    current = Taxonomy.from_categories(movies, column="genres")
    rng = np.random.default_rng(0)
    shuffled = Taxonomy.from_categories(movies.assign(genres=rng.permutation(movies["genres"].to_numpy())),
                                        column="genres")
    res = check_rollout(current, shuffled, ratings, GateConfig(max_flip_share=0.01, min_ami=0.5))
    assert not res.passed
    checks = res.summary["gate"]["checks"]
    assert not checks["ami (level 0)"]["passed"] and checks["ami (level 0)"]["value"] < 0.1


def test_cli_rollout_check_exit_codes(cli, fixtures, tmp_path):
    """`labeler rollout-check`: 0 when the gate passes (a taxonomy against itself), 1 when it
    fails, 2 on a usage error; summary.json written."""
    import pandas as pd
    items = pd.read_csv(fixtures / "items.csv")
    Taxonomy.from_categories(items).save(tmp_path / "cur")
    code, out, err = cli("rollout-check", "--current", tmp_path / "cur", "--candidate", tmp_path / "cur",
                         "--interactions", fixtures / "interactions.csv", "--out", tmp_path / "o1", "-q")
    assert code in (0, 1), err
    assert (tmp_path / "o1" / "summary.json").exists() and "rollout check" in out
    import json
    summary = json.loads((tmp_path / "o1" / "summary.json").read_text())
    assert code == (0 if summary["gate"]["passed"] else 1)
    assert summary["labels"]["flip_share"] == 0.0
    code, _, _ = cli("rollout-check", "--current", tmp_path / "cur")
    assert code == 2


@pytest.fixture(scope="module")
def merged_check(movielens, tmp_path_factory):
    """The MovieLens merge candidate, with a genre renamed to markup, written as a report."""
    ratings, movies = movielens
    current = Taxonomy.from_categories(movies, column="genres")

    def edit(g):
        out = ["Suspense" if x in {"Thriller", "Crime", "Mystery"} else x for x in g.split("|")]
        out = ["<script>alert('x')</script>" if x == "Western" else x for x in out]
        return "|".join(dict.fromkeys(out))
    candidate = Taxonomy.from_categories(movies.assign(genres=movies["genres"].map(edit)), column="genres")
    res = check_rollout(current, candidate, ratings, items=movies)
    return res, res.write(tmp_path_factory.mktemp("report"))


def test_report_escapes_text_from_the_inputs(merged_check):
    """Topic names come from user-generated metadata: they appear in report.html as text."""
    _, out = merged_check
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "<script>" not in page
    assert "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt;" in page
    assert page.count("<img src='data:image/png;base64,") >= 4  # self-contained: figures inline


def test_report_figures_are_labelled_without_overlapping_text(merged_check):
    """Every figure has a title and axis or side labels, and no two texts overlap (drawn boxes)."""
    from labeler import report
    from labeler.rollout.report import figures
    res, _ = merged_check
    for name, fig in figures(res).items():
        texts = [t.get_text() for t in fig.findobj(__import__("matplotlib").text.Text) if t.get_text().strip()]
        assert any("level" in t or "agreement" in t.lower() for t in texts), name
        assert report.overlapping_texts(fig) == [], name
        report.close(fig)


def test_flow_figure_with_many_topics_has_no_overlaps():
    """A candidate with 60 fine topics: the flow names the 20 largest per side and sums the rest."""
    from labeler import report
    from labeler.rollout.check import check_rollout as check
    from labeler.rollout.report import flow_figure
    rng = np.random.default_rng(1)
    items = [f"i{k}" for k in range(3000)]
    a = {i: f"topic number {rng.integers(0, 60):02d} with a long name" for i in items}
    b = {i: (v if rng.random() > 0.2 else f"other {rng.integers(0, 60):02d}") for i, v in a.items()}
    log = pd.DataFrame({"user_id": [f"u{k % 50}" for k in range(600)], "item_id": rng.choice(items, 600),
                        "ts": pd.Timestamp("2026-03-01", tz="UTC") + pd.to_timedelta(np.arange(600), unit="h")})
    res = check(_tables_tax(a, "a"), _tables_tax(b, "b"), log)
    fig = flow_figure(res, 0)
    texts = [t.get_text() for t in fig.findobj(__import__("matplotlib").text.Text)]
    assert any("other topics" in t for t in texts)
    assert report.overlapping_texts(fig) == []
    report.close(fig)


def test_report_renders_in_a_browser(merged_check, tmp_path):
    """report.html opens in headless Chromium (Debian package `chromium`) and draws a page."""
    import shutil
    import subprocess
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("chromium is not installed (.ci/run installs it)")
    _, out = merged_check
    shot = tmp_path / "shot.png"
    proc = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                           "--window-size=1200,3000", f"--screenshot={shot}", (out / "report.html").as_uri()],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and shot.exists(), proc.stderr[-2000:]
    import matplotlib.image
    img = matplotlib.image.imread(shot)
    assert img.shape[0] >= 3000 and img.shape[1] >= 1200
    dark = (img[..., :3].mean(axis=2) < 0.5).mean()
    assert 0.005 < dark < 0.5  # text and figures drawn on a light page, not blank, not black


def test_sampled_users_keep_their_full_history(movielens):
    """sample=N compares N users chosen by a hash of their id, each with every interaction."""
    from labeler.rollout.check import sample_users
    ratings, movies = movielens
    got = sample_users(ratings, 50)
    assert got["user_id"].nunique() == 50
    full = ratings[ratings["user_id"].isin(set(got["user_id"]))]
    assert len(got) == len(full)
    assert sample_users(ratings, 50).equals(got)  # the same users every time
    tax = Taxonomy.from_categories(movies, column="genres")
    res = check_rollout(tax, tax, ratings, GateConfig(min_topic_size=2), sample=50)
    assert res.summary["labels"]["rows_compared"] == len(got)


def test_silhouette_of_a_learned_candidate(hashing):
    """A learned candidate gets a cosine silhouette on a sample of its items (scikit-learn)."""
    from labeler import TaxonomyConfig, build_taxonomy
    words = ["sourdough bread", "bonsai wiring", "knitting socks", "espresso crema"]
    items = pd.DataFrame({"item_id": [f"i{k}" for k in range(120)],
                          "title": [f"{words[k % 4]} lesson {k}" for k in range(120)]})
    tax = build_taxonomy(items, TaxonomyConfig(min_cluster_size=5), embedder=hashing, progress=False)
    log = pd.DataFrame({"user_id": ["u1"] * 6, "item_id": [f"i{k}" for k in range(6)],
                        "ts": pd.date_range("2026-03-01", periods=6, freq="D", tz="UTC")})
    res = check_rollout(tax, tax, log, items=items)
    sil = res.summary["candidate_quality"]["silhouette"]
    assert sil is not None and -1.0 <= sil <= 1.0


def test_reordered_keywords_are_not_a_rename():
    """A topic whose name only lists its keywords in another order (or case) is 'kept', not 'renamed';
    another word is a rename."""
    from labeler.rollout.check import topic_map
    it = pd.DataFrame({"item_id": ["a", "b"], "level": 0, "topic_id": ["t1", "t2"], "confidence": 1.0})
    def tax(n1, n2):
        return Taxonomy.from_tables(pd.DataFrame({"topic_id": ["t1", "t2"], "level": 0, "name": [n1, n2]}), it)
    m = topic_map(tax("sourdough / starter / bread", "yarn / wool"), tax("Starter / bread / sourdough", "yarn / felt"), 0)
    status = m[m["side"] == "current"].set_index("topic_id")["status"].to_dict()
    assert status == {"t1": "kept", "t2": "renamed"}


def test_names_with_math_markup_do_not_break_the_report(cli, fixtures, tmp_path):
    """Category names like '$\\notacommand{x}$' (matplotlib would read them as math markup) are drawn
    as plain text: rollout-check writes its report and exits by the gate, not with a crash."""
    items = pd.read_csv(fixtures / "items.csv")
    cats = sorted(items["category"].dropna().unique())
    odd = items.assign(category=items["category"].replace({cats[0]: r"$\notacommand{x}$", cats[1]: "$$ 50% off $"}))
    odd.to_csv(tmp_path / "odd.csv", index=False)
    for name, path in (("cur", fixtures / "items.csv"), ("cand", tmp_path / "odd.csv")):
        code, _, err = cli("taxonomy", "build", "--items", path, "--out", tmp_path / name, "--from-categories",
                           "category", "-q")
        assert code == 0, err
    code, out, err = cli("rollout-check", "--current", tmp_path / "cur", "--candidate", tmp_path / "cand",
                         "--interactions", fixtures / "interactions.csv", "--out", tmp_path / "check", "-q")
    assert code in (0, 1), err
    html = (tmp_path / "check" / "report.html").read_text()
    assert "notacommand" in html
