"""Are the axes stable? Split the samples in two halves, fit each half, compare the axes.

For ``repeats`` random splits of the active samples into two halves, the leading ``k``
axes of each half are computed and compared with those of the other half:

* **each axis**: the absolute cosine between the two halves' loading vectors (the
  uncentred correlation of the loadings; loadings have unit length). Each half's axes are
  first matched to the whole fit's axes by the Hungarian algorithm on their absolute
  cosines (:func:`scipy.optimize.linear_sum_assignment`, maximising the sum), so that an
  axis that changes rank between halves (two axes of nearly equal variance) is still
  compared with its counterpart. The stability of axis ``j`` is the median of that cosine
  over the repeats, a value in [0, 1].
* **the subspace of the first j axes**: the cosine of the largest principal angle between
  the spans of the first ``j`` axes of the two halves (the smallest singular value of
  ``V_Aᵀ·V_B``; Björck & Golub 1973, "Numerical methods for computing angles between linear
  subspaces", Math. Comp. 27(123), doi:10.2307/2005662), median over repeats. Axes that
  swap or mix with a neighbour of nearly equal variance have low values of their own but a
  stable subspace together.

An axis whose stability is below ``threshold`` (default 0.8; common practice, no source) is
flagged unstable.

Each half is the fit's preprocessed matrix restricted to the half's samples (centre and
scale of the whole active set, from the fit) and then **re-centred on the half's own
mean** (unless the fit was not centred), so that each half is a PCA of its samples in the
fit's units. The re-centring is
exact and costs nothing extra: with ``m_h`` the half's mean row of ``X̃`` (accumulated in
the first pass),
``(X̃_h − 1m_hᵀ)ᵀ(X̃_h − 1m_hᵀ)·Q = X̃_hᵀX̃_h·Q − n_h·m_h(m_hᵀQ)``; the half means of
standardised data are of order ``1/√n_h``, so the rank-one term cancels nothing.

Shared reads: every pass reads the matrix once and advances all ``2·repeats``
half-problems: each block's rows are split by the half masks of every repeat and each half
accumulates its own ``X̃_hᵀ(X̃_h·Q_h)``. Each half runs a randomized block Krylov iteration
(Halko, Martinsson & Tropp 2011, SIAM Review 53(2), doi:10.1137/090771806; Musco & Musco
2015, arXiv:1504.05477) from its own Gaussian start of width ``l = k + oversample``, with
a Rayleigh–Ritz step on the whole basis after every pass, for at most ``max_passes``
passes; it stops earlier when every half's ``k`` Ritz vectors are within a sine of
``SETTLED_SINE`` of the exact ones (the residual bound of
:func:`axiscope.core.engine.ritz_accuracy`).

Why not start from the whole fit's loadings: both halves would then start from the same
vectors, and an axis not yet converged (an axis of the noise, whose half-sample vectors
are never resolved in a few passes) keeps much of that common start and looks stable when
it is not (measured: planted rank 3, axes 4–6 of pure noise, exact half-sample cosines
0.03–0.19; one pass from the whole fit's loadings gave 0.83–0.97, two passes 0.30–0.48).
Independent random starts err the other way: an unconverged axis looks less stable.

Memory: per half the basis and its image, ``2·p·l·max_passes`` float64, so
``4·repeats·p·l·max_passes·8`` bytes in all, plus the fit's blocks in flight. Compute: each
pass costs about ``repeats`` times the block products of one pass of the fit.
"""

from __future__ import annotations

import contextlib
import logging
import numbers
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.linalg
from scipy.optimize import linear_sum_assignment

from ..core.backends import Reduction, open_backend
from ..core.engine import ritz_accuracy
from ..core.options import Resources
from ..core.passes import PassRunner, Progress, blas_threads
from ..errors import OptionError
from ..fitting.result import FitResult
from ..fitting.run import FittedBlocks, fitted_blocks
from ..io import MatrixSource

__all__ = ["AxisStability", "axis_stability", "DEFAULT_THRESHOLD", "DEFAULT_MAX_PASSES", "DEFAULT_OVERSAMPLE",
           "SETTLED_SINE",
           "STABILITY_FILE", "stability_values", "check_stability_options"]

