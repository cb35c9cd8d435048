"""Learn a two-level taxonomy from item text.

Steps: embed (cached by content hash) -> L2 normalise -> PCA -> L2 normalise -> HDBSCAN on a
sample (at most ``fit_sample_cap`` items; leaf selection: many small dense groups) -> their
centroids in the embedding space, moved by k-means steps -> merged along a Ward tree to the count
with the best silhouette: the fine topics (level 1) -> every item placed at its nearest centroid,
with confidence = cosine similarity, unplaced below ``min_confidence`` -> coarse topics (level 0)
by agglomerating fine centroids -> names by class-based TF-IDF -> ids matched to a previous
taxonomy by item overlap.

Placing every item at its nearest centroid (HDBSCAN finds the topics, the centroids place the
items) makes ``Taxonomy.assign`` on the build items reproduce the build exactly.
"""
from __future__ import annotations

import json
import logging

import numpy as np
import pandas as pd

from ..config import TaxonomyConfig
from ..distilled import MEAN_ARRAY, TABLE_ARRAY, DistilledEncoder
from ..embed import EmbeddingCache, SentenceEmbedder, embed_items
from ..errors import ConfigError
from ..tables import item_text, normalize_items
from ..version import __version__
from .ids import format_id, id_number, match_topics, members_by_topic
from .model import FORMAT, Taxonomy, hash_strings, items_empty_text, place, placement_rows
from .names import class_tfidf_keywords, distinct_names

log = logging.getLogger(__name__)


def _unit(x: np.ndarray) -> np.ndarray:
    n = np.linalg.norm(x, axis=1, keepdims=True)
    n[n == 0] = 1.0
    return x / n


def _reduce(x: np.ndarray, k: int, seed: int) -> np.ndarray:
    """PCA to at most ``k`` dimensions, then unit length: the space HDBSCAN clusters in."""
    from sklearn.decomposition import PCA
    k = max(1, min(k, x.shape[0] - 1, x.shape[1]))
    pca = PCA(n_components=k, svd_solver="full" if x.shape[0] <= 5000 else "randomized", random_state=seed)
    return _unit(pca.fit_transform(x.astype(np.float64)))


def _cluster(x: np.ndarray, cfg: TaxonomyConfig) -> np.ndarray:
    """HDBSCAN labels (-1 = noise) of unit vectors ``x``, clustered after PCA.

    Fewer items than ``min_cluster_size``, identical texts, or nothing dense enough give one
    cluster holding everything (a documented degenerate result, not an error).
    """
    import hdbscan
    if len(x) < max(cfg.min_cluster_size, 2) or len(np.unique(np.round(x, 5), axis=0)) < 2:
        return np.zeros(len(x), dtype=int)
    z = _reduce(x, cfg.pca_components, cfg.seed)
    model = hdbscan.HDBSCAN(min_cluster_size=cfg.min_cluster_size, min_samples=cfg.min_samples,
                            metric="euclidean", cluster_selection_method=cfg.cluster_selection, core_dist_n_jobs=1)
    labels = model.fit_predict(z.astype(np.float64))
    if labels.max() < 0:
        return np.zeros(len(z), dtype=int)
    return labels


def _refine(x: np.ndarray, centroids: np.ndarray, iterations: int) -> np.ndarray:
    """Spherical k-means steps from HDBSCAN's centres over the whole sample (noise included).

    HDBSCAN decides how many topics there are and where their dense cores lie; these steps move
    each centre to the mean of the items nearest to it, so diffuse regions are shared out too.
    """
    from scipy import sparse
    rows = np.arange(len(x))
    for _ in range(iterations if len(centroids) > 1 else 0):
        nearest = np.argmax(x @ centroids.T, axis=1)
        members = sparse.csr_matrix((np.ones(len(x), dtype=x.dtype), (nearest, rows)),
                                    shape=(len(centroids), len(x)))
        sums = np.asarray(members @ x)  # per centre, the sum of its members (its mean's direction)
        empty = np.bincount(nearest, minlength=len(centroids)) == 0
        sums[empty] = centroids[empty]  # a centre nobody is nearest to stays where it is
        moved = _unit(sums)
        if np.allclose(moved, centroids, atol=1e-7):
            break
        centroids = moved
    return centroids.astype(np.float32)


