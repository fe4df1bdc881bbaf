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
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .annotations import benjamini_hochberg, correlation_p_value
from .errors import InputError, OptionError
from .memory import default_memory_limit, format_bytes, parse_memory
from .model import Model
from .passes import PassRunner, Progress, array_from_blocks
from .preprocess import PreprocessSpec, first_nonfinite, transform_block
from .readers import MatrixSource

__all__ = [
    "FeatureAxisStatistics",
    "feature_statistics",
    "supplementary_feature_statistics",
    "sample_quality",
    "sample_contributions",
    "read_feature_statistics",
    "read_result_table",
    "check_result_table",
]

logger = logging.getLogger(__name__)

_QUANTITIES = ("loading", "correlation", "contribution", "sq_cosine")


# --------------------------------------------------------------------------- samples


def sample_quality(sample_ids: Sequence[str], scores: np.ndarray, sq_dist: np.ndarray,
                   axis_names: Sequence[str], *, status: str = "active") -> pd.DataFrame:
    """Squared cosines (quality of representation) of samples on each axis.

    Parameters
    ----------
    sample_ids : sequence of str, shape (m,)
    scores : ndarray, shape (m, k)
    sq_dist : ndarray, shape (m,)
        Squared distance of each sample to the centre in the preprocessed space.
    axis_names : sequence of str, length k
    status : str, default="active"

    Returns
    -------
    DataFrame
        sample_id, status, sq_dist, ``sq_cosine_<axis>`` for each axis, and ``quality`` (the sum
        over the ``k`` axes: the share of the sample's squared distance they represent).
        Samples at the centre (zero distance) get NaN.
    """
    F = np.asarray(scores, dtype=np.float64)
    d = np.asarray(sq_dist, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        sq_cos = np.where(d[:, None] > 0, F**2 / d[:, None], np.nan)
    df = pd.DataFrame(sq_cos, columns=[f"sq_cosine_{a}" for a in axis_names])
    df.insert(0, "sq_dist", d)
    df.insert(0, "status", status)
    df.insert(0, "sample_id", np.asarray(sample_ids))
    df["quality"] = sq_cos.sum(axis=1)
    return df


def sample_contributions(sample_ids: Sequence[str], scores: np.ndarray, singular_values: np.ndarray,
                         axis_names: Sequence[str]) -> pd.DataFrame:
    """Contribution (percent) of each active sample to each axis: ``100·F_ia² / s_a²``.

    Returns
    -------
    DataFrame
        sample_id and one column ``contribution_<axis>`` per axis; each column sums to 100.
    """
    F = np.asarray(scores, dtype=np.float64)
    s2 = np.asarray(singular_values, dtype=np.float64) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        contrib = 100.0 * F**2 / s2
    df = pd.DataFrame(contrib, columns=[f"contribution_{a}" for a in axis_names])
    df.insert(0, "sample_id", np.asarray(sample_ids))
    return df


# --------------------------------------------------------------------------- features


@dataclass
class FeatureAxisStatistics:
    """Per-feature, per-axis statistics.

    Attributes
    ----------
    feature_ids : ndarray of str, shape (p,)
    supplementary : ndarray of bool, shape (p,)
        True for features not used to build the axes.
    loading : ndarray, shape (p, k)
        Unit-norm loadings (active); ``x̃_jᵀF_a / s_a²`` for supplementary features.
    correlation : ndarray, shape (p, k)
        Pearson correlation between the (transformed) feature and the scores.
    contribution : ndarray, shape (p, k)
        Percent of the axis built from the feature (``100·loading²``; NaN if supplementary).
    sq_cosine : ndarray, shape (p, k)
        Squared cosine of the feature with the axis.
    n_samples : int
        Number of active samples the correlations are computed on.
    axis_names : list of str
    """

    feature_ids: np.ndarray
    supplementary: np.ndarray
    loading: np.ndarray
    correlation: np.ndarray
    contribution: np.ndarray
    sq_cosine: np.ndarray
    n_samples: int
    axis_names: list[str]

    @property
    def n_features(self) -> int:
        return int(self.feature_ids.shape[0])

    def p_values(self) -> np.ndarray:
        """Two-sided p-values of the correlations (t-test on n − 2 df), shape (p, k)."""
        return correlation_p_value(self.correlation, self.n_samples)

    def adjusted_p_values(self, p_values: np.ndarray | None = None) -> np.ndarray:
        """Benjamini–Hochberg adjusted p-values over all features, per axis, shape (p, k).

        ``p_values`` (from :meth:`p_values`) avoids computing them a second time.
        """
        return benjamini_hochberg(self.p_values() if p_values is None else p_values, axis=0)

    def concat(self, other: "FeatureAxisStatistics") -> "FeatureAxisStatistics":
        """Active and supplementary features together (``other`` after ``self``)."""
        if other.axis_names != self.axis_names or other.n_samples != self.n_samples:
            raise OptionError(
                f"feature statistics of different fits cannot be combined (axes {self.axis_names} on "
                f"{self.n_samples} samples vs {other.axis_names} on {other.n_samples}); compute both from the same fit"
            )
        return FeatureAxisStatistics(
            np.concatenate([self.feature_ids, other.feature_ids]),
            np.concatenate([self.supplementary, other.supplementary]),
            *(np.vstack([getattr(self, q), getattr(other, q)]) for q in _QUANTITIES),
            self.n_samples, self.axis_names,
        )

    def to_frame(self) -> pd.DataFrame:
        """Wide table: feature_id, status, then ``<quantity>_<axis>`` columns."""
        cols = {"feature_id": self.feature_ids,
                "status": np.where(self.supplementary, "supplementary", "active")}
        for q in _QUANTITIES:
            values = getattr(self, q)
            for j, a in enumerate(self.axis_names):
                cols[f"{q}_{a}"] = values[:, j]
        return pd.DataFrame(cols)

    def write(self, directory: Path, *, name: str = "feature_statistics", threshold: int | None = None) -> Path:
        """Write as ``<name>.tsv``, or as a Zarr group ``<name>.zarr`` above ``threshold`` features.

        The Zarr group has one ``(p, k)`` float64 array per quantity, ``feature_ids`` and
        ``supplementary``; attributes ``axis_names`` and ``n_samples``.
        """
        from .writers import ZARR_FEATURE_THRESHOLD, write_table

        threshold = ZARR_FEATURE_THRESHOLD if threshold is None else threshold
        directory = Path(directory)
        if self.n_features <= threshold:
            path = directory / f"{name}.tsv"
            write_table(self.to_frame(), path)
            return path
        import zarr

        path = directory / f"{name}.zarr"
        group = zarr.open_group(str(path), mode="w")
        p, k = self.loading.shape
        for q in _QUANTITIES:
            arr = group.create_array(q, shape=(p, k), dtype="float64", chunks=(min(p, 65536), k))
            arr[:] = getattr(self, q)
        ids = group.create_array("feature_ids", shape=(p,), dtype=str, chunks=(min(p, 65536),))
        ids[:] = np.asarray(self.feature_ids, dtype=str)
        sup = group.create_array("supplementary", shape=(p,), dtype="bool", chunks=(min(p, 65536),))
        sup[:] = self.supplementary
        group.attrs["axis_names"] = list(self.axis_names)
        group.attrs["n_samples"] = int(self.n_samples)
        return path


_REFIT = "restore the file written by 'axiscope fit' or refit"


def read_result_table(path: Path, *, required: Sequence[str], numeric: Sequence[str] = ()) -> pd.DataFrame:
    """Read a TSV table written by ``axiscope fit``, checking its columns.

    Parameters
    ----------
    path : path
    required : sequence of str
        Columns that must be present.
    numeric : sequence of str
        Columns (among ``required``) that must hold numbers; converted to float64.

    Raises
    ------
    InputError
        The file is not a readable table, lacks a column, or holds text in a numeric column.
    """
    path = Path(path)
    try:
        table = pd.read_csv(path, sep="\t", dtype={"sample_id": str, "feature_id": str})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError, OSError) as exc:
        first = str(exc).strip().splitlines()
        reason = first[0] if first else exc.__class__.__name__
        raise InputError(f"{path}: not a readable table ({reason}); {_REFIT}") from exc
    return check_result_table(table, path, required=required, numeric=numeric)