logger = logging.getLogger(__name__)

#: Axes whose stability is below this are flagged unstable (common practice, no source).
DEFAULT_THRESHOLD = 0.8
#: Largest number of passes over the data (each advancing every half). On the demo cohort
#: (1,200 × 6,000, 10 axes) 2 passes put its third axis at 0.61 instead of 0.895, 3 passes
#: its fourth at 0.48–0.51 and 4 passes at 0.59, the value of 8 passes (0.594).
DEFAULT_MAX_PASSES = 4
#: The iteration stops earlier when the sine of the angle between every half's computed and
#: exact loading vectors is bounded by this (the reported values are then good to ~0.01).
SETTLED_SINE = 0.01
#: Extra dimensions of each half's Krylov block beyond the fit's axes.
DEFAULT_OVERSAMPLE = 5
#: The table written into the fit's result folder.
STABILITY_FILE = "axis_stability.tsv"


@dataclass
class AxisStability:
    """Split-half stability of the axes of a fit.

    Attributes
    ----------
    axis_names : list of str
    per_repeat : ndarray, shape (repeats, k)
        Absolute cosine between the two halves' loading vectors matched to each axis.
    subspace_per_repeat : ndarray, shape (repeats, k)
        Cosine of the largest principal angle between the spans of the first ``j + 1`` axes
        of the two halves.
    threshold : float
    passes : int
        Passes over the data (each read advances every half).
    read_from : str
        Where the passes read the blocks: ``input`` (decoded again), or the fit's cache
        (``memory``, ``scratch``) or ``source`` (an uncompressed input read again).
    seconds : float
    angle_bound : ndarray, shape (k,)
        Largest bound, over halves and repeats, on the sine of the angle between a half's
        computed loading vector and its exact one (1: not resolved in the passes run).
    loadings : list of tuple of ndarray
        Each repeat's two halves' loading vectors (``p × k`` each, half order, unit columns).
    halves : ndarray of int8, shape (repeats, n)
        The half (0 or 1) of each active sample in each repeat.
    seed : int or None
    execution : dict or None
        Where the passes ran: ``{"backend": "threaded", ...}`` or the cluster's record.
    """

    axis_names: list[str]
    per_repeat: np.ndarray
    subspace_per_repeat: np.ndarray
    threshold: float
    passes: int
    read_from: str
    seconds: float
    angle_bound: np.ndarray
    loadings: list = field(default_factory=list, repr=False)
    halves: np.ndarray | None = field(default=None, repr=False)
    seed: int | None = None
    #: Where the passes ran (threads or a cluster), as the fit's manifest records its own.
    execution: dict | None = None

    @property
    def repeats(self) -> int:
        return int(self.per_repeat.shape[0])

    @property
    def value(self) -> np.ndarray:
        """Per axis: the median over repeats of the halves' absolute cosine, in [0, 1]."""
        return np.median(self.per_repeat, axis=0)

    @property
    def subspace(self) -> np.ndarray:
        """Per axis ``j``: median over repeats of the subspace agreement of the first ``j + 1`` axes."""
        return np.median(self.subspace_per_repeat, axis=0)

    @property
    def stable(self) -> np.ndarray:
        return self.value >= self.threshold

    def table(self) -> pd.DataFrame:
        """One row per axis: ``axis``, ``stability``, ``stable``, ``lowest``, ``highest`` (over repeats),
        ``subspace_agreement`` (first axes up to this one) and ``angle_bound``."""
        return pd.DataFrame({
            "axis": self.axis_names,
            "stability": self.value,
            "stable": self.stable,
            "lowest": self.per_repeat.min(axis=0),
            "highest": self.per_repeat.max(axis=0),
            "subspace_agreement": self.subspace,
            "angle_bound": self.angle_bound,
        })

    def record(self) -> dict:
        """The manifest's ``"stability"`` record (plain JSON types)."""
        return {
            "method": "split halves, re-centred; axes matched to the fit's by the Hungarian algorithm "
                      "on absolute cosines; median over repeats",
            "threshold": float(self.threshold),
            "repeats": self.repeats,
            "passes": int(self.passes),
            "read_from": self.read_from,
            "seconds": round(float(self.seconds), 3),
            "seed": self.seed,
            **({} if self.execution is None else {"execution": self.execution}),
            "file": STABILITY_FILE,
            "axes": [{"axis": a, "stability": float(v), "stable": bool(s), "subspace_agreement": float(g),
                      "angle_bound": float(b)}
                     for a, v, s, g, b in zip(self.axis_names, self.value, self.stable, self.subspace,
                                              self.angle_bound)],
        }

    def write(self, directory: Path, *, parquet: bool = False) -> None:
        """Write :data:`STABILITY_FILE` into ``directory``."""
        from ..io.output import write_table

        write_table(self.table(), Path(directory) / STABILITY_FILE, parquet=parquet)