def _sizes(x: np.ndarray, centroids: np.ndarray) -> np.ndarray:
    """How many of the unit vectors ``x`` are nearest to each centre."""
    return np.bincount(np.argmax(x @ centroids.T, axis=1), minlength=len(centroids)).astype(np.float64)


def _merged(centroids: np.ndarray, sizes: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Centres of groups of topics: the members' centres weighted by their sizes."""
    merged = np.vstack([(centroids[groups == g] * np.maximum(sizes[groups == g], 1.0)[:, None]).sum(axis=0)
                        for g in range(groups.max() + 1)])
    return _unit(merged).astype(np.float32)


def _merge_to_count(x: np.ndarray, centroids: np.ndarray, cfg: TaxonomyConfig) -> np.ndarray:
    """Merge fine topics along a Ward tree of their centres, to ``fine_topics`` or else to the count
    whose partition has the best silhouette (cosine, on at most ``silhouette_sample`` items).

    HDBSCAN with leaf selection finds many small dense groups; merging them bottom-up joins groups
    that belong together, and the silhouette (Rousseeuw 1987) chooses where to stop. Counts from 2
    to the number of groups are tried (100 of them, spaced geometrically, when there are more).
    """
    from scipy.cluster.hierarchy import fcluster, linkage
    from sklearn.metrics import silhouette_score
    from sklearn.metrics.pairwise import cosine_distances
    n = len(centroids)
    if n < 2:
        return centroids
    tree = linkage(centroids.astype(np.float64), method="ward")
    sizes = _sizes(x, centroids)
    if cfg.fine_topics is not None:
        return _merged(centroids, sizes, fcluster(tree, t=min(cfg.fine_topics, n), criterion="maxclust") - 1)
    rng = np.random.default_rng(cfg.seed)
    sub = x if len(x) <= cfg.silhouette_sample else x[np.sort(rng.choice(len(x), cfg.silhouette_sample,
                                                                          replace=False))]
    dist = cosine_distances(sub)
    counts = range(n, 1, -1) if n <= 101 else sorted({int(round(v)) for v in np.geomspace(n, 2, 100)}, reverse=True)
    best, best_score = centroids, -np.inf
    for k in counts:
        merged = _merged(centroids, sizes, fcluster(tree, t=k, criterion="maxclust") - 1)
        labels = np.argmax(sub @ merged.T, axis=1)
        if len(np.unique(labels)) < 2:
            continue
        score = silhouette_score(dist, labels, metric="precomputed")
        if score > best_score:
            best, best_score = merged, score
    return best


def _merge_close(x: np.ndarray, centroids: np.ndarray, similarity: float) -> np.ndarray:
    """Merge topics whose centres have cosine similarity >= ``similarity`` (average linkage)."""
    from scipy.cluster.hierarchy import fcluster, linkage
    if len(centroids) < 2:
        return centroids
    groups = fcluster(linkage(centroids.astype(np.float64), method="average", metric="cosine"),
                      t=1.0 - similarity, criterion="distance") - 1
    return _merged(centroids, _sizes(x, centroids), groups)


def _coarse(centroids: np.ndarray, cfg: TaxonomyConfig, mean: np.ndarray | None = None) -> np.ndarray:
    """Group fine centroids into coarse topics with Ward linkage.

    The centres are first taken relative to ``mean`` (the catalog's mean vector) and scaled to
    unit length: what every item shares (a site's title templates, its house style) then no longer
    pulls the centres together, and the grouping follows how topics differ. On the demo this
    took the coarse AMI against the true hobbies from 0.595 to 0.710 and its largest coarse topic
    from 62% to 38% of the items; on WordNet nouns it changed level-0 AMI by at most 0.005.

    Without ``coarse_topics`` the Ward tree is cut at the count (2 to one less than the fine
    topics) whose grouping of those centres has the best silhouette (Rousseeuw 1987; Euclidean
    on the unit centres; the smaller count on a tie). Measured on the items, the silhouette only
    rises toward no merging at all; measured on the centres it peaks where groups of topics stand
    apart. Chosen on the demo (it picks the 6 true hobbies) and WordNet sample seed 0 (13 groups,
    level-0 AMI 0.373 where the square root of the fine count, the rule before it, gave 6 and 0.299).
    """
    from scipy.cluster.hierarchy import fcluster, linkage
    n = len(centroids)
    if n <= 2:
        return np.zeros(n, dtype=int)
    x = centroids.astype(np.float64)
    if mean is not None:
        x = x - mean.astype(np.float64)
        x /= np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)
    tree = linkage(x, method="ward")
    if cfg.coarse_topics is not None:
        k = max(1, min(cfg.coarse_topics, n))
        return (fcluster(tree, t=k, criterion="maxclust") - 1).astype(int)
    return _best_silhouette_cut(x, tree, n)


