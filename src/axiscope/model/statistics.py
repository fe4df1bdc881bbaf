"""Statistics that follow in closed form from a model and its training scores.

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

References
----------
Jolliffe, I. T. & Cadima, J. (2016). Principal component analysis: a review and
recent developments. *Phil. Trans. R. Soc. A* 374, 20150202. doi:10.1098/rsta.2015.0202
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.stats as sps

from ..errors import InputError, OptionError
from ..io.output import REFIT_HINT as _REFIT
from ..io.output import check_result_table, read_result_table, write_table
from .store import Model

__all__ = [
    "FeatureAxisStatistics",
    "feature_statistics",
    "sample_statistics",
    "read_feature_statistics",
    "correlation_p_value",
    "benjamini_hochberg",
]

_QUANTITIES = ("loading", "correlation", "contribution", "sq_cosine")
#: Column prefix (and Zarr array name) of each quantity in the written tables; the unit of
#: the contribution (percent) is part of its name.
_PREFIX = {"loading": "loading", "correlation": "correlation", "contribution": "contribution_pct",
           "sq_cosine": "sq_cosine"}


# --------------------------------------------------------------------------- samples


def sample_statistics(sample_ids: Sequence[str], scores: np.ndarray, squared_norms: np.ndarray,
                      axis_names: Sequence[str], *, singular_values: np.ndarray | None = None,
                      supplementary: bool = False) -> pd.DataFrame:
    """Contributions and squared cosines (quality of representation) of samples on each axis.

    Parameters
    ----------
    sample_ids : sequence of str, shape (m,)
    scores : ndarray, shape (m, k)
    squared_norms : ndarray, shape (m,)
        Squared length ``‖x̃_i‖²`` of each preprocessed sample (its squared distance to the
        centre when the features are centred).
    axis_names : sequence of str, length k
    singular_values : ndarray, shape (k,), optional
        Needed for the contributions of samples that built the axes.
    supplementary : bool, default=False
        The samples did not build the axes: their contributions are NaN.

    Returns
    -------
    DataFrame
        ``sample_id``, ``supplementary``, ``squared_norm``, ``represented_share`` (the sum of
        the squared cosines over the ``k`` axes: the share of ``‖x̃_i‖²`` the axes hold),
        then ``sq_cosine_<axis>`` and ``contribution_pct_<axis>`` (percent; ``100·F_ia²/s_a²``,
        each column sums to 100 over the samples that built the axes). Samples at the centre
        (zero length) get NaN squared cosines.
    """
    F = np.asarray(scores, dtype=np.float64)
    d = np.asarray(squared_norms, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        sq_cos = np.where(d[:, None] > 0, F**2 / d[:, None], np.nan)
        if supplementary or singular_values is None:
            contrib = np.full(F.shape, np.nan)
        else:
            contrib = 100.0 * F**2 / np.asarray(singular_values, dtype=np.float64) ** 2
    columns = {"sample_id": np.asarray(sample_ids, dtype=object),
               "supplementary": np.full(F.shape[0], bool(supplementary)),
               "squared_norm": d, "represented_share": sq_cos.sum(axis=1)}
    for j, a in enumerate(axis_names):
        columns[f"sq_cosine_{a}"] = sq_cos[:, j]
    for j, a in enumerate(axis_names):
        columns[f"contribution_pct_{a}"] = contrib[:, j]
    return pd.DataFrame(columns)


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
        Percent of the axis built from the feature (``100·loading²``; NaN if supplementary);
        written as ``contribution_pct_<axis>``.
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
        """Wide table: ``feature_id``, ``supplementary`` (true/false), then one column per
        quantity and axis: ``loading_<axis>``, ``correlation_<axis>``,
        ``contribution_pct_<axis>`` (percent), ``sq_cosine_<axis>``."""
        cols = {"feature_id": np.asarray(self.feature_ids, dtype=object),
                "supplementary": np.asarray(self.supplementary, dtype=bool)}
        for q in _QUANTITIES:
            values = getattr(self, q)
            for j, a in enumerate(self.axis_names):
                cols[f"{_PREFIX[q]}_{a}"] = values[:, j]
        return pd.DataFrame(cols)

    def write(self, directory: Path, *, name: str = "feature_statistics", threshold: int | None = None,
              parquet: bool = False) -> Path:
        """Write as ``<name>.tsv`` (and ``.parquet`` when ``parquet``), or as a Zarr group
        ``<name>.zarr`` above ``threshold`` features.

        The Zarr group has one ``(p, k)`` float64 array per quantity (named like the column
        prefixes of the table), ``feature_ids`` and ``supplementary``; attributes
        ``axis_names`` and ``n_samples``.
        """
        from ..io.output import ZARR_FEATURE_THRESHOLD

        threshold = ZARR_FEATURE_THRESHOLD if threshold is None else threshold
        directory = Path(directory)
        if self.n_features <= threshold:
            path = directory / f"{name}.tsv"
            write_table(self.to_frame(), path, parquet=parquet)
            return path
        import zarr

        path = directory / f"{name}.zarr"
        group = zarr.open_group(str(path), mode="w")
        p, k = self.loading.shape
        for q in _QUANTITIES:
            arr = group.create_array(_PREFIX[q], shape=(p, k), dtype="float64", chunks=(min(p, 65536), k))
            arr[:] = getattr(self, q)
        ids = group.create_array("feature_ids", shape=(p,), dtype=str, chunks=(min(p, 65536),))
        ids[:] = np.asarray(self.feature_ids, dtype=str)
        sup = group.create_array("supplementary", shape=(p,), dtype="bool", chunks=(min(p, 65536),))
        sup[:] = self.supplementary
        group.attrs["axis_names"] = list(self.axis_names)
        group.attrs["n_samples"] = int(self.n_samples)
        return path


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
                *(np.asarray(group[_PREFIX[q]][:], dtype=np.float64) for q in _QUANTITIES),
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
    df = read_result_table(tsv, required=["feature_id", "supplementary"])
    axes = [c[len("loading_"):] for c in df.columns if c.startswith("loading_")]
    if not axes:
        raise InputError(f"{tsv}: no loading_<axis> column; {_REFIT}")
    value_columns = [f"{_PREFIX[q]}_{a}" for q in _QUANTITIES for a in axes]
    df = check_result_table(df, tsv, required=value_columns, numeric=value_columns)
    flags = df["supplementary"].astype(str).str.strip().str.lower()
    if not flags.isin(["true", "false"]).all():
        raise InputError(f"{tsv}: column supplementary holds values other than true/false; {_REFIT}")
    return FeatureAxisStatistics(
        df["feature_id"].to_numpy(dtype=object),
        (flags == "true").to_numpy(),
        *(df[[f"{_PREFIX[q]}_{a}" for a in axes]].to_numpy(dtype=np.float64) for q in _QUANTITIES),
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


def correlation_p_value(r: np.ndarray, n: int | np.ndarray) -> np.ndarray:
    """Two-sided p-value of Pearson correlations ``r`` on ``n`` samples (t on n − 2 df)."""
    r = np.asarray(r, dtype=np.float64)
    df = np.asarray(n, dtype=np.float64) - 2
    with np.errstate(invalid="ignore", divide="ignore"):
        t2 = r * r * df / np.maximum(1.0 - r * r, 0.0)
        p = 2.0 * sps.t.sf(np.sqrt(t2), df)
    return np.where(df > 0, p, np.nan)


def benjamini_hochberg(p: np.ndarray, axis: int = 0) -> np.ndarray:
    """Benjamini–Hochberg adjusted p-values along ``axis``; NaN entries are ignored.

    ``p_adj(i) = min_{j ≥ i} (m / j · p(j))`` over the ``m`` finite p-values sorted in
    increasing order, capped at 1 (Benjamini & Hochberg 1995, doi:10.1111/j.2517-6161.1995.tb02031.x).
    """
    p = np.asarray(p, dtype=np.float64)
    moved = np.moveaxis(p, axis, -1)
    out = np.full(moved.shape, np.nan)
    flat_in = moved.reshape(-1, moved.shape[-1])
    flat_out = out.reshape(-1, moved.shape[-1])
    for row in range(flat_in.shape[0]):
        values = flat_in[row]
        ok = np.flatnonzero(np.isfinite(values))
        m = ok.size
        if m == 0:
            continue
        order = np.argsort(values[ok], kind="stable")
        ranked = values[ok][order] * m / np.arange(1, m + 1)
        ranked = np.minimum.accumulate(ranked[::-1])[::-1]
        adjusted = np.empty(m)
        adjusted[order] = np.minimum(ranked, 1.0)
        flat_out[row, ok] = adjusted
    return np.moveaxis(flat_out.reshape(moved.shape), -1, axis)
