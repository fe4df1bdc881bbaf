"""Factorisation engine: randomized SVD of an implicitly centred and scaled matrix.

The engine sees a row-chunked Dask array ``X`` (samples × features, values already
transformed) plus the centre ``μ`` and inverse scale ``d`` of each feature, and factorises

    X̃ = (X − 1·μᵀ)·diag(d)

without forming ``X̃``: every product is taken block by block as
``X_b·(d∘W) − 1·(μᵀ(d∘W))`` and ``d∘(X_bᵀY_b − μ·(1ᵀY))``.

Randomized path (Halko, Martinsson & Tropp 2011, "Finding structure with randomness",
SIAM Review 53(2), doi:10.1137/090771806, algorithms 4.4 and 5.1): subspace iteration on
the Gram form ``X̃ᵀX̃`` in feature space. One read of a block yields both ``Y_b = X̃_b·Q`` and
``X̃_bᵀ·Y_b``, so each power iteration costs one pass over the data; ``Q`` is
re-orthonormalised (QR, float64) after every pass so float32 never overflows. The final
pass computes ``X̃·Q`` only; the small SVD of that ``n × l`` matrix gives scores and loadings
(Rayleigh–Ritz). With ``power_iterations="auto"`` iterations continue until the leading
Ritz values change by less than ``tol`` (relative) between two passes.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import dask.array as da
import numpy as np
import scipy.linalg

from .passes import PassRunner

__all__ = ["Factorization", "randomized_factorization", "exact_factorization", "orient_signs"]

logger = logging.getLogger(__name__)

#: Number of Gaussian probes for the a-posteriori error estimate (failure probability 10**-r).
N_PROBES = 10
#: Largest number of power iterations taken by ``power_iterations="auto"``.
MAX_AUTO_ITERATIONS = 30
#: ``power_iterations="auto"`` also stops when every leading Ritz pair has a relative
#: residual ``‖X̃ᵀX̃v − s²v‖ / s²`` below this: then each ``s²`` is within that residual of an
#: eigenvalue, and the angle of ``v`` to its eigenvector is at most the residual divided by
#: the relative gap (Parlett, "The Symmetric Eigenvalue Problem", 1998, §11.5).
RESIDUAL_TOL = 1e-4


@dataclass
class Factorization:
    """Leading singular triplets of the preprocessed matrix ``X̃`` (``n × p``).

    Attributes
    ----------
    singular_values : ndarray, shape (k,)
    components : ndarray, shape (p, k)
        Right singular vectors (unit-norm feature directions, the loadings).
    scores : ndarray, shape (n, k)
        Left singular vectors times singular values (``X̃ · components``).
    row_sq_norms : ndarray, shape (n,)
        Squared distance of each sample to the centre, ``‖x̃_i‖²``.
    method : str
    power_iterations : int
    converged : bool
    ritz_change : float
        Largest relative change of the leading singular values in the last iteration.
    ritz_residual : float
        Largest relative residual ``‖X̃ᵀX̃v − s²v‖ / s²`` of the leading Ritz pairs.
    residual_bound : float
        Probabilistic upper bound on ``‖X̃ − X̃·Q·Qᵀ‖₂`` (Halko et al. 2011, §4.3, with
        probability at least ``1 − 10**-10``); NaN for the exact path (where it is the
        ``(k+1)``-th singular value).
    """

    singular_values: np.ndarray
    components: np.ndarray
    scores: np.ndarray
    row_sq_norms: np.ndarray
    method: str
    power_iterations: int = 0
    converged: bool = True
    ritz_change: float = 0.0
    ritz_residual: float = float("nan")
    residual_bound: float = float("nan")
    ritz_history: list = field(default_factory=list)


def orient_signs(components: np.ndarray, scores: np.ndarray) -> None:
    """Orient each axis so that its largest-magnitude loading is positive (in place).

    Ties between equal magnitudes go to the first feature.
    """
    idx = np.argmax(np.abs(components), axis=0)
    signs = np.sign(components[idx, np.arange(components.shape[1])])
    signs[signs == 0] = 1.0
    components *= signs
    scores *= signs


def _filled(block: np.ndarray, fill: np.ndarray | None) -> np.ndarray:
    if fill is None:
        return block
    bad = ~np.isfinite(block)
    if bad.any():
        block = np.where(bad, fill.astype(block.dtype), block)
    return block


def _products(block, W, offset, mean, d, fill, gram_width, want_norms):
    """Block products ``Y_b = X̃_b·W'``, ``X_bᵀ·Y_b[:, :gram_width]`` and ``‖x̃_i‖²`` for one block."""
    block = _filled(block, fill)
    y = (block @ W).astype(np.float64)
    y -= offset
    gram = None
    if gram_width:
        gram = (block.T @ y[:, :gram_width].astype(block.dtype)).astype(np.float64)
    norms = None
    if want_norms:
        centred = block - mean.astype(block.dtype)
        centred *= d.astype(block.dtype)
        norms = np.einsum("ij,ij->i", centred, centred, dtype=np.float64)
    return y, gram, norms