def check_result_table(table: pd.DataFrame, path: Path, *, required: Sequence[str],
                       numeric: Sequence[str] = ()) -> pd.DataFrame:
    """Check that ``table`` (read from ``path``) has the ``required`` columns and numbers in ``numeric``."""
    lacking = [c for c in required if c not in table.columns]
    if lacking:
        raise InputError(f"{path}: missing column(s) {', '.join(lacking)}; {_REFIT}")
    for column in numeric:
        try:
            table[column] = table[column].astype(np.float64)
        except (ValueError, TypeError) as exc:
            raise InputError(f"{path}: column {column} holds values that are not numbers; {_REFIT}") from exc
    return table


def read_feature_statistics(directory: Path, *, name: str = "feature_statistics",
                            n_samples: int | None = None) -> FeatureAxisStatistics | None:
    """Read what :meth:`FeatureAxisStatistics.write` wrote into ``directory``; None if absent.

    ``n_samples`` (the number of active samples, e.g. ``model.n_samples``) is needed for
    p-values when reading the TSV form, which does not store it; the Zarr form stores it.

    Raises
    ------
    OptionError
        The TSV form is found but ``n_samples`` is not given.
    InputError
        The file is unreadable or lacks columns/arrays.
    """
    directory = Path(directory)
    tsv, store = directory / f"{name}.tsv", directory / f"{name}.zarr"
    if store.is_dir():
        import zarr

        try:
            group = zarr.open_group(str(store), mode="r")
            return FeatureAxisStatistics(
                np.asarray(group["feature_ids"][:], dtype=object),
                np.asarray(group["supplementary"][:], dtype=bool),
                *(np.asarray(group[q][:], dtype=np.float64) for q in _QUANTITIES),
                int(group.attrs["n_samples"]), list(group.attrs["axis_names"]),
            )
        except (KeyError, ValueError, TypeError, OSError) as exc:
            raise InputError(f"{store}: incomplete or unreadable feature statistics ({exc.__class__.__name__}: "
                             f"{exc}); {_REFIT}") from exc
    if not tsv.is_file():
        return None
    if n_samples is None:
        raise OptionError(f"{tsv}: the number of active samples is needed for p-values; pass n_samples "
                          "(e.g. model.n_samples)")
    df = read_result_table(tsv, required=["feature_id", "status"])
    axes = [c[len("loading_"):] for c in df.columns if c.startswith("loading_")]
    if not axes:
        raise InputError(f"{tsv}: no loading_<axis> column; {_REFIT}")
    value_columns = [f"{q}_{a}" for q in _QUANTITIES for a in axes]
    df = check_result_table(df, tsv, required=value_columns, numeric=value_columns)
    return FeatureAxisStatistics(
        df["feature_id"].to_numpy(dtype=object),
        (df["status"] == "supplementary").to_numpy(),
        *(df[[f"{q}_{a}" for a in axes]].to_numpy(dtype=np.float64) for q in _QUANTITIES),
        int(n_samples), axes,
    )


