"""Sparse × dense products of one block, in the block's own dtype, accumulated in float64.

A block of the fit is a compressed-column (CSC) matrix: ``rows × features``, stored values
in the file's dtype (float32 values stay float32: 8 bytes per stored value with int32
indices, instead of 12 as float64), grouped by feature. The products the engine needs are

* ``X_b·W`` (rows × l): for each feature ``j`` its row ``W[j]`` is read once, in order, and
  added into the rows of the small ``rows × l`` output that hold a stored value;
* ``X_bᵀ·Y`` (features × l): each feature's row of the result is one sum over its stored
  values, gathered from the small ``rows × l`` input, written in order.

Both walk the large ``features × l`` arrays in order and scatter or gather only in the
small ``rows × l`` one, which stays in cache (measured 2–4× faster than the same products
on the block by rows).

Two implementations give the same sums to rounding:

* ``"numba"`` (when numba is installed, the ``fast`` extra): compiled loops that read each
  stored value in its own dtype and accumulate in float64, release the GIL (the blocks of
  a pass run at once on the pass's threads) and are compiled once per dtype combination and
  cached on disk (``cache=True``; the first call of a new installation compiles, about 1–3 s
  in all, measured in ``scripts/bench_sparse.py``);
* ``"scipy"``: SciPy's own CSC kernels on a float64 copy of the values made per product.

Each block's sums run in one fixed order (features in order, stored values in order
within a feature), one thread per block, so the result of a block does not depend on the
number of threads, and the engine folds blocks in block order: a fit is byte-identical
whatever ``threads`` is. Set the environment variable ``AXISCOPE_SPARSE_KERNEL=scipy`` to
use SciPy's kernels even where numba is installed.
"""

from __future__ import annotations

import importlib.util
import os
import threading
from typing import Any

import numpy as np

__all__ = ["kernel_name", "prepare", "times_dense", "transposed_times", "centred_row_sq_norms", "column_statistics",
           "NUMBA_AVAILABLE"]


#: Whether numba is installed (the ``fast`` extra); it is imported on the first product only.
NUMBA_AVAILABLE = importlib.util.find_spec("numba") is not None


def kernel_name() -> str:
    """``"numba"`` or ``"scipy"``: which implementation the products use now."""
    chosen = os.environ.get("AXISCOPE_SPARSE_KERNEL", "").strip().lower()
    if chosen == "scipy" or not NUMBA_AVAILABLE:
        return "scipy"
    return "numba"


# ------------------------------------------------------------------------- compiled loops


def _jit(function):
    """Compiled without the GIL and cached on disk; uncached where no cache folder is writable."""
    import numba

    try:
        return numba.njit(nogil=True, cache=True, boundscheck=False)(function)
    except RuntimeError:  # pragma: no cover - no cache locator for this file
        return numba.njit(nogil=True, boundscheck=False)(function)


def _csc_times(indptr, indices, data, W, Y):  # pragma: no cover - compiled
    """``Y += X·W`` for ``X`` in CSC (``Y`` rows × l, float64)."""
    p = indptr.shape[0] - 1
    l = W.shape[1]
    for j in range(p):
        a = indptr[j]
        b = indptr[j + 1]
        if a == b:
            continue
        w = W[j]
        for t in range(a, b):
            x = np.float64(data[t])
            y = Y[indices[t]]
            for q in range(l):
                y[q] += x * w[q]


def _csc_transposed_times(indptr, indices, data, Y, G):  # pragma: no cover - compiled
    """``G = Xᵀ·Y`` for ``X`` in CSC (``G`` features × l, float64; each row one sum in order)."""
    p = indptr.shape[0] - 1
    l = Y.shape[1]
    for j in range(p):
        g = G[j]
        for q in range(l):
            g[q] = 0.0
        for t in range(indptr[j], indptr[j + 1]):
            x = np.float64(data[t])
            y = Y[indices[t]]
            for q in range(l):
                g[q] += x * y[q]


def _csc_row_terms(indptr, indices, data, dd, mu, out):  # pragma: no cover - compiled
    """``out[i] += Σ_{j stored} dd_j·x_ij·(x_ij − 2μ_j)`` (float64)."""
    p = indptr.shape[0] - 1
    for j in range(p):
        a = indptr[j]
        b = indptr[j + 1]
        if a == b or dd[j] == 0.0:
            continue
        two_mu = 2.0 * mu[j]
        for t in range(a, b):
            x = np.float64(data[t])
            out[indices[t]] += dd[j] * x * (x - two_mu)


def _csc_column_statistics(indptr, data, rows, mean, m2):  # pragma: no cover - compiled
    """Mean and sum of squared deviations of each column over ``rows`` rows, zeros included."""
    p = indptr.shape[0] - 1
    for j in range(p):
        a = indptr[j]
        b = indptr[j + 1]
        s = 0.0
        for t in range(a, b):
            s += np.float64(data[t])
        m = s / rows
        ss = 0.0
        for t in range(a, b):
            e = np.float64(data[t]) - m
            ss += e * e
        mean[j] = m
        m2[j] = ss + (rows - (b - a)) * m * m


