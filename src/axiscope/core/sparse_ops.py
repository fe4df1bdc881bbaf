"""Sparse blocks: transforms, statistics and products over the stored values only.

A block of samples arrives from the reader as a :class:`scipy.sparse.csr_matrix` with the
file's float values (float32 stays float32; other dtypes become float64, and so does a
block that a per-sample transform rewrites); the per-sample transforms act on it, and the
fit then keeps it in the layout the products of :mod:`axiscope.core.sparse_kernels` read
(:func:`as_columns`: row tiles whose stored values are grouped by feature for the compiled
loops, 6 bytes per stored float32 value; the block's own CSC for SciPy's kernels, 8 bytes
with int32 indices), so a cached block is used as it is on every pass. ``X_b·W`` scatters into the small
``rows × l`` output and ``X_bᵀ·Y`` gathers from it, measured 2–4× faster than on the CSR
block; the conversion costs about one product and is made once when blocks are cached.
Every product accumulates in float64. Nothing here forms a dense copy of a block:
centring and scaling stay implicit, as a rank-one correction in float64,

    X̃_b·W  = X_b·(d∘W) − 1·(μᵀ(d∘W))
    X̃_bᵀ·Y = d ∘ (X_bᵀ·Y − μ·(1ᵀY))
    ‖x̃_i‖² = Σ_{j stored} d_j²·x_ij·(x_ij − 2μ_j) + Σ_j d_j²μ_j²

(the operator of :mod:`axiscope.core.engine` applies ``d`` around these). ``1ᵀY`` is zero
up to rounding when ``μ`` is the mean of the samples, so the second correction removes no
digits; the first loses what any implicit centring of sparse data loses, which float64
keeps below 1e-12 relative for counts.

Per-sample transforms keep zeros zero, so they act on the stored values only: counts per
``T`` multiplies each sample's values by ``T/total`` and ``log(1 + x)`` maps 0 to 0. Both
transforms :class:`~axiscope.core.preprocess.PreprocessSpec` offers keep zeros zero; missing
values cannot be marked in sparse storage (an absent entry is a zero), so ``missing='mean'``
is refused (:func:`check_sparse_spec`) and a stored NaN is an error.

Per-feature statistics take one pass over the stored values: a block's mean is its column
sum over its rows, and its sum of squared deviations ``Σ_stored (x − m)² + (rows − stored)·m²``
(no cancellation), merged across blocks like dense blocks (Chan, Golub & LeVeque 1983).
"""

from __future__ import annotations

import threading
from typing import Any

import numpy as np

from ..errors import OptionError
from .preprocess import BlockStats, NotADosage, PreprocessSpec
from .sparse_kernels import (TiledBlock, block_products, centred_row_sq_norms, column_statistics, kernel_name, tiled,
                             transposed_times)

__all__ = ["as_columns", "is_sparse", "check_sparse_spec", "transform_sparse", "sparse_block_statistics", "sparse_block_sketch",
           "sparse_stats_task", "sparse_products", "SparseBlockCache", "BYTES_PER_STORED", "first_nonfinite_sparse"]

#: Bytes held per stored value of a block in flight: the CSR block and its CSC copy
#: (at most 8 + 4 each), a float64 copy of the values where a transform or SciPy's kernels
#: need one (8), and the float64 work arrays of the statistics (16), rounded up (common
#: practice, no source).
BYTES_PER_STORED = 64


def is_sparse(block: Any) -> bool:
    """Whether a block is a SciPy sparse matrix or array, or a tiled block of the compiled products."""
    return isinstance(block, TiledBlock) or type(block).__module__.startswith("scipy.sparse")


def check_sparse_spec(spec: PreprocessSpec) -> None:
    """Refuse the preprocessing options that have no meaning for sparse input."""
    if spec.missing == "mean":
        raise OptionError("missing='mean' does not apply to sparse input: an absent entry is a zero, not a "
                          "missing value, and stored NaN values are refused; leave missing out")


def transform_sparse(block, spec: PreprocessSpec):
    """Counts per ``T`` and ``log(1 + x)`` on the stored values of a CSR block (in place; zeros stay zero)."""
    if spec.scale == "allele-frequency":
        values = block.data
        bad = (values != 0) & (values != 1) & (values != 2) & ~np.isnan(values)
        if bad.any():
            at = int(np.flatnonzero(bad)[0])
            row = int(np.searchsorted(block.indptr, at, side="right")) - 1
            raise NotADosage(values[at], row, int(block.indices[at]), int(bad.sum()))
    if (spec.counts_per is not None or spec.log_transform) and block.dtype != np.float64:
        block = block.astype(np.float64)  # the transformed values in float64
    if spec.counts_per is not None:
        totals = np.asarray(block.sum(axis=1), dtype=np.float64).reshape(-1)
        factors = np.where(totals > 0, spec.counts_per / np.where(totals > 0, totals, 1), 0)
        block.data *= np.repeat(factors, np.diff(block.indptr))
    if spec.log_transform:
        with np.errstate(invalid="ignore", divide="ignore"):
            np.log1p(block.data, out=block.data)
    return block


def as_columns(block):
    """The block in the layout the statistics and products read: row tiles grouped by feature
    (:class:`~axiscope.core.sparse_kernels.TiledBlock`) for the compiled loops, compressed
    columns (CSC) for SciPy's kernels."""
    if kernel_name() == "numba":
        return tiled(block)
    if isinstance(block, TiledBlock):
        return block.tocsc()
    return block if block.format == "csc" else block.tocsc()


