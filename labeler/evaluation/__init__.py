"""Evaluation: recommendation lists and experiment arms judged on the labels' ground truth.

Takes recommendation lists (or interactions with an experiment ``arm``), the interaction log and
a taxonomy; gives an :class:`~labeler.evaluation.metrics.Evaluation`: accuracy, diversity,
novelty, unexpectedness and serendipity per group with bootstrap intervals, interest growth per
arm, and a report.html (``report``). ``policies`` makes simple baseline lists to compare with.
"""
from .metrics import Evaluation, evaluate

__all__ = ["Evaluation", "evaluate"]
