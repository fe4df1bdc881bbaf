"""Statistics of supplementary features: one streaming pass over the columns left out of the axes.

Notation: ``X̃`` is the preprocessed (centred and scaled) matrix of the ``n`` active samples,
``F = X̃·V = U·S`` the scores, ``V`` the unit-norm loadings and ``s_a`` the singular values,
so that ``X̃ᵀ·F_a = s_a²·V_a`` and the variance of axis ``a`` is ``s_a²/n``.

Supplementary features are not used to build the axes; their correlations with the scores,
squared cosines and loadings (in the units of the active ones, ``x̃_jᵀ·F_a / s_a²``) come
from one streaming pass over the source's columns, holding ``O(p·k)`` accumulators and a
few row blocks. The active features' statistics follow in closed form from the model
(:func:`axiscope.model.statistics.feature_statistics`).

References
----------
Jolliffe, I. T. & Cadima, J. (2016). Principal component analysis: a review and
recent developments. *Phil. Trans. R. Soc. A* 374, 20150202. doi:10.1098/rsta.2015.0202
"""

from __future__ import annotations

import logging
import os
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..core.memory import (
    default_memory_limit,
    parse_memory,
    process_baseline,
)
from ..core.passes import PassRunner, Progress, array_from_blocks
from ..core.plan import window_block_rows
from ..core.preprocess import (
    PreprocessSpec,
    feature_scale,
    first_nonfinite,
    transform_block,
)
from ..errors import InputError, OptionError
from ..io import MatrixSource
from ..model.statistics import FeatureAxisStatistics

__all__ = ["supplementary_feature_statistics"]

logger = logging.getLogger(__name__)

#: Features finished at a time after the pass, so that temporaries stay small.
_STEP = 65536


def supplementary_feature_statistics(
    source: MatrixSource,
    scores: np.ndarray,
    singular_values: np.ndarray,
    *,
    columns: np.ndarray | None = None,
    rows: np.ndarray | None = None,
    spec: PreprocessSpec | None = None,
    axis_names: Sequence[str] | None = None,
    sample_ids: Sequence[str] | None = None,
    memory_limit: int | str | None = None,
    threads: int | None = None,
    progress: Progress | None = None,
) -> FeatureAxisStatistics:
    """Statistics of features not used to build the axes, in one streaming pass.

    Parameters
    ----------
    source : MatrixSource
        The fitted matrix, or a second matrix with the same samples.
    scores : ndarray, shape (n, k)
        Scores of the active samples (rows ``rows`` of ``source``, in order).
    singular_values : ndarray, shape (k,)
    columns : ndarray of int or bool, optional
        Columns of ``source`` to analyse (default all).
    rows : ndarray of bool, shape (n_samples,), optional
        The active samples (default all).
    spec : PreprocessSpec, optional
        Per-sample transforms (counts per ``T``, ``log(1 + x)``), centring and scaling replayed
        on the columns, as in the fit (default: standardized, no transform).
    axis_names : sequence of str, optional
    sample_ids : sequence of str, optional
        Ids of the scored samples; checked against ``source`` when given.
    memory_limit, threads, progress
        As for :func:`axiscope.fit`.

    Returns
    -------
    FeatureAxisStatistics
        ``contribution`` is NaN (supplementary features contribute nothing).

    Notes
    -----
    The steps: check which rows and columns are used (:func:`_selection`), size the row
    blocks from the memory budget (:func:`_block_rows`), stream the blocks once folding
    sums, sums of squares and cross-products with the scores (:class:`_Sums`), then turn
    the sums into correlations, loadings and squared cosines (:func:`_finish`).

    Memory: ``O(p_sup·k)`` float64 accumulators (cross-products, and with imputation the
    scores of missing cells) plus a window of ``2·threads`` row blocks during the pass, then
    the results (correlation, loading, squared cosine and the NaN contribution); both
    phases are sized to stay within ``memory_limit``. Non-finite cells are an error
    unless ``spec.missing == "mean"``, in which case they count as the feature mean.
    """
    spec = spec or PreprocessSpec()
    F = np.asarray(scores, dtype=np.float64)
    rows, cols = _selection(source, F, rows, columns, sample_ids)
    k = F.shape[1]
    names = list(axis_names) if axis_names is not None else [f"PC{j + 1}" for j in range(k)]
    threads = max(1, int(threads or os.cpu_count() or 1))
    block_rows = _block_rows(source, F.shape[0], cols.shape[0], k, threads, memory_limit,
                             imputing=spec.missing == "mean")
    sums = _stream(source, F, rows, cols, spec, block_rows, threads, progress)
    return _finish(sums, F, singular_values, spec, np.asarray(source.feature_ids, dtype=object)[cols], names)


