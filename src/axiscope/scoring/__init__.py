"""Placing new samples on a saved model's axes, with out-of-model diagnostics."""

from .score import DIAGNOSTICS_COLUMNS, FLAGS, Q_LIMIT_METHODS, ControlLimits, ScoreResult, model_directory, score

__all__ = ["DIAGNOSTICS_COLUMNS", "FLAGS", "Q_LIMIT_METHODS", "ControlLimits", "ScoreResult", "model_directory",
           "score"]
