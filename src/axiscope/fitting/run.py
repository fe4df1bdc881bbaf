"""Fitting: readers → preprocessing → engine → model, with the tables people use.

:func:`fit` streams a matrix from disk, computes feature statistics, factorises the
implicitly centred and scaled matrix, and returns a :class:`FitResult` holding the model
and the per-axis, per-sample and per-feature tables as pandas DataFrames.
"""

from __future__ import annotations

import logging
import numbers
import os
import platform
import sys
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..core.adjust import Adjustment, Covariates, Residualizer, block_cross
from ..core.backends import Reduction, SourceBlocks, WorkerCache, open_backend, read_block, read_sparse_block
from ..core.cache import BlockCache, remove_scratch_leftovers
from ..core.engine import Factorization, exact_factorization, randomized_factorization
from ..core.onepass import one_pass_factorization
from ..core.options import METHODS, EngineSettings, InputLayout, Resources
from ..core.passes import PassRunner, Progress, array_from_blocks, blas_threads
from ..core.plan import BlockPlan, plan_fit
from ..core.sparse_ops import SparseBlockCache, is_sparse, sparse_stats_task
from ..core.preprocess import (
    BlockStats,
    FeatureStatistics,
    Preprocessing,
    PreprocessSpec,
    block_statistics,
    first_nonfinite,
    statistics_and_sketch,
)
from ..errors import InputError, OptionError, counted
from ..io import MatrixSource, opened
from ..model.store import Model
from ..model.training import (
    training_extras,  # diagnostics and shrinkage stored in the model
)
from .result import FitResult

__all__ = ["fit", "METHODS", "max_components", "FittedBlocks", "fitted_blocks"]

logger = logging.getLogger(__name__)

#: ``method="auto"`` uses LAPACK when the smaller side of the matrix is at most this.
EXACT_MAX_SIDE = 300


def fit(
    source: MatrixSource | str | os.PathLike,
    *,
    n_components: int = 10,
    preprocess: PreprocessSpec | None = None,
    engine: EngineSettings | None = None,
    resources: Resources | None = None,
    layout: InputLayout | None = None,
    active: np.ndarray | None = None,
    exclude_features: np.ndarray | None = None,
    progress: Progress | None = None,
    covariates: Covariates | None = None,
    checksum: str = "sampled",
    checkpoint: str | os.PathLike | None = None,
    resume: bool = False,
    then: "Callable[[FitResult, FittedBlocks], None] | None" = None,
) -> FitResult:
    """Principal component analysis of a matrix on disk, out of core.

    Parameters
    ----------
    source : MatrixSource or path
        The matrix (samples × features once oriented). A path is opened with
        :func:`axiscope.io.open_matrix` as ``layout`` says.
    n_components : int, default=10
        Number of principal components ``k``; at most the rank the matrix can have:
        ``min(samples − 1, features)`` when centred, ``min(samples, features)`` when not
        (features counted after the preprocessing's selection), and no more than the
        numerical rank of the preprocessed matrix.
    preprocess : PreprocessSpec, optional
        Centring, scaling, transforms and filters (default: standardized PCA).
    engine : EngineSettings, optional
        Method, oversampling, power iterations, requested accuracy ``tol`` and seed.
    resources : Resources, optional
        Memory budget, threads and scratch folder.
    layout : InputLayout, optional
        Dataset, id sources and orientation of the matrix in its file (paths only).
    active : ndarray of bool, shape (n_samples,), optional
        Samples used to build the axes; the others are left out (supplementary).
    exclude_features : ndarray of bool, shape (n_features,), optional
        Features left out of the axes (supplementary features); they are still read.
    progress : callable, optional
        ``progress(pass_name, blocks_done, n_blocks)``.
    covariates : Covariates, optional
        Annotation columns regressed out of every feature of the preprocessed matrix before
        the axes are fitted (intercept included; categorical columns as indicators of all
        levels but the first). The scales are those before adjustment. No extra pass and no
        corrected copy (:mod:`axiscope.core.adjust`); variances, variance ratios and sample
        distances are those of the adjusted matrix, and the model keeps what scoring needs.
    checksum : {"sampled", "full"}, default="sampled"
        How the input's identity, recorded in the manifest and the model, is hashed
        (:func:`axiscope.io.identity.file_identity`).
    checkpoint : path, optional
        Folder where the randomized iteration's state is kept after each completed pass
        (:class:`axiscope.core.checkpoint.Checkpoint`).
    resume : bool, default=False
        Continue from the state in ``checkpoint``, when there is one of the same inputs
        and options (another is refused); the result is byte for byte that of an
        uninterrupted fit.
    then : callable, optional
        ``then(result, blocks)``, called once the fit is done while its block cache is still
        open: further passes over ``blocks`` (:class:`FittedBlocks`) read the transformed
        blocks from memory or scratch rather than decoding the input again (for example the
        split-half stability, :func:`axiscope.decide.stability.axis_stability`).

    Returns
    -------
    FitResult
        Its manifest's ``accuracy`` gives, per axis, the estimated relative error of the
        singular value and the sine of the angle to the exact loading vector
        (:func:`axiscope.core.engine.ritz_accuracy`), and whether each value is within
        ``engine.tol``.

    Raises
    ------
    OptionError
        An option of the wrong type or out of range, or ``n_components`` above the rank.
    InputError
        The input cannot be read or holds values the options do not allow.

    Notes
    -----
    Passes over the data: one for the statistics (fused with the first sketch unless a
    feature filter or mean imputation is requested, in which case the sketch takes a
    second pass), one per power iteration, one final. The input is decoded once: later
    passes read transformed blocks from memory or from an uncompressed scratch file.
    """
    t_start = time.perf_counter()
    preprocess = _option(preprocess, PreprocessSpec, "preprocess")
    engine = _option(engine, EngineSettings, "engine")
    resources = _option(resources, Resources, "resources")
    layout = _option(layout, InputLayout, "layout")
    if not (isinstance(n_components, numbers.Integral) and not isinstance(n_components, bool)
            and n_components >= 1):
        raise OptionError(f"n_components={n_components!r} is not a whole number >= 1; pass one")
    if isinstance(source, MatrixSource) and not layout.is_default:
        raise OptionError("layout describes a file, but source is an opened MatrixSource; pass the "
                          "file's path instead, or leave layout out")
    if resume and checkpoint is None:
        raise OptionError("resume=True needs the folder of the saved state; pass checkpoint=...")
    job = _Job(int(n_components), preprocess, engine, resources, progress, t_start, checksum,
               None if checkpoint is None else Path(checkpoint), bool(resume))
    with opened(source, **layout.open_options()) as src, blas_threads(resources.n_threads), \
            open_backend(resources) as backend:
        return _fit(src, replace(job, backend=backend), active, exclude_features, covariates, then)


