"""Sample annotations: reading, alignment by sample id, and their association with the axes.

Annotations are passive (supplementary) variables: they never take part in building the
axes. Numeric columns are quantitative unless declared categorical; text columns (and
true/false columns) are qualitative. For each quantitative annotation and axis the
correlation with the scores is reported with a two-sided t-test on ``n − 2`` degrees of
freedom; for each qualitative annotation, the barycentre (mean score), count and test
value of every category, and the correlation ratio η² with its F-test.

References
----------
Lebart, L., Morineau, A. & Piron, M. (1995). *Statistique exploratoire multidimensionnelle*.
Dunod, Paris (test values, section on supplementary elements).

Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate: a practical and
powerful approach to multiple testing. *J. R. Stat. Soc. B* 57(1), 289–300.
doi:10.1111/j.2517-6161.1995.tb02031.x
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats as sps

from ..errors import InputError, OptionError
from ..model.statistics import benjamini_hochberg, correlation_p_value

__all__ = [
    "MISSING_TOKENS",
    "AnnotationSet",
    "read_annotations",
    "align_annotations",
    "load_annotations",
    "split_names",
    "sample_flags",
    "correlation_test",
    "category_test_value",
    "correlation_ratio",
    "benjamini_hochberg",
    "quantitative_associations",
    "qualitative_associations",
    "category_statistics",
]

logger = logging.getLogger(__name__)

#: Cell values read as missing in an annotation table.
MISSING_TOKENS = frozenset({"", "NA", "N/A", "NaN", "nan", "null", "NULL", "None"})
#: A text column whose non-missing values are numbers in at least this fraction is taken
#: for a quantitative column with typos (common practice, no source).
_MOSTLY_NUMERIC = 0.9
_TRUE = frozenset({"true"})


def split_names(values: Iterable[str] | str | None) -> list[str]:
    """Column names from repeated and/or comma-separated option values, in order, unique."""
    if values is None:
        return []
    if isinstance(values, str):
        values = [values]
    out: list[str] = []
    for value in values:
        for name in str(value).split(","):
            name = name.strip()
            if name and name not in out:
                out.append(name)
    return out


def read_annotations(path: str | Path, *, id_column: str = "sample_id") -> pd.DataFrame:
    """Read a tab-separated annotation table as text, one row per sample.

    Parameters
    ----------
    path : path
        Tab-separated file with a header line.
    id_column : str, default="sample_id"
        Column holding the sample ids; must exist, be complete and unique.

    Returns
    -------
    DataFrame
        All cells as ``str`` (missing cells as ``None``), indexed by sample id; the id
        column itself is removed.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such annotation file; check --annotations")
    try:
        table = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False, na_filter=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not a readable tab-separated table ({_first_line(exc)}); "
                         "save it as TSV with a header line") from exc
    table.columns = [str(c).strip() for c in table.columns]
    if id_column not in table.columns:
        shown = ", ".join(repr(c) for c in list(table.columns)[:10])
        raise InputError(f"{path}: no column {id_column!r} (columns: {shown}); "
                         "name the sample-id column with --id-column")
    ids = table[id_column].str.strip()
    empty = np.flatnonzero(ids.isin(MISSING_TOKENS).to_numpy())
    if empty.size:
        raise InputError(f"{path}: {empty.size} rows have an empty {id_column!r} (first on line "
                         f"{empty[0] + 2}); give every row a sample id")
    duplicated = ids[ids.duplicated(keep=False)].unique()
    if duplicated.size:
        examples = ", ".join(repr(x) for x in duplicated[:5])
        raise InputError(f"{path}: {duplicated.size} sample ids occur more than once in column "
                         f"{id_column!r} (e.g. {examples}); keep one row per sample")
    table = table.drop(columns=[id_column])
    table.index = pd.Index(ids.to_numpy(dtype=object), name=id_column)
    table = table.apply(lambda s: s.str.strip())
    return table.mask(table.isin(MISSING_TOKENS), None)


