"""Fitting: readers → preprocessing → engine → model, with the tables people use.

:func:`fit` streams a matrix from disk, computes feature statistics, factorises the
implicitly centred and scaled matrix, and returns a :class:`FitResult` holding the model
and the per-axis, per-sample and per-feature tables as pandas DataFrames.
"""

from __future__ import annotations

import logging
import os
import platform
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..core.cache import BlockCache
from ..core.engine import exact_factorization, randomized_factorization
from ..core.memory import default_memory_limit, parse_memory
from ..core.passes import PassRunner, Progress, array_from_blocks, blas_threads
from ..core.plan import plan_blocks
from ..core.preprocess import (
    BlockStats,
    FeatureStatistics,
    Preprocessing,
    PreprocessSpec,
    block_statistics,
    first_nonfinite,
    transform_block,
)
from ..errors import InputError, OptionError
from ..io import MatrixSource, opened
from ..model.store import Model
from ..model.training import (
    training_extras,  # diagnostics and shrinkage stored in the model
)
from .result import FitResult

__all__ = ["fit", "METHODS"]

logger = logging.getLogger(__name__)

METHODS = ("auto", "randomized", "exact")
#: ``method="auto"`` uses LAPACK when the smaller side of the matrix is at most this.
EXACT_MAX_SIDE = 300
def fit(
    source: MatrixSource | str | os.PathLike,
    *,
    n_components: int = 10,
    preprocess: PreprocessSpec | None = None,
    oversample: int = 10,
    power_iterations: int | str = "auto",
    tol: float = 1e-6,
    method: str = "auto",
    seed: int | np.random.Generator = 0,
    memory_limit: int | str | None = None,
    threads: int | None = None,
    scratch: str | os.PathLike | None = None,
    active: np.ndarray | None = None,
    exclude_features: np.ndarray | None = None,
    progress: Progress | None = None,
    dataset: str | None = None,
    sample_ids: str | None = None,
    feature_ids: str | None = None,
    samples_in: str = "rows",
) -> FitResult:
    """Principal component analysis of a matrix on disk, out of core.

    Parameters
    ----------
    source : MatrixSource or path
        The matrix (samples × features once oriented). A path is opened with
        :func:`axiscope.readers.open_matrix` using ``dataset``, ``sample_ids``,
        ``feature_ids`` and ``samples_in``.
    n_components : int, default=10
        Number of principal components ``k``; at most ``min(n, p) − 1``.
    preprocess : PreprocessSpec, optional
        Centring, scaling, transforms and filters (default: standardized PCA).
    oversample : int, default=10
    power_iterations : int or "auto", default="auto"
        See :func:`axiscope.engine.randomized_factorization`.
    tol : float, default=1e-6
        Relative change of the leading singular values that stops ``"auto"`` iterations.
    method : {"auto", "randomized", "exact"}, default="auto"
        ``exact`` holds the preprocessed matrix in memory and calls LAPACK; ``auto`` does
        so when the smaller side is at most ``EXACT_MAX_SIDE`` and the matrix fits the budget.
    seed : int or numpy.random.Generator, default=0
    memory_limit : int or str, optional
        Budget for data held by the fit (default: half the machine's memory).
    threads : int, optional
        Blocks processed at once (default: the number of cores).
    scratch : path, optional
        Where the scratch file goes when transformed blocks do not fit in memory.
    active : ndarray of bool, shape (n_samples,), optional
        Samples used to build the axes; the others are left out (supplementary).
    exclude_features : ndarray of bool, shape (n_features,), optional
        Features left out of the axes (supplementary features); they are still read.
    progress : callable, optional
        ``progress(pass_name, blocks_done, n_blocks)``.

    Returns
    -------
    FitResult

    Notes
    -----
    Passes over the data: one for the statistics (fused with the first sketch unless a
    feature filter or mean imputation is requested, in which case the sketch takes a
    second pass), one per power iteration, one final. The input is decoded once: later
    passes read transformed blocks from memory or from an uncompressed scratch file.
    """
    t_start = time.perf_counter()
    spec = preprocess or PreprocessSpec()
    if method not in METHODS:
        raise OptionError(f"--method {method!r} is not one of {', '.join(METHODS)}")
    if power_iterations != "auto" and (int(power_iterations) < 0 or int(power_iterations) > 100):
        raise OptionError(f"--power-iterations must be 'auto' or between 0 and 100, got {power_iterations}")
    if oversample < 0:
        raise OptionError(f"--oversample must be >= 0, got {oversample}")
    budget = default_memory_limit() if memory_limit is None else parse_memory(memory_limit)
    threads = max(1, int(threads or os.cpu_count() or 1))
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    scratch_dir = Path(scratch) if scratch is not None else None
    if scratch_dir is not None and not scratch_dir.is_dir():
        raise OptionError(f"--scratch {scratch_dir}: no such directory; create it or choose another")

    with opened(source, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                samples_in=samples_in) as src, blas_threads(threads):
        return _fit(src, spec, n_components, oversample, power_iterations, tol, method, rng,
                    budget, threads, scratch_dir, active, exclude_features, progress, t_start, seed)


