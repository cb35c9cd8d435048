"""Rollout: the check of a taxonomy change before it replaces the current one.

Takes the current and a candidate taxonomy, items and interactions, with a
:class:`~labeler.config.GateConfig`; gives a :class:`~labeler.rollout.check.RolloutResult`: per
level the agreement of both assignments, the topic map (kept, renamed, split, merged, retired,
new), the labels that would flip, and the gate's verdict, with a report.html for people
(``report``).
"""
from .check import RolloutResult, check_rollout, check_value

__all__ = ["RolloutResult", "check_rollout", "check_value"]