def _best_silhouette_cut(x: np.ndarray, tree: np.ndarray, n: int) -> np.ndarray:
    """The Ward tree's cut into 2..n-1 groups whose silhouette on ``x`` is highest (first on a tie)."""
    from scipy.cluster.hierarchy import fcluster
    from sklearn.metrics import silhouette_score
    from sklearn.metrics.pairwise import euclidean_distances
    dist = euclidean_distances(x)
    best, best_score = None, -np.inf
    for k in range(2, n):
        groups = fcluster(tree, t=k, criterion="maxclust") - 1
        if len(np.unique(groups)) < 2:
            continue
        score = silhouette_score(dist, groups, metric="precomputed")
        if score > best_score + 1e-12:
            best, best_score = groups, score
    return (best if best is not None else np.zeros(n, dtype=int)).astype(int)


def _fit_centroids(x: np.ndarray, cfg: TaxonomyConfig) -> tuple[np.ndarray, int]:
    """Fine-topic centres (HDBSCAN's clusters, refined, merged where too close) and the noise count."""
    labels = _cluster(x, cfg)
    clusters = sorted(set(labels.tolist()) - {-1})
    centroids = _refine(x, _unit(np.vstack([x[labels == c].mean(axis=0) for c in clusters])),
                        cfg.refine_iterations)
    if cfg.fine_topics is not None or cfg.fine_count == "silhouette":
        centroids = _refine(x, _merge_to_count(x, centroids, cfg), cfg.refine_iterations)
    if cfg.merge_similarity is not None:
        centroids = _refine(x, _merge_close(x, centroids, cfg.merge_similarity), cfg.refine_iterations)
    return centroids, int((labels == -1).sum())


def _stable_ids(fine_members: dict, coarse_members: dict, previous, cfg: TaxonomyConfig):
    """Topic ids: a previous topic's id where its items continue, else a fresh one above all old ids.

    Returns ({(level, key): topic_id}, {old topic_id: first_version}).
    """
    ids: dict[tuple[int, int], str] = {}
    first_version: dict[str, str] = {}
    next_id = 0
    if previous is not None:
        next_id = max([id_number(t) for t in previous.topics["topic_id"]] + [-1]) + 1
        first_version = dict(zip(previous.topics["topic_id"], previous.topics["first_version"]))
        for level, members in ((0, coarse_members), (1, fine_members)):
            for key, tid in match_topics(members, members_by_topic(previous.item_topics, level),
                                         cfg.id_match_min_jaccard).items():
                ids[(level, key)] = tid
    for level, members in ((0, coarse_members), (1, fine_members)):
        for key in sorted(members, key=lambda k: (-len(members[k]), min(members[k], default=""))):
            if (level, key) not in ids:
                ids[(level, key)] = format_id(next_id)
                next_id += 1
    return ids, first_version


# names the build method: change it whenever the same inputs and settings would give other topics,
# so that a taxonomy built differently never carries the same version
METHOD = "learned/coarse-centred-silhouette"


def _input_version(items: pd.DataFrame, cfg: TaxonomyConfig, model: str, previous) -> str:
    texts = item_text(items, cfg.text_columns)
    return hash_strings([FORMAT, METHOD, __version__, model, cfg.meaning_json(),
                         previous.version if previous is not None else "",
                         *sorted(f"{i}\x01{t}" for i, t in zip(items["item_id"], texts))])


LEVEL_NAMES = {0: "coarse", 1: "fine"}
# a topic holding more than this share of a level's placed items says little about anyone
DOMINANT_SHARE = 0.5