@dataclass
class _Operator:
    """Implicit ``X̃ = (X − 1μᵀ)·diag(d)`` over a row-chunked Dask array."""

    X: da.Array
    mean: np.ndarray
    d: np.ndarray
    fill: np.ndarray | None
    runner: PassRunner
    source: str

    @property
    def shape(self) -> tuple[int, int]:
        return self.X.shape

    def apply(self, W: np.ndarray, *, gram: bool | int, norms: bool, name: str):
        """One pass: ``X̃·W`` (n × m), optionally ``X̃ᵀ·X̃·W`` and ``‖x̃_i‖²``.

        ``gram`` is False, True (all columns of ``W``) or the number of leading columns of
        ``W`` for which ``X̃ᵀ·X̃·W`` is wanted.
        """
        n, p = self.shape
        gram = W.shape[1] if gram is True else int(gram)
        dw = self.d[:, None] * W
        offset = self.mean @ dw
        W_cast = dw.astype(self.X.dtype)
        Y = np.empty((n, W.shape[1]))
        acc = {"gram": np.zeros((p, gram)) if gram else None}
        row_norms = np.empty(n) if norms else None

        def fold(result, index, start):
            y, g, r = result
            Y[start : start + y.shape[0]] = y
            if g is not None:
                acc["gram"] += g
            if r is not None:
                row_norms[start : start + y.shape[0]] = r

        self.runner.run(
            name, self.source, self.X, _products,
            fold, W_cast, offset, self.mean, self.d, self.fill, gram, norms,
        )
        Z = None
        if gram:
            Z = self.d[:, None] * (acc["gram"] - np.outer(self.mean, Y[:, :gram].sum(axis=0)))
        return Y, Z, row_norms


