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

With the compiled loops a fit's blocks are :class:`TiledBlock` objects: the block's rows in
tiles of :data:`TILE_ROWS`, each tile's stored values grouped by feature, so that both
products of a pass run tile by tile (:func:`block_products`) while the tile's rows of the
work array stay in a core's cache, whatever the block's height; row numbers within a tile
are uint16 (6 bytes per stored float32 value instead of 8). Every sum runs in the order of
the plain column loops, so the tiled and untiled results are equal bit for bit.

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
           "block_products", "tiled", "tile_rows_for", "TiledBlock", "TILE_ROWS", "NUMBA_AVAILABLE"]


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


def _tiles_from_csr(indptr, indices, data, tile_rows, ptr, rows_out, data_out):  # pragma: no cover - compiled
    """Fill a tiled block from a CSR block: for each tile of ``tile_rows`` rows, its stored
    values grouped by feature (a counting sort inside the tile), rows in order within a feature.
    ``ptr`` is ``tiles × (features + 1)``, global offsets into ``data_out``."""
    n = indptr.shape[0] - 1
    tiles = ptr.shape[0]
    p = ptr.shape[1] - 1
    fill = np.empty(p, dtype=np.int64)
    for T in range(tiles):
        r0 = T * tile_rows
        r1 = min(n, r0 + tile_rows)
        base = indptr[r0]
        for j in range(p + 1):
            ptr[T, j] = 0
        for s in range(indptr[r0], indptr[r1]):
            ptr[T, indices[s] + 1] += 1
        ptr[T, 0] = base
        for j in range(p):
            ptr[T, j + 1] += ptr[T, j]
        for j in range(p):
            fill[j] = ptr[T, j]
        for i in range(r0, r1):
            for s in range(indptr[i], indptr[i + 1]):
                j = indices[s]
                at = fill[j]
                fill[j] = at + 1
                data_out[at] = data[s]
                rows_out[at] = i - r0


def _tiled_products(ptr, rows, data, tile_rows, W, shift, offset, Y, G, gram_width):  # pragma: no cover - compiled
    """``Y = X·W − 1·shiftᵀ − 1·offsetᵀ`` and ``G += Xᵀ·Y[:, :gram_width]`` tile by tile.

    Within a tile the rows of ``Y`` it touches (``tile_rows × l``) stay in the core's cache
    between the two products; every sum runs in the order of the untiled block (features in
    order for ``Y``, rows in order for ``G``), so the results are those of the plain CSC loops.
    """
    tiles = ptr.shape[0]
    p = ptr.shape[1] - 1
    m = W.shape[1]
    n = Y.shape[0]
    for T in range(tiles):
        r0 = T * tile_rows
        r1 = min(n, r0 + tile_rows)
        for i in range(r0, r1):
            for q in range(m):
                Y[i, q] = 0.0
        for j in range(p):
            a = ptr[T, j]
            b = ptr[T, j + 1]
            if a == b:
                continue
            w = W[j]
            for t in range(a, b):
                x = np.float64(data[t])
                y = Y[r0 + rows[t]]
                for q in range(m):
                    y[q] += x * w[q]
        for i in range(r0, r1):
            y = Y[i]
            for q in range(m):
                y[q] -= shift[q]
            for q in range(m):
                y[q] -= offset[q]
        if gram_width == 0:
            continue
        for j in range(p):
            a = ptr[T, j]
            b = ptr[T, j + 1]
            g = G[j]
            for t in range(a, b):
                x = np.float64(data[t])
                y = Y[r0 + rows[t]]
                for q in range(gram_width):
                    g[q] += x * y[q]


def _tiled_transposed_times(ptr, rows, data, tile_rows, Y, G):  # pragma: no cover - compiled
    """``G += Xᵀ·Y`` (rows in order within each feature, tile after tile)."""
    tiles = ptr.shape[0]
    p = ptr.shape[1] - 1
    l = Y.shape[1]
    for T in range(tiles):
        r0 = T * tile_rows
        for j in range(p):
            g = G[j]
            for t in range(ptr[T, j], ptr[T, j + 1]):
                x = np.float64(data[t])
                y = Y[r0 + rows[t]]
                for q in range(l):
                    g[q] += x * y[q]