def align_annotations(table: pd.DataFrame, sample_ids: Sequence[str], *, where: str = "annotations",
                      allow_missing: bool = False) -> pd.DataFrame:
    """Reorder ``table`` (indexed by sample id) to ``sample_ids``.

    In strict mode every sample must have a row and every row a sample; otherwise an
    :class:`InputError` gives the counts and up to five examples. With ``allow_missing``
    samples without a row get missing values and rows without a sample are dropped, with
    a warning.
    """
    ids = pd.Index(np.asarray(sample_ids, dtype=object))
    lacking = ids[~ids.isin(table.index)]
    extra = table.index[~table.index.isin(ids)]
    if len(lacking) or len(extra):
        parts = []
        if len(lacking):
            parts.append(f"{len(lacking)} of {len(ids)} samples have no row "
                         f"(e.g. {', '.join(repr(x) for x in lacking[:5])})")
        if len(extra):
            parts.append(f"{len(extra)} of {len(table)} rows match no sample "
                         f"(e.g. {', '.join(repr(x) for x in extra[:5])})")
        message = f"{where}: " + "; ".join(parts)
        if not allow_missing:
            raise InputError(message + "; fix the ids (see --id-column) or pass --allow-missing-annotations")
        logger.warning("%s; unmatched rows are dropped and samples without a row count as missing", message)
    return table.reindex(ids)


@dataclass
class AnnotationSet:
    """Annotations aligned to samples, split into quantitative and qualitative variables.

    Attributes
    ----------
    sample_ids : ndarray of str, shape (n,)
        The (active) samples the annotations are aligned to.
    quantitative : dict of str to ndarray of float, shape (n,)
        NaN where the value is missing.
    qualitative : dict of str to ndarray of object, shape (n,)
        ``None`` where the value is missing.
    technical : list of str
        Columns marked as technical (processing batch, depth, quality ...).
    variables : DataFrame
        One row per column: kind, number of values used and missing, technical flag, and
        the status (``used`` or why it was skipped).
    source : str
    """

    sample_ids: np.ndarray
    quantitative: dict[str, np.ndarray]
    qualitative: dict[str, np.ndarray]
    technical: list[str]
    variables: pd.DataFrame
    source: str = "annotations"

    def subset(self, rows: np.ndarray) -> "AnnotationSet":
        """The same annotations for a subset of samples (bool mask or indices)."""
        return AnnotationSet(
            self.sample_ids[rows],
            {k: v[rows] for k, v in self.quantitative.items()},
            {k: v[rows] for k, v in self.qualitative.items()},
            list(self.technical),
            self.variables.copy(),
            self.source,
        )

    def take(self, sample_ids: Sequence[str]) -> "AnnotationSet":
        """The annotations of ``sample_ids`` (all must be present), in that order."""
        position = pd.Index(self.sample_ids).get_indexer(pd.Index(np.asarray(sample_ids, dtype=object)))
        if (position < 0).any():
            missing = np.asarray(sample_ids, dtype=object)[position < 0]
            raise InputError(f"{self.source}: {missing.size} samples are not annotated "
                             f"(e.g. {', '.join(repr(x) for x in missing[:5])}); fix the ids")
        return self.subset(position)