def first_nonfinite_sparse(block) -> tuple[int, int] | None:
    """Row and column of the first stored NaN or infinite value of a block (CSC), or None."""
    block = as_columns(block)
    bad = ~np.isfinite(block.data)
    if not bad.any():
        return None
    # the first in row order, as for dense blocks
    if isinstance(block, TiledBlock):
        rows, cols = block.coordinates(np.flatnonzero(bad))
    else:
        rows = block.indices[bad]
        cols = _feature_of_each(block)[bad]
    first = int(np.lexsort((cols, rows))[0])
    return int(rows[first]), int(cols[first])


def _feature_of_each(block) -> np.ndarray:
    """The feature (column) of each stored value of a CSC block."""
    return np.repeat(np.arange(block.shape[1]), np.diff(block.indptr))


def sparse_block_statistics(block) -> BlockStats:
    """Mean and sum of squared deviations of each feature over a block's rows (float64, CSC)."""
    block = as_columns(block)
    m, p = block.shape
    mean, m2 = column_statistics(block)
    return BlockStats(m, np.full(p, float(m)), mean, m2, 0, float(np.finfo(np.float64).eps))


def sparse_block_sketch(block, omega: np.ndarray, mean: np.ndarray | None) -> np.ndarray:
    """``(X_b − 1m_bᵀ)ᵀ(X_b − 1m_bᵀ)·Ω`` about the block's mean ``m_b``, or ``X_bᵀX_b·Ω`` (float64).

    ``t = X_b·Ω − 1·(m_bᵀΩ)`` is the centred block times ``Ω``; then
    ``(X_b − 1m_bᵀ)ᵀ·t = X_bᵀ·t − m_b·(1ᵀt)``.
    """
    block = as_columns(block)
    shift = np.zeros(omega.shape[1]) if mean is None else mean @ omega
    t, sketch = block_products(block, omega, shift, 0.0, omega.shape[1])
    if mean is None:
        return sketch
    return _minus_outer(sketch, mean, t.sum(axis=0))


def sparse_stats_task(block, omega: np.ndarray | None, centre: bool):
    """The statistics pass's work on one block: ``(stats, sketch or None, first bad cell or None)``."""
    block = as_columns(block)
    bad = first_nonfinite_sparse(block)
    if bad is not None:
        return None, None, bad
    stats = sparse_block_statistics(block)
    sketch = None if omega is None else sparse_block_sketch(block, omega, stats.mean if centre else None)
    return stats, sketch, None


def sparse_products(block, W, offset, centre, residual, d, fill, gram_width, want_norms):
    """``Y_b = X̃_b·W'``, ``(X_b − 1μᵀ)ᵀ·Y_b`` (before ``d``) and ``‖x̃_i‖²`` of one block (CSC).

    Same contract as the dense block products of :mod:`axiscope.core.engine` (``W`` is
    ``d∘W``; ``centre + residual`` is ``μ``; ``offset = residualᵀ·W``), all accumulated in
    float64 over the stored values (:mod:`axiscope.core.sparse_kernels`); ``fill`` is unused
    (sparse input has no missing values).
    """
    block = as_columns(block)
    W = np.asarray(W, dtype=np.float64)
    y, gram = block_products(block, W, centre @ W, offset, gram_width)
    if gram_width:
        gram = _minus_outer(gram, centre, y[:, :gram_width].sum(axis=0))
    norms = None
    if want_norms:
        mu = centre + residual
        dd = d * d
        norms = centred_row_sq_norms(block, dd, mu)
        norms += float(dd @ (mu * mu))
    return y, gram, norms


def sparse_transposed_product(block, R: np.ndarray) -> np.ndarray:
    """``X_bᵀ·R`` (``p × r``, float64) for a block's own dense rows ``R`` (``rows × r``), e.g. a
    one-pass fit's test matrix and covariates (:mod:`axiscope.core.onepass`)."""
    return transposed_times(as_columns(block), np.asarray(R, dtype=np.float64))


def _minus_outer(gram: np.ndarray, u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """``gram − u·vᵀ`` in place (BLAS ``dger`` on the C-ordered ``p × l`` array; 3× faster than
    forming the outer product, measured for 30,000 × 20)."""
    from scipy.linalg.blas import dger

    gram = np.ascontiguousarray(gram, dtype=np.float64)
    return dger(-1.0, np.ascontiguousarray(v, dtype=np.float64), np.ascontiguousarray(u, dtype=np.float64),
                a=gram.T, overwrite_a=True).T


class SparseBlockCache:
    """Transformed sparse blocks kept in memory, keyed by their first row (same use as :class:`BlockCache`)."""

    mode = "memory"

    def __init__(self) -> None:
        self._blocks: dict[int, Any] = {}
        self._lock = threading.Lock()

    def put(self, start: int, block) -> None:
        with self._lock:
            self._blocks[start] = block

    def get(self, start: int, stop: int):
        return self._blocks[start]

    @property
    def nbytes(self) -> int:
        return sum(b.data.nbytes + b.indices.nbytes + b.indptr.nbytes for b in self._blocks.values())

    def close(self) -> None:
        self._blocks.clear()
