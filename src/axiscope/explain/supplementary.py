"""Interpretation statistics of samples and features: contributions, squared cosines, correlations.

Notation: ``X̃`` is the preprocessed (centred and scaled) matrix of the ``n`` active samples,
``F = X̃·V = U·S`` the scores, ``V`` the unit-norm loadings and ``s_a`` the singular values,
so that ``X̃ᵀ·F_a = s_a²·V_a`` and the variance of axis ``a`` is ``s_a²/n``.

Samples
    contribution of sample ``i`` to axis ``a`` (percent) = ``100·F_ia² / s_a²`` (sums to 100
    over the active samples); squared cosine = ``F_ia² / d_i²`` with ``d_i²`` the squared
    distance of the sample to the centre in the preprocessed space.

Active features
    contribution (percent) = ``100·V_ja²``; correlation with the scores and squared cosine in
    closed form from the model (no pass over the data):
    ``corr_ja = V_ja·s_a / (sqrt(n)·std_j/scale_j)`` for centred PCA, whatever the scaling
    (for unit scaling this is ``V_ja·sqrt(variance_a)``), and the general Pearson formula
    with the feature and score means otherwise.

Supplementary features
    Not used to build the axes; their correlations, squared cosines and loadings (in the
    units of the active ones, ``x̃_jᵀ·F_a / s_a²``) come from one streaming pass over the
    source's columns, holding ``O(p·k)`` accumulators and a few row blocks.

References
----------
Lebart, L., Morineau, A. & Piron, M. (1995). *Statistique exploratoire multidimensionnelle*.
Dunod, Paris. Jolliffe, I. T. & Cadima, J. (2016). Principal component analysis: a review and
recent developments. *Phil. Trans. R. Soc. A* 374, 20150202. doi:10.1098/rsta.2015.0202
"""

from __future__ import annotations

import logging
import os
from collections.abc import Sequence

import numpy as np

from ..core.memory import default_memory_limit, format_bytes, parse_memory
from ..core.passes import PassRunner, Progress, array_from_blocks
from ..core.preprocess import PreprocessSpec, first_nonfinite, transform_block
from ..errors import InputError, OptionError
from ..io.readers import MatrixSource
from ..model.statistics import FeatureAxisStatistics

__all__ = ["supplementary_feature_statistics"]

