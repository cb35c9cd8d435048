"""Taxonomy quality with the real packaged model, against outside data and baselines.

Outside check: WordNet 3.0 noun synsets (Princeton University; Debian package ``wordnet-base``),
lemma + gloss as item text, the lexicographer file (26 noun categories) as the editorial truth.
Scores are scikit-learn's AMI and NMI. Defaults were tuned on sample seed 0 only; the assertions
run on seeds 1 to 6 (1-3 from the start; 4-6 added later). The fine-topic method (HDBSCAN leaf
clusters merged to the count with the best silhouette) was chosen on seed 0 and the demo alone;
seeds 1-6 had been scored only under the method before it. KMeans's own AMI moves with its random start (seed 0: 0.400-0.426 over 8 starts, sd 0.008),
so the embeddings+KMeans reference is the median of 5 random starts, each with n_init=10; the
first start's AMI and the spread are printed too. The level judged is fixed here, before any
score: level 1 (fine topics), because the coarse level is a grouping of fine topics with a fixed
rule (square root of their count), while the fine level is what HDBSCAN finds without being told
a count.
"""
from __future__ import annotations

import functools

import numpy as np
import pandas as pd
import pytest
from sklearn.cluster import KMeans
from sklearn.decomposition import TruncatedSVD
from sklearn.feature_extraction.text import TfidfVectorizer
from sklearn.metrics import adjusted_mutual_info_score, normalized_mutual_info_score

from labeler import Taxonomy, TaxonomyConfig, build_taxonomy

pytestmark = [pytest.mark.model]
LEVEL = 1
PER_CATEGORY = 120


@functools.lru_cache(maxsize=None)
def wordnet_build(seed: int):
    """A class-balanced WordNet noun sample (``PER_CATEGORY`` per lexicographer file, lemma + gloss
    as text), the taxonomy built on it with the defaults, and its embeddings."""
    from external import cache_dir, wordnet_nouns
    from labeler.embed import EmbeddingCache, SentenceEmbedder, embed_texts
    wn = wordnet_nouns()
    sample = wn.sample(frac=1.0, random_state=seed).groupby("lexfile").head(PER_CATEGORY)
    sample = sample.assign(title=sample["lemma"] + ": " + sample["gloss"]).reset_index(drop=True)
    emb, cache = SentenceEmbedder(), cache_dir() / "embeddings"
    tax = build_taxonomy(sample[["item_id", "title"]], TaxonomyConfig(text_columns=("title",),
                         embedding_cache=str(cache)), embedder=emb, progress=False)
    x, _ = embed_texts(sample["title"].tolist(), emb, EmbeddingCache(cache, emb.name), progress=False)
    return sample, tax, np.asarray(x)


@functools.lru_cache(maxsize=None)
def wordnet_scores(seed: int) -> dict[str, float]:
    """Build a taxonomy on a class-balanced WordNet sample and score it and two baselines."""
    sample, tax, x = wordnet_build(seed)
    truth, k = sample["lexfile"], sample["lexfile"].nunique()
    placed = tax.item_topics[tax.item_topics["level"] == LEVEL].set_index("item_id")["topic_id"]
    ours = sample["item_id"].map(placed).fillna("(unplaced)")  # unplaced items count as one group
    runs = [KMeans(k, n_init=10, random_state=seed * 10 + r).fit_predict(x) for r in range(5)]
    km_amis = [float(adjusted_mutual_info_score(truth, lab)) for lab in runs]
    km = runs[int(np.argsort(km_amis)[2])]  # the median run of five
    tfidf = TfidfVectorizer(stop_words="english", sublinear_tf=True).fit_transform(sample["title"])
    svd = TruncatedSVD(100, random_state=seed).fit_transform(tfidf)
    svd /= np.linalg.norm(svd, axis=1, keepdims=True) + 1e-12
    tf_km = KMeans(k, n_init=10, random_state=seed).fit_predict(svd)
    scores = {"items": len(sample), "topics": int(placed.nunique()),
              "unplaced_share": float((ours == "(unplaced)").mean()),
              "kmeans_first_start_ami": km_amis[0], "kmeans_ami_spread": max(km_amis) - min(km_amis)}
    for name, lab in (("taxonomy", ours), ("embeddings_kmeans", km), ("tfidf_svd_kmeans", tf_km)):
        scores[f"{name}_ami"] = float(adjusted_mutual_info_score(truth, lab))
        scores[f"{name}_nmi"] = float(normalized_mutual_info_score(truth, lab))
    print(f"\nWordNet seed {seed}: " + ", ".join(f"{k}={v:.4f}" if isinstance(v, float) else f"{k}={v}"
                                               for k, v in scores.items()))
    return scores


