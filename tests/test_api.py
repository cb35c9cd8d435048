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


def test_a_log_whose_event_types_are_all_filtered_out_gives_empty_tables():
    """labels.event_types that match no row: no labels and no footprints (before: a TypeError from
    the footprints' as-of time, which had no interaction to come from)."""
    from labeler import LabelConfig, build_footprints, label_interactions
    from labelcases import log, taxonomy
    tax = taxonomy({"k1": [("knit", 1.0)]})
    df = log(("u", "k1", 0, 1.0, "e1", "click"), ("u", "k1", 5, 1.0, "e2", "click"))
    cfg = LabelConfig(event_types=("view",))
    assert len(label_interactions(df, tax, cfg)) == 0
    assert len(build_footprints(df, tax, cfg)) == 0