def _option(value, kind: type, name: str):
    """``value``, or the default ``kind()`` when None; anything else is an error."""
    if value is None:
        return kind()
    if not isinstance(value, kind):
        raise OptionError(f"{name} is a {type(value).__name__}, not a {kind.__name__} object; "
                          f"pass axiscope.{kind.__name__}(...)")
    return value


def max_components(n_samples: int, n_features: int, *, center: bool) -> int:
    """The largest number of axes a matrix can have: its rank at most.

    Centring subtracts the mean of the samples, which removes one dimension:
    ``min(n_samples − 1, n_features)``; without centring ``min(n_samples, n_features)``.
    """
    return min(n_samples - 1 if center else n_samples, n_features)


@dataclass(frozen=True)
class _Job:
    """The settings of one fit, checked."""

    k: int
    spec: PreprocessSpec
    engine: EngineSettings
    resources: Resources
    progress: Progress | None
    t_start: float
    checksum: str = "sampled"
    checkpoint: Path | None = None
    resume: bool = False
    backend: object = None  # None: threads of this process; else a cluster (core/backends.py)


def _fit(src: MatrixSource, job: _Job, active, exclude, covariates=None, then=None) -> FitResult:
    """The steps of a fit: check, plan, read statistics, preprocess, factorise, record."""
    active, exclude = _masks(src, active, exclude)
    n = int(active.sum())
    _check_components(job.k, n, src.shape[1], job.spec.center,
                      "the array" if src.format == "array" else src.path)
    adjust = None if covariates is None else Adjustment.prepare(
        covariates, np.asarray(src.sample_ids)[active], center=job.spec.center, missing=job.spec.missing,
        n_components=job.k)
    remove_scratch_leftovers(job.resources.scratch)
    plan = plan_fit(src, n_components=job.k, preprocess=job.spec, engine=job.engine,
                    resources=job.resources)
    method = _choose_method(job.engine.method, n, src.shape[1], job.spec, plan.budget - plan.baseline)
    runner = PassRunner(threads=plan.threads, progress=job.progress, backend=job.backend,
                        read_ahead=plan.read_ahead, cached_threads=plan.cached_threads)
    identity = _input_identity(src, job.checksum)
    checkpoint = _checkpoint(job, identity, plan, active, exclude, method, adjust)
    rng = job.engine.generator()
    reader = _Reader(src, job.spec, active, plan.block_rows, plan.block_nonzeros)
    if reader.sparse and adjust is not None and method != "one-pass":
        raise OptionError(f"{src.path}: a sparse matrix is not yet fitted after a covariate adjustment "
                          "in several passes; read it once (the one-pass method), drop the adjustment, "
                          "or store the matrix dense")
    if method == "one-pass":
        stats, prep, fac, residualizer = _one_pass(src, job, reader, exclude, n, rng, runner, adjust)
        return _result(src, job, active, n, prep, stats, fac, plan, runner, filtered=False, identity=identity,
                       checkpoint=checkpoint, adjust=adjust, residualizer=residualizer)
    filtered = job.spec.has_filter or exclude is not None
    with _Caches(plan, job.resources, sparse=reader.sparse) as caches:
        if job.backend is not None and job.backend.reads_on_workers(src):
            # workers read their own blocks: kept in their memory when the plan has room for the
            # cache in memory, in a scratch file of each worker when it plans a scratch file,
            # otherwise read from the input on every pass
            caches.mode = job.backend.cache = job.backend.cache_mode(plan.cache)
        first_cache = None if filtered else caches.new(n, src.shape[1], src.dtype)
        fuse = not filtered and job.spec.missing == "error" and method == "randomized"
        l = min(job.k + job.engine.oversample, min(n, src.shape[1]))
        # Ω rounded to the data's dtype, so that the float64 correction of the sketch uses
        # the very numbers the products used
        omega = rng.standard_normal((src.shape[1], l)).astype(np.result_type(src.dtype, np.float32)) \
            .astype(np.float64) if fuse else None
        stats, sketch = _statistics_pass(reader.array("read", cache=first_cache), job.spec, omega,
                                         runner, src, active, centre=job.spec.center, adjust=adjust)
        prep = _preprocessing(job, stats, exclude, src, n)
        operand = _Operand.build(job.spec, stats, prep, reader, caches, filtered=filtered, filled=first_cache)
        residualizer = None
        if adjust is not None:  # the covariates, as the engine's products need them
            residualizer = adjust.residualizer(operand.inverse_scale, operand.columns)
            if sketch is not None:
                sketch = adjust.adjusted_sketch(sketch, omega)
        fac = _factorise(method, operand, job, n, rng, runner, plan, sketch, residualizer, checkpoint)
        result = _result(src, job, active, n, prep, stats, fac, plan, runner, filtered=operand.columns is not None,
                         identity=identity, checkpoint=checkpoint, adjust=adjust, residualizer=residualizer)
        caches.record(result.manifest["plan"])
        if then is not None:
            then(result, operand.blocks(reader, prep, job.backend))
    return result


