"""Sample annotations: reading, alignment by sample id, and how each column is treated.

Annotations never take part in building the axes; :mod:`axiscope.explain.associations`
measures how much of each axis they account for. Each column is treated either as
**numeric** (its values are numbers) or as **categorical** (its values name groups), and
the decision is written down for the user in :attr:`AnnotationSet.usage`:

- text columns and true/false columns are categorical;
- numeric columns are numeric, except columns of whole numbers with few distinct values
  (class labels such as 0–9, coded groups), which are categorical: a correlation with a
  label code means nothing. Name such a column in ``numeric`` to treat it as numbers, or a
  numeric column in ``categorical`` to treat its values as groups.

Loading happens in small steps: read the table as text (:func:`read_annotations`), check
the declared column names, align the rows to the samples (:func:`align_annotations`), keep
the samples that built the axes, then decide how each column is treated
(:func:`classify_column`).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, OptionError, counted
from ..io.annotation_table import (  # the reader sits in io/, below fit, which reads covariates
    MISSING_TOKENS,
    _frame_as_text,
    _shown,
    align_annotations,
    read_annotations,
)

__all__ = [
    "MISSING_TOKENS",
    "MAX_CODE_CATEGORIES",
    "AnnotationSet",
    "ColumnTreatment",
    "read_annotations",
    "align_annotations",
    "load_annotations",
    "classify_column",
    "split_names",
    "sample_flags",
]

logger = logging.getLogger(__name__)

#: A text column whose non-missing values are numbers in at least this fraction is taken
#: for a numeric column with typos (common practice, no source).
_MOSTLY_NUMERIC = 0.9
#: A column of whole numbers with at most this many distinct values, each seen at least
#: twice on average, holds codes (class labels 0–9, coded groups) and is treated as
#: categorical (common practice, no source).
MAX_CODE_CATEGORIES = 12
#: Categorical columns with more distinct values than this, all different, look like ids.
_ID_LIKE_MIN = 10

_USAGE_COLUMNS = ["annotation", "treated_as", "technical", "used", "n_used", "n_missing",
                  "n_categories", "note"]


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


# --------------------------------------------------------------------------- reading


# --------------------------------------------------------------------------- treating columns


@dataclass
class ColumnTreatment:
    """How one annotation column is treated.

    Attributes
    ----------
    treated_as : {"numeric", "categorical"}
    values : ndarray or None
        float64 with NaN for missing values (numeric), or object with ``None`` for missing
        values (categorical); None when the column is not used.
    n_used : int
        Samples with a value.
    n_categories : int or None
    note : str
        Why the column is treated this way or skipped, in words for the user ("" when
        nothing needs saying).
    used : bool
    """

    treated_as: str
    values: np.ndarray | None
    n_used: int
    n_categories: int | None
    note: str
    used: bool


def classify_column(name: str, values: pd.Series, *, declared: str | None = None,
                    where: str = "annotations") -> ColumnTreatment:
    """Decide whether one annotation column is numeric or categorical, and whether it is usable.

    Parameters
    ----------
    name : str
    values : Series of str or None, shape (n,)
        The column as text, aligned to the samples that built the axes (None or NaN where
        missing).
    declared : {"numeric", "categorical"}, optional
        What the user declared; otherwise the column's content decides (see the module
        description).
    where : str
        Name of the table in messages.

    Raises
    ------
    InputError
        A column declared numeric holds text, or a column is numeric except for a few values.
    """
    cells = values.to_numpy(dtype=object)
    present = ~pd.isna(cells)
    cells = np.where(present, cells, None)
    numbers = pd.to_numeric(pd.Series(cells, dtype=object), errors="coerce").to_numpy(dtype=np.float64)
    numeric = present & np.isfinite(numbers)
    bad = present & ~numeric
    n_used = int(present.sum())
    if declared == "numeric" and bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{where}: column {name!r} is declared numeric but sample {values.index[i]!r} has "
                         f"{cells[i]!r} ({int(bad.sum())} values are not numbers); fix them or leave the cells empty")
    if declared is None and n_used and numeric.any() and bad.any() and numeric.sum() >= _MOSTLY_NUMERIC * n_used:
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{where}: column {name!r} is numeric except for {int(bad.sum())} values (e.g. sample "
                         f"{values.index[i]!r}: {cells[i]!r}); fix them, leave missing cells empty, or name "
                         f"the column in categorical")
    all_numbers = n_used > 0 and not bad.any()
    if declared == "numeric" or (declared is None and all_numbers):
        return _numeric_or_codes(name, np.where(numeric, numbers, np.nan), n_used, declared == "numeric")
    return _categorical(cells, present, n_used)


def _numeric_or_codes(name: str, x: np.ndarray, n_used: int, declared: bool) -> ColumnTreatment:
    """A column of numbers: numeric, unless it holds a few whole-number codes (and was not declared)."""
    finite = x[np.isfinite(x)]
    levels = np.unique(finite)
    whole = bool(finite.size) and bool(np.all(finite == np.round(finite)))
    if not declared and whole and 2 <= levels.size <= MAX_CODE_CATEGORIES and levels.size <= n_used / 2:
        labels = np.array([None if not np.isfinite(v) else _code_label(v) for v in x], dtype=object)
        note = (f"whole numbers with {levels.size} distinct values ({_code_label(levels[0])}–"
                f"{_code_label(levels[-1])}), taken for category codes; name {name!r} in numeric to treat "
                "them as numbers")
        treatment = _categorical(labels, np.isfinite(x), n_used)
        if treatment.used:
            treatment.note = note
        return treatment
    note = ""
    if whole and not declared:
        note = (f"whole numbers with {levels.size} distinct values, treated as numbers; name {name!r} in "
                "categorical if they are codes")
    if n_used < 3:
        return ColumnTreatment("numeric", None, n_used, None, f"skipped: only {n_used} values", False)
    if levels.size < 2:
        return ColumnTreatment("numeric", None, n_used, None, "skipped: constant", False)
    return ColumnTreatment("numeric", x, n_used, None, note, True)


def _categorical(cells: np.ndarray, present: np.ndarray, n_used: int) -> ColumnTreatment:
    labels = np.array([str(v) if ok else None for v, ok in zip(cells, present)], dtype=object)
    levels = pd.unique(labels[present])
    if _is_boolean(levels):
        labels = np.array([None if v is None else v.lower() for v in labels], dtype=object)
        levels = pd.unique(labels[present])
    n_levels = len(levels)
    if n_levels < 2:
        note = f"skipped: a single category ({levels[0]!r})" if n_levels == 1 else "skipped: no values"
        return ColumnTreatment("categorical", None, n_used, n_levels, note, False)
    if n_levels == n_used and n_used > _ID_LIKE_MIN:
        return ColumnTreatment("categorical", None, n_used, n_levels,
                               "skipped: every value differs (an identifier?)", False)
    return ColumnTreatment("categorical", labels, n_used, n_levels, "", True)


def _code_label(value: float) -> str:
    return str(int(value))


@dataclass
class AnnotationSet:
    """Annotations aligned to samples, each column treated as numeric or categorical.

    Attributes
    ----------
    sample_ids : ndarray of str, shape (n,)
        The samples the annotations are aligned to (those that built the axes).
    numeric : dict of str to ndarray of float, shape (n,)
        NaN where the value is missing.
    categorical : dict of str to ndarray of object, shape (n,)
        ``None`` where the value is missing.
    technical : list of str
        Columns marked as technical (processing batch, run, depth, quality ...).
    usage : DataFrame
        One row per column: ``annotation``, ``treated_as``, ``technical``, ``used``,
        ``n_used``, ``n_missing``, ``n_categories`` and a ``note`` saying why it was skipped or
        how to change its treatment.
    source : str
    """

    sample_ids: np.ndarray
    numeric: dict[str, np.ndarray]
    categorical: dict[str, np.ndarray]
    technical: list[str]
    usage: pd.DataFrame
    source: str = "annotations"

    def subset(self, rows: np.ndarray) -> "AnnotationSet":
        """The same annotations for a subset of samples (bool mask or indices)."""
        return AnnotationSet(
            self.sample_ids[rows],
            {k: v[rows] for k, v in self.numeric.items()},
            {k: v[rows] for k, v in self.categorical.items()},
            list(self.technical),
            self.usage.copy(),
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

    @classmethod
    def empty(cls, sample_ids: Sequence[str]) -> "AnnotationSet":
        """No annotation at all, for ``sample_ids``."""
        return cls(np.asarray(sample_ids, dtype=object), {}, {}, [], pd.DataFrame(columns=_USAGE_COLUMNS))


def load_annotations(
    table: str | Path | pd.DataFrame,
    sample_ids: Sequence[str],
    *,
    id_column: str = "sample_id",
    categorical: Iterable[str] | str | None = None,
    numeric: Iterable[str] | str | None = None,
    technical: Iterable[str] | str | None = None,
    ignore: Iterable[str] | str | None = None,
    allow_missing: bool = False,
    where: str | None = None,
    active: np.ndarray | None = None,
) -> AnnotationSet:
    """Read (if a path), align and treat the annotations of ``sample_ids``.

    Alignment (strict by default) covers every sample in ``sample_ids``, supplementary ones
    included; how each column is treated and the counts of the usage table are decided on
    the samples that built the axes only, since only they are tested against the axes.

    Parameters
    ----------
    table : path or DataFrame
        A TSV file, or a DataFrame with an ``id_column`` column (or indexed by sample id).
    sample_ids : sequence of str, shape (n,)
    id_column : str, default="sample_id"
    categorical, numeric : column names, optional
        Treat a column's values as groups, or as numbers (then every non-missing value must
        be a number). Without them the content decides (see the module description).
    technical : column names, optional
        Columns describing processing rather than biology (batch, run, depth, quality); an
        axis that lines up with one of them more than with any other annotation is flagged.
    ignore : column names, optional
        Columns not to analyse (e.g. the supplementary-samples flag).
    allow_missing : bool, default=False
        See :func:`align_annotations`.
    where : str, optional
        Name of the table in messages (default: its path).
    active : ndarray of bool, shape (n,), optional
        The samples that built the axes (default: all). The returned set holds these
        samples only.

    Returns
    -------
    AnnotationSet
        Over the active samples, in the order of ``sample_ids``.
    """
    if isinstance(table, pd.DataFrame):
        where = where or "annotations"
        frame = _frame_as_text(table, id_column, where)
    else:
        where = where or str(table)
        frame = read_annotations(table, id_column=id_column)
    declared = _declared_treatments(frame.columns, categorical, numeric, technical, where)
    technical_l = split_names(technical)
    frame = align_annotations(frame, sample_ids, where=where, allow_missing=allow_missing)
    ids = np.asarray(sample_ids, dtype=object)
    if active is not None:
        active = np.asarray(active, dtype=bool)
        if active.shape != ids.shape:
            raise OptionError(f"{where}: the active-sample mask has {active.shape[0]} entries for {ids.shape[0]} samples")
        frame = frame.iloc[np.flatnonzero(active)]
        ids = ids[active]
    ignored = set(split_names(ignore))
    numeric_cols: dict[str, np.ndarray] = {}
    categorical_cols: dict[str, np.ndarray] = {}
    rows = []
    for column in frame.columns:
        if column in ignored:
            continue
        treatment = classify_column(column, frame[column], declared=declared.get(column), where=where)
        _report(where, column, treatment, len(frame))
        if treatment.used:
            target = numeric_cols if treatment.treated_as == "numeric" else categorical_cols
            target[column] = treatment.values
        rows.append([column, treatment.treated_as, column in technical_l, treatment.used, treatment.n_used,
                     len(frame) - treatment.n_used, treatment.n_categories, treatment.note])
    usage = pd.DataFrame(rows, columns=_USAGE_COLUMNS)
    return AnnotationSet(ids, numeric_cols, categorical_cols, technical_l, usage, where)


def _declared_treatments(columns: Iterable[str], categorical, numeric, technical, where: str) -> dict[str, str]:
    """The treatment the user declared for each named column; unknown names are an error."""
    columns = list(columns)
    named = {"categorical": split_names(categorical), "numeric": split_names(numeric),
             "technical": split_names(technical)}
    for parameter, names in named.items():
        unknown = [c for c in names if c not in columns]
        if unknown:
            raise OptionError(f"{parameter}={','.join(unknown)}: no such column in {where} "
                              f"(columns: {_shown(columns, 15)}); check the spelling")
    both = set(named["categorical"]) & set(named["numeric"])
    if both:
        raise OptionError(f"{counted(len(both), 'column')} ({', '.join(sorted(both))}) named both in "
                          f"categorical=... and in numeric=...; choose one")
    declared = {c: "categorical" for c in named["categorical"]}
    declared.update({c: "numeric" for c in named["numeric"]})
    return declared


def _report(where: str, column: str, treatment: ColumnTreatment, n: int) -> None:
    if not treatment.used:
        logger.warning("%s: annotation column %r %s; it is not analysed", where, column, treatment.note)
        return
    if treatment.note and treatment.treated_as == "categorical":
        logger.warning("%s: annotation column %r: %s", where, column, treatment.note)
    if treatment.n_used < n:
        logger.info("%s: column %r has %d missing values; they are left out for this column",
                    where, column, n - treatment.n_used)


def sample_flags(table: pd.DataFrame, column: str, sample_ids: Sequence[str], *, where: str = "annotations",
                 allow_missing: bool = False) -> np.ndarray:
    """A true/false annotation column (indexed by sample id) as a bool mask over ``sample_ids``.

    Accepted values (any case): true/false, yes/no, 1/0; missing values count as false.
    """
    if column not in table.columns:
        raise OptionError(f"supplementary_samples_column: no column {column!r} in {where} "
                          f"(columns: {_shown(table.columns, 15)})")
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
