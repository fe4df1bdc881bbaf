"""One-pass factorisation: statistics and two random sketches in a single read.

For storage that can be read only once, or is billed per read. The matrix is read once;
the feature statistics (hence the centre ``μ`` and inverse scale ``d``) are only known at
the end of that read, so both sketches are taken of the raw blocks and centred and scaled
afterwards:

* the **sample-side sketch** ``Ψ·X̃`` (``(s + q) × p``, ``Ψ`` Gaussian over the samples) is
  exact once the pass ends, because centring and scaling act on it from the right:
  ``Ψ·X̃ = (Ψ·X − (Ψ·1)·μᵀ)·diag(d)``. Its first ``s`` rows span the row space that the
  loadings live in; the last ``q`` rows (``Θ``) are kept apart to estimate the error;
* the **feature-side sketch** ``(X − 1·μᵀ)·Ω`` (``n × t``) is ``X̃·Ω̃`` with the test matrix
  ``Ω̃ = diag(1/d)·Ω``: the scale is not known while the blocks go by, so it ends up in the
  test matrix (rows of features left out — supplementary ones — are set to zero before the
  pass, so they add nothing).

The approximation is that of Tropp, Yurtsever, Udell & Cevher (2017, "Practical sketching
algorithms for low-rank matrix approximation", SIAM J. Matrix Anal. Appl. 38(4),
doi:10.1137/17M1111590), written for the transposed matrix: with ``Q`` an orthonormal basis
of ``(Ψ·X̃)ᵀ`` (``p × s``), ``X̃ ≈ B·Qᵀ`` where ``B = (X̃·Ω̃)·(Qᵀ·Ω̃)⁺`` solves a small least
squares problem; the SVD of ``B`` gives scores and (through ``Q``) loadings. Sketch sizes
follow their recommendation ``t = 2s + 1`` for the second sketch; ``s`` is
``max(2k + 1, k + oversample)`` for ``k`` axes.

Error: the ``q`` extra rows ``Θ·X̃`` estimate ``‖X̃ − X̃ₖ‖_F² ≈ ‖Θ·(X̃ − X̃ₖ)‖_F² / q`` for the
rank-``k`` result ``X̃ₖ`` (unbiased for Gaussian ``Θ``; Tropp et al. 2019, "Streaming
low-rank matrix approximation with an application to scientific simulation", SIAM J. Sci.
Comput. 41(4), §6). It bounds each singular value's error (Weyl) and, divided by the gap to
the neighbouring values, the angle of each loading vector (Wedin).

What one pass cannot give exactly: a sample's squared distance to the centre,
``‖x̃_i‖² = Σ_j d_j²(x_ij − μ_j)²``, is an inner product with vectors known only at the end.
It is estimated as the squared norm of the sample's score in the ``s``-dimensional sketch
plus its residual seen through ``Ω̃`` (rescaled so that the residuals add up to the exact
total, which the statistics give); :attr:`OnePassResult.distances_estimated` says so.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import dask.array as da
import numpy as np
import scipy.linalg

from .backends import Reduction
from .engine import Factorization, accuracy_from_error, orient_signs
from .passes import PassRunner
from .preprocess import BlockStats, block_statistics, first_nonfinite

__all__ = ["ERROR_ROWS", "OnePassResult", "one_pass_factorization", "sketch_widths"]

#: Rows of the separate sketch ``Θ·X̃`` that estimates the approximation error.
ERROR_ROWS = 20


def sketch_widths(k: int, oversample: int, n: int, p: int) -> tuple[int, int]:
    """Widths ``(s, t)`` of the sample-side and feature-side sketches for ``k`` axes."""
    s = min(max(2 * k + 1, k + oversample), n, p)
    t = min(2 * s + 1, p)
    return s, t


@dataclass
class OnePassResult:
    """A one-pass factorisation and the statistics read in the same pass."""

    factorization: Factorization
    statistics: BlockStats
    #: relative Frobenius error ``‖X̃ − X̃ₖ‖_F / ‖X̃‖_F``, estimated from ``Θ``
    relative_error: float
    #: sketch widths (sample side, feature side, error rows)
    widths: tuple[int, int, int]
    distances_estimated: bool = True


def _task(block, psi_rows, omega):
    """Statistics of a block, and its sketches about the block's own mean (float64).

    ``left = Ψ_b·(X_b − 1·m_bᵀ)``, ``right = (X_b − 1·m_bᵀ)·Ω``: the block is centred in its
    own dtype on ``m_b`` rounded to it, and the rounding ``e`` is taken out in float64.
    Returns ``(stats, left, right, bad, Ψ_b·1, m_b)`` (the last two to merge ``left`` over
    blocks and to move ``right`` to the final centre).
    """
    psi_b = psi_rows.T  # this block's columns of Ψ
    stats = block_statistics(block)
    psi_sum = psi_b.sum(axis=1)
    if stats.n_nonfinite:
        return stats, None, None, first_nonfinite(block), psi_sum, stats.mean
    c = stats.mean.astype(block.dtype)
    e = stats.mean - c.astype(np.float64)
    centred = block - c
    left = (psi_b.astype(block.dtype) @ centred).astype(np.float64)
    left -= np.outer(psi_b.astype(block.dtype).astype(np.float64).sum(axis=1), e)
    right = (centred @ omega.astype(block.dtype)).astype(np.float64)
    right -= e @ omega.astype(block.dtype).astype(np.float64)
    return stats, left, right, None, psi_sum, stats.mean


def _merge_left(a, b):
    """Two runs of blocks' ``(stats, left, Ψ·1)`` as one, ``left`` about the merged mean.

    With ``left_A = Ψ_A·(X_A − 1·m_Aᵀ)`` and the merged mean ``m``,
    ``Ψ_A·(X_A − 1·mᵀ) = left_A + (Ψ_A·1)·(m_A − m)ᵀ``; the shifts are differences of
    means, small next to the means themselves.
    """
    stats_a, left_a, sum_a = a
    stats_b, left_b, sum_b = b
    stats = stats_a.merge(stats_b)
    left = None
    if left_a is not None and left_b is not None:
        left = left_a + np.outer(sum_a, stats_a.mean - stats.mean)
        left += left_b
        left += np.outer(sum_b, stats_b.mean - stats.mean)
    return stats, left, sum_a + sum_b


def _split(result):
    """On a cluster: ``right``, the bad cell and the block mean come back per block; the
    statistics and ``left`` are merged on the workers (:func:`_merge_left`)."""
    stats, left, right, bad, psi_sum, mean = result
    return (None, None, right, bad, None, mean), (stats, left, psi_sum)


def _join(piece, total):
    _, _, right, bad, _, mean = piece
    stats, left, psi_sum = total
    return stats, left, right, bad, psi_sum, mean


#: How a cluster sums the one-pass results (:class:`axiscope.core.backends.Reduction`).
ONE_PASS_SUM = Reduction(_merge_left, split=_split, join=_join)


def one_pass_factorization(
    X: da.Array,
    *,
    n_components: int,
    oversample: int,
    rng: np.random.Generator,
    finish: Callable[[BlockStats], tuple[np.ndarray, np.ndarray]],
    omit: np.ndarray | None = None,
    on_missing: Callable[[int, int], None] | None = None,
    runner: PassRunner | None = None,
    source: str = "input",
) -> OnePassResult:
    """Statistics and the leading ``n_components`` singular triplets of ``X̃`` in one pass.

    Parameters
    ----------
    X : dask.array.Array, shape (n, p)
        Transformed values, chunked along rows.
    n_components, oversample : int
    rng : numpy.random.Generator
        Source of the test matrices ``Ψ``, ``Θ`` and ``Ω``.
    finish : callable
        ``finish(stats) -> (mean, inverse_scale)``: the centre and inverse scale of every
        column (``inverse_scale = 0`` drops a column) from the statistics of the pass.
    omit : ndarray of bool, shape (p,), optional
        Columns known before the pass to be left out; their rows of ``Ω`` are zero.
    on_missing : callable, optional
        Called with ``(row, column)`` of the first non-finite cell; it should raise.
    runner : PassRunner, optional

    Returns
    -------
    OnePassResult
    """
    runner = runner or PassRunner()
    n, p = X.shape
    k = n_components
    s, t = sketch_widths(k, oversample, n, p)
    q = ERROR_ROWS
    psi = rng.standard_normal((s + q, n))
    omega = rng.standard_normal((p, t))
    if omit is not None:
        omega[np.asarray(omit, dtype=bool)] = 0.0
    omega_used = omega.astype(np.result_type(X.dtype, np.float32)).astype(np.float64)

    Y = np.empty((n, t))
    acc: dict = {"merged": None, "ref": None}
    shifts: list[tuple[int, int, np.ndarray]] = []

    def fold(result, index, start):
        stats, left, right, bad, psi_sum, mean = result
        if bad is not None:
            if on_missing is not None:
                on_missing(start + bad[0], bad[1])
            raise ValueError(f"non-finite value at row {start + bad[0]}, column {bad[1]}")
        rows = right.shape[0]
        if acc["ref"] is None:
            acc["ref"] = mean.copy()
        Y[start : start + rows] = right
        shifts.append((start, rows, (mean - acc["ref"]) @ omega_used))  # small: against the first block's mean
        if stats is not None:  # on a cluster, only the last block brings the merged total
            merged = (stats, left, psi_sum)
            acc["merged"] = merged if acc["merged"] is None else _merge_left(acc["merged"], merged)

    runner.run("one pass: statistics + sketches", source, X, _task, fold, omega_used, rows=psi.T,
               reduce=ONE_PASS_SUM)
    stats, left_about, psi_sum = acc["merged"]
    mean, d = finish(stats)
    mean = np.asarray(mean, dtype=np.float64)
    d = np.asarray(d, dtype=np.float64)

    # centre about μ (from about the mean of the pass), then scale
    left = left_about - np.outer(psi_sum, mean - stats.mean)
    left *= d
    mu_omega = (mean - acc["ref"]) @ omega_used
    for start, rows, shift_omega in shifts:
        Y[start : start + rows] += shift_omega - mu_omega

    sketch, theta_a = left[:s], left[s:]
    Q, _ = scipy.linalg.qr(sketch.T, mode="economic", check_finite=False)  # p × s
    inv_d = np.divide(1.0, d, out=np.zeros_like(d), where=d > 0)
    omega_tilde = inv_d[:, None] * omega_used  # X̃·Ω̃ = (X − 1μᵀ)·Ω on the kept columns
    core = Q.T @ omega_tilde  # s × t
    B = scipy.linalg.lstsq(core.T, Y.T, check_finite=False)[0].T  # n × s
    U, sv, Vt = scipy.linalg.svd(B, full_matrices=False, check_finite=False)
    k_eff = min(k, sv.shape[0])
    components = Q @ Vt[:k_eff].T
    scores = U[:, :k_eff] * sv[:k_eff]

    # error of the rank-k result, seen through Θ
    theta = psi[s:]
    approx = (theta @ scores) @ components.T
    err2 = float(np.sum((theta_a - approx) ** 2)) / q
    total = float(np.sum(theta_a**2)) / q
    norms = _estimated_row_norms(B, Y, core, stats, d)
    orient_signs(components, scores)

    rel = np.sqrt(max(err2, 0.0) / total) if total > 0 else 0.0
    accuracy = accuracy_from_error(sv, k_eff, np.sqrt(max(err2, 0.0)), "sketch error estimate")
    fac = Factorization(
        singular_values=sv[:k_eff].copy(),
        components=components,
        scores=scores,
        row_sq_norms=norms,
        method="one-pass",
        power_iterations=0,
        converged=True,
        residual_bound=float(np.sqrt(max(err2, 0.0))),
        accuracy=accuracy,
    )
    return OnePassResult(fac, stats, float(rel), (s, t, q))


def _estimated_row_norms(B, Y, core, stats: BlockStats, d) -> np.ndarray:
    """Estimated ``‖x̃_i‖²``: the sketch's part exactly, the residual through ``Ω̃``.

    The residual part ``‖r_i‖²`` is estimated by ``‖Y_i − B_i·(QᵀΩ̃)‖²`` and rescaled so
    that the residuals of all samples add up to the exact total
    ``Σ_i ‖x̃_i‖² − ‖B‖_F²`` (the total from the statistics).
    """
    inside = np.einsum("ij,ij->i", B, B)
    seen = Y - B @ core
    outside = np.einsum("ij,ij->i", seen, seen)
    total = float(np.sum(stats.m2 * d**2))
    rest = max(total - float(inside.sum()), 0.0)
    if outside.sum() > 0:
        outside *= rest / float(outside.sum())
    else:
        outside[:] = rest / max(outside.shape[0], 1)
    return inside + outside