def randomized_factorization(
    X: da.Array,
    mean: np.ndarray,
    inverse_scale: np.ndarray,
    *,
    n_components: int,
    oversample: int = 10,
    power_iterations: int | str = "auto",
    tol: float = 1e-6,
    rng: np.random.Generator,
    start: np.ndarray | None = None,
    fill: np.ndarray | None = None,
    runner: PassRunner | None = None,
    source: str = "data",
    max_basis: int | None = None,
    sketch_from: da.Array | None = None,
) -> Factorization:
    """Leading ``n_components`` singular triplets of ``X̃`` by randomized block Krylov iteration.

    Parameters
    ----------
    X : dask.array.Array, shape (n, p)
        Transformed values, chunked along rows only (each chunk holds whole rows).
    mean, inverse_scale : ndarray, shape (p,)
        Centre ``μ`` and inverse scale ``d`` of each column (``d = 0`` drops a column).
    n_components : int
    oversample : int, default=10
        Extra dimensions of each block, ``l = n_components + oversample``.
    power_iterations : int or "auto", default="auto"
        Applications of ``X̃ᵀX̃`` after the first sketch. ``"auto"`` stops when the leading
        singular values are estimated to be within ``tol`` (relative) of their limit, or
        when every leading Ritz pair has a relative residual below ``RESIDUAL_TOL``, after
        at most ``MAX_AUTO_ITERATIONS``.
    tol : float, default=1e-6
    rng : numpy.random.Generator
        Source of the Gaussian test matrices.
    start : ndarray of shape (p, l), optional
        ``X̃ᵀX̃·Ω`` for some test matrix ``Ω`` when the caller obtained it in an earlier
        pass (fused with the statistics pass); otherwise one pass computes it.
    fill : ndarray of shape (p,), optional
        Value replacing non-finite cells of each column.
    runner : PassRunner, optional
        Records passes and reports progress.
    max_basis : int, optional
        Largest width of the Krylov basis before it is restarted (default ``8·l``).
    sketch_from : dask.array.Array, optional
        The same matrix read another way (for example from the input while it fills the
        cache that ``X`` reads), used for the first sketch pass only.

    Returns
    -------
    Factorization

    Notes
    -----
    Each pass over a block computes ``Y_b = X̃_b·Q_i`` and ``X̃_bᵀ·Y_b``; the new block
    ``Q_{i+1}`` is orthonormalised (twice, against the whole basis) so float32 never
    overflows. Because ``B = X̃·K`` is known block by block for the orthonormal basis
    ``K = [Q_0, Q_1, …]``, the Rayleigh–Ritz step needs no further pass: the eigenvectors
    ``W`` of ``BᵀB`` give values ``s``, loadings ``K·W`` and scores ``B·W``. Keeping the whole
    basis (block Krylov, Musco & Musco 2015, "Randomized block Krylov methods for stronger
    and faster approximate singular value decomposition", NeurIPS, arXiv:1504.05477)
    converges far faster than plain subspace iteration on flat spectra. When the basis
    reaches ``max_basis`` columns it is restarted from its leading Ritz vectors.

    Passes over the data: one for the first sketch (none when ``start`` is given), then one
    per power iteration plus one. Memory: ``O((n + p)·max_basis)`` float64 plus the blocks in
    flight.
    """
    runner = runner or PassRunner()
    n, p = X.shape
    k = n_components
    l = min(k + oversample, min(n, p))
    max_basis = max(2 * l, max_basis or 8 * l)
    op = _Operator(X, np.asarray(mean, float), np.asarray(inverse_scale, float), fill, runner, source)

    if start is None:
        sketch_op = op if sketch_from is None else _Operator(
            sketch_from, op.mean, op.d, fill, runner, "input")
        omega = rng.standard_normal((p, l))
        _, Z, _ = sketch_op.apply(omega, gram=True, norms=False, name="sketch")
    else:
        Z = start
    Q = _orthonormal(Z)
    probes = rng.standard_normal((p, N_PROBES))

    auto = power_iterations == "auto"
    n_pass = MAX_AUTO_ITERATIONS + 1 if auto else int(power_iterations) + 1
    K = np.empty((p, 0))
    B = np.empty((n, 0))
    AK = np.empty((p, 0))  # X̃ᵀX̃·K, for the residuals of the Ritz vectors
    history: list[np.ndarray] = []
    change, estimate, worst_residual = np.inf, np.inf, np.inf
    converged = not auto
    row_norms = Yp = None
    done = 0
    for i in range(n_pass):
        first = i == 0
        W = np.hstack([Q, probes]) if first else Q
        last_fixed = not auto and i == n_pass - 1
        Y, Z, norms = op.apply(W, gram=0 if last_fixed else Q.shape[1], norms=first,
                               name=f"iteration {i + 1}")
        done += 1
        if first:
            row_norms, Yp, Y = norms, Y[:, l:], Y[:, :l]
        K = np.hstack([K, Q])
        B = np.hstack([B, Y])
        s, W = _ritz(B)
        ritz = s[:k].copy()
        if Z is not None:
            AK = np.hstack([AK, Z])
            worst_residual = _relative_residual(K, AK, W[:, :k], ritz)
        if history:
            previous = history[-1]
            new_change = float(np.max(np.abs(ritz - previous) / np.maximum(ritz, np.finfo(float).tiny)))
            rate = min(new_change / change, 0.999) if np.isfinite(change) and change > 0 else 0.5
            estimate = new_change * rate / (1.0 - rate) if new_change > tol / 10 else new_change
            change = new_change
        history.append(ritz)
        room = min(n, p) - K.shape[1]
        settled = estimate < tol or worst_residual < RESIDUAL_TOL
        if Z is None or (auto and settled) or room <= 0:
            converged = True
            break
        if i == n_pass - 1:
            break
        # the next block is orthogonal to the whole basis, so a restart that keeps the
        # leading Ritz vectors keeps their residuals in the expanded basis (thick restart)
        Q = _new_block(Z[:, : min(l, room)], K)
        if Q.shape[1] == 0:  # the basis already spans the range of X̃ᵀ
            converged = True
            break
        if K.shape[1] + l > max_basis:
            keep = max_basis - l
            K = K @ W[:, :keep]
            B = B @ W[:, :keep]
            AK = AK @ W[:, :keep]

    components = K @ W[:, :k]
    scores = B @ W[:, :k]
    residual = Yp - B @ (K.T @ probes)
    bound = 10.0 * np.sqrt(2.0 / np.pi) * float(np.max(np.linalg.norm(residual, axis=0)))
    orient_signs(components, scores)
    if auto and not converged:
        logger.warning(
            "iterations stopped after %d passes with the leading singular values still changing "
            "by %.1e (relative; tolerance %.0e); pass --power-iterations to run more",
            done, change, tol,
        )
    return Factorization(
        singular_values=s[:k].copy(),
        components=components,
        scores=scores,
        row_sq_norms=row_norms,
        method="randomized",
        power_iterations=done - 1,
        converged=converged,
        ritz_change=float(change) if np.isfinite(change) else float("nan"),
        ritz_residual=worst_residual if np.isfinite(worst_residual) else float("nan"),
        residual_bound=bound,
        ritz_history=[h.tolist() for h in history],
    )


