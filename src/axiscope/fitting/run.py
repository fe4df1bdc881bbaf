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
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..core.backends import Reduction, SourceBlocks, WorkerCache, open_backend, read_block
from ..core.cache import BlockCache, remove_scratch_leftovers
from ..core.engine import Factorization, exact_factorization, randomized_factorization
from ..core.options import METHODS, EngineSettings, InputLayout, Resources
from ..core.passes import PassRunner, Progress, array_from_blocks, blas_threads
from ..core.plan import BlockPlan, plan_fit
from ..core.preprocess import (
    BlockStats,
    FeatureStatistics,
    Preprocessing,
    PreprocessSpec,
    block_statistics,
    first_nonfinite,
)
from ..errors import InputError, OptionError, counted
from ..io import MatrixSource, opened
from ..model.store import Model
from ..model.training import (
    training_extras,  # diagnostics and shrinkage stored in the model
)
from .result import FitResult

__all__ = ["fit", "METHODS", "max_components"]

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
    job = _Job(int(n_components), preprocess, engine, resources, progress, t_start)
    with opened(source, **layout.open_options()) as src, blas_threads(resources.n_threads), \
            open_backend(resources) as backend:
        return _fit(src, replace(job, backend=backend), active, exclude_features)


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
    backend: object = None  # None: threads of this process; else a cluster (core/backends.py)


def _fit(src: MatrixSource, job: _Job, active, exclude) -> FitResult:
    """The steps of a fit: check, plan, read statistics, preprocess, factorise, record."""
    active, exclude = _masks(src, active, exclude)
    n = int(active.sum())
    _check_components(job.k, n, src.shape[1], job.spec.center,
                      "the array" if src.format == "array" else src.path)
    remove_scratch_leftovers(job.resources.scratch)
    plan = plan_fit(src, n_components=job.k, preprocess=job.spec, engine=job.engine,
                    resources=job.resources)
    method = _choose_method(job.engine.method, n, src.shape[1], job.spec, plan.budget - plan.baseline)
    runner = PassRunner(threads=plan.threads, progress=job.progress, backend=job.backend)
    rng = job.engine.generator()
    reader = _Reader(src, job.spec, active, plan.block_rows)
    filtered = job.spec.has_filter or exclude is not None
    with _Caches(plan, job.resources) as caches:
        if job.backend is not None and job.backend.reads_on_workers(src):
            # workers read their own blocks: kept in the workers' memory when the plan has room
            # for the cache in memory, otherwise decoded from the file on every pass
            caches.mode = job.backend.cache = "workers" if plan.cache == "memory" else "source"
        first_cache = None if filtered else caches.new(n, src.shape[1], src.dtype)
        fuse = not filtered and job.spec.missing == "error" and method == "randomized"
        l = min(job.k + job.engine.oversample, min(n, src.shape[1]))
        # Ω rounded to the data's dtype, so that the float64 correction of the sketch uses
        # the very numbers the products used
        omega = rng.standard_normal((src.shape[1], l)).astype(np.result_type(src.dtype, np.float32)) \
            .astype(np.float64) if fuse else None
        stats, sketch = _statistics_pass(reader.array("read", cache=first_cache), job.spec, omega,
                                         runner, src, active, centre=job.spec.center)
        prep = _preprocessing(job, stats, exclude, src, n)
        operand = _Operand.build(job.spec, stats, prep, reader, caches, filtered=filtered, filled=first_cache)
        fac = _factorise(method, operand, job, n, rng, runner, plan, sketch)
    _check_numerical_rank(fac, job.k, src.dtype, n, int(prep.kept.shape[0]))
    model = _model(src, job.spec, prep, stats, fac, n, operand.columns is not None)
    manifest = _manifest(src, job, n, prep, stats, fac, plan, runner)
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

    def __init__(self, src: MatrixSource, spec: PreprocessSpec, active: np.ndarray, block_rows: int):
        self.src, self.spec, self.active = src, spec, active
        self.all_active = bool(active.all())
        spans = block_spans(src.shape[0], block_rows, src.sample_chunk)
        counts = [int(active[a:b].sum()) for a, b in spans]
        self.spans = [(a, b) for (a, b), c in zip(spans, counts) if c > 0]
        self.rows = [c for c in counts if c > 0]
        self.starts = np.concatenate([[0], np.cumsum(self.rows)])[:-1]
        self.token = uuid.uuid4().hex

    def block(self, i: int, columns=None, cache: BlockCache | None = None) -> np.ndarray:
        a, b = self.spans[i]
        block = read_block(self.src, (a, b), None if self.all_active else self.active[a:b], self.spec, columns)
        if cache is not None:
            cache.put(int(self.starts[i]), block)
        return block

    def blocks(self, columns=None, cache: BlockCache | WorkerCache | None = None) -> SourceBlocks:
        """The blocks as a picklable description (a cluster's workers read them themselves)."""
        masks = [None if self.all_active else self.active[a:b] for a, b in self.spans]
        if isinstance(cache, WorkerCache):  # the workers keep the blocks they read
            cache.columns = columns
            return SourceBlocks(self.src, self.spans, masks, self.spec, columns, None, self.token, True)
        store = None if cache is None else (lambda i, block: cache.put(int(self.starts[i]), block))
        return SourceBlocks(self.src, self.spans, masks, self.spec, columns, store, self.token)

    def array(self, name: str, columns=None, cache: BlockCache | None = None):
        """The input read once more (filling ``cache`` when given), as a Dask array."""
        width = self.src.shape[1] if columns is None else columns.shape[0]
        return array_from_blocks(self.blocks(columns, cache), self.rows, width,
                                 self.src.dtype, f"{name}-{self.token}")

    def cached(self, cache: BlockCache | WorkerCache, width: int):
        """The blocks stored in ``cache``, as a Dask array."""
        if isinstance(cache, WorkerCache):
            return array_from_blocks(self.blocks(cache.columns, cache), self.rows, width, self.src.dtype,
                                     f"workers-{self.token}")
        return array_from_blocks(
            lambda i: cache.get(int(self.starts[i]), int(self.starts[i]) + self.rows[i]),
            self.rows, width, self.src.dtype, f"cache-{self.token}",
        )