def kmeans_median_ami(x: np.ndarray, truth, k: int, seed: int) -> float:
    """Median AMI of three KMeans starts told ``k`` clusters."""
    amis = [adjusted_mutual_info_score(truth, KMeans(k, n_init=10, random_state=seed * 10 + r).fit_predict(x))
            for r in range(3)]
    return float(np.median(amis))


@functools.lru_cache(maxsize=None)
def wordnet_level_scores(seed: int, depth: int = 3) -> dict[str, float]:
    """Both levels of a taxonomy built on a class-balanced WordNet sample, scored against the two-level
    reference (bench/taxonomy_levels.py says how it is made), each beside KMeans told its true count."""
    from external import wordnet_ancestor
    sample, tax, x = wordnet_build(seed)
    sample = sample.assign(ancestor=sample["item_id"].map(lambda o: wordnet_ancestor(o, depth)))
    out = {"items": len(sample)}
    for level, truth_col in ((0, "lexfile"), (1, "ancestor")):
        placed = tax.item_topics[tax.item_topics["level"] == level].drop_duplicates("item_id")
        ours = sample["item_id"].map(placed.set_index("item_id")["topic_id"]).fillna("(unplaced)")
        truth = sample[truth_col]
        out[f"level{level}_topics"] = int(placed["topic_id"].nunique())
        out[f"level{level}_classes"] = int(truth.nunique())
        out[f"level{level}_ami"] = float(adjusted_mutual_info_score(truth, ours))
        out[f"level{level}_kmeans_ami"] = kmeans_median_ami(x, truth, truth.nunique(), seed)
    return out


@pytest.mark.external
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_wordnet_fine_level_matches_hypernym_classes_at_least_as_well_as_kmeans(seed):
    """Level 1 against each synset's hypernym ancestor at depth 3 (WordNet 3.0 data.noun ``@``
    pointers; depth fixed from class counts before any score): AMI at least that of embeddings +
    KMeans told the true class count. Level 0 is checked in the next test."""
    s = wordnet_level_scores(seed)
    print(f"\nWordNet two-level reference, seed {seed}: " + ", ".join(
        f"{k}={v:.3f}" if isinstance(v, float) else f"{k}={v}" for k, v in s.items()))
    assert s["level1_ami"] >= s["level1_kmeans_ami"]


@pytest.mark.external
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_wordnet_coarse_count_by_centre_silhouette_beats_the_square_root_rule(seed):
    """Level 0 against the 26 lexicographer files (WordNet 3.0): the count chosen by the silhouette
    of the fine centres (chosen on the demo and seed 0) scores at least 0.03 AMI above the square
    root of the fine-topic count (the rule before it) cut from the same Ward tree. The goal of
    KMeans told 26 (0.42-0.44) is printed, not asserted: it is not met (0.38-0.39)."""
    from labeler.taxonomy.build import _coarse
    sample, tax, x = wordnet_build(seed)
    s = wordnet_level_scores(seed)
    centres = tax.arrays["centroids"]
    sqrt_k = int(round(np.sqrt(len(centres))))
    group = dict(zip(tax.centroid_topics, _coarse(centres, TaxonomyConfig(coarse_topics=sqrt_k), x.mean(axis=0))))
    fine = tax.item_topics[tax.item_topics["level"] == 1].drop_duplicates("item_id").set_index("item_id")
    before = sample["item_id"].map(fine["topic_id"].map(group)).fillna(-1)
    ami_before = adjusted_mutual_info_score(sample["lexfile"], before)
    print(f"\nWordNet seed {seed}, level 0: {s['level0_topics']} topics AMI {s['level0_ami']:.3f}; square-root rule "
          f"{sqrt_k} topics AMI {ami_before:.3f}; KMeans told 26: {s['level0_kmeans_ami']:.3f}")
    assert s["level0_ami"] >= ami_before + 0.03


@pytest.mark.external
@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5, 6])
def test_wordnet_taxonomy_beats_tfidf_baseline_with_few_unplaced(seed):
    """On WordNet nouns the taxonomy beats TF-IDF+SVD+KMeans (told the category count) by AMI, <= 10% unplaced."""
    s = wordnet_scores(seed)
    assert s["taxonomy_ami"] > s["tfidf_svd_kmeans_ami"]
    assert s["unplaced_share"] <= 0.10


@pytest.mark.external
@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5, 6])
def test_wordnet_taxonomy_within_002_of_embeddings_kmeans(seed):
    """Without the category count, the taxonomy's AMI is within 0.02 of KMeans told the count (median of 5 starts),
    on the same embeddings."""
    s = wordnet_scores(seed)
    assert s["taxonomy_ami"] >= s["embeddings_kmeans_ami"] - 0.02