logger = logging.getLogger(__name__)

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
    Memory: ``O(p_sup·k)`` float64 accumulators (cross-products, and with imputation the
    scores of missing cells) plus a window of ``2·threads`` row blocks during the pass, then
    the results (correlation, loading, squared cosine and the NaN contribution); both
    phases are sized to stay within ``memory_limit``. Non-finite cells are an error
    unless ``spec.missing == "mean"``, in which case they count as the feature mean.
    """
    spec = spec or PreprocessSpec()
    F = np.asarray(scores, dtype=np.float64)
    n_all, p_all = source.shape
    rows = np.ones(n_all, dtype=bool) if rows is None else np.asarray(rows, dtype=bool)
    if rows.shape != (n_all,):
        raise OptionError(f"{source.path}: the sample mask has {rows.shape[0]} entries for {n_all} samples")
    n = int(rows.sum())
    if F.shape[0] != n:
        raise InputError(f"{source.path}: {F.shape[0]} scored samples but {n} selected rows; use the same samples")
    if sample_ids is not None and not np.array_equal(np.asarray(source.sample_ids, dtype=object)[rows],
                                                     np.asarray(sample_ids, dtype=object)):
        raise InputError(f"{source.path}: sample ids differ from those of the fit; give a matrix with the same samples in the same order")
    if columns is None:
        cols = np.arange(p_all)
    else:
        cols = np.asarray(columns)
        cols = np.flatnonzero(cols) if cols.dtype == bool else cols.astype(np.int64)
    p = cols.shape[0]
    k = F.shape[1]
    names = list(axis_names) if axis_names is not None else [f"PC{j + 1}" for j in range(k)]
    budget = default_memory_limit() if memory_limit is None else parse_memory(memory_limit)
    threads = max(1, int(threads or os.cpu_count() or 1))
    itemsize = source.dtype.itemsize
    missing_ok = spec.missing == "mean"
    step = 65536  # features finished at a time, so that temporaries stay small
    # during the pass: (p, k) accumulators of cross-products and, with imputation, of the
    # scores of missing cells; five length-p vectors (sums, squares, counts, shift, column
    # indices); the scores; and a window of row blocks
    accumulators = 8 * p * (k * (2 if missing_ok else 1) + 5) + 8 * n * k * 2
    # after the pass: correlation, loading, squared cosine and the NaN contribution returned
    # (p, k each), the SD and ids (p each), and the temporaries of one step of features
    results = 8 * p * (4 * k + 2) + 8 * min(p, step) * (4 * k + 8)
    window = 2 * threads
    row_bytes = p_all * itemsize * 2 + p * 8 * 3 + 8 * p * k // max(1, n)
    room = budget - accumulators
    needed = max(accumulators + window * row_bytes, accumulators + results)
    if needed > budget:
        raise OptionError(
            f"memory limit {format_bytes(budget)} is too small for statistics of {p} supplementary "
            f"features on {k} axes (needs at least {format_bytes(needed)}); raise --memory-limit"
        )
    block_rows = int(max(1, min(room // (window * row_bytes), n_all)))
    if source.sample_chunk and block_rows >= source.sample_chunk:
        block_rows = (block_rows // source.sample_chunk) * source.sample_chunk
    spans = [(a, min(n_all, a + block_rows)) for a in range(0, n_all, block_rows)]
    spans = [(a, b) for a, b in spans if rows[a:b].any()]
    counts = [int(rows[a:b].sum()) for a, b in spans]

    def load(i: int) -> np.ndarray:
        a, b = spans[i]
        block = source.read_samples(a, b)
        return block if rows[a:b].all() else block[rows[a:b]]

    def task(block: np.ndarray):
        block = transform_block(block, spec)  # totals over all columns of the source, as in the fit
        x = block[:, cols] if p != p_all else block
        del block
        x = x.astype(np.float64)
        bad = first_nonfinite(x)
        return x, bad

    state: dict = {"shift": None, "s1": np.zeros(p), "s2": np.zeros(p), "cnt": None,
                   "cross": np.zeros((p, k)), "nf": None}
    ids = np.asarray(source.sample_ids, dtype=object)[rows]

    def fold(result, index: int, start: int) -> None:
        x, bad = result
        Fb = F[start : start + x.shape[0]]
        if bad is not None:
            if not missing_ok:
                r, c = bad
                raise InputError(
                    f"{source.path}: sample {ids[start + r]!r}, feature {source.feature_ids[cols[c]]!r} is NaN "
                    f"or infinite (after the transforms); fix the input or pass --missing mean"
                )
            mask = ~np.isfinite(x)
            x[mask] = 0.0
            if state["cnt"] is None:
                state["cnt"] = np.full(p, float(start))
                state["nf"] = np.zeros((p, k))
            state["cnt"] += x.shape[0] - mask.sum(axis=0)
            state["nf"] += mask.T.astype(np.float64) @ Fb
        elif state["cnt"] is not None:
            state["cnt"] += x.shape[0]
        if state["shift"] is None:  # shifted sums keep the variance accurate (Chan, Golub & LeVeque 1983)
            state["shift"] = x[0].copy()
        shifted = x - state["shift"]
        if bad is not None:
            shifted[mask] = 0.0
        state["s1"] += shifted.sum(axis=0)
        np.square(shifted, out=shifted)
        state["s2"] += shifted.sum(axis=0)
        del shifted
        state["cross"] += x.T @ Fb

    X = array_from_blocks(load, counts, p_all, source.dtype, f"supfeat-{id(source)}-{os.getpid()}")
    runner = PassRunner(threads=threads, progress=progress)
    runner.run("supplementary features", "input", X, task, fold)

    cnt = state["cnt"] if state["cnt"] is not None else np.full(p, float(n))
    shift = state["shift"] if state["shift"] is not None else np.zeros(p)
    f_tot = F.sum(axis=0)
    f_bar = f_tot / n
    sd_f = np.sqrt(np.maximum((F**2).sum(axis=0) / n - f_bar**2, 0.0))
    s2 = np.asarray(singular_values, dtype=np.float64) ** 2
    corr = np.empty((p, k))
    loading = np.empty((p, k))
    sq_cos = np.empty((p, k))
    sd_x = np.empty(p)
    with np.errstate(invalid="ignore", divide="ignore"):
        for lo in range(0, p, step):
            sl = slice(lo, min(p, lo + step))
            c = cnt[sl]
            d1 = state["s1"][sl] / c  # mean − shift over present cells
            mean = shift[sl] + d1
            m2 = np.maximum(state["s2"][sl] - c * d1**2, 0.0)
            sd = np.sqrt(m2 / n)  # imputed cells add nothing (population convention of the fit)
            sd_x[sl] = sd
            cross = state["cross"][sl]
            # Σ over present cells of F, per feature
            f_present = f_tot - state["nf"][sl] if state["nf"] is not None else f_tot[None, :]
            centred = cross - mean[:, None] * f_present  # Σ (x − μ)·F over present cells
            corr[sl] = np.clip((centred / n) / (sd[:, None] * sd_f), -1.0, 1.0)
            if spec.scale == "unit":
                scale = sd
            elif spec.scale == "allele-frequency":
                freq = mean / 2.0
                scale = np.sqrt(2.0 * freq * (1.0 - freq))
            else:
                scale = np.ones(mean.shape[0])
            if spec.center:
                xf = centred / scale[:, None]
                norm2 = m2 / scale**2
            else:
                xf = (cross + mean[:, None] * (f_tot - f_present)) / scale[:, None]
                norm2 = (m2 + n * mean**2) / scale**2
            loading[sl] = xf / s2
            sq_cos[sl] = xf**2 / (s2 * norm2[:, None])
    del state
    constant = ~(sd_x > 0)
    if constant.any():
        logger.warning("%d supplementary features are constant over the active samples; their "
                       "correlations are undefined (NaN)", int(constant.sum()))
        corr[constant] = np.nan
        sq_cos[constant] = np.nan
        loading[constant] = np.nan
    return FeatureAxisStatistics(
        feature_ids=np.asarray(source.feature_ids, dtype=object)[cols],
        supplementary=np.ones(p, dtype=bool),
        loading=loading,
        correlation=corr,
        contribution=np.full((p, k), np.nan),
        sq_cosine=sq_cos,
        n_samples=n,
        axis_names=names,
    )
