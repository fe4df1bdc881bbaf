"""Probabilistic principal component analysis of a fitted model: noise, density, evidence.

The model of Tipping & Bishop [1]_: a sample is ``x = μ + W z + ε`` with ``z ~ N(0, I_k)``
and ``ε ~ N(0, σ² I_p)``. At the maximum of the likelihood, ``W W^T`` has the leading
eigenvectors ``V`` of the sample covariance with eigenvalues ``λ_j − σ²``, and ``σ²`` is the
mean of the ``p − k`` discarded eigenvalues, so the model covariance is
``C = V (Λ − σ² I) V^T + σ² I``. Eigenvalues here use the sample convention (divisor
``n − 1``), as :class:`sklearn.decomposition.PCA` does.

The number of axes can be chosen by Minka's Laplace approximation of the evidence of each
``k`` [2]_, from the whole spectrum.

Everything here works on small vectors (eigenvalues, per-sample squared norms and scores);
nothing holds the data.

References
----------
.. [1] M. E. Tipping and C. M. Bishop, "Probabilistic principal component analysis",
   Journal of the Royal Statistical Society B 61(3), 611–622, 1999.
   https://doi.org/10.1111/1467-9868.00196
.. [2] T. P. Minka, "Automatic choice of dimensionality for PCA", Advances in Neural
   Information Processing Systems 13 (NIPS 2000), 598–604.
"""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln

__all__ = ["noise_variance", "log_density", "minka_log_evidence", "minka_rank", "share_rank"]


def noise_variance(total_variance: float, eigenvalues: np.ndarray, n_samples: int, n_features: int) -> float:
    """Maximum-likelihood noise variance ``σ²``: the mean of the discarded eigenvalues.

    Parameters
    ----------
    total_variance : float
        Sum of all eigenvalues (the total variance of the features, sample convention).
    eigenvalues : ndarray, shape (k,)
        The ``k`` kept eigenvalues.
    n_samples, n_features : int
        The covariance has ``min(n_samples, n_features)`` eigenvalues (the last of them zero
        when centred and ``n_samples ≤ n_features``); ``σ²`` is the mean of the
        ``min(n_samples, n_features) − k`` after the kept ones, 0 when none is left.
    """
    left = min(n_samples, n_features) - eigenvalues.shape[0]
    if left <= 0:
        return 0.0
    return max(float(total_variance - np.sum(eigenvalues)) / left, 0.0)


def log_density(sq_norms: np.ndarray, scores: np.ndarray, eigenvalues: np.ndarray, noise: float,
                n_features: int) -> np.ndarray:
    """Log-likelihood of each sample under the probabilistic PCA model (Tipping & Bishop 1999).

    ``log p(x) = −½ (p log 2π + log det C + x̃^T C^{-1} x̃)`` with ``x̃`` the centred sample.
    With ``C^{-1} = (I − V diag(1 − σ²/λ) V^T) / σ²`` (the matrix inversion lemma) the
    quadratic form needs only ``‖x̃‖²`` and the scores ``z = V^T x̃``:
    ``(‖x̃‖² − Σ_j z_j² (1 − σ²/λ_j)) / σ²``.

    Parameters
    ----------
    sq_norms : ndarray, shape (m,)
        ``‖x̃‖²`` of each sample.
    scores : ndarray, shape (m, k)
        ``V^T x̃`` of each sample (not whitened).
    eigenvalues : ndarray, shape (k,)
    noise : float
        ``σ²``; 0 is allowed only when ``k = n_features`` (the covariance is then ``V Λ V^T``).
    n_features : int

    Raises
    ------
    ValueError
        When ``σ² = 0`` with ``k < n_features``: the model then has no density.
    """
    k = eigenvalues.shape[0]
    logdet = float(np.sum(np.log(eigenvalues)))
    if noise > 0:
        shrink = 1.0 - noise / eigenvalues
        quadratic = (sq_norms - (scores**2) @ shrink) / noise
        logdet += (n_features - k) * np.log(noise)
    elif k == n_features:
        quadratic = (scores**2) @ (1.0 / eigenvalues)
    else:
        raise ValueError(
            f"the model has no noise variance left ({k} axes take all the variance of "
            f"{n_features} features), so it has no density; choose fewer components"
        )
    return -0.5 * (n_features * np.log(2.0 * np.pi) + logdet + quadratic)