def shape_warnings(topics: pd.DataFrame, cfg: TaxonomyConfig) -> list[str]:
    """What a practitioner should know about a learned taxonomy's shape, with the setting to change:
    a level of one topic, or a topic holding more than half of a level's placed items."""
    out = []
    for level, g in topics.groupby("level"):
        name, total = LEVEL_NAMES.get(int(level), f"level {level}"), int(g["size"].sum())
        count_setting = "taxonomy.coarse_topics" if int(level) == 0 else "taxonomy.fine_topics"
        if len(g) == 1:
            out.append(f"the catalog yields one {name} topic (level {level}): its items are too few or too alike "
                       f"for these settings. Lower taxonomy.min_cluster_size (now {cfg.min_cluster_size}), set "
                       f"{count_setting}, or give the items more text (taxonomy.text_columns).")
            continue
        top = g.loc[g["size"].idxmax()]
        share = int(top["size"]) / max(total, 1)
        if share > DOMINANT_SHARE:
            out.append(f"{name} topic {top['topic_id']} '{top['name']}' holds {100 * share:.0f}% of the level's "
                       f"{total} placed items, so it tells little apart. Set {count_setting} higher (now "
                       f"{getattr(cfg, count_setting.split('.')[1]) or f'chosen: {len(g)}'}) or lower "
                       f"taxonomy.min_cluster_size (now {cfg.min_cluster_size}).")
    return out


def _distil(items: pd.DataFrame, usable: np.ndarray, teacher, cfg: TaxonomyConfig, progress: bool):
    """The distilled encoder of ``taxonomy.encoder = "distilled"``, fitted on a seeded sample of the
    items with text (all of them when there are at most ``distill_items``)."""
    if not isinstance(teacher, SentenceEmbedder):
        raise ConfigError(f"taxonomy.encoder = 'distilled' distils the sentence model, but the embedder "
                          f"given is {teacher.name!r}. Use the model (drop --embedder hashing) or set "
                          "taxonomy.encoder = 'model'.")
    rng = np.random.default_rng([cfg.seed, 1])  # its own stream: the fit sample's draw stays as it was
    pick = usable if len(usable) <= cfg.distill_items else np.sort(
        rng.choice(usable, size=cfg.distill_items, replace=False))
    texts = item_text(items.iloc[pick], cfg.text_columns).tolist()
    log.info("taxonomy.encoder = distilled: embedding %d of %d items with %s to fit the token table",
             len(texts), len(items), teacher.name)
    cache = EmbeddingCache(cfg.embedding_cache, teacher.name) if cfg.embedding_cache else None
    return DistilledEncoder.fit(texts, teacher, cache, ridge=cfg.distill_ridge, progress=progress)