def load_annotations(
    table: str | Path | pd.DataFrame,
    sample_ids: Sequence[str],
    *,
    id_column: str = "sample_id",
    categorical: Iterable[str] | str | None = None,
    quantitative: Iterable[str] | str | None = None,
    technical: Iterable[str] | str | None = None,
    exclude: Iterable[str] | str | None = None,
    allow_missing: bool = False,
    where: str | None = None,
    active: np.ndarray | None = None,
) -> AnnotationSet:
    """Read (if a path), align and type the annotations of ``sample_ids``.

    Alignment (strict by default) covers every sample in ``sample_ids``, supplementary ones
    included; the type and status of each column and the counts of the variables table are
    decided on the active samples only, since only they are tested against the axes.

    Parameters
    ----------
    table : path or DataFrame
        A TSV file, or a DataFrame with an ``id_column`` column (or indexed by sample id).
    sample_ids : sequence of str, shape (n,)
    id_column : str, default="sample_id"
    categorical, quantitative : column names, optional
        Force a column to be qualitative, or declare it quantitative (then every
        non-missing value must be a number).
    technical : column names, optional
        Columns describing processing rather than biology; an axis most strongly associated
        with one of them gets a batch warning.
    exclude : column names, optional
        Columns not to analyse (e.g. the supplementary-samples flag).
    allow_missing : bool, default=False
        See :func:`align_annotations`.
    where : str, optional
        Name of the table in messages (default: its path).
    active : ndarray of bool, shape (n,), optional
        The samples used to build the axes (default: all). The returned set holds these
        samples only.

    Returns
    -------
    AnnotationSet
        Over the active samples, in the order of ``sample_ids``.
    """
    if isinstance(table, pd.DataFrame):
        where = where or "annotations"
        frame = table.copy()
        if id_column in frame.columns:
            frame = frame.set_index(id_column)
        elif frame.index.name != id_column:
            shown = ", ".join(repr(c) for c in list(frame.columns)[:10])
            raise InputError(f"{where}: no column {id_column!r} (columns: {shown}); name the sample-id column with --id-column")
        if frame.index.duplicated().any():
            dup = frame.index[frame.index.duplicated()].unique()
            raise InputError(f"{where}: {len(dup)} sample ids occur more than once "
                             f"(e.g. {', '.join(repr(x) for x in dup[:5])}); keep one row per sample")
        frame.index = frame.index.astype(str)
        frame = frame.astype(object).where(frame.notna(), None)
        frame = frame.apply(lambda s: s.map(lambda v: None if v is None or str(v).strip() in MISSING_TOKENS else str(v).strip()))
    else:
        where = where or str(table)
        frame = read_annotations(table, id_column=id_column)
    categorical_l = split_names(categorical)
    quantitative_l = split_names(quantitative)
    technical_l = split_names(technical)
    exclude_l = split_names(exclude)
    for option, names in (("--categorical", categorical_l), ("--quantitative", quantitative_l),
                          ("--technical", technical_l)):
        unknown = [c for c in names if c not in frame.columns]
        if unknown:
            shown = ", ".join(repr(c) for c in frame.columns[:15])
            raise OptionError(f"{option}: no column {', '.join(repr(c) for c in unknown)} in {where} "
                              f"(columns: {shown}); check the spelling")
    both = set(categorical_l) & set(quantitative_l)
    if both:
        raise OptionError(f"column(s) {', '.join(sorted(both))} are declared both categorical and quantitative; choose one")
    frame = align_annotations(frame, sample_ids, where=where, allow_missing=allow_missing)
    ids = np.asarray(sample_ids, dtype=object)
    if active is not None:
        active = np.asarray(active, dtype=bool)
        if active.shape != ids.shape:
            raise OptionError(f"{where}: the active-sample mask has {active.shape[0]} entries for {ids.shape[0]} samples")
        frame = frame.iloc[np.flatnonzero(active)]
        ids = ids[active]

    quant: dict[str, np.ndarray] = {}
    qual: dict[str, np.ndarray] = {}
    rows = []
    n = len(frame)
    for column in frame.columns:
        if column in exclude_l:
            continue
        values = frame[column]
        present = values.notna().to_numpy()
        n_used = int(present.sum())
        numbers = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
        numeric = present & np.isfinite(numbers)
        bad = present & ~numeric
        kind = "qualitative"
        status = "used"
        if column in quantitative_l:
            if bad.any():
                i = int(np.flatnonzero(bad)[0])
                raise InputError(
                    f"{where}: column {column!r} is declared quantitative but sample {frame.index[i]!r} "
                    f"has {values.iloc[i]!r} ({int(bad.sum())} non-numeric values); fix them or leave the cells empty"
                )
            kind = "quantitative"
        elif column not in categorical_l and n_used and numeric.any():
            if not bad.any():
                kind = "quantitative"
            elif numeric.sum() >= _MOSTLY_NUMERIC * n_used:
                i = int(np.flatnonzero(bad)[0])
                raise InputError(
                    f"{where}: column {column!r} is numeric except for {int(bad.sum())} values (e.g. sample "
                    f"{frame.index[i]!r}: {values.iloc[i]!r}); fix them, leave missing cells empty, or pass "
                    f"--categorical {column}"
                )
        if kind == "quantitative":
            x = np.where(numeric, numbers, np.nan)
            if n_used < 3:
                status = f"skipped: only {n_used} values"
            elif np.nanstd(x) == 0:
                status = "skipped: constant"
            else:
                quant[column] = x
            n_levels = np.nan
        else:
            labels = np.array([str(v) if ok else None for v, ok in zip(values.to_numpy(dtype=object), present)],
                              dtype=object)
            levels = pd.unique(labels[present])
            n_levels = len(levels)
            if _is_boolean(levels):
                labels = np.array([None if v is None else ("true" if v.lower() in _TRUE else "false")
                                   for v in labels], dtype=object)
                n_levels = len(pd.unique(labels[present]))
            if n_levels < 2:
                status = f"skipped: a single level ({levels[0]!r})" if n_levels == 1 else "skipped: no values"
            elif n_levels == n_used and n_used > 10:
                status = "skipped: every value differs (an identifier?)"
            else:
                qual[column] = labels
        if status != "used":
            logger.warning("%s: annotation column %r %s; it is not analysed", where, column, status)
        if n_used < n and status == "used":
            logger.info("%s: column %r has %d missing values; they are ignored for this column", where, column, n - n_used)
        rows.append({
            "variable": column,
            "kind": kind,
            "technical": column in technical_l,
            "n_used": n_used,
            "n_missing": n - n_used,
            "n_levels": n_levels,
            "status": status,
        })
    variables = pd.DataFrame(rows, columns=["variable", "kind", "technical", "n_used", "n_missing", "n_levels", "status"])
    return AnnotationSet(ids, quant, qual, technical_l, variables, where)


