"""Reading a table of sample annotations (tab-separated, one row per sample) and aligning it by id.

Only text handling: every cell stays a string (missing cells ``None``). How a column is
treated (numeric or categorical) is decided by the stage that uses it:
:mod:`axiscope.explain.annotations` for the axis explanations,
:mod:`axiscope.core.adjust` for the covariates a fit adjusts for.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError

__all__ = ["MISSING_TOKENS", "read_annotations", "align_annotations"]

logger = logging.getLogger(__name__)

#: Cell values read as missing in an annotation table.
MISSING_TOKENS = frozenset({"", "NA", "N/A", "NaN", "nan", "null", "NULL", "None"})


def read_annotations(path: str | Path | pd.DataFrame, *, id_column: str = "sample_id") -> pd.DataFrame:
    """Read a tab-separated annotation table as text, one row per sample.

    Parameters
    ----------
    path : path or DataFrame
        Tab-separated file with a header line (or a table already read, with an
        ``id_column`` column or index).
    id_column : str, default="sample_id"
        Column holding the sample ids; must exist, be complete and unique.

    Returns
    -------
    DataFrame
        All cells as ``str`` (missing cells as ``None``), indexed by sample id; the id
        column itself is removed.
    """
    if isinstance(path, pd.DataFrame):  # a caller's table, put in the same form
        return _frame_as_text(path, id_column, "annotations")
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such annotation file; check the path given as annotations=...")
    try:
        table = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False, na_filter=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not a readable tab-separated table ({_first_line(exc)}); "
                         "save it as TSV with a header line") from exc
    table.columns = [str(c).strip() for c in table.columns]
    if id_column not in table.columns:
        raise InputError(f"{path}: no column {id_column!r} (columns: {_shown(table.columns)}); "
                         "name the sample-id column with id_column")
    ids = table[id_column].str.strip()
    empty = np.flatnonzero(ids.isin(MISSING_TOKENS).to_numpy())
    if empty.size:
        raise InputError(f"{path}: {empty.size} rows have an empty {id_column!r} (first on line "
                         f"{empty[0] + 2}); give every row a sample id")
    _refuse_duplicates(pd.Index(ids.to_numpy(dtype=object)), str(path), f" in column {id_column!r}")
    table = table.drop(columns=[id_column])
    table.index = pd.Index(ids.to_numpy(dtype=object), name=id_column)
    table = table.apply(lambda s: s.str.strip())
    return table.astype(object).mask(table.isin(MISSING_TOKENS), None)


def _frame_as_text(frame: pd.DataFrame, id_column: str, where: str) -> pd.DataFrame:
    """A caller's DataFrame in the form :func:`read_annotations` returns."""
    frame = frame.copy()
    if id_column in frame.columns:
        frame = frame.set_index(id_column)
    elif frame.index.name != id_column:
        raise InputError(f"{where}: no column {id_column!r} (columns: {_shown(frame.columns)}); "
                         "name the sample-id column with id_column")
    _refuse_duplicates(frame.index, where, "")
    frame.index = pd.Index([str(i) for i in frame.index], dtype=object, name=id_column)
    frame.columns = [str(c).strip() for c in frame.columns]

    def cell(value):
        if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
            return None
        text = str(value).strip()
        return None if text in MISSING_TOKENS else text

    return frame.astype(object).apply(lambda s: s.map(cell)).astype(object)


def _refuse_duplicates(index: pd.Index, where: str, column_text: str) -> None:
    duplicated = index[index.duplicated(keep=False)].unique()
    if len(duplicated):
        examples = ", ".join(repr(x) for x in duplicated[:5])
        raise InputError(f"{where}: {len(duplicated)} sample ids occur more than once{column_text} "
                         f"(e.g. {examples}); keep one row per sample")


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
            raise InputError(message + "; fix the ids (see id_column) or set allow_missing")
        logger.warning("%s; unmatched rows are dropped and samples without a row count as missing", message)
    return table.reindex(ids)


def _shown(columns: Iterable[str], limit: int = 10) -> str:
    return ", ".join(repr(c) for c in list(columns)[:limit])


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else exc.__class__.__name__
