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

Covariates (:mod:`axiscope.core.adjust`): the matrix factorised is then ``P·X̃`` with
``P = I − Q·Qᵀ`` (``C = Q·R``, the intercept and the encoded columns of the annotations). The
same pass accumulates ``(X − 1μᵀ)ᵀC`` (each block's ``X_bᵀC̄_b``, taken in the block's product
with ``Ψ``), so ``M = X̃ᵀQ`` is known at the end, and both sketches are corrected without a
pass: ``P·(X̃·Ω̃) = Y − Q·(QᵀY)`` and ``Ψ·P·X̃ = Ψ·X̃ − (Ψ·Q)·Mᵀ``; ``‖P·X̃‖²_F = ‖X̃‖²_F − ‖M‖²_F``.

Sparse blocks (:mod:`axiscope.core.sparse_ops`) are never densified: ``X_bᵀ·[Ψ_bᵀ, C̄_b]`` and
``X_b·Ω`` over the stored values, the block's mean taken out as a rank-one float64 correction.

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

from .adjust import Adjustment, Residualizer
from .backends import Reduction
from .engine import Factorization, accuracy_from_error, orient_signs
from .passes import PassRunner
from .preprocess import BlockStats, block_statistics, first_nonfinite
from .sparse_ops import (as_columns, first_nonfinite_sparse, is_sparse, sparse_block_statistics, sparse_products,
                         sparse_transposed_product)

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
    #: ``Q`` and ``M = X̃ᵀQ`` of an adjusted fit (None without covariates)
    residualizer: Residualizer | None = None


def _task(block, rows, width, omega, in_place=False):
    """Statistics of a block, and its products about the block's own mean (float64).

    ``rows`` holds this block's columns of ``Ψ`` (the first ``width`` columns) followed by its
    rows of the centred covariates ``C̄`` (none without an adjustment). Returns
    ``(stats, left, cross, right, bad, Ψ_b·1, m_b)`` (the last two to merge ``left`` over
    blocks and to move ``right`` to the final centre) with ``left = Ψ_b·(X_b − 1·m_bᵀ)`` (``width × p``),
    ``cross = X_bᵀ·C̄_b`` (:func:`axiscope.core.adjust.block_cross`; None without covariates)
    and ``right = (X_b − 1·m_bᵀ)·Ω``. Both left-hand products are one product with
    ``[Ψ_bᵀ, C̄_b]``. A dense block is centred in its own dtype on a shift ``c`` near ``m_b``
    (:func:`_shifted`; in place when ``in_place``), and ``e = m_b − c`` is taken out in
    float64; a sparse block is never densified (:func:`_sparse_task`).
    """
    if is_sparse(block):
        return _sparse_task(block, rows, width, omega)
    stats, centred, c = _shifted(block, in_place)
    psi_sum = rows[:, :width].astype(np.float64).sum(axis=0)
    if centred is None:
        return stats, None, None, None, first_nonfinite(block), psi_sum, stats.mean
    del block
    e = stats.mean - c.astype(np.float64)
    rows_b = rows.astype(centred.dtype)
    both = (rows_b.T @ centred).astype(np.float64)  # (width + covariates) × p
    left = both[:width]
    left -= np.outer(rows_b[:, :width].astype(np.float64).sum(axis=0), e)
    cross = None
    if rows.shape[1] > width:  # the shift comes back in float64: X_bᵀC̄_b = (X_b − 1cᵀ)ᵀC̄_b + c·(1ᵀC̄_b)
        cross = both[width:].T + np.outer(c.astype(np.float64), rows[:, width:].sum(axis=0))
    omega_b = omega.astype(centred.dtype)
    right = (centred @ omega_b).astype(np.float64)
    right -= e @ omega_b.astype(np.float64)
    return stats, left, cross, right, None, psi_sum, stats.mean


def _shifted(block: np.ndarray, in_place: bool = False) -> tuple[BlockStats, np.ndarray | None, np.ndarray | None]:
    """The block's statistics, the block minus a shift ``c`` near its column means (in its own
    dtype; the block itself, overwritten, when ``in_place``), and ``c``; ``(stats, None, None)``
    when the block holds a non-finite value.

    The statistics pass's :func:`axiscope.core.preprocess.block_statistics`, sharing its
    shifted copy with the products: ``c`` is the column means rounded to the block's dtype,
    ``mean = c + Σ(x − c)/m`` and ``M2 = Σ(x − c)² − (Σ(x − c))²/m``, all sums in float64
    (no cancellation, as ``c`` is the mean to rounding).
    """
    m = block.shape[0]
    total = np.add.reduce(block, axis=0, dtype=np.float64)
    if np.isfinite(total).all():
        c = (total / m).astype(block.dtype)
    else:  # a NaN or infinite value, or sums past the largest float
        stats = block_statistics(block)
        if stats.n_nonfinite:
            return stats, None, None
        c = stats.mean.astype(block.dtype)
    centred = np.subtract(block, c, out=block) if in_place else block - c
    csum = np.add.reduce(centred, axis=0, dtype=np.float64)
    m2 = np.einsum("ij,ij->j", centred, centred, dtype=np.float64) - csum**2 / m
    mean = c.astype(np.float64) + csum / m
    eps = float(np.finfo(block.dtype if block.dtype.kind == "f" else np.float64).eps)
    return BlockStats(m, np.full(block.shape[1], float(m)), mean, np.maximum(m2, 0.0), 0, eps), centred, c