def _result(src, job, active, n, prep, stats, fac, plan, runner, *, filtered: bool, identity: dict,
            checkpoint=None, adjust: Adjustment | None = None, residualizer: Residualizer | None = None) -> FitResult:
    """The model, the manifest and the tables of a finished factorisation."""
    _check_numerical_rank(fac, job.k, src.dtype, n, int(prep.kept.shape[0]))
    model = _model(src, job.spec, prep, stats, fac, n, filtered)
    if adjust is not None:
        _record_adjustment(model, adjust, residualizer, prep, filtered, fac)
    manifest = _manifest(src, job, n, prep, stats, fac, plan, runner)
    if adjust is not None:
        manifest["adjusted_for"] = adjust.design.to_dict(adjust.rank)
    model.info["training_input"] = manifest["input"]["identity"] = identity
    if checkpoint is not None:
        manifest["checkpoint"] = checkpoint.record()
    return FitResult(
        model=model,
        sample_ids=np.asarray(src.sample_ids)[active],
        scores=fac.scores,
        sample_sq_dist=fac.row_sq_norms,
        factorization=fac,
        preprocessing=prep,
        statistics=stats,
        input_feature_ids=np.asarray(src.feature_ids),
        manifest=manifest,
    )


# ------------------------------------------------------------------------ the steps


def _masks(src: MatrixSource, active, exclude) -> tuple[np.ndarray, np.ndarray | None]:
    """The active-sample mask (all by default) and the excluded-feature mask (None if empty)."""
    n_all, p_all = src.shape
    if exclude is not None:
        exclude = np.asarray(exclude, dtype=bool)
        if exclude.shape != (p_all,):
            raise OptionError(f"exclude_features has {exclude.shape[0] if exclude.ndim else 0} entries "
                              f"for {p_all} features; pass one bool per feature")
        if not exclude.any():
            exclude = None
    active = np.ones(n_all, dtype=bool) if active is None else np.asarray(active, dtype=bool)
    if active.shape != (n_all,):
        raise OptionError(f"active has {active.shape[0] if active.ndim else 0} entries for {n_all} "
                          "samples; pass one bool per sample")
    n = int(active.sum())
    if n < 2:
        raise InputError(f"{src.path}: fewer than 2 active samples ({n}); at least 2 are needed")
    return active, exclude


def _check_components(k: int, n: int, p: int, center: bool, where, *, after: str = "") -> None:
    """``k`` within the rank the matrix can have (structural: from its shape)."""
    limit = max_components(n, p, center=center)
    if k > limit:
        rule = "min(samples − 1, features) when centred" if center else "min(samples, features) when not centred"
        raise OptionError(
            f"n_components={k} is more axes than {where} can give: {n} samples × {p} features{after} "
            f"have rank at most {limit} ({rule}); choose at most {limit}"
        )


def _one_pass(src: MatrixSource, job: _Job, reader: _Reader, exclude, n: int, rng, runner, adjust=None):
    """Statistics and both sketches in one read of the input (no cache, no second pass); with
    ``adjust``, of the matrix after the covariate adjustment."""
    spec = job.spec
    if spec.has_filter or spec.missing != "error":
        raise OptionError(
            "a one-pass fit cannot use min_variance, top_variable or missing='mean': they need the "
            "feature statistics before the pass that reads the values; drop them or use the default passes"
        )
    active_index = np.flatnonzero(reader.active)
    found: dict = {}

    def finish(block_stats: BlockStats):
        stats = FeatureStatistics.from_block_stats(block_stats)
        prep = _preprocessing(job, stats, exclude, src, n)
        found.update(stats=stats, prep=prep)
        d = np.zeros(src.shape[1])
        d[prep.kept] = prep.inverse_scale
        return np.where(spec.center, stats.mean, 0.0), d

    def missing(row: int, column: int) -> None:
        sample = src.sample_ids[active_index[row]]
        raise InputError(f"{src.path}: sample {sample!r}, feature {src.feature_ids[column]!r} is NaN or "
                         "infinite (after the transforms); fix the input (a one-pass fit imputes nothing)")

    result = one_pass_factorization(
        reader.array("read"), n_components=job.k, oversample=job.engine.oversample, rng=rng,
        finish=finish, omit=exclude, on_missing=missing, runner=runner, source="input", adjust=adjust,
        fresh_blocks=True,  # the reader's blocks are fresh copies (MatrixSource.read_samples)
    )
    fac = result.factorization
    fac.sketch = {"relative_error": result.relative_error, "widths": list(result.widths),
                  "distances_estimated": result.distances_estimated, "precision": result.working_precision}
    return found["stats"], found["prep"], fac, result.residualizer


def _choose_method(method: str, n: int, p: int, spec: PreprocessSpec, budget: int) -> str:
    """``"auto"``: LAPACK when the smaller side is small and the dense matrix fits a third of the budget."""
    if method != "auto":
        return method
    dense_bytes = 8 * n * min(spec.top_variable or p, p)
    small = min(n, p) <= EXACT_MAX_SIDE and dense_bytes * 3 <= budget
    return "exact" if small else "randomized"