class _Caches:
    """Block caches of a fit (none when the plan re-reads the input), closed at the end."""

    def __init__(self, plan: BlockPlan, resources: Resources):
        self.mode = plan.cache
        self.resources = resources
        self.opened: list[BlockCache] = []

    def new(self, n_rows: int, n_cols: int, dtype) -> BlockCache | WorkerCache | None:
        if self.mode == "source":
            return None
        if self.mode == "workers":
            return WorkerCache()
        scratch = self.resources.scratch_folder() if self.mode == "scratch" else None
        cache = BlockCache(self.mode, n_rows, n_cols, dtype, scratch)
        self.opened.append(cache)
        return cache

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
        return cls(columns, mean, d, fill, first, later, source)


def _factorise(method: str, op: _Operand, job: _Job, n: int, rng, runner, plan: BlockPlan,
               sketch) -> Factorization:
    """LAPACK on the dense matrix, or randomized block Krylov iterations on the blocks."""
    if method == "exact":
        return exact_factorization(op.first if op.first is not None else op.later, op.mean,
                                   op.inverse_scale, n_components=job.k, fill=op.fill, runner=runner,
                                   source=op.later_source if op.first is None else "input")
    start = None
    if sketch is not None:  # the statistics pass took (X − 1μᵀ)ᵀ(X − 1μᵀ)·Ω (or XᵀX·Ω); scale it
        start = op.inverse_scale[:, None] * sketch
    # without a fused start, the sketch pass reads the input (filling the cache)
    eng = job.engine
    return randomized_factorization(
        op.later, op.mean, op.inverse_scale, n_components=job.k, oversample=eng.oversample,
        power_iterations=eng.power_iterations, tol=eng.tol, rng=rng, start=start,
        fill=op.fill, runner=runner, source=op.later_source, max_basis=plan.max_basis,
        sketch_from=op.first,
    )


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
            "detail": [
                {"name": r.name, "read_from": r.source, "seconds": round(r.seconds, 3), "blocks": r.n_blocks,
                 **({} if r.bytes_to_client is None else
                    {"bytes_to_client": r.bytes_to_client, "bytes_from_client": r.bytes_from_client})}
                for r in runner.records
            ],
        },
        "accuracy": _accuracy_record(fac, job.engine.tol),
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


def _stats_task(block, omega32, centre):
    stats = block_statistics(block)
    bad = first_nonfinite(block) if stats.n_nonfinite else None
    sketch = None
    if omega32 is not None and bad is None:
        sketch = _block_sketch(block, omega32, stats.mean if centre else None)
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


def _merge_stats(a, b, omega, centre):
    """The statistics-pass results of two adjacent runs of blocks as one (a cluster's tree sum).

    The same updates as the fold of :func:`_statistics_pass`: Chan's merge of the feature
    statistics and of the sketches about their means; a bad cell's row counted from ``a``'s start.
    """
    stats_a, sketch_a, bad_a = a
    stats_b, sketch_b, bad_b = b
    bad = bad_a if bad_a is not None else None if bad_b is None else (bad_b[0] + stats_a.n_samples, bad_b[1])
    sketch = None
    if sketch_a is not None and sketch_b is not None:
        if centre:
            n_a, n_b = stats_a.n_samples, stats_b.n_samples
            delta = stats_b.mean - stats_a.mean
            sketch_b = sketch_b + (n_a * n_b / (n_a + n_b)) * np.outer(delta, delta @ omega)
        sketch = sketch_a + sketch_b
    return stats_a.merge(stats_b), sketch, bad


def _statistics_pass(X, spec, omega, runner, src, active, *, centre: bool = True):
    """One pass: feature statistics, and the sketch ``X̃ᵀX̃·Ω`` (unscaled) when ``omega`` is given.

    The mean is not known before the pass, and an uncentred ``XᵀX·Ω`` centred afterwards
    (``− n·μμᵀΩ``) loses every digit when means lie far from zero. So each block's sketch is
    taken about the block's own mean (:func:`_block_sketch`), and the sketches are merged in
    block order like the variances (Chan, Golub & LeVeque 1983): merging ``A`` and ``B``
    adds ``(n_A·n_B/n)·δ(δᵀΩ)``, ``δ = m_B − m_A``, so the result is about the overall mean.
    Without centring (``centre=False``) the plain ``XᵀX·Ω`` is summed. ``omega`` must hold
    values exact in the data's dtype.
    """
    omega32 = None if omega is None else omega.astype(X.dtype)
    state: dict = {"stats": None, "sketch": None}
    active_index = np.flatnonzero(active)

    def fold(result, index, start):
        stats, sketch, bad = result
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

    runner.run("statistics" + (" + sketch" if omega is not None else ""), "input", X,
               _stats_task, fold, omega32, centre, reduce=Reduction(_merge_stats, (omega, centre)))
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