def _compiled(name: str):
    """The numba version of one loop above (numba is imported on the first call)."""
    with _COMPILE_LOCK:
        if name not in _COMPILED:
            _COMPILED[name] = _jit(_LOOPS[name])
        return _COMPILED[name]


_COMPILE_LOCK = threading.Lock()
_COMPILED: dict[str, Any] = {}

_LOOPS = {f.__name__: f for f in (_csc_times, _csc_transposed_times, _csc_row_terms, _csc_column_statistics)}


def prepare() -> None:
    """Import numba and load (or compile) the loops now, when they will be used.

    The memory plan measures the process before the passes: numba and LLVM take about
    100 MB of resident memory once loaded, which the plan must see (measured with
    ``scripts/bench_sparse.py``).
    """
    if kernel_name() == "numba":
        import scipy.sparse as sp

        for dtype in (np.float32, np.float64):  # the values as stored, or transformed
            block = sp.csc_matrix(np.ones((2, 2), dtype=dtype))
            column_statistics(block)
            centred_row_sq_norms(block, np.ones(2), np.zeros(2))
            transposed_times(block, times_dense(block, np.ones((2, 1))))


# ------------------------------------------------------------------------------ dispatch


def _arrays(block) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The block's arrays in the only types the loops are compiled for: int64 offsets, int32
    row numbers (rows of one block), float32 or float64 values. Any other combination would
    compile a new version during a pass, whose memory the plan did not see."""
    if block.format != "csc":
        raise TypeError(f"expected a CSC block, got {block.format}")
    data = block.data if block.data.dtype in (np.float32, np.float64) else block.data.astype(np.float64)
    return block.indptr.astype(np.int64, copy=False), block.indices.astype(np.int32, copy=False), data


def _float64(block):
    return block if block.dtype == np.float64 else block.astype(np.float64)


def times_dense(block, W: np.ndarray) -> np.ndarray:
    """``X_b·W`` (rows × l, float64) of a CSC block of any float dtype; ``W`` float64."""
    W = np.ascontiguousarray(W, dtype=np.float64)
    if kernel_name() == "scipy":
        return np.asarray(_float64(block) @ W)
    Y = np.zeros((block.shape[0], W.shape[1]))
    _compiled("_csc_times")(*_arrays(block), W, Y)
    return Y


def transposed_times(block, Y: np.ndarray) -> np.ndarray:
    """``X_bᵀ·Y`` (features × l, float64, C order) of a CSC block; ``Y`` float64."""
    Y = np.ascontiguousarray(Y, dtype=np.float64)
    if kernel_name() == "scipy":
        return np.ascontiguousarray(_float64(block).T @ Y)
    G = np.empty((block.shape[1], Y.shape[1]))
    _compiled("_csc_transposed_times")(*_arrays(block), Y, G)
    return G


def centred_row_sq_norms(block, dd: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """``Σ_{j stored} dd_j·x_ij·(x_ij − 2μ_j)`` for each row ``i`` of a CSC block (float64).

    Adding ``Σ_j dd_j μ_j²`` gives ``‖(x_i − μ)∘d‖²`` with ``dd = d²``.
    """
    dd = np.ascontiguousarray(dd, dtype=np.float64)
    mu = np.ascontiguousarray(mu, dtype=np.float64)
    if kernel_name() == "scipy":
        feature = np.repeat(np.arange(block.shape[1]), np.diff(block.indptr))
        x = block.data.astype(np.float64)
        terms = dd[feature] * x * (x - 2.0 * mu[feature])
        return np.bincount(block.indices, weights=terms, minlength=block.shape[0])
    out = np.zeros(block.shape[0])
    _compiled("_csc_row_terms")(*_arrays(block), dd, mu, out)
    return out


def column_statistics(block) -> tuple[np.ndarray, np.ndarray]:
    """Mean and sum of squared deviations of each column of a CSC block over its rows (float64).

    The squared deviations are summed over the stored values, and the zeros add
    ``(rows − stored)·mean²``: no cancellation.
    """
    m, p = block.shape
    if kernel_name() == "scipy":
        stored = np.diff(block.indptr)
        feature = np.repeat(np.arange(p), stored)
        x = block.data.astype(np.float64)
        mean = np.bincount(feature, weights=x, minlength=p) / m
        dev = x - mean[feature]
        m2 = np.bincount(feature, weights=dev * dev, minlength=p) + (m - stored) * mean**2
        return mean, m2
    mean = np.empty(p)
    m2 = np.empty(p)
    indptr, _, data = _arrays(block)
    _compiled("_csc_column_statistics")(indptr, data, float(m), mean, m2)
    return mean, m2
