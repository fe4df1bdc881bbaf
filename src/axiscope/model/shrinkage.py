"""Shrinkage of projected scores when there are many more features than training samples.

When the number of features ``p`` is comparable to or larger than the number of training
samples ``n``, the sample principal axes are noisy estimates of the population axes. The
training scores are then inflated (each sample helped to choose the axes) while the
projected scores of new samples are not, so new samples look shrunk toward the centre
compared with the training samples (Lee, Zou & Wright 2010, "Convergence and prediction of
principal component scores in high-dimensional settings", Annals of Statistics 38(6),
3605–3629, doi:10.1214/10-AOS821).

This module estimates one shrinkage factor per axis from quantities the fit already has
(the axis variances, the total variance, ``n`` and ``p``), with the asymptotic formulas of
the spiked covariance model (Baik & Silverstein 2006, doi:10.1016/j.jmva.2005.08.003;
Paul 2007, Statistica Sinica 17(4), 1617–1642). It needs no pass over the data and no refit.

Model: the population covariance is ``σ²·(I + Σ_j (ℓ_j − 1)·u_j·u_jᵀ)`` and ``p/(n−1) → γ``.
For a spike above the detection threshold ``ℓ_j > 1 + √γ``:

* the sample variance of axis ``j`` converges to ``σ²·ℓ_j·(1 + γ/(ℓ_j − 1))``;
* the squared cosine between the sample and the population axis converges to
  ``(1 − γ/(ℓ_j − 1)²) / (1 + γ/(ℓ_j − 1))``;
* hence the variance of a new sample's projection on the sample axis,
  ``σ²·(1 + (ℓ_j − 1)·cos²)``, divided by the training variance, converges to
  ``((ℓ_j − 1)/(ℓ_j − 1 + γ))²``: the shrinkage factor of the scores is
  ``(ℓ_j − 1)/(ℓ_j − 1 + γ)`` (the factor given by Lee, Zou & Wright 2010).

Below the threshold the sample axis is asymptotically unrelated to any population axis;
a new sample's projection then has variance ``σ²`` and the factor is
``sqrt(σ² / training variance)``, which equals the formula above at the threshold.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ShrinkageEstimate", "spiked_shrinkage"]

_MAX_ITERATIONS = 100


@dataclass
class ShrinkageEstimate:
    """Per-axis shrinkage factors of projected scores under the spiked covariance model.

    Attributes
    ----------
    factor : ndarray, shape (k,)
        Expected ratio of the standard deviation of new samples' projected scores to that
        of the training scores, in (0, 1]. Dividing projected scores by it corrects them.
    spike : ndarray, shape (k,)
        Estimated population variance of each axis in units of the noise variance
        (``ℓ_j``); NaN for axes below the detection threshold.
    noise_variance : float
        Estimated noise variance ``σ²`` per feature.
    gamma : float
        Aspect ratio ``p / (n − 1)``.
    """

    factor: np.ndarray
    spike: np.ndarray
    noise_variance: float
    gamma: float


def _invert_spike(ratio: np.ndarray, gamma: float) -> np.ndarray:
    """Population spike ``ℓ`` from the sample variance ``ratio = λ̂/σ²`` (NaN below threshold).

    Solves ``ℓ + γℓ/(ℓ − 1) = ratio``, i.e. ``ℓ² − (1 + ratio − γ)ℓ + ratio = 0``, larger root.
    """
    edge = (1.0 + np.sqrt(gamma)) ** 2
    b = 1.0 + ratio - gamma
    disc = np.maximum(b * b - 4.0 * ratio, 0.0)
    spike = (b + np.sqrt(disc)) / 2.0
    return np.where(ratio > edge, spike, np.nan)


def spiked_shrinkage(
    variance: np.ndarray,
    *,
    n_samples: int,
    n_features: int,
    total_variance: float,
) -> ShrinkageEstimate:
    """Asymptotic shrinkage factors of the projected scores of new samples, per axis.

    Parameters
    ----------
    variance : ndarray, shape (k,)
        Variance of each training axis with the population convention (``s²/n``).
    n_samples : int
        Number of training samples ``n``.
    n_features : int
        Number of features used by the axes ``p``.
    total_variance : float
        Sum of the variances of the preprocessed features (population convention).

    Returns
    -------
    ShrinkageEstimate

    Notes
    -----
    The noise variance is estimated jointly with the spikes: starting from the mean
    variance left outside the ``k`` axes, ``σ² = (total − σ²·Σ ℓ_j) / (p − m)`` is iterated,
    where the sum runs over the ``m`` axes above the detection threshold (the others count
    as noise). Since the trace of the sample covariance is unbiased for the trace of the
    population covariance, this removes the bias of the plain residual mean (which is too
    small by the inflation ``Σ(λ̂_j − σ²ℓ_j)``). Convergence is fast (a contraction of
    order ``k/p``). Variances are converted to the ``1/(n−1)`` convention, the one for
    which the limits above hold for centred data.

    References
    ----------
    Lee, Zou & Wright (2010), Annals of Statistics 38(6), doi:10.1214/10-AOS821.
    Baik & Silverstein (2006), J. Multivariate Analysis 97(6), doi:10.1016/j.jmva.2005.08.003.
    Paul (2007), Statistica Sinica 17(4), 1617–1642.
    """
    variance = np.asarray(variance, dtype=np.float64)
    k = variance.shape[0]
    n, p = int(n_samples), int(n_features)
    if n < 2 or p <= k:
        return ShrinkageEstimate(np.ones(k), np.full(k, np.nan), float("nan"), float("nan"))
    to_sample = n / (n - 1.0)
    lam = variance * to_sample
    total = float(total_variance) * to_sample
    gamma = p / (n - 1.0)
    residual = total - lam.sum()
    if not residual > 1e-9 * total:  # the axes hold all the variance: no noise to shrink by
        return ShrinkageEstimate(np.ones(k), np.full(k, np.nan), 0.0, gamma)
    sigma2 = residual / (p - k)
    spike = np.full(k, np.nan)
    for _ in range(_MAX_ITERATIONS):
        spike = _invert_spike(lam / sigma2, gamma)
        above = np.isfinite(spike)
        updated = (total - sigma2 * spike[above].sum()) / (p - int(above.sum()))
        if not updated > 0:
            break
        done = abs(updated - sigma2) <= 1e-12 * sigma2
        sigma2 = updated
        if done:
            break
    spike = _invert_spike(lam / sigma2, gamma)
    above = np.isfinite(spike)
    factor = np.sqrt(np.clip(sigma2 / np.maximum(lam, np.finfo(float).tiny), 0.0, 1.0))
    a = spike[above] - 1.0
    factor[above] = a / (a + gamma)
    factor = np.clip(factor, np.finfo(float).eps, 1.0)
    return ShrinkageEstimate(factor, spike, float(sigma2), float(gamma))