def _ritz(B: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Singular values and right singular vectors of ``B`` (n × L) from its L × L Gram matrix.

    Holding only ``B`` and an ``L × L`` matrix (not the ``n × L`` left factor) keeps memory
    at one copy of the basis; squaring the condition number costs nothing for the leading
    values that are wanted.
    """
    evals, W = scipy.linalg.eigh(B.T @ B, check_finite=False)
    order = np.argsort(evals)[::-1]
    return np.sqrt(np.maximum(evals[order], 0.0)), W[:, order]


def _new_block(Z: np.ndarray, K: np.ndarray) -> np.ndarray:
    """Orthonormal directions of ``Z`` outside the span of ``K``, dropping vanishing ones.

    Directions whose part outside ``K`` is below ``1e-10·‖Z‖`` are numerically in the span
    already (the basis has reached the rank of the matrix) and are not added.
    """
    scale = np.linalg.norm(Z, 2)
    U, sv, _ = scipy.linalg.svd(_project_out(Z, K), full_matrices=False, check_finite=False)
    keep = sv > 1e-10 * max(scale, np.finfo(float).tiny)
    Q = U[:, keep]
    return _orthonormal(_project_out(Q, K)) if Q.shape[1] else Q


def _relative_residual(K: np.ndarray, AK: np.ndarray, W: np.ndarray, s: np.ndarray) -> float:
    """Largest ``‖X̃ᵀX̃v − s²v‖ / s²`` over the Ritz pairs ``(s, v = K·w)``."""
    s2 = np.maximum(s**2, np.finfo(float).tiny)
    residual = AK @ W - (K @ W) * s2
    return float(np.max(np.linalg.norm(residual, axis=0) / s2))


def _project_out(Z: np.ndarray, K: np.ndarray) -> np.ndarray:
    """``Z`` minus its projection on the orthonormal columns of ``K`` (twice, for stability)."""
    for _ in range(2):
        Z = Z - K @ (K.T @ Z)
    return Z


def exact_factorization(
    X: da.Array,
    mean: np.ndarray,
    inverse_scale: np.ndarray,
    *,
    n_components: int,
    fill: np.ndarray | None = None,
    runner: PassRunner | None = None,
    source: str = "data",
) -> Factorization:
    """Leading singular triplets of ``X̃`` by LAPACK (``gesdd``) on the whole matrix.

    For small inputs only: holds ``X̃`` in float64 (``8·n·p`` bytes). One pass.
    """
    runner = runner or PassRunner()
    n, p = X.shape
    mean = np.asarray(mean, float)
    d = np.asarray(inverse_scale, float)
    dense = np.empty((n, p))

    def task(block):
        block = _filled(block, fill)
        return (block.astype(np.float64) - mean) * d

    def fold(result, index, start):
        dense[start : start + result.shape[0]] = result

    runner.run("exact", source, X, task, fold)
    row_norms = np.einsum("ij,ij->i", dense, dense)
    U, s, Vt = scipy.linalg.svd(dense, full_matrices=False, lapack_driver="gesdd")
    k = n_components
    components = Vt[:k].T.copy()
    scores = U[:, :k] * s[:k]
    orient_signs(components, scores)
    residual = float(s[k]) if s.shape[0] > k else 0.0
    return Factorization(
        singular_values=s[:k].copy(),
        components=components,
        scores=scores,
        row_sq_norms=row_norms,
        method="exact",
        residual_bound=residual,
    )


def _orthonormal(Z: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the columns of ``Z`` (economic QR, float64)."""
    Q, _ = scipy.linalg.qr(Z, mode="economic", check_finite=False)
    return Q