def _selection(source: MatrixSource, F: np.ndarray, rows, columns, sample_ids) -> tuple[np.ndarray, np.ndarray]:
    """The active-row mask and the column indices, checked against the scores and their ids."""
    n_all, p_all = source.shape
    rows = np.ones(n_all, dtype=bool) if rows is None else np.asarray(rows, dtype=bool)
    if rows.shape != (n_all,):
        raise OptionError(f"{source.path}: the sample mask has {rows.shape[0]} entries for {n_all} samples")
    n = int(rows.sum())
    if F.shape[0] != n:
        raise InputError(f"{source.path}: {F.shape[0]} scored samples but {n} selected rows; use the same samples")
    if sample_ids is not None and not np.array_equal(np.asarray(source.sample_ids, dtype=object)[rows],
                                                     np.asarray(sample_ids, dtype=object)):
        raise InputError(f"{source.path}: sample ids differ from those of the fit; give a matrix with the same "
                         "samples in the same order")
    if columns is None:
        return rows, np.arange(p_all)
    cols = np.asarray(columns)
    return rows, (np.flatnonzero(cols) if cols.dtype == bool else cols.astype(np.int64))


def _block_rows(source: MatrixSource, n: int, p: int, k: int, threads: int, memory_limit, *,
                imputing: bool) -> int:
    """Rows per block so that the accumulators, a window of blocks and the results fit the budget."""
    limit = default_memory_limit() if memory_limit is None else parse_memory(memory_limit)
    held = process_baseline()  # on the command line the limit is for the whole process
    budget = limit - held
    n_all, p_all = source.shape
    # during the pass: (p, k) accumulators of cross-products and, with imputation, of the
    # scores of missing cells; five length-p vectors (sums, squares, counts, shift, column
    # indices); the scores; and a window of row blocks
    accumulators = 8 * p * (k * (2 if imputing else 1) + 5) + 8 * n * k * 2
    # after the pass: correlation, loading, squared cosine and the NaN contribution returned
    # (p, k each), the SD and ids (p each), and the temporaries of one step of features
    results = 8 * p * (4 * k + 2) + 8 * min(p, _STEP) * (4 * k + 8)
    row_bytes = p_all * source.dtype.itemsize * 2 + p * 8 * 3 + 8 * p * k // max(1, n)
    return window_block_rows(source, budget=budget, held=held, limit=limit, accumulators=accumulators,
                             results=results, row_bytes=row_bytes,
                             what=f"statistics of {p} supplementary features on {k} axes")


@dataclass
class _Sums:
    """Sums folded over the row blocks, per supplementary feature.

    ``shift`` is the first row: sums of ``x − shift`` keep the variance accurate (Chan,
    Golub & LeVeque 1983). ``count`` and ``missing_scores`` (the sum of the scores of the
    samples where a feature is missing) exist only once a non-finite cell was seen.
    """

    s1: np.ndarray
    s2: np.ndarray
    cross: np.ndarray
    shift: np.ndarray | None = None
    count: np.ndarray | None = None
    missing_scores: np.ndarray | None = None

    def fold(self, x: np.ndarray, Fb: np.ndarray, start: int, mask: np.ndarray | None) -> None:
        """Add one block ``x`` (rows ``start:start+len(x)``, missing cells zeroed in ``mask``)."""
        if mask is not None:
            if self.count is None:
                self.count = np.full(x.shape[1], float(start))
                self.missing_scores = np.zeros(self.cross.shape)
            self.count += x.shape[0] - mask.sum(axis=0)
            self.missing_scores += mask.T.astype(np.float64) @ Fb
        elif self.count is not None:
            self.count += x.shape[0]
        if self.shift is None:
            self.shift = x[0].copy()
        shifted = x - self.shift
        if mask is not None:
            shifted[mask] = 0.0
        self.s1 += shifted.sum(axis=0)
        np.square(shifted, out=shifted)
        self.s2 += shifted.sum(axis=0)
        del shifted
        self.cross += x.T @ Fb