def block_spans(n: int, block_rows: int, sample_chunk: int | None) -> list[tuple[int, int]]:
    """Row ranges of the blocks: ``block_rows`` each, never across an on-disk chunk boundary.

    Blocks smaller than the on-disk chunk split each chunk into nearly equal parts, so a
    read decodes one chunk, never two (a block across a boundary held two decoded chunks at
    once: measured +370 MB instead of +186 MB for 96 MB chunks). The partition depends on
    the shape, ``block_rows`` and the chunking only.
    """
    if not sample_chunk or block_rows >= sample_chunk or sample_chunk >= n:
        return [(s, min(n, s + block_rows)) for s in range(0, n, block_rows)]
    spans = []
    for c0 in range(0, n, sample_chunk):
        c1 = min(n, c0 + sample_chunk)
        parts = -(-(c1 - c0) // block_rows)
        edges = [c0 + ((c1 - c0) * j) // parts for j in range(parts + 1)]
        spans += [(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]
    return spans


class _Reader:
    """Blocks of active samples, read and transformed, as Dask arrays for the passes."""

    def __init__(self, src: MatrixSource, spec: PreprocessSpec, active: np.ndarray, block_rows: int,
                 block_nonzeros: int | None = None):
        self.src, self.spec, self.active = src, spec, active
        self.all_active = bool(active.all())
        #: sparse input: CSR blocks cut by stored values (core/sparse_ops.py)
        self.sparse = bool(getattr(src, "sparse", False))
        if self.sparse:
            spans = src.sample_spans(block_rows, block_nonzeros or src.shape[1])
        else:
            spans = block_spans(src.shape[0], block_rows, src.sample_chunk)
        counts = [int(active[a:b].sum()) for a, b in spans]
        self.spans = [(a, b) for (a, b), c in zip(spans, counts) if c > 0]
        self.rows = [c for c in counts if c > 0]
        self.starts = np.concatenate([[0], np.cumsum(self.rows)])[:-1]
        self.token = uuid.uuid4().hex

    def block(self, i: int, columns=None, cache: BlockCache | None = None) -> np.ndarray:
        a, b = self.spans[i]
        # sparse blocks stay compressed, in the products' layout (core/sparse_ops.py)
        read = read_sparse_block if self.sparse else read_block
        block = read(self.src, (a, b), None if self.all_active else self.active[a:b], self.spec, columns)
        if cache is not None:
            cache.put(int(self.starts[i]), block)
        return block

    def blocks(self, columns=None, cache: BlockCache | WorkerCache | None = None) -> SourceBlocks:
        """The blocks as a picklable description (a cluster's workers read them themselves)."""
        masks = [None if self.all_active else self.active[a:b] for a, b in self.spans]
        if isinstance(cache, WorkerCache):  # the workers keep the blocks they read
            cache.columns = columns
            return SourceBlocks(self.src, self.spans, masks, self.spec, columns, None, self.token, True,
                                sparse=self.sparse, keep_on_disk=cache.on_disk)
        store = None if cache is None else (lambda i, block: cache.put(int(self.starts[i]), block))
        return SourceBlocks(self.src, self.spans, masks, self.spec, columns, store, self.token, sparse=self.sparse)

    def array(self, name: str, columns=None, cache: BlockCache | None = None):
        """The input read once more (filling ``cache`` when given), as a Dask array."""
        width = self.src.shape[1] if columns is None else columns.shape[0]
        return array_from_blocks(self.blocks(columns, cache), self.rows, width, self.src.dtype, f"{name}-{self.token}")

    def load_cached(self, cache: BlockCache):
        """``load(i)``: the ``i``-th block from ``cache``."""
        return lambda i: cache.get(int(self.starts[i]), int(self.starts[i]) + self.rows[i])

    def cached(self, cache: BlockCache | WorkerCache, width: int):
        """The blocks stored in ``cache``, as a Dask array."""
        if isinstance(cache, WorkerCache):
            return array_from_blocks(self.blocks(cache.columns, cache), self.rows, width, self.src.dtype,
                                     f"workers-{self.token}")
        return array_from_blocks(
            lambda i: cache.get(int(self.starts[i]), int(self.starts[i]) + self.rows[i]),
            self.rows, width, self.src.dtype, f"cache-{self.token}",
        )


@dataclass(frozen=True)
class FittedBlocks:
    """The fit's matrix for further passes: blocks of transformed values, and the centre,
    inverse scale and fill of their columns (the kept features in model order, or every input
    feature with inverse scale 0 for those not kept, see ``kept``).

    ``X̃ = (X − 1·meanᵀ)·diag(inverse_scale)`` over the active samples is the matrix the fit
    factorised; ``X`` is a row-chunked Dask array whose blocks are those of the fit.
    """

    X: object  # dask.array.Array, active samples × columns
    mean: np.ndarray
    inverse_scale: np.ndarray
    fill: np.ndarray | None
    load: object  # load(i): the i-th block (what X's i-th chunk computes)
    rows: list  # rows of each block
    #: Position of each of the model's features among the blocks' columns (None: the same
    #: columns); the other columns have inverse scale 0.
    kept: np.ndarray | None = None
    #: Where the blocks are read from: "input", "memory", "scratch" or "source".
    source: str = "input"
    #: The cluster the fit ran on (None: threads of this process); passes over these blocks
    #: run there too (their blocks may be kept by its workers).
    backend: object = None


def fitted_blocks(src: MatrixSource, result: FitResult, *, active: np.ndarray | None = None,
                  name: str = "again", backend=None) -> FittedBlocks:
    """The matrix ``result`` was fitted on, as the same blocks of the same active samples.

    Each pass over the returned array reads the input once more (no cache is kept), with the
    fit's per-sample transforms and block rows; features other than the kept ones are
    dropped from each block (no copy when all are kept).

    Parameters
    ----------
    src : MatrixSource
        The input the fit read.
    result : FitResult
    active : ndarray of bool, shape (n_samples,), optional
        The fit's active samples (default: all).
    name : str
        Name of the Dask array (a prefix; a unique token is added).
    backend : ClusterBackend, optional
        The cluster the passes over the blocks run on (its workers read the blocks from the
        input themselves); None: threads of this process.
    """
    active = np.ones(src.shape[0], dtype=bool) if active is None else np.asarray(active, dtype=bool)
    if active.shape != (src.shape[0],) or int(active.sum()) != result.model.n_samples:
        raise OptionError(f"active selects {int(active.sum())} samples, but the fit used "
                          f"{result.model.n_samples}; pass the fit's active mask")
    prep, spec = result.preprocessing, result.model.spec
    reader = _Reader(src, spec, active, int(result.manifest["plan"]["block_rows"]))
    columns = None if prep.kept.shape[0] == src.shape[1] else np.asarray(prep.kept)
    fill = np.asarray(prep.mean_raw, dtype=np.float64) if spec.missing == "mean" else None
    return FittedBlocks(reader.array(name, columns), np.asarray(prep.mean, dtype=np.float64),
                        np.asarray(prep.inverse_scale, dtype=np.float64), fill,
                        lambda i: reader.block(i, columns), list(reader.rows), None, "input", backend)


class _Caches:
    """Block caches of a fit (none when the plan re-reads the input), closed at the end."""

    def __init__(self, plan: BlockPlan, resources: Resources, *, sparse: bool = False):
        self.mode = plan.cache
        self.allowance = plan.cache_allowance if plan.cache == "compressed" else None
        self.resources = resources
        self.sparse = sparse
        self.opened: list[BlockCache] = []

    def new(self, n_rows: int, n_cols: int, dtype) -> BlockCache | WorkerCache | None:
        if self.mode == "source":
            return None
        if self.mode in ("workers", "worker scratch"):
            return WorkerCache(on_disk=self.mode == "worker scratch")
        if self.sparse:  # the plan keeps sparse blocks in memory or re-reads the source
            cache = SparseBlockCache()
            self.opened.append(cache)
            return cache
        scratch = self.resources.scratch_folder() if self.mode in ("scratch", "compressed") else None
        cache = BlockCache(self.mode, n_rows, n_cols, dtype, scratch, allowance=self.allowance)
        self.opened.append(cache)
        return cache

    def record(self, plan: dict) -> None:
        """What a compressed cache held in memory and wrote to scratch, into the manifest's plan."""
        for cache in self.opened:
            if getattr(cache, "mode", None) == "compressed":
                plan["cache_held_bytes"] = cache.held_bytes
                plan["cache_spilled_bytes"] = cache.spilled_bytes

    def __enter__(self) -> "_Caches":
        return self

    def __exit__(self, *exc) -> None:
        for cache in self.opened:
            cache.close()


def _preprocessing(job: _Job, stats: FeatureStatistics, exclude, src: MatrixSource, n: int) -> Preprocessing:
    """Kept features, centre and scale from the statistics; checks that enough are left."""
    prep = Preprocessing.from_statistics(job.spec, stats, exclude)
    n_kept = int(prep.kept.shape[0])
    if n_kept < 2:
        raise InputError(
            f"{src.path}: fewer than 2 features left after dropping constant or filtered "
            f"ones ({n_kept} kept); relax min_variance or top_variable"
        )
    _check_components(job.k, n, n_kept, job.spec.center, "the preprocessed matrix",
                      after=" left after dropping constant or filtered ones")
    if prep.dropped.get("constant"):
        n_constant = prep.dropped["constant"]
        logger.warning("%s dropped as constant (%s); listed in dropped_features.tsv",
                       counted(n_constant, "feature was", "features were"), prep.rules["constant"])
    return prep


@dataclass
class _Operand:
    """What the engine factorises: blocks, and the centre, inverse scale and fill of their columns.

    Without a feature filter the columns are all input features (dropped ones get inverse
    scale 0) and the blocks come from the cache filled by the statistics pass; with one,
    only the kept features, and the first pass over them (``first``) fills the cache.
    """

    columns: np.ndarray | None
    mean: np.ndarray
    inverse_scale: np.ndarray
    fill: np.ndarray | None
    first: object | None  # Dask array read from the input, filling the cache
    later: object  # Dask array of the passes after it
    later_source: str
    cache: BlockCache | None = None

    @classmethod
    def build(cls, spec, stats, prep, reader: _Reader, caches: _Caches, *, filtered: bool,
              filled: BlockCache | None) -> "_Operand":
        """``filled``: the cache the statistics pass filled (None with a feature filter)."""
        p_all = reader.src.shape[1]
        if filtered:
            columns = prep.kept
            mean, d = prep.mean, prep.inverse_scale
            fill = prep.mean_raw if spec.missing == "mean" else None
            cache = caches.new(int(sum(reader.rows)), columns.shape[0], reader.src.dtype)
            first = reader.array("sel", columns, cache)
        else:
            columns = None
            mean = np.where(spec.center, stats.mean, 0.0)
            d = np.zeros(p_all)
            d[prep.kept] = prep.inverse_scale
            fill = stats.mean if spec.missing == "mean" else None
            cache, first = filled, None
        width = p_all if columns is None else columns.shape[0]
        if cache is not None:
            later, source = reader.cached(cache, width), caches.mode
        else:
            later, source = reader.array("reread", columns), "source"
        return cls(columns, mean, d, fill, first, later, source, cache)

    def blocks(self, reader: _Reader, prep: Preprocessing, backend=None) -> FittedBlocks:
        """The blocks the later passes read (cache or input), for passes after the fit (on ``backend``)."""
        load = reader.load_cached(self.cache) if self.cache is not None else \
            (lambda i: reader.block(i, self.columns))
        kept = None if self.columns is not None or prep.kept.shape[0] == reader.src.shape[1] else prep.kept
        return FittedBlocks(self.later, self.mean, self.inverse_scale, self.fill, load, list(reader.rows),
                            kept, self.later_source, backend)


def _input_identity(src: MatrixSource, checksum: str) -> dict | None:
    """Size, modification time and hash of the input file (None for an in-memory array)."""
    from ..io.identity import file_identity

    if src.format == "array" or src.path is None or not Path(src.path).exists():
        return None
    return file_identity(src.path, checksum=checksum)


def _checkpoint(job: _Job, identity, plan: BlockPlan, active, exclude, method: str, adjust=None):
    """The fit's checkpoint (None without ``checkpoint``), keyed by what determines the result."""
    if job.checkpoint is None:
        return None
    from ..core.checkpoint import Checkpoint, fingerprint_of

    fingerprint = fingerprint_of(
        input={"size": None if identity is None else identity["size"],
               "hash": None if identity is None else identity["hash"]},
        n_components=job.k, preprocessing=job.spec.to_dict(), engine=job.engine.to_dict(), method=method,
        block_rows=plan.block_rows, max_basis=plan.max_basis, active_samples=active,
        excluded_features=exclude,
        covariates=None if adjust is None else adjust.basis,
    )
    checkpoint = Checkpoint(job.checkpoint, fingerprint, resume=job.resume)
    checkpoint.state = checkpoint.load()  # refused now, before any pass, when it is another fit's
    return checkpoint


def _factorise(method: str, op: _Operand, job: _Job, n: int, rng, runner, plan: BlockPlan,
               sketch, adjust: Residualizer | None = None, checkpoint=None) -> Factorization:
    """LAPACK on the dense matrix, or randomized block Krylov iterations on the blocks."""
    if method == "exact":
        return exact_factorization(op.first if op.first is not None else op.later, op.mean,
                                   op.inverse_scale, n_components=job.k, fill=op.fill, runner=runner,
                                   source=op.later_source if op.first is None else "input", adjust=adjust)
    start = None
    if sketch is not None:  # the statistics pass took (X − 1μᵀ)ᵀ(X − 1μᵀ)·Ω (or XᵀX·Ω); scale it
        start = op.inverse_scale[:, None] * sketch
    # without a fused start, the sketch pass reads the input (filling the cache)
    eng = job.engine
    return randomized_factorization(
        op.later, op.mean, op.inverse_scale, n_components=job.k, oversample=eng.oversample,
        power_iterations=eng.power_iterations, tol=eng.tol, rng=rng, start=start,
        fill=op.fill, runner=runner, source=op.later_source, max_basis=plan.max_basis,
        sketch_from=op.first, adjust=adjust, **_checkpoint_hooks(checkpoint, op),
    )


def _checkpoint_hooks(checkpoint, op: _Operand) -> dict:
    """The engine's ``on_pass`` / ``resume_from``: the state saved with the feature statistics,
    which a resumed fit (having computed them again) checks before it continues."""
    if checkpoint is None:
        return {}
    statistics = {"feature_centre": op.mean, "feature_inverse_scale": op.inverse_scale}
    if checkpoint.state is not None:
        checkpoint.check_statistics(statistics)
    return {"on_pass": lambda state: checkpoint.save({**state, **statistics}), "resume_from": checkpoint.state}


def _check_numerical_rank(fac: Factorization, k: int, dtype, n: int, p: int) -> None:
    """No axis of a singular value at rounding level: ``k`` above the numerical rank.

    The tolerance is that of :func:`numpy.linalg.matrix_rank`, ``σ₁·max(n, p)·ε`` with
    ``ε`` the machine epsilon of the data's dtype.
    """
    s = fac.singular_values
    eps = float(np.finfo(np.result_type(dtype, np.float32)).eps)
    threshold = float(s[0]) * max(n, p) * eps if s.size else 0.0
    rank = int(np.sum(s > threshold))
    if rank < k:
        raise OptionError(
            f"n_components={k} is more than the rank of the preprocessed matrix: only {rank} of its "
            f"singular values are above rounding ({max(n, p) * eps:.0e} of the largest); "
            f"choose at most {rank}"
        )


def _model(src, spec, prep, stats, fac, n, filtered) -> Model:
    components = fac.components if filtered else fac.components[prep.kept]
    return Model(
        spec=spec,
        feature_ids=np.asarray(src.feature_ids)[prep.kept],
        mean=prep.mean,
        scale=prep.scale,
        std=prep.std,
        components=components,
        singular_values=fac.singular_values,
        n_samples=n,
        total_inertia=prep.total_inertia,
        n_input_features=src.shape[1],
        info={"method": fac.method},
        extras={
            "input_feature_ids": np.asarray(src.feature_ids, dtype=str),
            "feature_mean": prep.mean_raw,
            "training_sq_dist": fac.row_sq_norms,
            "input_feature_mean": stats.mean,
            **training_extras(fac.singular_values, fac.scores, fac.row_sq_norms,
                              total_inertia=prep.total_inertia, n_features=int(prep.kept.shape[0])),
        },
    )


def _record_adjustment(model: Model, adjust: Adjustment, residualizer: Residualizer, prep: Preprocessing,
                       filtered: bool, fac: Factorization) -> None:
    """What an adjusted model changes and keeps: the inertia and feature spreads of ``P·X̃``
    (so variance ratios and correlations are those of the adjusted features), the
    coefficients ``Γ`` (kept features × terms) and the design, for scoring."""
    M = residualizer.loadings if filtered else residualizer.loadings[prep.kept]
    n = model.n_samples
    removed = np.sum(M**2, axis=1) / n  # variance of each feature of X̃ the covariates explain
    model.total_inertia = max(prep.total_inertia - float(removed.sum()), 0.0)
    model.std = np.sqrt(np.maximum(prep.std**2 - prep.scale**2 * removed, 0.0))
    model.extras.update(training_extras(fac.singular_values, fac.scores, fac.row_sq_norms,
                                        total_inertia=model.total_inertia, n_features=int(prep.kept.shape[0])))
    model.extras["covariate_coef"] = adjust.coefficients(M)
    model.info["covariates"] = adjust.design.to_dict(adjust.rank)


def _manifest(src, job: _Job, n, prep, stats, fac, plan, runner) -> dict:
    n_all, p_all = src.shape
    return {
        "axiscope_version": __version__,
        "input": {
            "path": str(src.path),
            "format": src.format,
            "dataset": src.dataset,
            "samples_in": src.samples_in,
            "shape": [n_all, p_all],
            "dtype": str(src.dtype),
            "stored_dtype": str(src.stored_dtype),
            **src.notes,
            "file_size": src.file_size,
            "modified": _mtime(src.path),
        },
        "n_active_samples": n,
        "n_features_kept": int(prep.kept.shape[0]),
        "features_dropped": prep.dropped,
        "features_dropped_rules": prep.rules,
        "n_missing_imputed": int(stats.n_missing),
        "options": {
            "n_components": job.k,
            **job.engine.to_dict(),
            "method": fac.method,
            "threads": job.resources.n_threads,
            "preprocessing": job.spec.to_dict(),
        },
        "plan": plan.to_dict(),
        "execution": runner.describe(),
        "passes": {
            "count": runner.n_passes,
            "detail": [r.to_dict() for r in runner.records],
        },
        "accuracy": _accuracy_record(fac, job.engine.tol),
        **({"one_pass": _one_pass_record(fac)} if fac.sketch is not None else {}),
        "seconds": round(time.perf_counter() - job.t_start, 3),
        "versions": _versions(),
    }


def _accuracy_record(fac: Factorization, tol: float) -> dict:
    """Per-axis error estimates, whether each singular value is within ``tol``, and how known."""
    acc = fac.accuracy
    axes = acc.to_records([f"PC{j + 1}" for j in range(fac.singular_values.shape[0])], tol)
    return {
        "estimated_from": acc.basis,
        "requested_tol": tol,
        "all_below_tol": all(a["below_tol"] for a in axes),
        "max_singular_value_error": float(np.max(acc.singular_value)),
        "subspace_error": float(acc.subspace),
        "axes": axes,
        "power_iterations_run": fac.power_iterations,
        "converged": fac.converged,
        "last_relative_change": fac.ritz_change if fac.method == "randomized" else None,
    }


def _one_pass_record(fac: Factorization) -> dict:
    """What a one-pass fit gave up, in numbers and words."""
    s, t, q = fac.sketch["widths"]
    return {
        "sketch_widths": {"sample_side": s, "feature_side": t, "error_rows": q},
        "estimated_relative_error": fac.sketch["relative_error"],
        "sample_distances": "estimated" if fac.sketch["distances_estimated"] else "exact",
        "working_precision": fac.sketch.get("precision"),
        "note": ("read once: statistics and two random sketches in the same pass, no power "
                 "iterations; the singular values and loadings are less accurate than the default "
                 "passes give (estimated_relative_error is ‖X̃ − X̃ₖ‖_F / ‖X̃‖_F seen through a separate "
                 "sketch), and each sample's squared distance to the centre is estimated"),
    }


def _stats_task(block, omega32, centre):
    if is_sparse(block):
        return sparse_stats_task(block, omega32, centre)
    # one shifted copy of the block serves the statistics and the sketch (core/preprocess.py)
    stats, sketch = statistics_and_sketch(block, omega32, centre=centre)
    bad = first_nonfinite(block) if stats.n_nonfinite else None
    return stats, sketch, bad


def _block_sketch(block: np.ndarray, omega32: np.ndarray, mean: np.ndarray | None) -> np.ndarray:
    """``(X_b − 1m_bᵀ)ᵀ(X_b − 1m_bᵀ)·Ω`` about the block's own mean ``m_b`` (float64), or
    ``X_bᵀX_b·Ω`` when ``mean`` is None.

    The block is centred in its own dtype on ``c = m_b`` rounded to it (nearby numbers subtract
    exactly); the rounding ``e = m_b − c`` is taken out in float64,
    ``Σ(x−m)(x−m)ᵀ = Σ(x−c)(x−c)ᵀ − rows·e·eᵀ``.
    """
    if mean is None:
        return (block.T @ (block @ omega32)).astype(np.float64)
    c = mean.astype(block.dtype)
    shifted = block - c
    sketch = (shifted.T @ (shifted @ omega32)).astype(np.float64)
    e = mean - c.astype(np.float64)
    sketch -= block.shape[0] * np.outer(e, e @ omega32.astype(np.float64))
    return sketch


def _stats_task_with_rows(block, covariate_rows, omega32, centre):
    """:func:`_stats_task` plus the block's cross product ``X_bᵀ·C̄_b`` with the centred covariates
    (covariate adjustment, which always centres). With a sketch, both products share the block
    shifted to its mean: one product with ``[shifted·Ω, C̄_b]``."""
    stats = block_statistics(block)
    bad = first_nonfinite(block) if stats.n_nonfinite else None
    sketch = cross = None
    if bad is None and omega32 is not None:
        sketch, cross = _block_sketch_and_cross(block, omega32, stats.mean, covariate_rows)
    elif bad is None:
        cross = block_cross(block, covariate_rows, stats.mean)
    return stats, sketch, bad, cross


def _block_sketch_and_cross(block, omega32, mean, covariate_rows) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_block_sketch` about the block's mean, and :func:`axiscope.core.adjust.block_cross`,
    from one shifted copy of the block and one product."""
    c = mean.astype(block.dtype)
    shifted = block - c
    l = omega32.shape[1]
    right = np.hstack([shifted @ omega32, covariate_rows.astype(block.dtype)])
    product = (shifted.T @ right).astype(np.float64)
    sketch = product[:, :l]
    e = mean - c.astype(np.float64)
    sketch -= block.shape[0] * np.outer(e, e @ omega32.astype(np.float64))
    cross = product[:, l:] + np.outer(c.astype(np.float64), covariate_rows.sum(axis=0))
    return np.ascontiguousarray(sketch), cross


def _merge_stats(a, b, omega, centre):
    """The statistics-pass results of two adjacent runs of blocks as one (a cluster's tree sum).

    The same updates as the fold of :func:`_statistics_pass`: Chan's merge of the feature
    statistics and of the sketches about their means; a bad cell's row counted from ``a``'s start.
    """
    stats_a, sketch_a, bad_a = a
    stats_b, sketch_b, bad_b = b
    bad = bad_a if bad_a is not None else None if bad_b is None else (bad_b[0] + stats_a.n_samples, bad_b[1])
    if stats_a is None or stats_b is None:  # a sparse block with a bad cell has no statistics
        return None, None, bad
    sketch = None
    if sketch_a is not None and sketch_b is not None:
        if centre:
            n_a, n_b = stats_a.n_samples, stats_b.n_samples
            delta = stats_b.mean - stats_a.mean
            sketch_b = sketch_b + (n_a * n_b / (n_a + n_b)) * np.outer(delta, delta @ omega)
        sketch = sketch_a + sketch_b
    return stats_a.merge(stats_b), sketch, bad


def _merge_stats_and_cross(a, b, omega, centre):
    """:func:`_merge_stats` of the covariate-adjusted statistics pass: the cross products
    ``X_bᵀ·C̄_b`` add up (None once a bad cell was met)."""
    cross = None if a[3] is None or b[3] is None else a[3] + b[3]
    return (*_merge_stats(a[:3], b[:3], omega, centre), cross)


def _statistics_pass(X, spec, omega, runner, src, active, *, centre: bool = True,
                     adjust: Adjustment | None = None):
    """One pass: feature statistics, and the sketch ``X̃ᵀX̃·Ω`` (unscaled) when ``omega`` is given.

    The mean is not known before the pass, and an uncentred ``XᵀX·Ω`` centred afterwards
    (``− n·μμᵀΩ``) loses every digit when means lie far from zero. So each block's sketch is
    taken about the block's own mean (:func:`_block_sketch`), and the sketches are merged in
    block order like the variances (Chan, Golub & LeVeque 1983): merging ``A`` and ``B``
    adds ``(n_A·n_B/n)·δ(δᵀΩ)``, ``δ = m_B − m_A``, so the result is about the overall mean.
    Without centring (``centre=False``) the plain ``XᵀX·Ω`` is summed. ``omega`` must hold
    values exact in the data's dtype. With ``adjust``, the same pass accumulates
    ``(X − 1μᵀ)ᵀ·C`` into it (:meth:`axiscope.core.adjust.Adjustment.add_cross`).
    """
    omega32 = None if omega is None else omega.astype(X.dtype)
    state: dict = {"stats": None, "sketch": None}
    active_index = np.flatnonzero(active)

    def fold(result, index, start):
        stats, sketch, bad = result[:3]
        if adjust is not None and result[3] is not None:
            adjust.add_cross(result[3])
        if bad is not None and spec.missing == "error":
            row, col = bad
            sample = src.sample_ids[active_index[start + row]]
            feature = src.feature_ids[col]
            raise InputError(
                f"{src.path}: sample {sample!r}, feature {feature!r} is NaN or infinite "
                f"(after the transforms); fix the input or pass missing='mean' to impute feature means"
            )
        before = state["stats"]
        if sketch is not None:
            if before is None:
                state["sketch"] = sketch
            else:
                if centre:  # Chan-style merge about the combined mean
                    n_a, n_b = before.n_samples, stats.n_samples
                    delta = stats.mean - before.mean
                    sketch += (n_a * n_b / (n_a + n_b)) * np.outer(delta, delta @ omega)
                state["sketch"] += sketch
        state["stats"] = stats if before is None else before.merge(stats)

    if adjust is None:
        runner.run("statistics" + (" + sketch" if omega is not None else ""), "input", X,
                   _stats_task, fold, omega32, centre, reduce=Reduction(_merge_stats, (omega, centre)))
    else:
        runner.run("statistics + covariates" + (" + sketch" if omega is not None else ""), "input", X,
                   _stats_task_with_rows, fold, omega32, centre, rows=adjust.centred,
                   reduce=Reduction(_merge_stats_and_cross, (omega, centre)))
    merged: BlockStats = state["stats"]
    return FeatureStatistics.from_block_stats(merged), state["sketch"]


def _mtime(path: Path) -> str | None:
    try:
        return time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(Path(path).stat().st_mtime))
    except OSError:
        return None


def _versions() -> dict:
    import dask
    import h5py
    import scipy
    import zarr

    return {
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "dask": dask.__version__,
        "zarr": zarr.__version__,
        "h5py": h5py.__version__,
        "pandas": pd.__version__,
    }