def axis_stability(
    source: MatrixSource | FittedBlocks,
    result: FitResult,
    *,
    stability_repeats: int = 3,
    stability_threshold: float = DEFAULT_THRESHOLD,
    max_passes: int = DEFAULT_MAX_PASSES,
    oversample: int = DEFAULT_OVERSAMPLE,
    seed: int = 0,
    active: np.ndarray | None = None,
    threads: int | None = None,
    progress: Progress | None = None,
    scheduler=None,
    cluster: str | None = None,
) -> AxisStability:
    """Split-half stability of the axes of ``result``, all halves sharing each read.

    Parameters
    ----------
    source : MatrixSource or FittedBlocks
        The opened input of the fit (decoded again on every pass), or the fit's blocks as
        :func:`axiscope.fitting.fit` hands them to its ``then`` callback (read from the fit's
        cache, in memory or on scratch, while it is open).
    result : FitResult
        The fit; its preprocessing, block rows and loadings are used.
    stability_repeats : int, default=3
        Random splits of the active samples into two halves.
    stability_threshold : float, default=0.8
        Axes with a stability below it are flagged unstable (named like the options of
        ``axiscope fit`` they come from).
    max_passes : int, default=4
        Largest number of passes over the data (at least 2).
    oversample : int, default=5
        Extra dimensions of each half's Krylov block beyond the ``k`` axes (5 and 10 gave the
        same values to 0.005 on the demo cohort after 4 passes; 5 costs a quarter less).
    seed : int, default=0
        Seed of the splits and of the random starts; the same seed gives the same values
        whatever the number of threads.
    active : ndarray of bool, optional
        The fit's active samples (default: all).
    threads : int, optional
        Blocks worked on at once (default: the fit's).
    progress : callable, optional
        ``progress(pass_name, blocks_done, n_blocks)``.
    scheduler, cluster
        With a ``MatrixSource``: the ``dask.distributed`` cluster the passes run on, as for
        :func:`axiscope.fitting.fit` (:class:`axiscope.Resources`: a scheduler's address or a
        client, or ``"local:N"``); neither: the current client if the caller made one,
        otherwise threads. Fitted blocks run where the fit ran (these are then ignored).
        The values agree with the threaded run's to rounding (sums over blocks in another order).

    Returns
    -------
    AxisStability

    Raises
    ------
    OptionError
        An option out of range, or halves too small for the fit's number of axes.

    Notes
    -----
    Passes over the data: between 2 and ``max_passes`` (see the module's description).
    """
    repeats, threshold, max_passes, oversample = _check(stability_repeats, stability_threshold, max_passes,
                                                        oversample, seed)
    k = result.model.n_components
    n = result.model.n_samples
    half = n // 2
    if half - 1 < k:
        raise OptionError(f"stability_repeats: halves of {half} samples have rank at most {half - 1}, fewer "
                          f"than the fit's {k} axes; fit fewer axes or leave stability out")
    t0 = time.perf_counter()
    threads = threads or int(result.manifest.get("plan", {}).get("threads", 1))
    rng = np.random.default_rng(seed)
    labels = np.stack([_split(n, rng) for _ in range(repeats)])
    with contextlib.ExitStack() as stack:
        if isinstance(source, FittedBlocks):
            blocks = source  # read where the fit left them, on the fit's cluster if any
        else:  # the input read again, on the cluster asked for (or the current client's)
            backend = stack.enter_context(open_backend(Resources(threads=threads, scheduler=scheduler,
                                                                 cluster=cluster)))
            blocks = fitted_blocks(source, result, active=active, name="stability", backend=backend)
        runner = PassRunner(threads=threads, progress=progress, backend=blocks.backend)
        with blas_threads(threads):
            halves, passes = _iterate(blocks, labels, k, oversample, max_passes, rng, runner,
                                      recentre=bool(result.model.spec.center))
        execution = runner.describe()
    full = np.asarray(result.model.components, dtype=np.float64)
    per_repeat, subspace = stability_values(full, [(halves[2 * r].vectors, halves[2 * r + 1].vectors)
                                                   for r in range(repeats)])
    out = AxisStability(
        axis_names=list(result.axis_names), per_repeat=per_repeat, subspace_per_repeat=subspace,
        threshold=threshold, passes=passes, read_from=blocks.source, seconds=time.perf_counter() - t0,
        angle_bound=np.max(np.stack([h.bound for h in halves]), axis=0),
        loadings=[(halves[2 * r].vectors, halves[2 * r + 1].vectors) for r in range(repeats)],
        halves=labels, seed=int(seed), execution=execution,
    )
    unstable = [a for a, s in zip(out.axis_names, out.stable) if not s]
    if unstable:
        logger.info("unstable axes (split-half stability below %g): %s", threshold, ", ".join(unstable))
    return out