def sample_flags(table: pd.DataFrame, column: str, sample_ids: Sequence[str], *, where: str = "annotations",
                 allow_missing: bool = False) -> np.ndarray:
    """A true/false annotation column (indexed by sample id) as a bool mask over ``sample_ids``.

    Accepted values (any case): true/false, yes/no, 1/0; missing values count as false.
    """
    if column not in table.columns:
        shown = ", ".join(repr(c) for c in list(table.columns)[:15])
        raise OptionError(f"--supplementary-samples-column: no column {column!r} in {where} (columns: {shown})")
    aligned = align_annotations(table[[column]], sample_ids, where=where, allow_missing=allow_missing)[column]
    truthy, falsy = {"true", "yes", "1", "t", "y"}, {"false", "no", "0", "f", "n"}
    out = np.zeros(len(aligned), dtype=bool)
    for i, value in enumerate(aligned.to_numpy(dtype=object)):
        if value is None or (isinstance(value, float) and np.isnan(value)):
            continue
        low = str(value).strip().lower()
        if low in truthy:
            out[i] = True
        elif low not in falsy:
            raise InputError(f"{where}: column {column!r} must hold true/false, but sample "
                             f"{aligned.index[i]!r} has {value!r}; fix the value")
    return out


def _is_boolean(levels: Sequence[str]) -> bool:
    low = {str(v).lower() for v in levels}
    return bool(low) and low <= {"true", "false"}


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else exc.__class__.__name__


# --------------------------------------------------------------------------- statistics