@functools.lru_cache(maxsize=None)
def demo_build():
    """The demo scenario (seed 7), its taxonomy with the real model, and its items' vectors."""
    from labeler.demo import generate_scenario
    from labeler.embed import EmbeddingCache, SentenceEmbedder, embed_texts
    from labeler.tables import item_text
    from external import cache_dir
    s = generate_scenario()
    cache = cache_dir() / "embeddings"
    emb = SentenceEmbedder()
    tax = build_taxonomy(s.items, TaxonomyConfig(embedding_cache=str(cache)), embedder=emb, progress=False)
    x, _ = embed_texts(item_text(s.items, TaxonomyConfig().text_columns).tolist(), emb,
                       EmbeddingCache(cache, emb.name), progress=False)
    return s, tax, np.asarray(x)


def test_demo_fine_topics_match_true_themes():
    """On the demo scenario the fine level recovers the true themes: AMI within 0.08 of KMeans told the theme count."""
    s, tax, x = demo_build()
    truth = s.truth_items
    regular = truth["kind"] != "off_topic"
    placed = tax.item_topics[tax.item_topics["level"] == 1].set_index("item_id")["topic_id"]
    ours = truth["item_id"].map(placed).fillna("(unplaced)")
    km = KMeans(truth.loc[regular, "theme"].nunique(), n_init=10, random_state=0).fit_predict(x)
    ami = adjusted_mutual_info_score(truth.loc[regular, "theme"], ours[regular])
    base = adjusted_mutual_info_score(truth.loc[regular, "theme"], km[regular.to_numpy()])
    print(f"\ndemo: fine AMI {ami:.4f}, embeddings+KMeans (true count) {base:.4f}, "
          f"{tax.manifest['topics_per_level']}")
    assert ami >= base - 0.08
    assert tax.manifest["n_unplaced"] / len(s.items) <= 0.05


def test_demo_coarse_level_groups_hobbies_better_than_ward_on_raw_centres():
    """The coarse level (Ward on fine centres taken from the catalog mean, unit length) against the
    demo's true hobbies, next to Ward on the raw centres (the method before it) over the same fine
    topics and count: at least as good, and no coarse topic holds half the items. The change was
    chosen on this demo; on demo seeds 1-3 it scored 0.646/0.661/0.718 against 0.645/0.661/0.718
    (equal or better), and on WordNet nouns it moved level-0 AMI by at most 0.005 (README, Topics).
    The count (the centres' silhouette) finds the demo's 6 hobbies. The issue's goal (0.80, no
    topic over 35%) is not met: this is printed, not asserted."""
    from labeler.taxonomy.build import _coarse
    s, tax, _ = demo_build()
    truth = s.truth_items.set_index("item_id")
    regular = truth["kind"] != "off_topic"
    rows = tax.item_topics.drop_duplicates(["item_id", "level"]).pivot(index="item_id", columns="level",
                                                                        values="topic_id")
    coarse = truth.index.map(rows[0]).fillna("(unplaced)")
    k = int(tax.topics.query("level == 0").shape[0])
    raw = dict(zip(tax.centroid_topics, _coarse(tax.arrays["centroids"], TaxonomyConfig(coarse_topics=k))))
    before = truth.index.map(rows[1]).map(raw).fillna(-1)
    ami = adjusted_mutual_info_score(truth.loc[regular, "hobby"], np.asarray(coarse)[regular.to_numpy()])
    ami_raw = adjusted_mutual_info_score(truth.loc[regular, "hobby"], np.asarray(before)[regular.to_numpy()])
    share = tax.topics.query("level == 0")["size"].max() / tax.topics.query("level == 0")["size"].sum()
    print(f"\ndemo coarse level: AMI vs true hobbies {ami:.3f} (Ward on raw centres {ami_raw:.3f}), "
          f"largest coarse topic {share:.0%} of the items")
    assert ami >= ami_raw
    assert share < 0.5


def test_assign_agrees_with_build_on_the_real_model():
    """assign() with the real model reproduces the build's topics for >= 99% of items."""
    from labeler.demo import generate_scenario
    from external import cache_dir
    items = generate_scenario(seed=3, n_items=800, n_users=10, weeks=1).items
    tax = build_taxonomy(items, TaxonomyConfig(embedding_cache=str(cache_dir() / "embeddings")), progress=False)
    again = tax.assign(items)
    a = tax.item_topics.set_index(["item_id", "level"])["topic_id"]
    b = again.set_index(["item_id", "level"])["topic_id"]
    joined = a.to_frame("a").join(b.to_frame("b"), how="outer")
    assert (joined["a"] == joined["b"]).mean() >= 0.99


