"""Principal axes updated one batch of samples at a time.

The sequential Karhunen–Loève update with a moving mean of Ross et al. [1]_ (their
Algorithm 1 with forgetting factor 1, i.e. no forgetting): the ``k`` leading singular
values ``s`` and right singular vectors ``V`` of the centred data seen so far are
combined with a new batch ``B`` (``m`` samples, mean ``b``) by one small SVD of

    [ diag(s) V^T                            ]   (k rows)
    [ B − 1 b^T                              ]   (m rows)
    [ sqrt(n m / (n + m)) · (b − μ)^T        ]   (1 row: the shift of the mean)

whose leading ``k`` right singular vectors and values are the new ``V`` and ``s``; the
mean and the per-feature sums of squares are merged exactly (Chan, Golub & LeVeque 1983).
This is also the update of scikit-learn's ``IncrementalPCA``.

Accuracy: the update is exact (up to rounding) while the centred data seen so far have
rank at most ``k``; beyond that, each step discards the directions after the ``k``-th, and
the axes drift from those of a fit on all the data by an amount that depends on the gap
after ``σ_k`` (measured in ``tests/test_estimator_features.py``).

Memory: the ``(k + m + 1) × p`` stacked matrix and its SVD; nothing else grows with the
number of samples.

References
----------
.. [1] D. A. Ross, J. Lim, R.-S. Lin and M.-H. Yang, "Incremental learning for robust
   visual tracking", International Journal of Computer Vision 77, 125–141, 2008.
   https://doi.org/10.1007/s11263-007-0075-7
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

__all__ = ["IncrementalAxes"]


@dataclass
class IncrementalAxes:
    """The running state: samples seen, mean, sums of squares about it and the leading axes.

    Attributes
    ----------
    n_samples : int
    mean : ndarray, shape (p,)
    sum_squares : ndarray, shape (p,)
        Per-feature sum of squared deviations from ``mean`` (float64).
    singular_values : ndarray, shape (r,)
        ``r ≤ k``: fewer while the data seen have lower rank.
    components : ndarray, shape (p, r)
    """

    n_samples: int
    mean: np.ndarray
    sum_squares: np.ndarray
    singular_values: np.ndarray
    components: np.ndarray

    @classmethod
    def empty(cls, n_features: int) -> "IncrementalAxes":
        return cls(0, np.zeros(n_features), np.zeros(n_features), np.zeros(0), np.zeros((n_features, 0)))

    def update(self, batch: np.ndarray, n_components: int, *, center: bool = True) -> None:
        """Fold ``batch`` (m × p, float64) into the state, keeping at most ``n_components`` axes."""
        m = batch.shape[0]
        n = self.n_samples
        b = batch.mean(axis=0) if center else np.zeros(batch.shape[1])
        deviations = batch - b
        rows = [self.singular_values[:, None] * self.components.T, deviations]
        if center and n > 0:
            rows.append(np.sqrt(n * m / (n + m)) * (b - self.mean)[None, :])
        _, s, vt = scipy.linalg.svd(np.vstack(rows), full_matrices=False, lapack_driver="gesdd")
        # directions of a singular value at rounding level carry nothing: keep the others
        eps = np.finfo(np.float64).eps
        positive = int(np.sum(s > (s[0] if s.size else 0.0) * max(vt.shape) * eps))
        r = min(n_components, positive)
        components = vt[:r].T.copy()
        _orient(components)
        delta = b - self.mean
        self.sum_squares = self.sum_squares + np.sum(deviations**2, axis=0) + delta**2 * (n * m / (n + m))
        self.mean = self.mean + delta * (m / (n + m)) if center else self.mean
        self.n_samples = n + m
        self.singular_values = s[:r].copy()
        self.components = components


def _orient(components: np.ndarray) -> None:
    """Axiscope's sign convention: each axis's largest-magnitude loading is positive."""
    if components.shape[1] == 0:
        return
    idx = np.argmax(np.abs(components), axis=0)
    signs = np.sign(components[idx, np.arange(components.shape[1])])
    signs[signs == 0] = 1.0
    components *= signs