def _tiled_row_terms(ptr, rows, data, tile_rows, dd, mu, out):  # pragma: no cover - compiled
    """``out[i] += Σ_{j stored} dd_j·x_ij·(x_ij − 2μ_j)`` (float64; features in order per row)."""
    tiles = ptr.shape[0]
    p = ptr.shape[1] - 1
    for T in range(tiles):
        r0 = T * tile_rows
        for j in range(p):
            a = ptr[T, j]
            b = ptr[T, j + 1]
            if a == b or dd[j] == 0.0:
                continue
            two_mu = 2.0 * mu[j]
            for t in range(a, b):
                x = np.float64(data[t])
                out[r0 + rows[t]] += dd[j] * x * (x - two_mu)


def _tiled_column_statistics(ptr, data, n_rows, mean, m2):  # pragma: no cover - compiled
    """Mean and sum of squared deviations of each column (rows in order, zeros included)."""
    tiles = ptr.shape[0]
    p = ptr.shape[1] - 1
    for j in range(p):
        mean[j] = 0.0
        m2[j] = 0.0
    for T in range(tiles):
        for j in range(p):
            s = mean[j]
            for t in range(ptr[T, j], ptr[T, j + 1]):
                s += np.float64(data[t])
            mean[j] = s
    for j in range(p):
        mean[j] = mean[j] / n_rows
    for T in range(tiles):
        for j in range(p):
            m = mean[j]
            ss = m2[j]
            for t in range(ptr[T, j], ptr[T, j + 1]):
                e = np.float64(data[t]) - m
                ss += e * e
            m2[j] = ss
    for j in range(p):
        stored = 0
        for T in range(tiles):
            stored += ptr[T, j + 1] - ptr[T, j]
        m2[j] += (n_rows - stored) * mean[j] * mean[j]


def _compiled(name: str):
    """The numba version of one loop above (numba is imported on the first call)."""
    with _COMPILE_LOCK:
        if name not in _COMPILED:
            _COMPILED[name] = _jit(_LOOPS[name])
        return _COMPILED[name]


_COMPILE_LOCK = threading.Lock()
_COMPILED: dict[str, Any] = {}

_LOOPS = {f.__name__: f for f in (_csc_times, _csc_transposed_times, _csc_row_terms, _csc_column_statistics,
                                  _tiles_from_csr, _tiled_products, _tiled_transposed_times, _tiled_row_terms,
                                  _tiled_column_statistics)}


def prepare() -> None:
    """Import numba and load (or compile) the loops now, when they will be used.

    The memory plan measures the process before the passes: numba and LLVM take about
    100 MB of resident memory once loaded, which the plan must see (measured with
    ``scripts/bench_sparse.py``). Only the loops of tiled blocks are loaded: every block of
    a fit is tiled (:func:`tiled`).
    """
    if kernel_name() == "numba":
        import scipy.sparse as sp

        for dtype in (np.float32, np.float64):  # the values as stored, or transformed
            block = tiled(sp.csr_matrix(np.ones((2, 2), dtype=dtype)))
            column_statistics(block)
            centred_row_sq_norms(block, np.ones(2), np.zeros(2))
            y, _ = block_products(block, np.ones((2, 1)), np.zeros(1), np.zeros(1), 1)
            transposed_times(block, y)


#: Rows of a tile of a :class:`TiledBlock`: the tile's rows of a ``rows × l`` float64 work
#: array (at most 512 KB for ``l ≤ 32``) stay in a core's cache between the two products
#: (measured on blocks of 12,500 × 30,000 at 2%: 26 ns per stored value for both products
#: with tiles of 2,000–4,000 rows against 37 ns untiled; 39–53 ns with tiles of 500–1,000,
#: where the walk over every feature of each tile costs more than it saves).
TILE_ROWS = 2048