def build_taxonomy(items: pd.DataFrame, config: TaxonomyConfig | None = None, *, embedder=None,
                   previous: Taxonomy | None = None, progress: bool = True,
                   source: str = "items") -> Taxonomy:
    """Learn a two-level taxonomy from the items' text (see the module docstring for the steps).

    >>> from labeler.embed import HashingEmbedder
    >>> df = pd.DataFrame({"item_id": [f"i{k}" for k in range(40)],
    ...                    "title": ["sourdough bread"] * 20 + ["bonsai wiring"] * 20})
    >>> tax = build_taxonomy(df, TaxonomyConfig(min_cluster_size=5), embedder=HashingEmbedder(64),
    ...                      progress=False)
    >>> int(tax.topics.query("level == 1").shape[0]) >= 1
    True
    """
    cfg = config or TaxonomyConfig()
    items, intake = normalize_items(items, cfg.text_columns, source=source)
    items = items.sort_values("item_id", kind="stable").reset_index(drop=True)  # input order never matters
    embedder = embedder or SentenceEmbedder(cfg.model, cfg.model_path, cfg.batch_size)
    cfgd = cfg.model_dump(mode="json")
    empty = items_empty_text(items, cfgd)
    usable = np.flatnonzero(~empty)
    if cfg.encoder == "distilled":
        embedder = _distil(items, usable, embedder, cfg, progress)
    version = _input_version(items, cfg, embedder.name, previous)
    vectors, stats = embed_items(items, cfgd, embedder, progress=progress)
    rng = np.random.default_rng(cfg.seed)
    fit_idx = usable if len(usable) <= cfg.fit_sample_cap else np.sort(
        rng.choice(usable, size=cfg.fit_sample_cap, replace=False))
    if len(fit_idx) == 0:
        fit_idx = np.arange(len(items))
    centroids, n_noise = _fit_centroids(vectors[fit_idx], cfg)
    fine_idx, conf = place(vectors, centroids)
    placed = (conf >= cfg.min_confidence) & ~empty
    kept = np.unique(fine_idx[placed]) if placed.any() else np.arange(len(centroids))
    if len(kept) < len(centroids):  # a centre nobody is placed at is no topic
        centroids = centroids[kept]
        fine_idx, conf = place(vectors, centroids)
        placed = (conf >= cfg.min_confidence) & ~empty
    n_fine = len(centroids)
    coarse_of_fine = _coarse(centroids, cfg, vectors[fit_idx].mean(axis=0))
    item_ids = items["item_id"].to_numpy()
    fine_members = {c: set(item_ids[placed & (fine_idx == c)]) for c in range(n_fine)}
    coarse_members = {g: set().union(*(fine_members[c] for c in range(n_fine) if coarse_of_fine[c] == g))
                      for g in sorted(set(coarse_of_fine.tolist()))}
    ids, first_version = _stable_ids(fine_members, coarse_members, previous, cfg)
    centroid_topics = [ids[(1, c)] for c in range(n_fine)]
    parent = {ids[(1, c)]: ids[(0, int(coarse_of_fine[c]))] for c in range(n_fine)}
    arrays = {"centroids": centroids.astype(np.float32)}
    if isinstance(embedder, DistilledEncoder):
        arrays[TABLE_ARRAY], arrays[MEAN_ARRAY] = embedder.table, embedder.mean
    rows = placement_rows(item_ids, fine_idx, conf, empty, centroid_topics, parent, cfg.min_confidence)
    texts = pd.Series(item_text(items, cfg.text_columns).to_numpy(), index=item_ids)
    topic_rows = []
    for level in (0, 1):
        sub = rows[rows["level"] == level]
        kw = class_tfidf_keywords(texts.loc[sub["item_id"]].reset_index(drop=True),
                                  sub["topic_id"].reset_index(drop=True), cfg.keywords_per_topic)
        size = sub.groupby("topic_id").size()
        level_ids = sorted(set(sub["topic_id"]))
        names = distinct_names({tid: kw.get(tid, []) for tid in level_ids}, cfg.name_words)
        for tid in level_ids:
            topic_rows.append((tid, level, parent.get(tid) if level == 1 else None, names[tid], kw.get(tid, []),
                               int(size[tid]), first_version.get(tid, version)))
    topics = pd.DataFrame(topic_rows, columns=["topic_id", "level", "parent_id", "name", "keywords",
                                               "size", "first_version"])
    n_unplaced = int(len(items) - rows["item_id"].nunique())
    warnings = shape_warnings(topics, cfg)
    for w in warnings:
        log.warning("taxonomy %s: %s", version[:12], w)
    manifest = {"format": FORMAT, "kind": "learned", "version": version, "tool_version": __version__,
                "model": embedder.name, "config": json.loads(cfg.meaning_json()), "n_items": int(len(items)),
                "n_fit_sample": int(len(fit_idx)), "n_unplaced": n_unplaced,
                "n_empty_text": int(empty.sum()), "n_noise_in_fit": n_noise,
                "topics_per_level": {str(l): int((topics["level"] == l).sum()) for l in (0, 1)},
                "previous_version": previous.version if previous is not None else None,
                "embedding_cache": {"hits": stats.hits, "misses": stats.misses}, "warnings": warnings}
    log.info("taxonomy %s: %d coarse / %d fine topics, %d of %d items unplaced (%.1f%%)", version[:12],
             manifest["topics_per_level"]["0"], manifest["topics_per_level"]["1"], n_unplaced,
             len(items), 100.0 * n_unplaced / max(len(items), 1))
    if isinstance(embedder, DistilledEncoder):
        manifest["encoder"] = {"kind": "distilled", "teacher": embedder.teacher,
                               "distilled_on": int(min(cfg.distill_items, len(usable)))}
    out = Taxonomy(topics, rows, manifest, arrays, centroid_topics,
                   tokenizer_json=embedder.tokenizer_json if isinstance(embedder, DistilledEncoder) else None)
    out.last_embed_stats = stats
    return out