def correlation_test(x: np.ndarray, scores: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """Pearson correlation of ``x`` with each column of ``scores``, with two-sided p-values.

    Samples where ``x`` is missing (NaN) are ignored. The p-value comes from
    ``t = r·sqrt((n − 2)/(1 − r²))`` on ``n − 2`` degrees of freedom.

    Returns
    -------
    r : ndarray, shape (k,)
    p : ndarray, shape (k,)
    n : int
        Number of samples used.
    """
    x = np.asarray(x, dtype=np.float64)
    F = np.asarray(scores, dtype=np.float64)
    if F.ndim == 1:
        F = F[:, None]
    ok = np.isfinite(x)
    n = int(ok.sum())
    xc = x[ok] - x[ok].mean()
    Fc = F[ok] - F[ok].mean(axis=0)
    denom = np.sqrt(np.einsum("i,i->", xc, xc) * np.einsum("ij,ij->j", Fc, Fc))
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.clip((xc @ Fc) / denom, -1.0, 1.0)
    return r, correlation_p_value(r, n), n


def category_test_value(mean_group: np.ndarray, n_group: int, mean_all: np.ndarray, var_all: np.ndarray, n: int) -> np.ndarray:
    """Test value of a category: standardized difference of its mean from the overall mean.

    ``v = (x̄_g − x̄) / sqrt( (n − n_g)/(n − 1) · s²/n_g )`` where ``s²`` is the population
    variance of the scores over the ``n`` samples used: the category's ``n_g`` samples are
    treated as drawn without replacement (Lebart, Morineau & Piron 1995). Under the null
    hypothesis ``v`` is approximately standard normal; ``|v| ≥ 2`` is the usual threshold.
    """
    if n_group >= n:
        return np.full(np.shape(mean_group), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (np.asarray(mean_group) - mean_all) / np.sqrt((n - n_group) / (n - 1) * np.asarray(var_all) / n_group)


def correlation_ratio(y: np.ndarray, labels: np.ndarray) -> tuple[float, float, float]:
    """Correlation ratio η² = between-group / total sum of squares, its F statistic and p-value.

    Parameters
    ----------
    y : ndarray, shape (n,)
    labels : ndarray, shape (n,)
        Group of each value (no missing values).

    Returns
    -------
    ratio, f_statistic, p_value : float
        ``F = (SS_between/(G − 1)) / (SS_within/(n − G))`` on ``(G − 1, n − G)`` degrees of
        freedom (one-way analysis of variance).
    """
    y = np.asarray(y, dtype=np.float64)
    codes, uniques = pd.factorize(pd.Series(labels, dtype=object), sort=False)
    G, n = len(uniques), y.shape[0]
    counts = np.bincount(codes, minlength=G).astype(np.float64)
    means = np.bincount(codes, weights=y, minlength=G) / counts
    grand = y.mean()
    ss_total = float(np.sum((y - grand) ** 2))
    ss_between = float(np.sum(counts * (means - grand) ** 2))
    ss_within = max(ss_total - ss_between, 0.0)
    ratio = ss_between / ss_total if ss_total > 0 else np.nan
    if G < 2 or n <= G:
        return ratio, np.nan, np.nan
    with np.errstate(invalid="ignore", divide="ignore"):
        f = (ss_between / (G - 1)) / (ss_within / (n - G))
    p = float(sps.f.sf(f, G - 1, n - G)) if np.isfinite(f) else (0.0 if ss_within == 0 else np.nan)
    return ratio, float(f), p


def quantitative_associations(annotations: AnnotationSet, scores: np.ndarray, axis_names: Sequence[str]) -> pd.DataFrame:
    """Correlation of every quantitative annotation with every axis.

    Columns: variable, axis, n, correlation, p_value, p_adjusted (Benjamini–Hochberg over
    the annotations tested on the same axis), technical.
    """
    rows = []
    for name, x in annotations.quantitative.items():
        r, p, n = correlation_test(x, scores)
        for j, axis in enumerate(axis_names):
            rows.append((name, axis, n, r[j], p[j], name in annotations.technical))
    df = pd.DataFrame(rows, columns=["variable", "axis", "n", "correlation", "p_value", "technical"])
    df.insert(5, "p_adjusted", _adjust_by_axis(df))
    return df


def category_statistics(labels: np.ndarray, scores: np.ndarray, axis_names: Sequence[str], *,
                        variable: str = "", technical: bool = False) -> pd.DataFrame:
    """Barycentre, count and test value of every category of one qualitative annotation.

    Samples with a missing label are ignored; the overall mean and variance of the scores
    are taken over the samples used. Columns: variable, category, axis, count, n,
    mean_score, test_value, p_value (two-sided, normal approximation), technical.
    """
    F = np.asarray(scores, dtype=np.float64)
    ok = np.array([v is not None for v in labels], dtype=bool)
    lab = np.asarray(labels, dtype=object)[ok]
    Fu = F[ok]
    n = Fu.shape[0]
    mean_all = Fu.mean(axis=0)
    var_all = Fu.var(axis=0)
    rows = []
    for category in sorted(pd.unique(lab), key=str):
        member = lab == category
        n_g = int(member.sum())
        mean_g = Fu[member].mean(axis=0)
        v = category_test_value(mean_g, n_g, mean_all, var_all, n)
        p = 2.0 * sps.norm.sf(np.abs(v))
        for j, axis in enumerate(axis_names):
            rows.append((variable, str(category), axis, n_g, n, mean_g[j], v[j], p[j], technical))
    return pd.DataFrame(rows, columns=["variable", "category", "axis", "count", "n", "mean_score",
                                       "test_value", "p_value", "technical"])


def qualitative_associations(annotations: AnnotationSet, scores: np.ndarray,
                             axis_names: Sequence[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Correlation ratios (one row per variable and axis) and category statistics.

    Returns
    -------
    ratios : DataFrame
        variable, axis, n, n_levels, correlation_ratio, f_statistic, p_value, p_adjusted, technical.
    categories : DataFrame
        See :func:`category_statistics`.
    """
    F = np.asarray(scores, dtype=np.float64)
    rows, cats = [], []
    for name, labels in annotations.qualitative.items():
        technical = name in annotations.technical
        ok = np.array([v is not None for v in labels], dtype=bool)
        lab = np.asarray(labels, dtype=object)[ok]
        n_levels = len(pd.unique(lab))
        for j, axis in enumerate(axis_names):
            ratio, f, p = correlation_ratio(F[ok, j], lab)
            rows.append((name, axis, int(ok.sum()), n_levels, ratio, f, p, technical))
        cats.append(category_statistics(labels, F, axis_names, variable=name, technical=technical))
    ratios = pd.DataFrame(rows, columns=["variable", "axis", "n", "n_levels", "correlation_ratio", "f_statistic", "p_value", "technical"])
    ratios.insert(7, "p_adjusted", _adjust_by_axis(ratios))
    categories = pd.concat(cats, ignore_index=True) if cats else pd.DataFrame(
        columns=["variable", "category", "axis", "count", "n", "mean_score", "test_value", "p_value", "technical"])
    return ratios, categories


def _adjust_by_axis(df: pd.DataFrame) -> np.ndarray:
    out = np.full(len(df), np.nan)
    for _, index in df.groupby("axis", sort=False).indices.items():
        out[index] = benjamini_hochberg(df["p_value"].to_numpy()[index])
    return out