def minka_log_evidence(eigenvalues: np.ndarray, rank: int, n_samples: int) -> float:
    """Laplace approximation of ``log p(D | k)`` for ``k = rank`` (Minka 2000, §3, eq. 30).

    Parameters
    ----------
    eigenvalues : ndarray, shape (d,)
        All ``d`` eigenvalues of the sample covariance, descending.
    rank : int
        ``1 ≤ rank < d``.
    n_samples : int

    Returns
    -------
    float
        ``−inf`` when an eigenvalue among the leading ``rank`` is at rounding level or two
        of them are tied (the approximation needs them positive and distinct).

    Notes
    -----
    The terms, with ``λ̂_j = λ_j`` for ``j ≤ k`` and ``σ̂² = Σ_{j>k} λ_j / (d − k)`` otherwise,
    and ``m = d k − k(k+1)/2``:
    ``log p(U) = −k log 2 + Σ_{i=1..k} [log Γ((d−i+1)/2) − (d−i+1)/2 · log π]``;
    ``−n/2 · Σ_{j≤k} log λ_j − n(d−k)/2 · log σ̂²``;
    ``+(m+k)/2 · log 2π − k/2 · log n``;
    ``−½ log |A_Z|`` with ``|A_Z| = Π_{i≤k} Π_{j>i} n (1/λ̂_j − 1/λ̂_i)(λ_i − λ_j)``.
    """
    lam = np.asarray(eigenvalues, dtype=np.float64)
    d, k, n = lam.shape[0], int(rank), int(n_samples)
    if not 1 <= k < d:
        raise ValueError(f"rank={k} is not between 1 and {d - 1}")
    tiny = np.finfo(np.float64).eps
    if lam[k - 1] < tiny:
        return -np.inf
    sigma2 = max(float(np.sum(lam[k:])) / (d - k), tiny)
    i = np.arange(1, k + 1)
    log_pu = -k * np.log(2.0) + float(np.sum(gammaln((d - i + 1) / 2.0) - (d - i + 1) / 2.0 * np.log(np.pi)))
    log_lik = -n / 2.0 * float(np.sum(np.log(lam[:k]))) - n * (d - k) / 2.0 * np.log(sigma2)
    m = d * k - k * (k + 1) / 2.0
    hat = np.concatenate([lam[:k], np.full(d - k, sigma2)])
    log_az = 0.0
    for a in range(k):
        rest = slice(a + 1, d)
        factors = (1.0 / hat[rest] - 1.0 / hat[a]) * (lam[a] - lam[rest]) * n
        if np.any(factors <= 0):  # tied eigenvalues: the Laplace approximation does not hold
            return -np.inf
        log_az += float(np.sum(np.log(factors)))
    return log_pu + log_lik + (m + k) / 2.0 * np.log(2.0 * np.pi) - k / 2.0 * np.log(n) - log_az / 2.0


def minka_rank(eigenvalues: np.ndarray, n_samples: int) -> int:
    """The ``k`` in ``1 … d − 1`` of largest :func:`minka_log_evidence` (the first on ties)."""
    d = np.asarray(eigenvalues).shape[0]
    evidence = [minka_log_evidence(eigenvalues, k, n_samples) for k in range(1, d)]
    return int(np.argmax(evidence)) + 1


def share_rank(variance_ratio: np.ndarray, share: float) -> int:
    """The fewest leading axes whose variance ratios add up to more than ``share``."""
    cumulative = np.cumsum(np.asarray(variance_ratio, dtype=np.float64))
    return min(int(np.searchsorted(cumulative, share, side="right")) + 1, cumulative.shape[0])
