"""Labels: the stage that tags every interaction as in-profile or new-interest discovery.

Takes interactions (a pandas or Arrow frame, or Parquet files, read on an engine) and a
taxonomy's item topics, with a :class:`~labeler.config.LabelConfig`; gives, per interaction and
level, the label and its reward columns, each user's point-in-time footprints (per level and
topic) and history lengths, as a :class:`~labeler.labels.plan.LabelRun` to write or read, or
continued from :class:`~labeler.labels.plan.Carried` state for incremental runs.

Modules: ``rules`` (the label rules as Ibis expressions, written once for every engine),
``intake`` (inputs read, checked and content-hashed), ``scan`` (the sort-and-scan plan on DuckDB),
``plan`` (``plan_labels``, the run and its carried state), ``files`` (the output files, the same
bytes however they are fed), ``pieces`` (a large run one range of users at a time).
"""
from .plan import Carried, LabelRun, build_footprints, label_interactions, plan_labels

__all__ = ["Carried", "LabelRun", "build_footprints", "label_interactions", "plan_labels"]