@functools.lru_cache(maxsize=None)
def wordnet_distilled(seeds: tuple[int, ...] = (3, 4, 5), n_fit: int = 20_000):
    """The distilled encoder fitted on ``n_fit`` WordNet noun glosses that none of the scored samples
    of ``seeds`` holds: a catalog distilling on a part of itself embedded with the model and encoding
    the rest (bench/encoder_static.py measures the same way)."""
    from external import cache_dir, wordnet_noun_glosses_outside
    from labeler.distilled import DistilledEncoder
    from labeler.embed import EmbeddingCache, SentenceEmbedder
    scored = set().union(*(set(wordnet_build(s)[0]["item_id"]) for s in seeds))
    texts = wordnet_noun_glosses_outside(scored, n_fit)
    teacher = SentenceEmbedder()
    return DistilledEncoder.fit(texts, teacher, EmbeddingCache(cache_dir() / "embeddings", teacher.name),
                                progress=False)


@pytest.mark.external
@pytest.mark.parametrize("seed", [3, 4, 5])
def test_wordnet_distilled_encoder_within_003_of_the_model(seed):
    """taxonomy.encoder = distilled loses at most 0.03 AMI against the model on WordNet 3.0 nouns
    (Princeton; scikit-learn's AMI against the 26 lexicographer files), for the taxonomy's fine level
    and for KMeans told k = 26. The method (centring included) was chosen on seeds 0-2; these seeds
    were not looked at before this test. Its speed (about 180x the model's items/s) is measured in
    bench/encoder_static.py, not here."""
    sample, tax, x = wordnet_build(seed)
    enc = wordnet_distilled()
    truth, k = sample["lexfile"], sample["lexfile"].nunique()
    fast = build_taxonomy(sample[["item_id", "title"]], TaxonomyConfig(text_columns=("title",)), embedder=enc,
                          progress=False)
    fine = {}
    for name, t in (("model", tax), ("distilled", fast)):
        placed = t.item_topics[t.item_topics["level"] == 1].set_index("item_id")["topic_id"]
        fine[name] = adjusted_mutual_info_score(truth, sample["item_id"].map(placed).fillna("(unplaced)"))
    km_model = kmeans_median_ami(x, truth, k, seed)
    km_fast = kmeans_median_ami(enc.encode(sample["title"].tolist()), truth, k, seed)
    print(f"\nWordNet seed {seed}: fine AMI model {fine['model']:.4f}, distilled {fine['distilled']:.4f} "
          f"({fast.manifest['topics_per_level']}); KMeans k={k} model {km_model:.4f}, distilled {km_fast:.4f}")
    assert fine["model"] - fine["distilled"] <= 0.03
    assert km_model - km_fast <= 0.03


def test_distilled_encoder_on_the_demo_is_deterministic_and_keeps_the_topics(tmp_path):
    """On the demo (seed 7) the distilled encoder, fitted on 1,000 of the 3,200 items, finds the true
    themes within 0.03 AMI of the model's taxonomy; two builds give the same table and placements;
    the saved taxonomy places the items again with no model (the table and tokenizer travel in it)."""
    from external import cache_dir
    s, tax, _ = demo_build()
    truth = s.truth_items
    regular = truth["kind"] != "off_topic"
    cfg = TaxonomyConfig(embedding_cache=str(cache_dir() / "embeddings"), encoder="distilled", distill_items=1000)
    fast, again = (build_taxonomy(s.items, cfg, progress=False) for _ in range(2))
    np.testing.assert_array_equal(fast.arrays["encoder_table"], again.arrays["encoder_table"])
    pd.testing.assert_frame_equal(fast.item_topics, again.item_topics)
    assert fast.version == again.version != tax.version
    amis = {}
    for name, t in (("model", tax), ("distilled", fast)):
        placed = t.item_topics[t.item_topics["level"] == 1].set_index("item_id")["topic_id"]
        amis[name] = adjusted_mutual_info_score(truth.loc[regular, "theme"],
                                                truth["item_id"].map(placed).fillna("(unplaced)")[regular])
    print(f"\ndemo fine AMI: model {amis['model']:.4f}, distilled {amis['distilled']:.4f}")
    assert amis["model"] - amis["distilled"] <= 0.03
    fast.save(tmp_path / "t")
    placed = Taxonomy.load(tmp_path / "t").assign(s.items)
    key = ["item_id", "level", "topic_id"]
    assert placed[key].sort_values(key).values.tolist() == fast.item_topics[key].sort_values(key).values.tolist()
