"""How much of each axis the sample annotations account for, numeric and categorical alike.

One quantity for both kinds of annotation: **R²**, the share of the variance of an axis's
scores explained by a least-squares fit of the scores on the annotation.

- Numeric annotation ``x``: the fit is a straight line, so ``R² = r²`` with ``r`` the
  Pearson correlation of ``x`` with the scores.
- Categorical annotation with ``g`` categories: the fit is one mean per category, so
  ``R² = η² = SS_between / SS_total`` (the between-category share of the sum of squares).

Both come with the F-test of the fit, ``F = (R²/df1) / ((1 − R²)/df2)`` on ``df1 = 1``
(numeric) or ``g − 1`` (categorical) and ``df2 = n − 1 − df1`` degrees of freedom, with the
p-value from ``scipy.stats.f``; for a numeric annotation it equals the two-sided p-value of
the correlation's t-test. p-values are adjusted together over all annotations × axes
(Benjamini & Hochberg 1995).

For a categorical annotation, each category's mean score is compared with the mean of all
``n`` samples with a value: under the hypothesis that the category's ``n_c`` members are a
random draw without replacement from those ``n`` samples, its mean has variance
``(n − n_c)/(n − 1) · σ²/n_c`` (σ² the population variance of the ``n`` scores), so
``z = (mean_c − mean) / sqrt((n − n_c)/(n − 1) · σ²/n_c)`` is approximately standard normal.

References
----------
Cochran, W. G. (1977). *Sampling Techniques*, 3rd ed. Wiley, New York. Theorem 2.2 (the
variance of the mean of a sample drawn without replacement, with the finite-population
correction).

Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate: a practical and
powerful approach to multiple testing. *J. R. Stat. Soc. B* 57(1), 289–300.
doi:10.1111/j.2517-6161.1995.tb02031.x
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats as sps

from ..model.statistics import benjamini_hochberg
from .annotations import AnnotationSet

__all__ = [
    "ShareExplained",
    "numeric_share",
    "categorical_share",
    "category_z",
    "category_deviations",
    "annotation_shares",
    "SHARE_COLUMNS",
    "CATEGORY_COLUMNS",
]

#: Columns of the table returned by :func:`annotation_shares` (one row per annotation × axis).
SHARE_COLUMNS = ["axis", "annotation", "treated_as", "technical", "n", "n_categories", "r_squared",
                 "correlation", "f_statistic", "df_between", "df_within", "p_value", "p_adjusted"]
#: Columns of the table returned by :func:`category_deviations` (one row per category × axis).
CATEGORY_COLUMNS = ["axis", "annotation", "category", "technical", "n", "category_mean", "overall_mean",
                    "z", "p_value"]


@dataclass
class ShareExplained:
    """The share of one axis's variance explained by one annotation, with its F-test.

    Attributes
    ----------
    r_squared : ndarray, shape (k,)
    f_statistic, p_value : ndarray, shape (k,)
    df_between, df_within : int
    n : int
        Samples with a value of the annotation.
    correlation : ndarray, shape (k,)
        Signed Pearson correlation (numeric annotations; NaN for categorical ones).
    """

    r_squared: np.ndarray
    f_statistic: np.ndarray
    p_value: np.ndarray
    df_between: int
    df_within: int
    n: int
    correlation: np.ndarray


def _f_test(r_squared: np.ndarray, df_between: int, df_within: int) -> tuple[np.ndarray, np.ndarray]:
    """F statistic and upper-tail p-value of a fit explaining the share ``r_squared``."""
    r2 = np.asarray(r_squared, dtype=np.float64)
    if df_between < 1 or df_within < 1:
        nan = np.full(r2.shape, np.nan)
        return nan, nan
    with np.errstate(invalid="ignore", divide="ignore"):
        f = (r2 / df_between) / (np.maximum(1.0 - r2, 0.0) / df_within)
    return f, sps.f.sf(f, df_between, df_within)


def numeric_share(x: np.ndarray, scores: np.ndarray) -> ShareExplained:
    """R² = r² of each axis's scores on a numeric annotation ``x`` (NaN values left out).

    Parameters
    ----------
    x : ndarray, shape (n,)
    scores : ndarray, shape (n, k) or (n,)
    """
    x = np.asarray(x, dtype=np.float64)
    F = np.asarray(scores, dtype=np.float64)
    F = F[:, None] if F.ndim == 1 else F
    ok = np.isfinite(x)
    n = int(ok.sum())
    xc = x[ok] - x[ok].mean()
    Fc = F[ok] - F[ok].mean(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.clip((xc @ Fc) / np.sqrt((xc @ xc) * np.einsum("ij,ij->j", Fc, Fc)), -1.0, 1.0)
    f, p = _f_test(r * r, 1, n - 2)
    return ShareExplained(r * r, f, p, 1, n - 2, n, r)


def categorical_share(labels: np.ndarray, scores: np.ndarray) -> ShareExplained:
    """R² = η², the between-category share of each axis's variance (``None`` labels left out).

    Parameters
    ----------
    labels : ndarray of object, shape (n,)
    scores : ndarray, shape (n, k) or (n,)
    """
    F = np.asarray(scores, dtype=np.float64)
    F = F[:, None] if F.ndim == 1 else F
    ok = np.array([v is not None for v in labels], dtype=bool)
    codes, uniques = pd.factorize(pd.Series(np.asarray(labels, dtype=object)[ok], dtype=object), sort=False)
    Fu = F[ok]
    n, g = Fu.shape[0], len(uniques)
    sizes = np.bincount(codes, minlength=g).astype(np.float64)
    sums = np.zeros((g, F.shape[1]))
    np.add.at(sums, codes, Fu)
    grand = Fu.mean(axis=0)
    ss_total = ((Fu - grand) ** 2).sum(axis=0)
    ss_between = (sizes[:, None] * (sums / sizes[:, None] - grand) ** 2).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        r2 = np.where(ss_total > 0, np.minimum(ss_between / ss_total, 1.0), np.nan)
    f, p = _f_test(r2, g - 1, n - g)
    return ShareExplained(r2, f, p, g - 1, n - g, n, np.full(F.shape[1], np.nan))


def category_z(category_mean: np.ndarray, n_category: int, overall_mean: np.ndarray,
               population_variance: np.ndarray, n: int) -> np.ndarray:
    """z-score of a category's mean score against the mean of all ``n`` samples.

    ``z = (category_mean − overall_mean) / sqrt((n − n_c)/(n − 1) · σ²/n_c)`` with ``σ²`` the
    population variance (divisor ``n``) of the ``n`` scores: the standard deviation is that
    of the mean of ``n_c`` values drawn without replacement from the ``n`` (Cochran 1977,
    Theorem 2.2, with ``S² = n·σ²/(n − 1)`` and the finite-population correction
    ``1 − n_c/n``). NaN when the category holds every sample.
    """
    if n_category >= n:
        return np.full(np.shape(category_mean), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.sqrt((n - n_category) / (n - 1) * np.asarray(population_variance) / n_category)
        return (np.asarray(category_mean) - overall_mean) / sd


def category_deviations(labels: np.ndarray, scores: np.ndarray, axis_names: Sequence[str], *,
                        annotation: str = "", technical: bool = False) -> pd.DataFrame:
    """Size, mean score and z-score of every category of one categorical annotation, per axis.

    Samples without a label are left out; the overall mean and variance are those of the
    samples with a label. Columns: :data:`CATEGORY_COLUMNS`; ``p_value`` is two-sided
    (standard normal).
    """
    F = np.asarray(scores, dtype=np.float64)
    ok = np.array([v is not None for v in labels], dtype=bool)
    lab = np.asarray(labels, dtype=object)[ok]
    Fu = F[ok]
    n = Fu.shape[0]
    overall, variance = Fu.mean(axis=0), Fu.var(axis=0)
    rows = []
    for category in sorted(pd.unique(lab), key=str):
        member = lab == category
        n_c = int(member.sum())
        mean_c = Fu[member].mean(axis=0)
        z = category_z(mean_c, n_c, overall, variance, n)
        p = 2.0 * sps.norm.sf(np.abs(z))
        for j, axis in enumerate(axis_names):
            rows.append((axis, annotation, str(category), technical, n_c, mean_c[j], overall[j], z[j], p[j]))
    return pd.DataFrame(rows, columns=CATEGORY_COLUMNS)


def annotation_shares(annotations: AnnotationSet, scores: np.ndarray,
                      axis_names: Sequence[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """R² of every annotation on every axis, and the categories' deviations.

    Parameters
    ----------
    annotations : AnnotationSet
        Aligned to the rows of ``scores``.
    scores : ndarray, shape (n, k)
    axis_names : sequence of str, length k

    Returns
    -------
    shares : DataFrame
        One row per axis × annotation (columns :data:`SHARE_COLUMNS`), sorted by axis and
        decreasing R²; ``p_adjusted`` is Benjamini–Hochberg over all its rows.
    categories : DataFrame
        One row per axis × category of each categorical annotation (columns
        :data:`CATEGORY_COLUMNS` plus ``p_adjusted``, Benjamini–Hochberg over all its rows).
    """
    F = np.asarray(scores, dtype=np.float64)
    rows, categories = [], []
    tests = [(name, "numeric", numeric_share(x, F), None) for name, x in annotations.numeric.items()]
    tests += [(name, "categorical", categorical_share(lab, F), len(pd.unique(lab[[v is not None for v in lab]])))
              for name, lab in annotations.categorical.items()]
    for name, kind, share, n_categories in tests:
        technical = name in annotations.technical
        for j, axis in enumerate(axis_names):
            rows.append((axis, name, kind, technical, share.n, n_categories, share.r_squared[j],
                         share.correlation[j], share.f_statistic[j], share.df_between, share.df_within,
                         share.p_value[j], np.nan))
        if kind == "categorical":
            categories.append(category_deviations(annotations.categorical[name], F, axis_names,
                                                  annotation=name, technical=technical))
    shares = pd.DataFrame(rows, columns=SHARE_COLUMNS)
    shares["p_adjusted"] = _adjusted(shares["p_value"])
    order = {a: i for i, a in enumerate(axis_names)}
    shares = shares.assign(_axis=shares["axis"].map(order)).sort_values(
        ["_axis", "r_squared"], ascending=[True, False], kind="stable").drop(columns="_axis")
    cats = (pd.concat(categories, ignore_index=True) if categories
            else pd.DataFrame(columns=CATEGORY_COLUMNS))
    cats["p_adjusted"] = _adjusted(cats["p_value"])
    return shares.reset_index(drop=True), cats


def _adjusted(p_values: pd.Series) -> np.ndarray:
    """Benjamini–Hochberg over all the rows of a table (none: nothing to adjust)."""
    p = p_values.to_numpy(dtype=np.float64)
    return benjamini_hochberg(p) if p.size else p