def _sparse_task(block, rows, width, omega):
    """:func:`_task` on a sparse block: products over the stored values, the block mean as a
    rank-one correction in float64 (``Ψ_b(X_b − 1mᵀ) = (X_bᵀΨ_bᵀ)ᵀ − (Ψ_b1)·mᵀ``,
    ``(X_b − 1mᵀ)Ω = X_bΩ − 1·(mᵀΩ)``), never a dense copy of the block."""
    block = as_columns(block)
    bad = first_nonfinite_sparse(block)
    psi_sum = rows[:, :width].astype(np.float64).sum(axis=0)
    if bad is not None:
        return None, None, None, None, bad, psi_sum, None
    stats = sparse_block_statistics(block)
    both = sparse_transposed_product(block, rows)  # X_bᵀ·[Ψ_bᵀ, C̄_b]
    left = both[:, :width].T - np.outer(rows[:, :width].sum(axis=0), stats.mean)
    cross = both[:, width:] if rows.shape[1] > width else None
    zero = np.zeros_like(stats.mean)
    right = sparse_products(block, omega, 0.0, stats.mean, zero, zero, None, 0, False)[0]
    return stats, left, cross, right, None, psi_sum, stats.mean


def _merge_left(a, b):
    """Two runs of blocks' ``(stats, left, Ψ·1, cross)`` as one, ``left`` about the merged mean
    (``cross``, the covariates' ``XᵀC̄``, is a plain sum; None without covariates).

    With ``left_A = Ψ_A·(X_A − 1·m_Aᵀ)`` and the merged mean ``m``,
    ``Ψ_A·(X_A − 1·mᵀ) = left_A + (Ψ_A·1)·(m_A − m)ᵀ``; the shifts are differences of
    means, small next to the means themselves.
    """
    stats_a, left_a, sum_a, cross_a = a
    stats_b, left_b, sum_b, cross_b = b
    if stats_a is None or stats_b is None:  # a sparse block with a non-finite value, named when folded
        return None, None, sum_a + sum_b, None
    stats = stats_a.merge(stats_b)
    left = None
    if left_a is not None and left_b is not None:
        left = left_a + np.outer(sum_a, stats_a.mean - stats.mean)
        left += left_b
        left += np.outer(sum_b, stats_b.mean - stats.mean)
    cross = None if cross_a is None or cross_b is None else cross_a + cross_b
    return stats, left, sum_a + sum_b, cross


def _split(result):
    """On a cluster: ``right``, the bad cell and the block mean come back per block; the
    statistics and ``left`` are merged on the workers (:func:`_merge_left`)."""
    stats, left, cross, right, bad, psi_sum, mean = result
    return (None, None, None, right, bad, None, mean), (stats, left, psi_sum, cross)


