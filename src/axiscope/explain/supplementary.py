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
from ..core.backends import Reduction, SourceBlocks, read_block
from ..core.passes import PassRunner, Progress, array_from_blocks
from ..core.plan import WINDOW, window_block_rows
from ..core.preprocess import (
    PreprocessSpec,
    feature_scale,
    first_nonfinite,
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
    runner: PassRunner | None = None,
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
    runner : PassRunner, optional
        Runs the pass and keeps its record (default: a new one on ``threads`` threads).
        Made with a cluster back-end (:func:`axiscope.core.backends.open_backend`), the
        workers read their own blocks of a file they can open, add up their sums among
        themselves, and only the ``p × k`` totals come back.

    Returns
    -------
    FeatureAxisStatistics
        ``contribution`` is NaN (supplementary features contribute nothing).

    Notes
    -----
    The steps: check which rows and columns are used (:func:`_selection`), size the row
    blocks from the memory budget (:func:`_block_rows`), stream the blocks once folding
    sums, sums of squares and cross-products with the scores (:class:`_Sums`, per block,
    added up in block order or by a cluster's fixed tree), then turn
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
    runner = runner or PassRunner(threads=threads, progress=progress)
    sums, shift = _stream(source, F, rows, cols, spec, block_rows, runner)
    return _finish(sums, shift, F, singular_values, spec, np.asarray(source.feature_ids, dtype=object)[cols], names)


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
    # the sums of each block in flight (WINDOW of them, as for the blocks, so that any thread
    # count cuts the samples the same way): gone once the pass is over
    in_flight = WINDOW * 8 * p * (k * (2 if imputing else 1) + 2)
    # after the pass: correlation, loading, squared cosine and the NaN contribution returned
    # (p, k each), the SD and ids (p each), and the temporaries of one step of features
    results = 8 * p * (4 * k + 2) + 8 * min(p, _STEP) * (4 * k + 8)
    # a row read and transformed, then in float64 and shifted
    row_bytes = p_all * source.dtype.itemsize * 2 + p * 8 * 2 + 8 * p * k // max(1, n)
    return window_block_rows(source, budget=budget, held=held, limit=limit, accumulators=accumulators + in_flight,
                             results=max(0, results - in_flight), row_bytes=row_bytes,
                             what=f"statistics of {p} supplementary features on {k} axes")


@dataclass
class _Sums:
    """Sums over row blocks, per supplementary feature.

    ``shift`` (the first active row, :func:`_shift`) is subtracted before summing: sums of
    ``x − shift`` keep the variance accurate (Chan, Golub & LeVeque 1983). ``rows`` counts
    the rows summed; ``count`` (finite cells per feature) and ``missing_scores`` (the sum of
    the scores of the samples where a feature is missing) exist only once a non-finite cell
    was seen.
    """

    s1: np.ndarray
    s2: np.ndarray
    cross: np.ndarray
    rows: int
    count: np.ndarray | None = None
    missing_scores: np.ndarray | None = None

    def __sizeof__(self) -> int:  # what Dask counts as the bytes of a result (sys.getsizeof)
        return object.__sizeof__(self) + sum(a.nbytes for a in (self.s1, self.s2, self.cross, self.count,
                                                                  self.missing_scores) if a is not None)

    def counts(self) -> np.ndarray:
        """Finite cells per feature."""
        return self.count if self.count is not None else np.full(self.s1.shape[0], float(self.rows))

    def add(self, other: "_Sums") -> None:
        """Add the sums of the blocks after these (in place)."""
        if self.count is not None or other.count is not None:
            self.count = self.counts() + other.counts()
        if other.missing_scores is not None:
            self.missing_scores = other.missing_scores if self.missing_scores is None else \
                self.missing_scores + other.missing_scores
        self.s1 += other.s1
        self.s2 += other.s2
        self.cross += other.cross
        self.rows += other.rows


def _block_sums(block: np.ndarray, Fb: np.ndarray, shift: np.ndarray):
    """One block's sums (:class:`_Sums`), and the first non-finite cell (or None).

    ``block``: the transformed values of the block's rows and the analysed columns;
    ``Fb``: the block's scores. Non-finite cells are left out of the sums (they count as the
    feature mean when imputing; otherwise the fold reports the first one).
    """
    x = block.astype(np.float64)
    bad = first_nonfinite(x)
    mask = None
    if bad is not None:
        mask = ~np.isfinite(x)
        x[mask] = 0.0
    shifted = x - shift
    if mask is not None:
        shifted[mask] = 0.0
    s1 = shifted.sum(axis=0)
    np.square(shifted, out=shifted)
    s2 = shifted.sum(axis=0)
    del shifted
    sums = _Sums(s1, s2, x.T @ Fb, x.shape[0])
    if mask is not None:
        sums.count = x.shape[0] - mask.sum(axis=0).astype(np.float64)
        sums.missing_scores = mask.T.astype(np.float64) @ Fb
    return bad, sums


def _add_sums(a: _Sums, b: _Sums) -> _Sums:
    """The sums of two runs of blocks as one (``a`` before ``b``; neither is changed)."""
    total = _Sums(a.s1.copy(), a.s2.copy(), a.cross.copy(), a.rows, a.count, a.missing_scores)
    total.add(b)
    return total


def _split_sums(result):
    bad, sums = result
    return (bad, None), sums


def _join_sums(piece, total):
    return piece[0], total


#: On a cluster, the sums are added up on the workers; only the first non-finite cell of
#: each block comes back per block (:class:`axiscope.core.backends.Reduction`).
SUMS = Reduction(_add_sums, split=_split_sums, join=_join_sums)


def _shift(source: MatrixSource, rows: np.ndarray, cols: np.ndarray | None, spec: PreprocessSpec) -> np.ndarray:
    """The first active row, transformed, with the analysed columns (non-finite cells as 0)."""
    first = int(np.flatnonzero(rows)[0])
    x = read_block(source, (first, first + 1), None, spec, cols)[0].astype(np.float64)
    x[~np.isfinite(x)] = 0.0
    return x


def _stream(source: MatrixSource, F: np.ndarray, rows: np.ndarray, cols: np.ndarray, spec: PreprocessSpec,
            block_rows: int, runner: PassRunner) -> tuple[_Sums, np.ndarray]:
    """One pass over the active rows of ``source``: the sums over the columns ``cols``, and the shift.

    Each block's sums are computed where the block is (a thread, or a cluster's worker that
    reads it), then added up in block order (threads) or by the cluster's fixed tree.
    """
    n_all, p_all = source.shape
    p = cols.shape[0]
    spans = [(a, min(n_all, a + block_rows)) for a in range(0, n_all, block_rows)]
    spans = [(a, b) for a, b in spans if rows[a:b].any()]
    ids = np.asarray(source.sample_ids, dtype=object)[rows]
    imputing = spec.missing == "mean"
    columns = None if p == p_all else cols
    total = {}

    def fold(result, index: int, start: int) -> None:
        bad, sums = result
        if bad is not None and not imputing:
            r, c = bad
            raise InputError(
                f"{source.path}: sample {ids[start + r]!r}, feature {source.feature_ids[cols[c]]!r} is NaN "
                f"or infinite (after the transforms); fix the input or impute missing cells with the "
                f"feature mean (missing='mean')"
            )
        if sums is not None:  # (the blocks' own sums: added in place)
            if "sums" in total:
                total["sums"].add(sums)
            else:
                total["sums"] = sums

    counts = [int(rows[a:b].sum()) for a, b in spans]
    # a picklable description of the blocks (read, transformed, the analysed columns), so
    # that a cluster's workers read their own
    load = SourceBlocks(source, spans, [None if rows[a:b].all() else rows[a:b] for a, b in spans], spec, columns)
    X = array_from_blocks(load, counts, p, source.dtype, f"supfeat-{id(source)}-{os.getpid()}")
    shift = _shift(source, rows, columns, spec)
    runner.run(
        "supplementary features", "input", X, _block_sums, fold, shift, rows=F, reduce=SUMS)
    return total["sums"], shift


def _finish(sums: _Sums, shift: np.ndarray, F: np.ndarray, singular_values: np.ndarray, spec: PreprocessSpec,
            feature_ids: np.ndarray, names: list[str]) -> FeatureAxisStatistics:
    """Correlations, loadings (in the units of the active ones) and squared cosines from the sums."""
    n, k = F.shape
    p = sums.s1.shape[0]
    count = sums.counts()
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