def check_stability_options(repeats, threshold) -> None:
    """Refuse a number of repeats or a threshold out of range (before any work is done)."""
    _check(repeats, threshold, DEFAULT_MAX_PASSES, 0, 0)


def _check(repeats, threshold, max_passes, oversample, seed):
    def whole(value, name, low):
        if not (isinstance(value, numbers.Integral) and not isinstance(value, bool) and value >= low):
            raise OptionError(f"{name}={value!r} is not a whole number >= {low}; pass one")
        return int(value)

    repeats = whole(repeats, "stability_repeats", 1)
    if isinstance(threshold, bool) or not isinstance(threshold, numbers.Real) or not 0.0 < float(threshold) < 1.0:
        raise OptionError(f"stability_threshold={threshold!r} is not a value between 0 and 1; choose e.g. 0.8")
    whole(seed, "seed", 0)
    return repeats, float(threshold), whole(max_passes, "max_passes", 2), whole(oversample, "oversample", 0)


def _split(n: int, rng: np.random.Generator) -> np.ndarray:
    """Half labels 0/1 of ``n`` samples: a random ``n // 2`` get 0, the rest 1."""
    labels = np.ones(n, dtype=np.int8)
    labels[rng.permutation(n)[: n // 2]] = 0
    return labels


def stability_values(full: np.ndarray, pairs: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """Per repeat and axis: the halves' matched absolute cosine, and the subspace agreement.

    Parameters
    ----------
    full : ndarray, shape (p, k)
        The whole fit's loadings (unit columns).
    pairs : list of (ndarray, ndarray), each shape (p, k)
        The two halves' loadings of each repeat, in each half's order of variance.

    Returns
    -------
    per_repeat, subspace : ndarray, shape (repeats, k)
    """
    k = full.shape[1]
    per_repeat = np.empty((len(pairs), k))
    subspace = np.empty((len(pairs), k))
    for r, (A, B) in enumerate(pairs):
        a, b = A[:, _match(full, A)], B[:, _match(full, B)]
        per_repeat[r] = np.minimum(1.0, np.abs(np.einsum("ij,ij->j", a, b)))
        for j in range(k):
            cosines = scipy.linalg.svd(A[:, : j + 1].T @ B[:, : j + 1], compute_uv=False)
            subspace[r, j] = min(1.0, float(cosines[-1]))
    return per_repeat, subspace


def _match(full: np.ndarray, half: np.ndarray) -> np.ndarray:
    """For each axis of ``full``, the column of ``half`` assigned to it (maximum total |cosine|)."""
    rows, cols = linear_sum_assignment(np.abs(full.T @ half), maximize=True)
    return cols[np.argsort(rows)]


# ------------------------------------------------------------------ the shared iterations


@dataclass
class _Half:
    """One half's block Krylov basis ``K`` and its image ``AK = X̃_hcᵀX̃_hc·K`` (re-centred)."""

    n_rows: int
    rank_limit: int  # number of the model's features
    K: np.ndarray
    AK: np.ndarray
    Q: np.ndarray  # the block the next pass multiplies
    vectors: np.ndarray | None = None
    bound: np.ndarray | None = None
    done: bool = False


def _iterate(blocks, labels: np.ndarray, k: int, oversample: int, max_passes: int, rng, runner: PassRunner,
             *, recentre: bool = True):
    """Block Krylov iterations of all halves, one shared read per pass; returns the halves and passes.

    ``recentre``: centre each half on its own mean (a fit without centring leaves them uncentred).
    """
    p = blocks.mean.shape[0]
    kept = np.arange(p) if blocks.kept is None else np.asarray(blocks.kept)
    n_rows = [int(np.sum(labels[r] == h)) for r in range(labels.shape[0]) for h in (0, 1)]
    halves = []
    for n_h in n_rows:
        l = min(k + oversample, kept.shape[0], n_h - 1)
        start = np.zeros((p, l))  # drawn over the model's features only: the same start whatever the columns
        start[kept] = rng.standard_normal((kept.shape[0], l))
        halves.append(_Half(n_h, kept.shape[0], np.empty((p, 0)), np.empty((p, 0)), _orthonormal(start)))
    X = blocks.X
    roundoff = float(np.finfo(np.result_type(X.dtype, np.float32)).eps / 2)  # of the block products
    centre = blocks.mean.astype(X.dtype)
    residual = blocks.mean - centre.astype(np.float64)
    sums = None
    passes = 0
    for i in range(max_passes):
        Ws = [(blocks.inverse_scale[:, None] * h.Q).astype(X.dtype) for h in halves]
        offsets = [residual @ W.astype(np.float64) for W in Ws]
        grams, ysums, colsums = _shared_pass(runner, blocks, labels, Ws, offsets, centre, blocks.fill,
                                             first=sums is None, name=f"stability pass {i + 1}")
        passes += 1
        if sums is None:  # Σ of each half's rows of X̃
            sums = [blocks.inverse_scale * (c - h.n_rows * residual) for c, h in zip(colsums, halves)]
        for h, g, ysum, s in zip(halves, grams, ysums, sums):
            Z = blocks.inverse_scale[:, None] * (g - np.outer(residual, ysum))
            if recentre:  # on the half's own mean
                Z -= np.outer(s, (s @ h.Q) / h.n_rows)
            _advance(h, Z, k, roundoff)
        if i >= 1 and all(h.done or float(np.max(h.bound)) <= SETTLED_SINE for h in halves):
            break
        if all(h.done for h in halves):
            break
    for h in halves:  # in the model's features (the other columns are zero)
        h.vectors = h.vectors[kept]
    return halves, passes


def _advance(h: _Half, Z: np.ndarray, k: int, roundoff: float) -> None:
    """Add the block and its image to the basis, take the Ritz pairs, prepare the next block."""
    h.K = np.hstack([h.K, h.Q])
    h.AK = np.hstack([h.AK, Z])
    H = h.K.T @ h.AK
    evals, W = scipy.linalg.eigh((H + H.T) / 2.0, check_finite=False)
    order = np.argsort(evals)[::-1]
    theta, W = np.maximum(evals[order], 0.0), W[:, order]
    m = min(k + 1, W.shape[1])
    residuals = np.linalg.norm(h.AK @ W[:, :m] - (h.K @ W[:, :m]) * theta[:m], axis=0)
    h.vectors = h.K @ W[:, :k]
    h.bound = ritz_accuracy(np.sqrt(theta), residuals, k, unit_roundoff=roundoff).vector
    room = min(h.n_rows - 1, h.rank_limit) - h.K.shape[1]
    h.Q = _new_directions(Z[:, : max(0, min(Z.shape[1], room))], h.K) if room > 0 else h.K[:, :0]
    h.done = h.Q.shape[1] == 0  # the basis spans every direction the half has: its pairs are exact


def _new_directions(Z: np.ndarray, K: np.ndarray) -> np.ndarray:
    """Orthonormal directions of ``Z`` outside the span of ``K`` (vanishing ones dropped).

    A direction is dropped when its part outside ``K`` is below ``1e-7·‖Z‖`` (from the
    eigenvalues of the small Gram matrix, so ``1e-14`` relative in squares): the basis has
    then reached every direction the half has.
    """
    if Z.shape[1] == 0:
        return Z
    scale = max(float(np.linalg.norm(Z, 2)), np.finfo(float).tiny)
    for _ in range(2):
        Z = Z - K @ (K.T @ Z)
    evals, V = scipy.linalg.eigh(Z.T @ Z, check_finite=False)
    keep = evals > (1e-7 * scale) ** 2
    Q = Z @ V[:, keep]
    for _ in range(2):
        Q = Q - K @ (K.T @ Q)
    return _orthonormal(Q) if Q.shape[1] else Q


def _orthonormal(Z: np.ndarray) -> np.ndarray:
    Q, _ = scipy.linalg.qr(Z, mode="economic", check_finite=False)
    return Q


def _shared_pass(runner: PassRunner, blocks, labels, Ws, offsets, centre, fill, *, first: bool, name: str):
    """One read of the matrix: for every half, ``C_hᵀ·Y_h``, ``Σ Y_h`` and (first pass) ``Σ C_h``.

    ``C_h`` are the half's rows of the block centred (in the data's dtype) on the fit's centre
    rounded to it, ``Y_h = C_h·W_h − 1·offset_h`` in float64. Each block receives its rows of
    the half labels; results are folded in block order (on a cluster, summed on the workers).
    """
    n_halves = len(Ws)
    acc = {"g": [np.zeros((W.shape[0], W.shape[1])) for W in Ws],
           "y": [np.zeros(W.shape[1]) for W in Ws],
           "c": [np.zeros(Ws[0].shape[0]) for _ in Ws] if first else None}

    def fold(result, index, start):
        for j in range(n_halves):
            g, ysum, csum = result[j]
            acc["g"][j] += g
            acc["y"][j] += ysum
            if csum is not None:
                acc["c"][j] += csum

    runner.run(name, blocks.source, blocks.X, _half_task, fold, centre, fill, first, *Ws, *offsets,
               rows=np.ascontiguousarray(labels.T), reduce=HALF_SUMS)
    return acc["g"], acc["y"], acc["c"] if first else [None] * n_halves


def _half_task(block, label_rows, centre, fill, first, *arrays):
    """:func:`_half_products` of one block, given its rows of the labels (samples × repeats) and
    the halves' ``W`` then ``offset`` arrays (each its own argument, so a cluster sends each once)."""
    half = len(arrays) // 2
    return _half_products(block, label_rows.T, 0, arrays[:half], arrays[half:], centre, fill, first)


def _add_halves(a, b):
    """The summed products of two runs of blocks, half by half (a cluster's tree sum)."""
    return [(ga + gb, ya + yb, None if ca is None else ca + cb) for (ga, ya, ca), (gb, yb, cb) in zip(a, b)]


#: On a cluster, every half's products are summed on the workers; only the totals come back.
HALF_SUMS = Reduction(_add_halves)


def _half_products(block, labels, start, Ws, offsets, centre, fill, first):
    """Each half's products for one block: its rows gathered and centred in one copy."""
    if fill is not None:
        bad = ~np.isfinite(block)
        if bad.any():
            block = np.where(bad, fill.astype(block.dtype), block)
    rows = block.shape[0]
    out = []
    for j, (W, offset) in enumerate(zip(Ws, offsets)):
        r, h = divmod(j, 2)
        sub = block[labels[r, start : start + rows] == h]  # a copy: centred in place
        sub -= centre
        y = (sub @ W).astype(np.float64)
        y -= offset
        g = (sub.T @ y.astype(block.dtype)).astype(np.float64)
        csum = sub.sum(axis=0, dtype=np.float64) if first else None
        out.append((g, y.sum(axis=0), csum))
    return out