def _fit(src, spec, k, oversample, power_iterations, tol, method, rng, budget, threads,
         scratch_dir, active, exclude, progress, t_start, seed) -> FitResult:
    n_all, p_all = src.shape
    if exclude is not None:
        exclude = np.asarray(exclude, dtype=bool)
        if exclude.shape != (p_all,):
            raise OptionError(f"the supplementary-feature mask has {exclude.shape[0]} entries for {p_all} features")
        if not exclude.any():
            exclude = None
    if active is None:
        active = np.ones(n_all, dtype=bool)
    active = np.asarray(active, dtype=bool)
    if active.shape != (n_all,):
        raise OptionError(f"the active-sample mask has {active.shape[0]} entries for {n_all} samples")
    n = int(active.sum())
    if n < 2:
        raise InputError(f"{src.path}: fewer than 2 active samples ({n}); at least 2 are needed")
    limit = min(n, p_all) - 1
    if not 1 <= k <= limit:
        raise OptionError(
            f"--components {k} is out of range for {n} samples × {p_all} features; "
            f"choose between 1 and {limit} (min(samples, features) − 1)"
        )
    l = min(k + oversample, min(n, p_all))
    cache_features = spec.top_variable if spec.top_variable else p_all
    plan = plan_blocks(n_all, p_all, src.dtype.itemsize, sketch_width=l, threads=threads,
                       budget=budget, sample_chunk=src.sample_chunk,
                       cache_features=min(cache_features, p_all), scratch=scratch_dir,
                       reread_cheap=src.plain_reads and not (spec.log1p or spec.normalize_total))
    if method == "auto":
        dense_bytes = 8 * n * min(cache_features, p_all)
        small = min(n, p_all) <= EXACT_MAX_SIDE and dense_bytes * 3 <= budget
        method = "exact" if small else "randomized"
    runner = PassRunner(threads=threads, progress=progress)
    spans = [(s, min(n_all, s + plan.block_rows)) for s in range(0, n_all, plan.block_rows)]
    counts = [int(active[a:b].sum()) for a, b in spans]
    keep_spans = [(a, b, c) for (a, b), c in zip(spans, counts) if c > 0]
    cache_starts = np.concatenate([[0], np.cumsum([c for _, _, c in keep_spans])])[:-1]
    all_active = bool(active.all())

    def read_transformed(i: int, columns=None, cache=None):
        a, b, _ = keep_spans[i]
        block = src.read_samples(a, b)
        if not all_active:
            block = block[active[a:b]]
        block = transform_block(block, spec)
        if columns is not None:
            block = np.ascontiguousarray(block[:, columns])
        if cache is not None:
            cache.put(int(cache_starts[i]), block)
        return block

    rows_per_block = [c for _, _, c in keep_spans]
    token = uuid.uuid4().hex[:8]
    filtered = spec.has_filter or exclude is not None
    fuse = not filtered and spec.missing == "error" and method == "randomized"
    cache_first = plan.cache != "source" and not filtered
    cache = None
    try:
        if plan.cache != "source":
            cache_cols = p_all if not filtered else None
            if cache_cols is not None:
                cache = BlockCache(plan.cache, n, cache_cols, src.dtype, scratch_dir)
        X_src = array_from_blocks(
            lambda i: read_transformed(i, cache=cache if cache_first else None),
            rows_per_block, p_all, src.dtype, f"read-{token}",
        )
        omega = rng.standard_normal((p_all, l)) if fuse else None
        stats, raw_sketch = _statistics_pass(X_src, spec, omega, runner, src, active)
        prep = Preprocessing.from_statistics(spec, stats, exclude)
        if prep.kept.shape[0] < 2:
            raise InputError(
                f"{src.path}: fewer than 2 features left after dropping constant or filtered "
                f"ones ({prep.kept.shape[0]} kept); relax --min-variance/--top-variable"
            )
        if k > min(n, prep.kept.shape[0]) - 1:
            raise OptionError(
                f"--components {k} is out of range: {prep.kept.shape[0]} features are kept "
                f"after filtering; choose at most {min(n, prep.kept.shape[0]) - 1}"
            )
        if prep.dropped.get("constant"):
            logger.warning(
                "%d constant features were dropped (zero variance); they are listed in "
                "dropped_features.tsv", prep.dropped["constant"],
            )

        # Column space of the arrays the engine sees: all input features (dropped ones
        # get inverse scale 0) when nothing is filtered, else only the kept features.
        if filtered:
            columns = prep.kept
            mean_c, d_c = prep.mean, prep.inverse_scale
            fill_c = prep.mean_raw if spec.missing == "mean" else None
            if plan.cache != "source":
                cache = BlockCache(plan.cache, n, columns.shape[0], src.dtype, scratch_dir)
            X_first = array_from_blocks(lambda i: read_transformed(i, columns, cache),
                                        rows_per_block, columns.shape[0], src.dtype, f"sel-{token}")
        else:
            columns = None
            mean_c = np.where(spec.center, stats.mean, 0.0)
            d_c = np.zeros(p_all)
            d_c[prep.kept] = prep.inverse_scale
            fill_c = stats.mean if spec.missing == "mean" else None
            X_first = None
        width = p_all if columns is None else columns.shape[0]
        if cache is not None:
            X_iter = array_from_blocks(
                lambda i: cache.get(int(cache_starts[i]), int(cache_starts[i]) + rows_per_block[i]),
                rows_per_block, width, src.dtype, f"cache-{token}",
            )
            iter_source = plan.cache
        else:
            X_iter = array_from_blocks(lambda i: read_transformed(i, columns), rows_per_block,
                                       width, src.dtype, f"reread-{token}")
            iter_source = "source"

        start = None
        if raw_sketch is not None:
            start = d_c[:, None] * (raw_sketch - n * np.outer(mean_c, mean_c @ omega)) \
                if spec.center else d_c[:, None] * raw_sketch
        if method == "exact":
            X_exact = X_first if X_first is not None else X_iter
            fac = exact_factorization(X_exact, mean_c, d_c, n_components=k, fill=fill_c,
                                      runner=runner, source=iter_source if X_first is None else "input")
        else:
            # without a fused start, the sketch pass reads the input (filling the cache)
            fac = randomized_factorization(
                X_iter, mean_c, d_c, n_components=k, oversample=oversample,
                power_iterations=power_iterations, tol=tol, rng=rng, start=start,
                fill=fill_c, runner=runner, source=iter_source, max_basis=plan.max_basis,
                sketch_from=X_first,
            )
    finally:
        if cache is not None:
            cache.close()

    components = fac.components if columns is not None else fac.components[prep.kept]
    feature_ids = np.asarray(src.feature_ids)[prep.kept]
    model = Model(
        spec=spec,
        feature_ids=feature_ids,
        mean=prep.mean,
        scale=prep.scale,
        std=prep.std,
        components=components,
        singular_values=fac.singular_values,
        n_samples=n,
        total_inertia=prep.total_inertia,
        n_input_features=p_all,
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
    t_total = time.perf_counter() - t_start
    manifest = {
        "axiscope_version": __version__,
        "input": {
            "path": str(src.path),
            "format": src.format,
            "dataset": src.dataset,
            "samples_in": src.samples_in,
            "shape": [n_all, p_all],
            "dtype": str(src.dtype),
            "file_size": src.file_size,
            "modified": _mtime(src.path),
        },
        "n_active_samples": n,
        "n_features_kept": int(prep.kept.shape[0]),
        "features_dropped": prep.dropped,
        "n_missing_imputed": int(stats.n_missing),
        "options": {
            "n_components": k,
            "oversample": oversample,
            "power_iterations": power_iterations,
            "tol": tol,
            "method": fac.method,
            "seed": seed if isinstance(seed, int) else None,
            "threads": threads,
            "preprocessing": spec.to_dict(),
        },
        "plan": plan.to_dict(),
        "passes": {
            "count": runner.n_passes,
            "detail": [
                {"name": r.name, "read_from": r.source, "seconds": round(r.seconds, 3), "blocks": r.n_blocks}
                for r in runner.records
            ],
        },
        "accuracy": {
            "power_iterations_run": fac.power_iterations,
            "converged": fac.converged,
            "last_relative_change": fac.ritz_change,
            "max_relative_ritz_residual": fac.ritz_residual,
            "residual_norm_bound": fac.residual_bound,
            "residual_norm_bound_relative": fac.residual_bound / float(fac.singular_values[0])
            if fac.singular_values[0] > 0 else float("nan"),
        },
        "seconds": round(t_total, 3),
        "versions": _versions(),
    }
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


def _stats_task(block, omega32):
    stats = block_statistics(block)
    bad = first_nonfinite(block) if stats.n_nonfinite else None
    sketch = None
    if omega32 is not None and bad is None:
        sketch = (block.T @ (block @ omega32)).astype(np.float64)
    return stats, sketch, bad


def _statistics_pass(X, spec, omega, runner, src, active):
    """One pass: feature statistics, and the uncentred sketch ``XᵀX·Ω`` when ``omega`` is given."""
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
                f"(after the transforms); fix the input or pass --missing mean to impute feature means"
            )
        state["stats"] = stats if state["stats"] is None else state["stats"].merge(stats)
        if sketch is not None:
            state["sketch"] = sketch if state["sketch"] is None else state["sketch"] + sketch

    runner.run("statistics" + (" + sketch" if omega is not None else ""), "input", X,
               _stats_task, fold, omega32)
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
