"""The distilled encoder's pieces, fast: a toy word-level tokenizer and random tables stand in for
the model (the model-group checks are in test_taxonomy_quality.py)."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from labeler import ConfigError, Taxonomy, TaxonomyConfig, build_taxonomy
from labeler.distilled import DistilledEncoder, mean_matrix, refine
from test_taxonomy import CFG, WORDS, catalog

VOCAB = ["[UNK]"] + sorted({w for words in WORDS.values() for w in words.split()})


def toy_tokenizer_json() -> str:
    """A word-level tokenizer over the test catalog's words, as the JSON a model folder holds."""
    from tokenizers import Tokenizer
    from tokenizers.models import WordLevel
    from tokenizers.pre_tokenizers import Whitespace
    tok = Tokenizer(WordLevel({w: i for i, w in enumerate(VOCAB)}, unk_token="[UNK]"))
    tok.pre_tokenizer = Whitespace()
    return tok.to_str()


def toy_encoder(dim: int = 32, seed: int = 0) -> DistilledEncoder:
    rng = np.random.default_rng(seed)
    return DistilledEncoder(toy_tokenizer_json(), rng.normal(size=(len(VOCAB), dim)), "toy",
                            mean=rng.normal(scale=0.01, size=dim))


def test_refine_solves_the_ridge_normal_equations():
    """Conjugate gradients give the ridge solution pulled toward the prior, checked against a dense
    solve of (M'M + lam I) W = M'Y + lam T0 (numpy.linalg.solve as the reference)."""
    rng = np.random.default_rng(1)
    m = sp.random(60, 25, density=0.2, random_state=2, format="csr", dtype=np.float32)
    y, prior = rng.normal(size=(60, 8)).astype(np.float32), rng.normal(size=(25, 8)).astype(np.float32)
    lam = 0.3
    dense = m.toarray().astype(np.float64)
    want = np.linalg.solve(dense.T @ dense + lam * np.eye(25), dense.T @ y + lam * prior)
    np.testing.assert_allclose(refine(m, y, prior, lam, iterations=200), want, atol=2e-4)


def test_rows_of_tokens_no_text_uses_stay_at_the_prior():
    """A token that appears in no fit text keeps its prior row exactly."""
    rng = np.random.default_rng(3)
    m = sp.csr_matrix(np.hstack([rng.random((30, 5)), np.zeros((30, 3))]).astype(np.float32))
    prior = rng.normal(size=(8, 4)).astype(np.float32)
    out = refine(m, rng.normal(size=(30, 4)).astype(np.float32), prior, 0.1)
    np.testing.assert_array_equal(out[5:], prior[5:])


def test_mean_matrix_averages_each_texts_tokens():
    """Each row is the mean of the text's token ids (repeats counted); a text with no token is a zero row."""
    enc = toy_encoder()
    m = mean_matrix(enc.tokenizer, ["yarn wool yarn", ""], len(VOCAB)).toarray()
    want = np.zeros(len(VOCAB))
    want[VOCAB.index("yarn")], want[VOCAB.index("wool")] = 2 / 3, 1 / 3
    np.testing.assert_allclose(m[0], want, rtol=1e-6)
    assert not m[1].any()


def test_encoding_is_the_centred_mean_of_token_rows_at_unit_length():
    """encode() = unit(unit(mean of the text's float16 table rows) - mean)."""
    enc = toy_encoder()
    rows = enc.table.astype(np.float32)
    x = rows[[VOCAB.index("bonsai"), VOCAB.index("juniper")]].mean(0)
    x = x / np.linalg.norm(x) - enc.mean
    np.testing.assert_allclose(enc.encode(["bonsai juniper"])[0], x / np.linalg.norm(x), atol=1e-6)


def test_a_taxonomy_built_with_it_carries_the_encoder_and_assigns_after_loading(tmp_path):
    """The table, the mean and the tokenizer travel in the taxonomy folder (checksummed), the manifest
    says which encoder it is, and the loaded taxonomy places the build's items as the build did."""
    items = catalog()
    tax = build_taxonomy(items, CFG, embedder=toy_encoder(), progress=False)
    tax.save(tmp_path / "t")
    back = Taxonomy.load(tmp_path / "t")
    assert back.manifest["encoder"]["kind"] == "distilled" and back.manifest["model"] == "distilled-toy"
    assert {"encoder_table.npy", "encoder_mean.npy", "encoder_tokenizer.json"} <= set(back.manifest["files"])
    again = back.assign(items)
    key = ["item_id", "level", "topic_id"]
    assert again[key].sort_values(key).values.tolist() == tax.item_topics[key].sort_values(key).values.tolist()


def test_distilling_the_hashing_embedder_is_a_clear_error():
    """encoder = distilled needs the sentence model: another embedder is refused, naming what to change."""
    from labeler.embed import HashingEmbedder
    with pytest.raises(ConfigError, match="taxonomy.encoder = 'model'"):
        build_taxonomy(catalog(), TaxonomyConfig(encoder="distilled"), embedder=HashingEmbedder(64), progress=False)


def test_the_encoder_settings_count_in_the_version_only_when_chosen():
    """Taxonomies built with the model keep the versions they had before the option existed (its
    fields are left out of the hash); choosing the distilled encoder, or its settings, changes it."""
    base = TaxonomyConfig()
    assert "encoder" not in base.meaning_json() and "distill" not in base.meaning_json()
    assert TaxonomyConfig(distill_items=500).meaning_json() == base.meaning_json()
    distilled = TaxonomyConfig(encoder="distilled")
    assert distilled.meaning_json() != base.meaning_json()
    assert TaxonomyConfig(encoder="distilled", distill_items=500).meaning_json() != distilled.meaning_json()