def _join(piece, total):
    _, _, _, right, bad, _, mean = piece
    stats, left, psi_sum, cross = total
    return stats, left, cross, right, bad, psi_sum, mean


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
    adjust: Adjustment | None = None,
    fresh_blocks: bool = False,
) -> OnePassResult:
    """Statistics and the leading ``n_components`` singular triplets of ``X̃`` in one pass.

    Parameters
    ----------
    X : dask.array.Array, shape (n, p)
        Transformed values, chunked along rows (dense blocks, or SciPy sparse ones).
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
    adjust : Adjustment, optional
        Covariates to remove (:mod:`axiscope.core.adjust`): the result factorises
        ``P·X̃``, ``P = I − Q·Qᵀ``. The same pass accumulates ``(X − 1μᵀ)ᵀC`` into it;
        afterwards both sketches are those of ``P·X̃``: ``P·(X̃·Ω̃) = Y − Q·(QᵀY)`` and
        ``Ψ·P·X̃ = Ψ·X̃ − (Ψ·Q)·Mᵀ`` with ``M = X̃ᵀQ``
        (:meth:`axiscope.core.adjust.Adjustment.residualizer`).
    fresh_blocks : bool, default=False
        Every block of ``X`` is a fresh array that nothing else holds (as the fit's reader
        makes them): dense blocks are then centred in place, without a copy.

    Returns
    -------
    OnePassResult
        With ``adjust``, :attr:`OnePassResult.residualizer` holds ``Q`` and ``M`` for the model.
    """
    runner = runner or PassRunner()
    n, p = X.shape
    k = n_components
    s, t = sketch_widths(k, oversample, n, p)
    q = ERROR_ROWS
    work = np.result_type(X.dtype, np.float32)
    # test matrices rounded to the data's dtype: the float64 corrections use the very
    # numbers the block products used
    psi = rng.standard_normal((s + q, n)).astype(work).astype(np.float64)
    omega = rng.standard_normal((p, t))
    if omit is not None:
        omega[np.asarray(omit, dtype=bool)] = 0.0
    omega_used = omega.astype(work).astype(np.float64)
    rows = psi.T if adjust is None else np.hstack([psi.T, adjust.centred])

    Y = np.empty((n, t))
    acc: dict = {"merged": None, "ref": None}
    shifts: list[tuple[int, int, np.ndarray]] = []

    def fold(result, index, start):
        stats, left, cross, right, bad, psi_sum, mean = result
        if bad is not None:
            if on_missing is not None:
                on_missing(start + bad[0], bad[1])
            raise ValueError(f"non-finite value at row {start + bad[0]}, column {bad[1]}")
        m = right.shape[0]
        if acc["ref"] is None:
            acc["ref"] = mean.copy()
        Y[start : start + m] = right
        shifts.append((start, m, (mean - acc["ref"]) @ omega_used))  # small: against the first block's mean
        if stats is not None:  # on a cluster, only the last block brings the merged total
            merged = (stats, left, psi_sum, cross)
            acc["merged"] = merged if acc["merged"] is None else _merge_left(acc["merged"], merged)

    name = "one pass: statistics + " + ("covariates + " if adjust is not None else "") + "sketches"
    in_place = bool(fresh_blocks) and runner.backend is None  # (a cluster may run a block's task twice)
    runner.run(name, source, X, _task, fold, s + q, omega_used, in_place, rows=rows, reduce=ONE_PASS_SUM)
    stats, left_about, psi_sum, cross = acc["merged"]
    if cross is not None:
        adjust.add_cross(cross)
    mean, d = finish(stats)
    mean = np.asarray(mean, dtype=np.float64)
    d = np.asarray(d, dtype=np.float64)

    # centre about μ (from about the mean of the pass), then scale
    left = left_about - np.outer(psi_sum, mean - stats.mean)  # Ψ·X̃ before the scale
    left *= d
    mu_omega = (mean - acc["ref"]) @ omega_used
    for start, m, shift_omega in shifts:
        Y[start : start + m] += shift_omega - mu_omega
    total = float(np.sum(stats.m2 * d**2))  # ‖X̃‖²_F
    residualizer = None
    if adjust is not None:  # both sketches of P·X̃ (module notes of core/adjust.py)
        residualizer = adjust.residualizer(d, None)
        basis, M = residualizer.basis, residualizer.loadings
        left -= (psi @ basis) @ M.T
        Y -= basis @ (basis.T @ Y)
        total -= float(np.sum(M**2))

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
    seen = float(np.sum(theta_a**2)) / q
    norms = _estimated_row_norms(B, Y, core, total)
    orient_signs(components, scores)

    rel = np.sqrt(max(err2, 0.0) / seen) if seen > 0 else 0.0
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
    return OnePassResult(fac, stats, float(rel), (s, t, q), residualizer=residualizer)


def _estimated_row_norms(B, Y, core, total: float) -> np.ndarray:
    """Estimated ``‖x̃_i‖²``: the sketch's part exactly, the residual through ``Ω̃``.

    The residual part ``‖r_i‖²`` is estimated by ``‖Y_i − B_i·(QᵀΩ̃)‖²`` and rescaled so
    that the residuals of all samples add up to the exact total
    ``total − ‖B‖_F²``, ``total = Σ_i ‖x̃_i‖²`` from the statistics (minus what the
    covariates account for, when adjusted).
    """
    inside = np.einsum("ij,ij->i", B, B)
    seen = Y - B @ core
    outside = np.einsum("ij,ij->i", seen, seen)
    rest = max(total - float(inside.sum()), 0.0)
    if outside.sum() > 0:
        outside *= rest / float(outside.sum())
    else:
        outside[:] = rest / max(outside.shape[0], 1)
    return inside + outside