def _stream(source: MatrixSource, F: np.ndarray, rows: np.ndarray, cols: np.ndarray, spec: PreprocessSpec,
            block_rows: int, threads: int, progress: Progress | None) -> _Sums:
    """One pass over the active rows of ``source``, folding the sums of the columns ``cols``."""
    n_all, p_all = source.shape
    p = cols.shape[0]
    spans = [(a, min(n_all, a + block_rows)) for a in range(0, n_all, block_rows)]
    spans = [(a, b) for a, b in spans if rows[a:b].any()]
    ids = np.asarray(source.sample_ids, dtype=object)[rows]
    imputing = spec.missing == "mean"
    sums = _Sums(np.zeros(p), np.zeros(p), np.zeros((p, F.shape[1])))

    def load(i: int) -> np.ndarray:
        a, b = spans[i]
        block = source.read_samples(a, b)
        return block if rows[a:b].all() else block[rows[a:b]]

    def task(block: np.ndarray):
        block = transform_block(block, spec)  # totals over all columns of the source, as in the fit
        x = (block[:, cols] if p != p_all else block).astype(np.float64)
        return x, first_nonfinite(x)

    def fold(result, index: int, start: int) -> None:
        x, bad = result
        mask = None
        if bad is not None:
            if not imputing:
                r, c = bad
                raise InputError(
                    f"{source.path}: sample {ids[start + r]!r}, feature {source.feature_ids[cols[c]]!r} is NaN "
                    f"or infinite (after the transforms); fix the input or impute missing cells with the "
                    f"feature mean (missing='mean')"
                )
            mask = ~np.isfinite(x)
            x[mask] = 0.0
        sums.fold(x, F[start : start + x.shape[0]], start, mask)

    counts = [int(rows[a:b].sum()) for a, b in spans]
    X = array_from_blocks(load, counts, p_all, source.dtype, f"supfeat-{id(source)}-{os.getpid()}")
    PassRunner(threads=threads, progress=progress).run("supplementary features", "input", X, task, fold)
    return sums


def _finish(sums: _Sums, F: np.ndarray, singular_values: np.ndarray, spec: PreprocessSpec,
            feature_ids: np.ndarray, names: list[str]) -> FeatureAxisStatistics:
    """Correlations, loadings (in the units of the active ones) and squared cosines from the sums."""
    n, k = F.shape
    p = sums.s1.shape[0]
    count = sums.count if sums.count is not None else np.full(p, float(n))
    shift = sums.shift if sums.shift is not None else np.zeros(p)
    f_tot = F.sum(axis=0)
    sd_f = np.sqrt(np.maximum((F**2).sum(axis=0) / n - (f_tot / n) ** 2, 0.0))
    s2 = np.asarray(singular_values, dtype=np.float64) ** 2
    corr, loading, sq_cos = np.empty((p, k)), np.empty((p, k)), np.empty((p, k))
    sd_x = np.empty(p)
    with np.errstate(invalid="ignore", divide="ignore"):
        for lo in range(0, p, _STEP):
            sl = slice(lo, min(p, lo + _STEP))
            d1 = sums.s1[sl] / count[sl]  # mean − shift over present cells
            mean = shift[sl] + d1
            m2 = np.maximum(sums.s2[sl] - count[sl] * d1**2, 0.0)
            sd = np.sqrt(m2 / n)  # imputed cells add nothing (population convention of the fit)
            sd_x[sl] = sd
            cross = sums.cross[sl]
            # Σ over present cells of F, per feature
            f_present = f_tot - sums.missing_scores[sl] if sums.missing_scores is not None else f_tot[None, :]
            centred = cross - mean[:, None] * f_present  # Σ (x − μ)·F over present cells
            corr[sl] = np.clip((centred / n) / (sd[:, None] * sd_f), -1.0, 1.0)
            scale = feature_scale(spec.scale, mean, sd)
            if spec.center:
                xf = centred / scale[:, None]
                norm2 = m2 / scale**2
            else:
                xf = (cross + mean[:, None] * (f_tot - f_present)) / scale[:, None]
                norm2 = (m2 + n * mean**2) / scale**2
            loading[sl] = xf / s2
            sq_cos[sl] = xf**2 / (s2 * norm2[:, None])
    constant = ~(sd_x > 0)
    if constant.any():
        logger.warning("%d supplementary features are constant over the active samples; their "
                       "correlations are undefined (NaN)", int(constant.sum()))
        for values in (corr, sq_cos, loading):
            values[constant] = np.nan
    return FeatureAxisStatistics(
        feature_ids=feature_ids, supplementary=np.ones(p, dtype=bool), loading=loading, correlation=corr,
        contribution=np.full((p, k), np.nan), sq_cosine=sq_cos, n_samples=n, axis_names=names,
    )
