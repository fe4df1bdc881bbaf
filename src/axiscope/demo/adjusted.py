"""The demo's check that adjusting for the invented processing batch removes the batch axis.

Compares a fit with one adjusted for a covariate: for each, the share of each axis's
variance that a categorical annotation accounts for (η², between-group over total sum of
squares of the scores), for the covariate and for the planted biology.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["AdjustmentCheck", "eta_squared", "check_adjustment"]


def eta_squared(scores: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """η² of ``groups`` on each column of ``scores``: between-group / total sum of squares."""
    centred = scores - scores.mean(axis=0)
    total = np.sum(centred**2, axis=0)
    between = np.zeros(scores.shape[1])
    for level in pd.unique(groups):
        rows = groups == level
        between += rows.sum() * centred[rows].mean(axis=0) ** 2
    return between / np.maximum(total, np.finfo(float).tiny)


@dataclass
class AdjustmentCheck:
    """η² of the covariate and of the biology on the first axes, before and after adjusting."""

    covariate: str
    biology: str
    covariate_before: np.ndarray
    covariate_after: np.ndarray
    biology_before: np.ndarray
    biology_after: np.ndarray

    def line(self) -> str:
        """One plain sentence for the demo's summary."""
        worst = int(np.argmax(self.covariate_before))
        kept = ", ".join(f"PC{j + 1} {v:.2f}" for j, v in enumerate(self.biology_after[:2]))
        return (f"adjusted for {self.covariate} (--adjust-for {self.covariate}): its η² with the first "
                f"{self.covariate_before.size} axes falls from {self.covariate_before[worst]:.2f} (PC{worst + 1}) "
                f"to {float(np.max(self.covariate_after)):.2f}; {self.biology} keeps {kept}")


def check_adjustment(result, adjusted, annotations: pd.DataFrame, *, covariate: str, biology: str,
                     id_column: str = "sample_id", n_axes: int = 3) -> AdjustmentCheck:
    """η² of ``covariate`` and ``biology`` on the first ``n_axes`` axes of both fits."""
    table = annotations.set_index(id_column).loc[list(result.sample_ids)]

    def eta(fitted, column):
        return eta_squared(fitted.scores[:, :n_axes], table[column].astype(str).to_numpy())

    return AdjustmentCheck(covariate, biology, eta(result, covariate), eta(adjusted, covariate),
                           eta(result, biology), eta(adjusted, biology))
