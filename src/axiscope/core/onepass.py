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

Working precision and cost of a dense block (:func:`_dense_task`): the block is shifted in
place, in its own dtype, by ``c_b``, the mean of a few of its rows; both products (``Ψ_b``'s
columns with a row of ones, which gives the column sums, and ``Ω``) are taken in the block's
dtype (float32 for float32 input: the method's own error is orders above float32 rounding),
the squares summed a few hundred rows at a time in that dtype; everything is added over
blocks in float64, each block's shift moved to the common centre in float64
(:class:`_ShiftedSums`). So a block costs one subtraction in place, two products and one sum
of squares, and no float64 copy. The manifest's one-pass entry states these dtypes
(:attr:`OnePassResult.working_precision`).

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
from .preprocess import BlockStats, first_nonfinite
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
    #: the dtype of the blocks' products, and of their sums over blocks (manifest record)
    working_precision: dict | None = None


#: Rows, evenly spaced through a dense block, whose mean is the block's shift ``c``.
SHIFT_ROWS = 32
#: Rows per partial sum of squares accumulated in the block's dtype (then added in float64).
SQUARE_ROWS = 256


def _task(block, rows, width, omega, in_place=False):
    """Statistics of a block, and its products about a shift ``c_b`` near the block's mean.

    ``rows`` holds this block's columns of ``Ψ`` (the first ``width`` columns) followed by its
    rows of the centred covariates ``C̄`` (none without an adjustment). Returns
    ``(stats, left, cross, right, bad, c_b)``: ``left = Ψ_b·(X_b − 1·c_bᵀ)`` (``width × p``),
    ``cross = X_bᵀ·C̄_b`` (:func:`axiscope.core.adjust.block_cross`; None without covariates),
    ``right = (X_b − 1·c_bᵀ)·Ω`` and the shift ``c_b`` (float64), which the fold uses to move
    both products to the final centre (:class:`_ShiftedSums`). A dense block is worked on in
    its own dtype (:func:`_dense_task`); a sparse block is never densified
    (:func:`_sparse_task`).
    """
    if is_sparse(block):
        return _sparse_task(block, rows, width, omega)
    return _dense_task(block, rows, width, omega, in_place)


def _dense_task(block, rows, width, omega, in_place=False):
    """:func:`_task` on a dense block: one copy at most, two products, one sum of squares.

    The block is shifted in its own dtype (in place when ``in_place``) by ``c``, the mean of
    :data:`SHIFT_ROWS` rows spread through it (:func:`_shift`): the difference of two numbers
    of the column, so no precision is lost that the values had. Both products are taken in
    the block's dtype; the left one is ``[Ψ_bᵀ, 1, C̄_b]ᵀ·(X_b − 1cᵀ)``, whose row of ones gives
    the column sums ``Σ(x − c)`` with it. The statistics follow (Chan, Golub & LeVeque's
    shifted sums): ``mean = c + Σ(x − c)/m``, ``M2 = Σ(x − c)² − (Σ(x − c))²/m``, with
    ``Σ(x − c)²`` summed :data:`SQUARE_ROWS` rows at a time in the block's dtype and those
    partial sums in float64.
    """
    if block.dtype not in (np.float32, np.float64):
        block, in_place = block.astype(np.result_type(block.dtype, np.float32)), True
    m = block.shape[0]
    c = _shift(block)
    centred = np.subtract(block, c, out=block) if in_place else block - c
    del block
    dtype = centred.dtype
    lhs = np.empty((m, rows.shape[1] + 1), dtype=dtype)
    lhs[:, :width] = rows[:, :width]
    lhs[:, width] = 1.0
    lhs[:, width + 1:] = rows[:, width:]
    both = lhs.T @ centred  # (width + 1 + covariates) × p, in the block's dtype
    csum = both[width].astype(np.float64)
    squares = _sum_squares(centred)
    if not (np.isfinite(csum).all() and np.isfinite(squares).all()):
        bad = first_nonfinite(centred)  # x − c is finite exactly where x is (c is finite)
        if bad is not None:
            return None, None, None, None, bad, None
        # finite values whose sums passed the dtype's largest number: again in float64
        return _dense_task(centred.astype(np.float64) + c, rows, width, omega, True)
    c64 = c.astype(np.float64)
    m2 = np.maximum(squares - csum**2 / m, 0.0)
    eps = float(np.finfo(dtype).eps)
    stats = BlockStats(m, np.full(centred.shape[1], float(m)), c64 + csum / m, m2, 0, eps)
    cross = None
    if rows.shape[1] > width:  # the shift comes back in float64: X_bᵀC̄_b = (X_b − 1cᵀ)ᵀC̄_b + c·(1ᵀC̄_b)
        cross = both[width + 1:].T.astype(np.float64) + np.outer(c64, rows[:, width:].sum(axis=0))
    right = centred @ omega.astype(dtype, copy=False)  # m × t, in the block's dtype
    return stats, both[:width], cross, right, None, c64


def _shift(block: np.ndarray) -> np.ndarray:
    """Mean of :data:`SHIFT_ROWS` rows evenly spread through the block, in its dtype (0 where
    not finite, so that a NaN or an infinite value stays in its own cell)."""
    step = max(1, block.shape[0] // SHIFT_ROWS)
    some = block[::step][:SHIFT_ROWS]
    with np.errstate(invalid="ignore", over="ignore"):
        c = np.add.reduce(some, axis=0, dtype=np.float64) / some.shape[0]
    c[~np.isfinite(c)] = 0.0
    return c.astype(block.dtype)


def _sum_squares(centred: np.ndarray) -> np.ndarray:
    """``Σ_i x_ij²`` per column: :data:`SQUARE_ROWS` rows at a time in the block's dtype, the
    partial sums added in float64 (no float64 copy of the block)."""
    total = np.zeros(centred.shape[1])
    for a in range(0, centred.shape[0], SQUARE_ROWS):
        part = centred[a : a + SQUARE_ROWS]
        total += np.einsum("ij,ij->j", part, part)
    return total


def _sparse_task(block, rows, width, omega):
    """:func:`_task` on a sparse block: products over the stored values about the block's
    mean ``m`` (the shift), taken out as a rank-one correction in float64
    (``Ψ_b(X_b − 1mᵀ) = (X_bᵀΨ_bᵀ)ᵀ − (Ψ_b1)·mᵀ``, ``(X_b − 1mᵀ)Ω = X_bΩ − 1·(mᵀΩ)``), never a
    dense copy of the block."""
    block = as_columns(block)
    bad = first_nonfinite_sparse(block)
    if bad is not None:
        return None, None, None, None, bad, None
    stats = sparse_block_statistics(block)
    both = sparse_transposed_product(block, rows)  # X_bᵀ·[Ψ_bᵀ, C̄_b]
    left = both[:, :width].T - np.outer(rows[:, :width].sum(axis=0), stats.mean)
    cross = both[:, width:] if rows.shape[1] > width else None
    zero = np.zeros_like(stats.mean)
    right = sparse_products(block, omega, 0.0, stats.mean, zero, zero, None, 0, False)[0]
    return stats, left, cross, right, None, stats.mean


def _merge(a, b):
    """Two runs of blocks' ``(stats, left, cross)`` as one: the statistics merged, the left
    products (each about its blocks' own shifts, in the blocks' dtype) and the covariates'
    ``XᵀC̄`` summed in float64; None after a block with a non-finite value (named when folded)."""
    stats_a, left_a, cross_a = a
    stats_b, left_b, cross_b = b
    if stats_a is None or stats_b is None:
        return None, None, None
    cross = None if cross_a is None or cross_b is None else cross_a + cross_b
    return stats_a.merge(stats_b), np.add(left_a, left_b, dtype=np.float64), cross


def _split(result):
    """On a cluster: ``right``, the bad cell and the shift come back per block; the
    statistics and ``left`` are merged on the workers (:func:`_merge`)."""
    stats, left, cross, right, bad, shift = result
    return (None, None, None, right, bad, shift), (stats, left, cross)


def _join(piece, total):
    stats, left, cross = total
    return stats, left, cross, piece[3], piece[4], piece[5]


#: How a cluster sums the one-pass results (:class:`axiscope.core.backends.Reduction`).
ONE_PASS_SUM = Reduction(_merge, split=_split, join=_join)

#: Blocks whose shift corrections are applied together (one small product instead of one
#: rank-one update of the ``(s + q) × p`` sum per block).
SHIFTS_AT_ONCE = 8


class _ShiftedSums:
    """The blocks' results folded in block order: both sketches about the first block's shift.

    Block ``b`` brings ``L_b = Ψ_b·(X_b − 1c_bᵀ)`` and ``R_b = (X_b − 1c_bᵀ)·Ω`` about its own
    shift ``c_b``. About the first block's shift ``r``:
    ``Ψ·(X − 1rᵀ) = Σ_b L_b + Σ_b (Ψ_b1)·(c_b − r)ᵀ`` and ``(X_b − 1rᵀ)·Ω = R_b + 1·(c_b − r)ᵀΩ``;
    the shifts differ by about a standard deviation, so nothing cancels. The corrections of
    :data:`SHIFTS_AT_ONCE` blocks are applied as one product. ``L_b`` is summed in float64.
    """

    def __init__(self, psi: np.ndarray, omega: np.ndarray, Y: np.ndarray, on_missing):
        self.psi, self.omega, self.Y, self.on_missing = psi, omega, Y, on_missing
        self.ref = None
        self.stats = self.left = self.cross = None
        self.product_dtype = None  # of the blocks' products (sparse blocks: float64)
        self.correction = np.zeros((psi.shape[0], omega.shape[0]))
        self.waiting: list[tuple[int, int, np.ndarray]] = []

    def fold(self, result, index, start) -> None:
        stats, left, cross, right, bad, shift = result
        if bad is not None:
            if self.on_missing is not None:
                self.on_missing(start + bad[0], bad[1])
            raise ValueError(f"non-finite value at row {start + bad[0]}, column {bad[1]}")
        m = right.shape[0]
        self.Y[start : start + m] = right
        self.product_dtype = np.promote_types(self.product_dtype or right.dtype, right.dtype)
        if self.ref is None:
            self.ref = shift.copy()
        self.waiting.append((start, m, shift - self.ref))
        if len(self.waiting) >= SHIFTS_AT_ONCE:
            self._apply_shifts()
        if stats is not None:  # on a cluster, only the last block brings the merged total
            if self.stats is None:
                self.stats, self.left, self.cross = stats, left.astype(np.float64), cross
            else:
                self.stats = self.stats.merge(stats)
                np.add(self.left, left, out=self.left)
                self.cross = None if cross is None else self.cross + cross

    def _apply_shifts(self) -> None:
        if not self.waiting:
            return
        D = np.array([d for _, _, d in self.waiting])  # blocks × p
        G = np.array([self.psi[:, start : start + m].sum(axis=1) for start, m, _ in self.waiting])
        self.correction += G.T @ D
        for (start, m, _), row in zip(self.waiting, D @ self.omega):
            self.Y[start : start + m] += row
        self.waiting = []

    def about(self, mean: np.ndarray) -> np.ndarray:
        """``Ψ·(X − 1μᵀ)``, and ``Y`` moved to ``(X − 1μᵀ)·Ω`` in place, for the centre ``μ``."""
        self._apply_shifts()
        move = mean - self.ref
        self.Y -= move @ self.omega
        left = self.left + self.correction
        left -= np.outer(self.psi.sum(axis=1), move)
        return left


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
    sums = _ShiftedSums(psi, omega_used, Y, on_missing)
    name = "one pass: statistics + " + ("covariates + " if adjust is not None else "") + "sketches"
    in_place = bool(fresh_blocks) and runner.backend is None  # (a cluster may run a block's task twice)
    runner.run(name, source, X, _task, sums.fold, s + q, omega_used.astype(work), in_place, rows=rows,
               reduce=ONE_PASS_SUM)
    stats, cross = sums.stats, sums.cross
    if cross is not None:
        adjust.add_cross(cross)
    mean, d = finish(stats)
    mean = np.asarray(mean, dtype=np.float64)
    d = np.asarray(d, dtype=np.float64)

    # centre about μ (both sketches, from about the first block's shift), then scale
    left = sums.about(mean)  # Ψ·X̃ before the scale; Y = X̃·Ω̃ from here on
    left *= d
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
    B = _right_solve(Y, core)  # n × s
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
    within = np.dtype(sums.product_dtype).name  # (sparse blocks: float64 throughout)
    precision = {"block_products": within, "column_sums_within_a_block": within,
                 "squares_within_a_block": within if within == "float64" else f"{within}, {SQUARE_ROWS} rows at a time",
                 "sums_over_blocks": "float64"}
    return OnePassResult(fac, stats, float(rel), (s, t, q), residualizer=residualizer, working_precision=precision)


def _right_solve(Y: np.ndarray, core: np.ndarray) -> np.ndarray:
    """``B = Y·core⁺`` (``n × s``), the least-squares solution of ``B·core ≈ Y`` of least norm.

    Through the SVD of the small ``core = U·Σ·Vᵀ`` (``s × t``): ``B = ((Y·V)·Σ⁻¹)·Uᵀ``,
    singular values below ``eps·σ₁`` treated as zero (the default cut of
    :func:`scipy.linalg.lstsq`, whose LAPACK ``gelsd`` gives the same ``B`` but carries the
    ``n`` right-hand sides through its bidiagonal reduction: measured 0.5 s against 0.02 s of
    CPU for ``n = 40,000``, ``t = 83``, one thread).
    """
    U, sv, Vt = scipy.linalg.svd(core, full_matrices=False, check_finite=False)
    keep = sv > sv[0] * np.finfo(np.float64).eps if sv.size else sv > 0
    return ((Y @ Vt[keep].T) / sv[keep]) @ U[:, keep].T


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
