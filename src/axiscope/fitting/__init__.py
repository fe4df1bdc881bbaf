"""Fitting: reading → preprocessing → engine → model, with the tables people use."""

from .result import FitResult
from .run import METHODS, fit

__all__ = ["METHODS", "FitResult", "fit"]
