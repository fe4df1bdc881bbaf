"""Reference statistics of the training samples, stored with a model at fit time.

They let new samples be diagnosed (the Q limit's residual moments) and corrected (the
shrinkage factors of projected scores) later without the training data; see
:mod:`axiscope.scoring`.
"""

from __future__ import annotations

import numpy as np

from .shrinkage import spiked_shrinkage

__all__ = ["training_extras"]


def training_extras(
    singular_values: np.ndarray,
    scores: np.ndarray,
    squared_norms: np.ndarray,
    *,
    total_inertia: float,
    n_features: int,
) -> dict[str, np.ndarray]:
    """Arrays stored with a model so that new samples can be diagnosed and corrected.

    Parameters
    ----------
    singular_values : ndarray, shape (k,)
    scores : ndarray, shape (n, k)
        Training scores.
    squared_norms : ndarray, shape (n,)
        Squared distance of each training sample to the centre (preprocessed space).
    total_inertia : float
        Sum of the variances of the preprocessed features (population convention).
    n_features : int
        Number of features used by the axes.

    Returns
    -------
    dict
        ``residual_moments`` (θ1, θ2, θ3), ``shrinkage_factor`` (k,).

    Notes
    -----
    θ1 is exact: the sum of the residual eigenvalues is the total variance minus the
    variance of the ``k`` axes (population convention, ``s²/n``). θ2 and θ3 are not the
    residual eigenvalue moments ``Σ λ_j²``, ``Σ λ_j³`` (those would need all residual
    eigenvalues): they are estimated from the population variance ``m2`` and the third
    central moment ``m3`` of the training residuals ``Q`` through the Gaussian identities
    ``var(Q) = 2θ2`` and ``E[(Q − θ1)³] = 8θ3``, i.e. ``θ2 = m2/2``, ``θ3 = m3/8``. The mean
    and variance used by Box's limit are ``θ1`` and ``2θ2``. No pass over the data is
    needed.
    """
    s = np.asarray(singular_values, dtype=np.float64)
    scores = np.asarray(scores, dtype=np.float64)
    n = scores.shape[0]
    variance = s**2 / n
    theta1 = max(float(total_inertia) - float(variance.sum()), 0.0)
    q = np.maximum(np.asarray(squared_norms, dtype=np.float64) - np.einsum("ij,ij->i", scores, scores), 0.0)
    centred = q - q.mean()
    m2 = float(np.mean(centred**2))
    m3 = float(np.mean(centred**3))
    shrink = spiked_shrinkage(variance, n_samples=n, n_features=n_features, total_variance=total_inertia)
    return {
        "residual_moments": np.array([theta1, m2 / 2.0, m3 / 8.0]),
        "shrinkage_factor": shrink.factor,
    }


# ----------------------------------------------------------------------- control limits
