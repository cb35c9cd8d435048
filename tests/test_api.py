"""The public Python API: every name DESIGN.md's API section promises is exported by `labeler`."""
from __future__ import annotations

import labeler

DESIGN_NAMES = ["build_taxonomy", "Taxonomy", "TaxonomyConfig", "label_interactions", "build_footprints",
                "LabelConfig", "publish_store", "open_store", "check_rollout", "GateConfig", "evaluate"]


def test_design_api_names_are_exported():
    """Each name of the design's Python API is in labeler.__all__ and importable from labeler."""
    missing = [n for n in DESIGN_NAMES if n not in labeler.__all__ or not hasattr(labeler, n)]
    assert not missing, missing


def test_all_lists_only_real_names():
    """Nothing in labeler.__all__ is a dangling name."""
    assert [n for n in labeler.__all__ if not hasattr(labeler, n)] == []