class TiledBlock:
    """A block of samples in the layout of the compiled products: row tiles, each by features.

    The block's rows are cut into tiles of ``tile_rows`` rows; the stored values of a tile
    are grouped by feature (rows in order within a feature), and the tiles follow each other
    in ``data``. ``indptr[T, j]`` is where feature ``j`` of tile ``T`` starts in ``data``
    (``indptr[T, features]`` where the tile ends), ``indices`` the row of each stored value
    within its tile (uint16). 6 bytes per stored float32 value (8 with int32 row numbers in
    a CSC block) plus ``8·(features + 1)`` per tile, at most 2 more per stored value
    (:func:`tile_rows_for`): never more than the CSC block with int32 row numbers.

    Built from a CSR block in one counting sort per tile (:func:`tiled`), whose writes stay
    inside the tile. Anything but the compiled products sees it as its CSR form
    (:meth:`tocsr`, row selection, ``@``).
    """

    format = "tiled"

    def __init__(self, data: np.ndarray, rows: np.ndarray, pointers: np.ndarray, shape: tuple[int, int],
                 tile_rows: int) -> None:
        self.data, self.indices, self.indptr = data, rows, pointers
        self.shape = (int(shape[0]), int(shape[1]))
        self.tile_rows = int(tile_rows)

    @property
    def dtype(self) -> np.dtype:
        return self.data.dtype

    @property
    def nnz(self) -> int:
        return int(self.data.shape[0])

    @property
    def ndim(self) -> int:
        return 2

    def coordinates(self, positions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Row and feature of the stored values at ``positions`` of ``data``."""
        p = self.shape[1]
        # the pointers, tile after tile, never decrease (a tile ends where the next starts)
        flat = np.searchsorted(self.indptr.reshape(-1), positions, side="right") - 1
        tile, feature = np.divmod(flat, p + 1)
        return tile * self.tile_rows + self.indices[positions].astype(np.int64), feature

    def tocsr(self):
        import scipy.sparse as sp

        rows, features = self.coordinates(np.arange(self.nnz))
        return sp.csr_matrix((self.data, (rows, features)), shape=self.shape)

    def tocsc(self):
        return self.tocsr().tocsc()

    def toarray(self) -> np.ndarray:
        return self.tocsr().toarray()

    def __getitem__(self, key):
        return self.tocsr()[key]

    def __matmul__(self, other):
        return self.tocsr() @ other

    @property
    def T(self):
        return self.tocsr().T


def tile_rows_for(n_rows: int, n_features: int, nnz: int) -> int:
    """Rows per tile of a block: :data:`TILE_ROWS`, or more where the block is so sparse that a
    tile would hold fewer than ``4·features`` stored values (the walk over every feature of a
    tile and its ``8·(features + 1)`` bytes of pointers, at most 2 bytes per stored value, would
    then cost more than the cache saves); at most 65,536 (row numbers are uint16). Depends on
    the block only, never on the threads; the sums are the same whatever the tiles."""
    if nnz <= 0:
        return max(1, min(n_rows, 2**16))
    wanted = -(-4 * n_features * n_rows // nnz)
    return int(max(1, min(2**16, max(TILE_ROWS, wanted))))


def tiled(block, tile_rows: int | None = None) -> TiledBlock:
    """A CSR block (any SciPy sparse block) as a :class:`TiledBlock` (values keep float32)."""
    if isinstance(block, TiledBlock):
        return block
    if block.format != "csr":
        block = block.tocsr()
    n, p = block.shape
    tile_rows = tile_rows_for(n, p, block.nnz) if tile_rows is None else int(tile_rows)
    data = block.data if block.data.dtype in (np.float32, np.float64) else block.data.astype(np.float64)
    tiles = -(-n // tile_rows)
    pointers = np.empty((tiles, p + 1), dtype=np.int64)
    rows = np.empty(block.nnz, dtype=np.uint16)
    values = np.empty(block.nnz, dtype=data.dtype)
    index_type = np.int32 if p < 2**31 else np.int64
    _compiled("_tiles_from_csr")(block.indptr.astype(np.int64, copy=False), block.indices.astype(index_type, copy=False),
                                 data, tile_rows, pointers, rows, values)
    return TiledBlock(values, rows, pointers, (n, p), tile_rows)


def _tiled_args(block: TiledBlock) -> tuple:
    return block.indptr, block.indices, block.data, block.tile_rows


def _plain(block):
    """A block the SciPy kernels read: a tiled block turns back into CSC."""
    return block.tocsc() if isinstance(block, TiledBlock) else block


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
        return np.asarray(_float64(_plain(block)) @ W)
    if isinstance(block, TiledBlock):
        return block_products(block, W, np.zeros(W.shape[1]), np.zeros(W.shape[1]), 0)[0]
    Y = np.zeros((block.shape[0], W.shape[1]))
    _compiled("_csc_times")(*_arrays(block), W, Y)
    return Y


def transposed_times(block, Y: np.ndarray) -> np.ndarray:
    """``X_bᵀ·Y`` (features × l, float64, C order) of a CSC block; ``Y`` float64."""
    Y = np.ascontiguousarray(Y, dtype=np.float64)
    if kernel_name() == "scipy":
        return np.ascontiguousarray(_float64(_plain(block)).T @ Y)
    if isinstance(block, TiledBlock):
        G = np.zeros((block.shape[1], Y.shape[1]))
        _compiled("_tiled_transposed_times")(*_tiled_args(block), Y, G)
        return G
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
        block = _plain(block)
        feature = np.repeat(np.arange(block.shape[1]), np.diff(block.indptr))
        x = block.data.astype(np.float64)
        terms = dd[feature] * x * (x - 2.0 * mu[feature])
        return np.bincount(block.indices, weights=terms, minlength=block.shape[0])
    out = np.zeros(block.shape[0])
    if isinstance(block, TiledBlock):
        _compiled("_tiled_row_terms")(*_tiled_args(block), dd, mu, out)
        return out
    _compiled("_csc_row_terms")(*_arrays(block), dd, mu, out)
    return out


def column_statistics(block) -> tuple[np.ndarray, np.ndarray]:
    """Mean and sum of squared deviations of each column of a CSC block over its rows (float64).

    The squared deviations are summed over the stored values, and the zeros add
    ``(rows − stored)·mean²``: no cancellation.
    """
    m, p = block.shape
    if kernel_name() == "scipy":
        block = _plain(block)
        stored = np.diff(block.indptr)
        feature = np.repeat(np.arange(p), stored)
        x = block.data.astype(np.float64)
        mean = np.bincount(feature, weights=x, minlength=p) / m
        dev = x - mean[feature]
        m2 = np.bincount(feature, weights=dev * dev, minlength=p) + (m - stored) * mean**2
        return mean, m2
    mean = np.empty(p)
    m2 = np.empty(p)
    if isinstance(block, TiledBlock):
        _compiled("_tiled_column_statistics")(block.indptr, block.data, float(m), mean, m2)
        return mean, m2
    indptr, _, data = _arrays(block)
    _compiled("_csc_column_statistics")(indptr, data, float(m), mean, m2)
    return mean, m2


def block_products(block, W: np.ndarray, shift: np.ndarray, offset, gram_width: int):
    """``Y = X_b·W − 1·shiftᵀ − 1·offsetᵀ`` (rows × l, float64) and, when ``gram_width`` > 0,
    ``X_bᵀ·Y[:, :gram_width]`` (features × gram_width, float64, C order), else None.

    On a :class:`TiledBlock` (compiled loops) both come from one walk over each tile, with
    the tile's rows of ``Y`` still in cache for the second product; otherwise from
    :func:`times_dense` and :func:`transposed_times`. The sums run in the same order either
    way (``shift`` then ``offset`` subtracted as in numpy), so the results are equal.
    """
    W = np.ascontiguousarray(W, dtype=np.float64)
    m = W.shape[1]
    shift = np.ascontiguousarray(np.broadcast_to(np.asarray(shift, dtype=np.float64), (m,)))
    offset = np.ascontiguousarray(np.broadcast_to(np.asarray(offset, dtype=np.float64), (m,)))
    if isinstance(block, TiledBlock) and kernel_name() == "numba":
        Y = np.empty((block.shape[0], m))
        G = np.zeros((block.shape[1], gram_width) if gram_width else (0, 0))
        _compiled("_tiled_products")(*_tiled_args(block), W, shift, offset, Y, G, int(gram_width))
        return Y, (G if gram_width else None)
    Y = times_dense(block, W)
    Y -= shift
    Y -= offset
    G = transposed_times(block, Y[:, :gram_width]) if gram_width else None
    return Y, G
