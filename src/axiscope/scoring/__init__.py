"""Placing new samples on a saved model's axes, with out-of-model diagnostics."""

from .score import FLAGS, Q_LIMIT_METHODS, ControlLimits, ScoreResult, score

__all__ = ["FLAGS", "Q_LIMIT_METHODS", "ControlLimits", "ScoreResult", "score"]