def feature_statistics(model: Model) -> FeatureAxisStatistics:
    """Statistics of the model's active features, in closed form (no pass over the data).

    With ``μ̃_j`` the mean and ``σ̃_j = std_j/scale_j`` the standard deviation of the
    preprocessed feature, and ``F̄_a = Σ_j μ̃_j·V_ja`` the mean score (zero when centred):
    ``cov(x̃_j, F_a) = V_ja·s_a²/n − μ̃_j·F̄_a``, ``var(F_a) = s_a²/n − F̄_a²``, so
    ``corr_ja = cov / (σ̃_j·sd(F_a))``; for centred PCA ``corr_ja = V_ja·s_a/(sqrt(n)·σ̃_j)``.
    The squared cosine is ``V_ja²·s_a² / ‖x̃_j‖²`` with ``‖x̃_j‖² = n·(σ̃_j² + μ̃_j²)``
    (``μ̃_j = 0`` when centred); it equals ``corr²`` for centred PCA and sums to 1 over all
    axes of a full-rank fit.

    Returns
    -------
    FeatureAxisStatistics
        For the ``p`` kept features, in the model's order.
    """
    V = np.asarray(model.components, dtype=np.float64)
    s = np.asarray(model.singular_values, dtype=np.float64)
    n = float(model.n_samples)
    scale = np.asarray(model.scale, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd_t = np.asarray(model.std, dtype=np.float64) / scale
        if model.spec.center:
            mu_t = np.zeros_like(sd_t)
        else:
            raw = model.extras.get("feature_mean")
            if raw is None:
                raise OptionError("the model has no feature means (extra 'feature_mean'); refit it with this axiscope")
            mu_t = np.asarray(raw, dtype=np.float64) / scale
        f_bar = mu_t @ V
        cov = V * (s**2 / n) - np.outer(mu_t, f_bar)
        sd_f = np.sqrt(np.maximum(s**2 / n - f_bar**2, 0.0))
        corr = np.clip(cov / (sd_t[:, None] * sd_f), -1.0, 1.0)
        norm2 = n * (sd_t**2 + mu_t**2)
        sq_cos = V**2 * s**2 / norm2[:, None]
    return FeatureAxisStatistics(
        feature_ids=np.asarray(model.feature_ids),
        supplementary=np.zeros(V.shape[0], dtype=bool),
        loading=V,
        correlation=corr,
        contribution=100.0 * V**2,
        sq_cosine=sq_cos,
        n_samples=int(model.n_samples),
        axis_names=model.axis_names,
    )


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
        Per-sample transforms (total normalisation, log1p), centring and scaling replayed
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
            elif spec.scale == "binomial":
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
