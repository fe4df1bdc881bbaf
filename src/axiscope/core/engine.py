"""Factorisation engine: randomized SVD of an implicitly centred and scaled matrix.

The engine sees a row-chunked Dask array ``X`` (samples × features, values already
transformed) plus the centre ``μ`` and inverse scale ``d`` of each feature, and factorises

    X̃ = (X − 1·μᵀ)·diag(d)

without forming ``X̃`` as a whole: each block is centred inside its own buffer,
``C_b = X_b − 1·μ'ᵀ`` with ``μ'`` the centre rounded to the data's dtype, before the products
``C_b·(d∘W)`` and ``d∘(C_bᵀY_b)``. Only the rounding ``μ − μ'`` (zero for float64 data) is
applied as a rank-one correction, in float64; it is small, so nothing cancels, and float32
data whose means lie many standard deviations from zero are as exact as float64 copies.

Randomized path (Halko, Martinsson & Tropp 2011, "Finding structure with randomness",
SIAM Review 53(2), doi:10.1137/090771806, algorithms 4.4 and 5.1, extended to a block
Krylov basis): iteration on the Gram form ``X̃ᵀX̃`` in feature space. One read of a block
yields both ``Y_b = X̃_b·Q`` and ``X̃_bᵀ·Y_b``, so each power iteration costs one pass over the
data; each new block is orthonormalised (float64) against the whole basis so float32 never
overflows. The Rayleigh–Ritz step on the stored ``X̃·K`` gives scores and loadings without
a further pass. With ``power_iterations="auto"`` iterations continue until the leading
singular values have settled to ``tol`` (relative). Every result carries a per-axis error
estimate (:class:`AxisAccuracy`): from the residuals of the final Ritz pairs on the
randomized path (:func:`ritz_accuracy`), from LAPACK's error bounds on the exact path
(:func:`lapack_accuracy`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import dask.array as da
import numpy as np
import scipy.linalg

from .backends import Reduction
from .passes import PassRunner
from .sparse_ops import is_sparse, sparse_products
from .workspace import work_array

if TYPE_CHECKING:
    from .adjust import Residualizer

__all__ = ["AxisAccuracy", "Factorization", "randomized_factorization", "exact_factorization",
           "orient_signs", "ritz_accuracy", "lapack_accuracy", "accuracy_from_error"]

logger = logging.getLogger(__name__)

#: Number of Gaussian probes of the probabilistic bound on what the basis leaves out
#: (``Factorization.residual_bound``; failure probability 10**-r).
N_PROBES = 10
#: Largest number of power iterations taken by ``power_iterations="auto"``.
MAX_AUTO_ITERATIONS = 30
#: ``power_iterations="auto"`` also stops when every leading Ritz pair has a relative
#: residual ``‖X̃ᵀX̃v − s²v‖ / s²`` below this: then each ``s²`` is within that residual of an
#: eigenvalue, and the angle of ``v`` to its eigenvector is at most the residual divided by
#: the relative gap (see :func:`ritz_accuracy`).
RESIDUAL_TOL = 1e-4


@dataclass
class AxisAccuracy:
    """Estimated error of each computed axis, relative, with how it was obtained.

    Attributes
    ----------
    singular_value : ndarray, shape (k,)
        Relative error of each singular value, ``|σ − s|/σ``.
    vector : ndarray, shape (k,)
        Sine of the angle between each computed loading vector and the exact one (1 when
        the axis is not separated from a neighbour of nearly equal value).
    subspace : float
        Sine of the largest angle between the span of the ``k`` computed loadings and the
        exact leading ``k``-dimensional subspace.
    basis : str
        ``"ritz residuals"`` (randomized path: residuals of the final Ritz pairs) or
        ``"lapack error bounds"`` (exact path).
    relative_gap : ndarray, shape (k,)
        Distance of each axis's variance to the nearest other one, relative to it (from the
        computed values). The estimates are upper bounds that grow loose as this shrinks.
    """

    singular_value: np.ndarray
    vector: np.ndarray
    subspace: float
    basis: str
    relative_gap: np.ndarray

    def to_records(self, axis_names: list[str], tol: float | None = None) -> list[dict]:
        """One record per axis: the estimates and whether the value is below ``tol``."""
        records = []
        for j, name in enumerate(axis_names):
            record = {"axis": name, "singular_value_error": float(self.singular_value[j]),
                      "loading_error": float(self.vector[j]), "relative_gap": float(self.relative_gap[j])}
            if tol is not None:
                record["below_tol"] = bool(self.singular_value[j] <= tol)
            records.append(record)
        return records


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
        probability at least ``1 − 10**-10``); for the exact path the ``(k+1)``-th
        singular value.
    accuracy : AxisAccuracy or None
        Per-axis error estimates of the singular values and loadings.
    spectrum : ndarray or None
        Every singular value of ``X̃`` (``min(n, p)``, descending) when the exact path
        computed them all; None otherwise. Used to choose the number of axes from the
        whole spectrum (a share of variance, Minka's evidence).
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
    accuracy: AxisAccuracy | None = None
    spectrum: np.ndarray | None = None
    #: one-pass mode only: sketch widths, estimated relative error, estimated distances
    sketch: dict | None = None


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


def _products(block, W, offset, centre, residual, d, fill, gram_width, want_norms):
    """Block products ``Y_b = X̃_b·W'``, ``C_bᵀ·Y_b[:, :gram_width]`` and ``‖x̃_i‖²`` for one block.

    The block is centred in a buffer of its own dtype, ``C_b = X_b − 1·centreᵀ`` with
    ``centre`` the mean rounded to that dtype: the subtraction of nearby numbers loses
    nothing, so the products see values of the size of the spread, not of the mean, and
    no cancellation follows however far the mean lies from zero. What the rounding of the
    mean left over (``residual = μ − centre``, zero for float64 data) is a small rank-one
    correction taken in float64 by the caller (``offset = residualᵀ·W'``).
    """
    if is_sparse(block):  # implicit centring over the stored values, float64 (core/sparse_ops.py)
        return sparse_products(block, W, offset, centre, residual, d, fill, gram_width, want_norms)
    block = _filled(block, fill)
    # into the pass thread's work array (core/workspace.py): no fresh block-sized array per block
    centred = np.subtract(block, centre, out=work_array("centred", block.shape, np.result_type(block, centre)))
    y = (centred @ W).astype(np.float64)
    y -= offset
    gram = None
    if gram_width:
        gram = (centred.T @ y[:, :gram_width].astype(block.dtype)).astype(np.float64)
    norms = None
    if want_norms:
        centred -= residual.astype(block.dtype)
        centred *= d.astype(block.dtype)
        norms = np.einsum("ij,ij->i", centred, centred, dtype=np.float64)
    return y, gram, norms


def _split_gram(result):
    """A block's products as (what comes back per block, the Gram part summed over blocks)."""
    y, gram, norms = result
    return (y, None, norms), gram


def _join_gram(piece, total):
    y, _, norms = piece
    return y, total, norms


#: On a cluster, the ``features × l`` Gram parts are summed on the workers; only ``Y_b`` and
#: the row norms come back per block (:class:`axiscope.core.backends.Reduction`).
GRAM_SUM = Reduction(np.add, split=_split_gram, join=_join_gram)


@dataclass
class _Operator:
    """Implicit ``X̃ = (X − 1μᵀ)·diag(d)`` over a row-chunked Dask array.

    Each block is centred inside its own buffer before any product (see :func:`_products`);
    only the rounding of ``μ`` to the data's dtype is corrected afterwards, in float64.
    """

    X: da.Array
    mean: np.ndarray
    d: np.ndarray
    fill: np.ndarray | None
    runner: PassRunner
    source: str
    #: Covariate adjustment: the products are those of ``P·X̃`` (:mod:`axiscope.core.adjust`).
    adjust: "Residualizer | None" = None

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
        width = W.shape[1]
        if self.adjust is not None and norms:  # X̃·M as well, for the adjusted row norms
            W = np.hstack([W, self.adjust.extra_columns()])
        centre = self.mean.astype(self.X.dtype)
        residual = self.mean - centre.astype(np.float64)
        dw = self.d[:, None] * W
        W_cast = dw.astype(self.X.dtype)
        offset = residual @ W_cast.astype(np.float64)
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
            fold, W_cast, offset, centre, residual, self.d, self.fill, gram, norms,
            reduce=GRAM_SUM if gram else None,
        )
        Z = None
        if gram:
            Z = self.d[:, None] * (acc["gram"] - np.outer(residual, Y[:, :gram].sum(axis=0)))
        if self.adjust is not None:  # a separate step: P·Y, X̃ᵀ·P·Y and the rows of P·X̃
            Y, Z, row_norms = self.adjust.finish(Y, Z, row_norms, width, gram)
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
    adjust: "Residualizer | None" = None,
    on_pass=None,
    resume_from: dict | None = None,
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
    adjust : Residualizer, optional
        Factorise ``P·X̃`` instead, ``P`` the projection off known covariates
        (:mod:`axiscope.core.adjust`); no extra pass. ``start`` must then be of ``P·X̃`` too.
    on_pass : callable, optional
        Called as ``on_pass(state)`` after each completed iteration that is not the last,
        with everything needed to continue (:func:`_iteration_state`): the checkpoint hook.
    resume_from : dict, optional
        A state given to ``on_pass`` by an earlier run of the same inputs and options: the
        iterations continue after it (the first pass then reads ``sketch_from`` when given,
        which refills its cache) and give the same result as an uninterrupted run.

    Returns
    -------
    Factorization
        With a per-axis error estimate from the residuals of the final Ritz pairs
        (:func:`ritz_accuracy`).

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
    reaches ``max_basis`` columns it is restarted from its leading Ritz vectors. The image
    ``X̃ᵀX̃·K`` of the basis is kept too, so the residual of every Ritz pair is known
    without a pass.

    Passes over the data: one for the first sketch (none when ``start`` is given), then one
    per power iteration plus one. Memory: ``O((n + p)·max_basis)`` float64 plus the blocks in
    flight.
    """
    runner = runner or PassRunner()
    n, p = X.shape
    k = n_components
    l = min(k + oversample, min(n, p))
    op = _Operator(X, np.asarray(mean, float), np.asarray(inverse_scale, float), fill, runner, source, adjust)
    watch = _Convergence(k, tol, auto=power_iterations == "auto")
    n_pass = MAX_AUTO_ITERATIONS + 1 if watch.auto else int(power_iterations) + 1
    if resume_from is None:
        Q = _first_block(op, start, rng, l, sketch_from)
        probes = rng.standard_normal((p, N_PROBES))
        basis = _KrylovBasis.empty(n, p, max(2 * l, max_basis or 8 * l))
        row_norms = Yp = None
        done = first_i = 0
    else:
        Q, probes, basis, row_norms, Yp, done, first_i = _restore_state(resume_from, watch, rng)
    for i in range(first_i, n_pass):
        first = i == 0
        reader = op if i > first_i or resume_from is None or sketch_from is None else _Operator(
            sketch_from, op.mean, op.d, op.fill, op.runner, "input", op.adjust)  # refills the cache on resume
        Y, Z, norms = reader.apply(np.hstack([Q, probes]) if first else Q, gram=Q.shape[1], norms=first,
                                   name=f"iteration {i + 1}")
        done += 1
        if first:
            row_norms, Yp, Y = norms, Y[:, l:], Y[:, :l]
        basis.extend(Q, Y, Z)
        s, W = basis.ritz()
        stop = watch.update(s[:k], basis, W)
        room = min(n, p) - basis.width
        if room <= 0:  # the basis spans the whole space: the Ritz pairs are exact
            watch.converged = True
        if stop or room <= 0 or i == n_pass - 1:
            break
        # the next block is orthogonal to the whole basis, so a restart that keeps the
        # leading Ritz vectors keeps their residuals in the expanded basis (thick restart)
        Q = _new_block(Z[:, : min(l, room)], basis.K)
        if Q.shape[1] == 0:  # the basis already spans the range of X̃ᵀ
            watch.converged = True
            break
        basis.restart_if_full(W, l)
        if on_pass is not None:
            on_pass(_iteration_state(i + 1, done, Q, probes, basis, row_norms, Yp, watch, rng))

    components = basis.K @ W[:, :k]
    scores = basis.B @ W[:, :k]
    residual = Yp - basis.B @ (basis.K.T @ probes)
    bound = 10.0 * np.sqrt(2.0 / np.pi) * float(np.max(np.linalg.norm(residual, axis=0)))
    accuracy = ritz_accuracy(s, basis.residual_norms(s, W, min(k + 1, W.shape[1])), k,
                             unit_roundoff=_unit_roundoff(X.dtype))
    orient_signs(components, scores)
    if watch.auto and not watch.converged:
        logger.warning(
            "iterations stopped after %d passes with the leading singular values still changing "
            "by %.1e (relative; tolerance %.0e); pass power_iterations to run more",
            done, watch.change, tol,
        )
    return Factorization(
        singular_values=s[:k].copy(),
        components=components,
        scores=scores,
        row_sq_norms=row_norms,
        method="randomized",
        power_iterations=done - 1,
        converged=watch.converged,
        ritz_change=float(watch.change) if np.isfinite(watch.change) else float("nan"),
        ritz_residual=watch.worst_residual if np.isfinite(watch.worst_residual) else float("nan"),
        residual_bound=bound,
        ritz_history=[h.tolist() for h in watch.history],
        accuracy=accuracy,
    )


def _iteration_state(next_i, done, Q, probes, basis, row_norms, Yp, watch, rng) -> dict:
    """Everything the iteration needs to continue at iteration ``next_i`` (arrays kept exactly)."""
    return {
        "Q": Q, "probes": probes, "K": basis.K, "B": basis.B, "AK": basis.AK,
        **({"G": basis.G} if basis.G is not None else {}),
        "row_norms": row_norms, "Yp": Yp,
        "history": np.array(watch.history, dtype=float),
        "convergence": np.array([watch.change, watch.estimate, watch.worst_residual], dtype=float),
        "scalars": {"next_iteration": next_i, "passes_done": done, "max_width": basis.max_width,
                    "converged": bool(watch.converged), "rng_state": rng.bit_generator.state},
    }


def _restore_state(state: dict, watch: "_Convergence", rng: np.random.Generator):
    """The inverse of :func:`_iteration_state`: set ``watch`` and ``rng``, return the rest."""
    scalars = state["scalars"]
    basis = _KrylovBasis(state["K"], state["B"], state["AK"], int(scalars["max_width"]), state.get("G"))
    watch.history = [row.copy() for row in state["history"]]
    watch.change, watch.estimate, watch.worst_residual = (float(v) for v in state["convergence"])
    watch.converged = bool(scalars["converged"])
    rng.bit_generator.state = scalars["rng_state"]
    return (state["Q"], state["probes"], basis, state["row_norms"], state["Yp"], int(scalars["passes_done"]),
            int(scalars["next_iteration"]))


def _first_block(op: "_Operator", start: np.ndarray | None, rng: np.random.Generator, l: int,
                 sketch_from: da.Array | None) -> np.ndarray:
    """The first orthonormal block ``orth(X̃ᵀX̃·Ω)``: from ``start``, or one pass over the data."""
    if start is None:
        sketch_op = op if sketch_from is None else _Operator(
            sketch_from, op.mean, op.d, op.fill, op.runner, "input", op.adjust)
        omega = rng.standard_normal((op.shape[1], l))
        _, start, _ = sketch_op.apply(omega, gram=True, norms=False, name="sketch")
    return _orthonormal(start)


@dataclass
class _KrylovBasis:
    """The orthonormal basis ``K`` (p × m) with its images ``B = X̃·K`` and ``AK = X̃ᵀX̃·K``,
    and the Gram matrix ``G = BᵀB`` (m × m) of the Rayleigh–Ritz step, kept up to date by the
    columns each pass adds (``None``: computed in full on first use)."""

    K: np.ndarray
    B: np.ndarray
    AK: np.ndarray
    max_width: int
    G: np.ndarray | None = None

    @classmethod
    def empty(cls, n: int, p: int, max_width: int) -> "_KrylovBasis":
        return cls(np.empty((p, 0)), np.empty((n, 0)), np.empty((p, 0)), max_width, np.empty((0, 0)))

    @property
    def width(self) -> int:
        return self.K.shape[1]

    def extend(self, Q: np.ndarray, Y: np.ndarray, Z: np.ndarray) -> None:
        if self.G is not None:
            self.G = _gram_extended(self.G, self.B, Y)
        self.K = _grown(self.K, Q, self.max_width)
        self.B = _grown(self.B, Y, self.max_width)
        self.AK = _grown(self.AK, Z, self.max_width)

    def ritz(self) -> tuple[np.ndarray, np.ndarray]:
        """Ritz values ``s`` (descending) and the coefficients ``W`` of the Ritz vectors ``K·W``."""
        if self.G is None:
            self.G = self.B.T @ self.B
        return _ritz(self.G)

    def residual_norms(self, s: np.ndarray, W: np.ndarray, m: int) -> np.ndarray:
        """``‖X̃ᵀX̃v − s²v‖`` of the first ``m`` Ritz pairs ``(s, v = K·w)``."""
        residual = self.AK @ W[:, :m] - (self.K @ W[:, :m]) * s[:m] ** 2
        return np.linalg.norm(residual, axis=0)

    def restart_if_full(self, W: np.ndarray, l: int) -> None:
        """Keep the leading Ritz vectors when the next block would overflow ``max_width``."""
        if self.width + l > self.max_width:
            keep = self.max_width - l
            self.K = _restarted(self.K, W[:, :keep], self.max_width)
            self.B = _restarted(self.B, W[:, :keep], self.max_width)
            self.AK = _restarted(self.AK, W[:, :keep], self.max_width)
            if self.G is not None:  # (B·W)ᵀ(B·W) = Wᵀ·G·W, without a pass over B
                G = W[:, :keep].T @ (self.G @ W[:, :keep])
                self.G = (G + G.T) / 2


@dataclass
class _Convergence:
    """When ``power_iterations="auto"`` stops: settled values or small Ritz residuals."""

    k: int
    tol: float
    auto: bool
    history: list = field(default_factory=list)
    change: float = np.inf
    estimate: float = np.inf
    worst_residual: float = np.inf
    converged: bool = False

    def __post_init__(self) -> None:
        self.converged = not self.auto

    def update(self, s: np.ndarray, basis: _KrylovBasis, W: np.ndarray) -> bool:
        """Record the leading Ritz values of this pass; True when auto iterations can stop.

        The distance of the values to their limit is extrapolated from the geometric rate
        of their last two changes (for flat spectra, where vectors converge slowly but
        values do not).
        """
        ritz = s.copy()
        self.worst_residual = _relative_residual(basis.K, basis.AK, W[:, : self.k], ritz)
        if self.history:
            previous = self.history[-1]
            new_change = float(np.max(np.abs(ritz - previous) / np.maximum(ritz, np.finfo(float).tiny)))
            change = self.change
            rate = min(new_change / change, 0.999) if np.isfinite(change) and change > 0 else 0.5
            self.estimate = new_change * rate / (1.0 - rate) if new_change > self.tol / 10 else new_change
            self.change = new_change
        self.history.append(ritz)
        if self.auto and (self.estimate < self.tol or self.worst_residual < RESIDUAL_TOL):
            self.converged = True
            return True
        return False


def ritz_accuracy(s: np.ndarray, residuals: np.ndarray, k: int, *, unit_roundoff: float) -> AxisAccuracy:
    """Per-axis error estimates of Ritz pairs of ``X̃ᵀX̃`` from their residuals.

    Parameters
    ----------
    s : ndarray, shape (m,)
        Ritz singular values of the final basis, descending (``θ = s²`` are Ritz values of
        ``X̃ᵀX̃``); ``m > k`` gives the last axis a neighbour below.
    residuals : ndarray, shape (min(m, k + 1),)
        ``r_j = ‖X̃ᵀX̃v_j − θ_j v_j‖`` of the leading Ritz pairs.
    k : int
        Number of axes reported.
    unit_roundoff : float
        Unit roundoff of the arithmetic of the block products (that of the data's dtype).

    Returns
    -------
    AxisAccuracy

    Notes
    -----
    For a Ritz pair ``(θ, v)`` of a symmetric matrix with residual ``r`` and gap ``δ``
    between ``θ`` and the rest of the spectrum:

    * some eigenvalue lies within ``r`` of ``θ``, and within ``r²/δ`` (Kato–Temple);
    * the sine of the angle between ``v`` and that eigenvalue's eigenvector is at most
      ``r/δ``

    (Bai, Demmel, Dongarra, Ruhe & van der Vorst, *Templates for the Solution of Algebraic
    Eigenvalue Problems*, SIAM 2000, §4.8, eqs. 4.55–4.56; also Parlett, *The Symmetric
    Eigenvalue Problem*, SIAM 1998, chapters 4 and 11, and Saad, *Numerical Methods for
    Large Eigenvalue Problems*, 2nd ed., SIAM 2011, chapter 3);

    * the sine of the largest angle between the span of the first ``k`` Ritz vectors and
      the leading invariant subspace is at most ``‖R_k‖_F/δ_k`` (Davis & Kahan 1970, "The
      rotation of eigenvectors by a perturbation. III", SIAM J. Numer. Anal. 7(1),
      doi:10.1137/0707001, sin θ theorem), with ``δ_k`` the gap below ``θ_k``.

    The true gap involves unknown eigenvalues; it is estimated from the Ritz values, each
    neighbour moved towards ``θ_j`` by its own residual (the eigenvalue it approximates lies
    within that distance), which errs on the side of larger error estimates. The relative
    error of a singular value ``s = √θ`` is that of ``θ`` halved: ``|σ − s|/σ ≤ |λ − θ|/(2θ)``
    since Ritz values never exceed the eigenvalues they approximate (Cauchy interlacing).
    When the gap is not larger than the residual, the vector estimate is 1 (the axis is
    not separated from its neighbour: only the subspace they span together is determined).

    Rounding limits what any method resolves: the estimates are at least the LAPACK
    Users' Guide's bounds for a backward-stable SVD (see :func:`lapack_accuracy`) with the
    data's unit roundoff, ``u·σ₁/σ_j`` for values and ``u·σ₁/gap_j`` for vectors. Errors
    below about ten times that level are not resolved.

    Checked against LAPACK on planted matrices (``tests/test_engine.py``): the estimates
    bound the true errors, and exceed them by at most about ``3/g`` where ``g`` is the
    relative gap of the axis (the bound divides by the gap to the nearest value, while the
    error comes mostly from the far part of the spectrum).
    """
    s = np.asarray(s, dtype=np.float64)
    r = np.asarray(residuals, dtype=np.float64)
    theta = s**2
    gap = np.full(k, np.inf)
    for j in range(k):
        for i in (j - 1, j + 1):
            if 0 <= i < theta.shape[0]:
                neighbour_residual = r[i] if i < r.shape[0] else 0.0
                gap[j] = min(gap[j], abs(theta[j] - theta[i]) - neighbour_residual)
    rk = r[:k]
    separated = gap > rk
    safe_gap = np.where(separated, gap, 1.0)
    value = np.where(separated, rk**2 / safe_gap, rk)
    vector = np.where(separated, np.minimum(1.0, rk / safe_gap), 1.0)
    if theta.shape[0] > k:  # the gap below the whole subspace
        below = theta[k - 1] - theta[k] - (r[k] if r.shape[0] > k else 0.0)
    else:  # the basis spans the whole range: nothing lies below
        below = np.inf
    subspace = min(1.0, float(np.sqrt(np.sum(rk**2))) / below) if below > 0 else 1.0
    floor = lapack_accuracy(s, k, unit_roundoff=unit_roundoff)
    tiny = np.finfo(float).tiny
    return AxisAccuracy(
        singular_value=np.maximum(value / np.maximum(2.0 * theta[:k], tiny), floor.singular_value),
        vector=np.maximum(vector, floor.vector),
        subspace=max(subspace, floor.subspace),
        basis="ritz residuals",
        relative_gap=_relative_gaps(theta, k),
    )


def _relative_gaps(theta: np.ndarray, k: int) -> np.ndarray:
    """``min_{i≠j} |θ_j − θ_i| / θ_j`` for the first ``k`` of the values ``θ`` (descending)."""
    gaps = np.full(k, np.inf)
    for j in range(k):
        for i in (j - 1, j + 1):
            if 0 <= i < theta.shape[0]:
                gaps[j] = min(gaps[j], abs(theta[j] - theta[i]))
    return gaps / np.maximum(theta[:k], np.finfo(float).tiny)


def _grown(A: np.ndarray, new: np.ndarray, capacity: int) -> np.ndarray:
    """``[A, new]``, written into spare columns of the buffer ``A`` is a view of when it has
    room, otherwise into a new column-major buffer of ``capacity`` columns (so the basis is
    copied once per restart, not on every pass; columns not yet written take no memory).
    Measured at 100,000 × 160: 2.6 s of ``hstack`` copies over a fit's 9 passes."""
    rows, width = A.shape
    buffer = A.base
    if isinstance(buffer, np.ndarray) and buffer.ndim == 2 and buffer.flags.c_contiguous and buffer.shape[1] == rows:
        buffer = buffer.T  # written by _restarted as its transpose: column-major as seen here
    in_place = (isinstance(buffer, np.ndarray) and buffer.ndim == 2 and buffer.flags.f_contiguous
                and A.flags.f_contiguous and buffer.shape[0] == rows and buffer.shape[1] >= width + new.shape[1]
                and A.__array_interface__["data"][0] == buffer.__array_interface__["data"][0])
    if not in_place:
        buffer = np.empty((rows, max(capacity, width + new.shape[1])), order="F")
        buffer[:, :width] = A
    buffer[:, width : width + new.shape[1]] = new
    return buffer[:, : width + new.shape[1]]


def _restarted(A: np.ndarray, W: np.ndarray, capacity: int) -> np.ndarray:
    """``A·W`` written straight into the first columns of a column-major buffer of
    ``capacity`` columns, which :func:`_grown` then fills in place (no copy of the restarted
    basis on the next pass; measured for ``B`` at 100,000 × 160 → 140 columns, one restart and
    the next append: 0.39 s by ``A @ W`` and a copy, 0.13 s this way)."""
    rows, keep = A.shape[0], W.shape[1]
    buffer = np.empty((max(capacity, keep), rows))  # row-major transpose of the column-major buffer
    np.matmul(np.ascontiguousarray(W.T), A.T, out=buffer[:keep])
    return buffer[:keep].T


def _ritz(G: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Singular values and right singular vectors of ``B`` (n × L) from its L × L Gram matrix
    ``G = BᵀB``.

    Holding only ``B`` and an ``L × L`` matrix (not the ``n × L`` left factor) keeps memory
    at one copy of the basis; squaring the condition number costs nothing for the leading
    values that are wanted.
    """
    evals, W = scipy.linalg.eigh(G, check_finite=False)
    order = np.argsort(evals)[::-1]
    return np.sqrt(np.maximum(evals[order], 0.0)), W[:, order]


def _gram_extended(G: np.ndarray, B: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """``[B, Y]ᵀ[B, Y]`` from ``G = BᵀB``: only the products with the new columns ``Y``.

    A pass adds ``l`` columns to a basis of ``m``, so this costs ``n·l·(m + l)`` instead of
    ``n·(m + l)²`` (measured at 100,000 × up to 160 columns over a fit's 9 passes, with the
    eigensolver: 0.35–0.6 s in full, 0.02 s this way). Every entry is one dot product of two columns, as in ``BᵀB``, and the matrix is
    exactly symmetric (the new cross block is mirrored).
    """
    m, l = G.shape[0], Y.shape[1]
    out = np.empty((m + l, m + l))
    out[:m, :m] = G
    cross = B.T @ Y
    out[:m, m:] = cross
    out[m:, :m] = cross.T
    out[m:, m:] = Y.T @ Y
    return out


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
    adjust: "Residualizer | None" = None,
) -> Factorization:
    """Leading singular triplets of ``X̃`` by LAPACK (``gesdd``) on the whole matrix.

    For small inputs only: holds ``X̃`` in float64 (``8·n·p`` bytes). One pass. With
    ``adjust``, of ``P·X̃`` (residualised in place before the SVD).
    """
    runner = runner or PassRunner()
    n, p = X.shape
    mean = np.asarray(mean, float)
    d = np.asarray(inverse_scale, float)
    dense = np.empty((n, p))

    def task(block):
        if is_sparse(block):  # small inputs only: the whole matrix is held dense here anyway
            block = block.toarray()
        block = _filled(block, fill)
        return (block.astype(np.float64) - mean) * d

    def fold(result, index, start):
        dense[start : start + result.shape[0]] = result

    runner.run("exact", source, X, task, fold)
    if adjust is not None:
        adjust.dense(dense)
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
        accuracy=lapack_accuracy(s, k),
        spectrum=s.copy(),
    )


def lapack_accuracy(s: np.ndarray, k: int, *, unit_roundoff: float = np.finfo(np.float64).eps / 2) -> AxisAccuracy:
    """Error bounds of the leading ``k`` singular triplets of a dense float64 SVD by LAPACK.

    From the LAPACK Users' Guide (Anderson et al., 3rd ed., SIAM 1999, §4.9.1, "Further
    Details: Error Bounds for the Singular Value Decomposition"): each computed singular
    value is within ``ε·σ₁`` of the exact one, and the angle between a computed singular
    vector and the exact one is at most ``ε·σ₁/gap_j``, ``gap_j = min_{i≠j} |σ_j − σ_i|``
    (the guide's modest factor ``p(m, n)`` taken as 1, as in its own example code); ``ε``
    is the unit roundoff (LAPACK's ``EPSMCH``; float64 by default). ``s`` holds the
    singular values known (all of them for a dense SVD), descending.
    """
    s = np.asarray(s, dtype=np.float64)
    return accuracy_from_error(s, k, unit_roundoff * float(s[0]) if s.size else 0.0, "lapack error bounds")


def accuracy_from_error(s: np.ndarray, k: int, error: float, basis: str) -> AxisAccuracy:
    """Per-axis bounds from an absolute error ``error`` on every singular value (Weyl) and the
    gaps between the known values ``s`` (descending): loading angles at most ``error/gap``
    (Wedin), the ``k``-axis subspace at most ``error/(s_k − s_{k+1})``."""
    s = np.asarray(s, dtype=np.float64)
    gaps = np.array([np.min(np.abs(s[j] - np.delete(s, j))) if s.size > 1 else np.inf for j in range(k)])
    tiny = np.finfo(float).tiny
    below = float(s[k - 1] - s[k]) if s.size > k else np.inf
    return AxisAccuracy(
        singular_value=error / np.maximum(s[:k], tiny),
        vector=np.minimum(1.0, error / np.maximum(gaps, tiny)),
        subspace=min(1.0, error / below) if below > 0 else 1.0,
        basis=basis,
        relative_gap=_relative_gaps(s**2, k),
    )


def _unit_roundoff(dtype) -> float:
    """Unit roundoff of the arithmetic on blocks of ``dtype`` (float32 or float64)."""
    return float(np.finfo(np.result_type(dtype, np.float32)).eps / 2)


def _orthonormal(Z: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the columns of ``Z`` (economic QR, float64)."""
    Q, _ = scipy.linalg.qr(Z, mode="economic", check_finite=False)
    return Q
