"""Atomic output directories and table writers."""

from __future__ import annotations

import contextlib
import os
import re
import shutil
import tempfile
from collections.abc import Iterator, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ..defaults import DEFAULT_TOP_FEATURES  # noqa: F401  (re-exported)
from ..errors import InputError, OptionError

__all__ = ["atomic_directory", "check_target", "write_table", "write_json", "write_zarr_matrix",
           "read_result_table", "check_result_table", "REFIT_HINT", "ZARR_FEATURE_THRESHOLD"]


#: Above this many features, per-feature tables are also written as Zarr arrays with ids.
ZARR_FEATURE_THRESHOLD = 200_000


def check_target(out: Path, overwrite: bool) -> None:
    """Refuse an existing output directory unless ``overwrite``."""
    out = Path(out)
    if out.exists() and not overwrite:
        raise OptionError(f"{out}: already exists; choose another directory or pass overwrite=True")
    if out.exists() and not out.is_dir():
        raise OptionError(f"{out}: exists and is not a directory; choose another directory")


@contextlib.contextmanager
def atomic_directory(out: Path, *, overwrite: bool = False) -> Iterator[Path]:
    """Yield a temporary directory beside ``out``; move it to ``out`` only on success.

    A failed or interrupted run leaves neither ``out`` nor the temporary directory.
    """
    out = Path(out)
    check_target(out, overwrite)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.tmp-", dir=out.parent))
    try:
        yield tmp
        if out.exists():
            old = out.with_name(f".{out.name}.old-{os.getpid()}")
            os.replace(out, old)
            os.replace(tmp, out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_table(df: pd.DataFrame, path: Path, *, parquet: bool = False, header: Sequence[str] = ()) -> None:
    """Write a tab-separated table that any CSV reader splits into the right cells (and a Parquet copy).

    Numbers are written with 8 significant digits and missing values as empty cells;
    true/false flags as ``true``/``false``; text cells are quoted (``"…"``, inner quotes
    doubled, RFC 4180 style) when they hold a tab, a line break (``\\n`` or ``\\r``), a quote,
    a ``#``, or leading/trailing white space, so that such ids cannot break a row. The
    ``header`` lines are written first, each prefixed with ``# ``.
    """
    flags = {c: df[c].map(lambda v: "" if v is None or v is pd.NA else ("true" if v else "false"))
             for c in df.columns if pd.api.types.is_bool_dtype(df[c].dtype)}
    plain = df.assign(**flags) if flags else df
    if any(_awkward(plain[c]) for c in plain.columns if not pd.api.types.is_numeric_dtype(plain[c].dtype)) or any(
            _QUOTE_IF.search(str(c)) for c in plain.columns):
        _write_quoted(df, path, header)  # rare: cells the csv module would not quote
    else:
        with Path(path).open("w", encoding="utf-8", newline="") as handle:
            for line in header:
                handle.write(f"# {line}\n" if line else "#\n")
            plain.to_csv(handle, sep="\t", index=False, float_format="%.8g", lineterminator="\n")
    if parquet:
        df.to_parquet(Path(path).with_suffix(".parquet"), index=False)


def _awkward(values: pd.Series) -> bool:
    """Whether a text column holds a cell that the csv module's minimal quoting would leave broken."""
    text = values[values.map(lambda v: isinstance(v, str))]
    return bool(len(text)) and bool(text.str.contains(r'\r|^#|^\s|\s$', regex=True).any())


#: Text cells holding one of these characters are quoted: the separator, line breaks, the
#: quote itself, and ``#`` (so that readers told to skip ``#`` comments keep the cell whole).
_QUOTE_IF = re.compile(r'[\t\n\r"#]|^\s|\s$')


def _write_quoted(df: pd.DataFrame, path: Path, header: Sequence[str]) -> None:
    """Write a tab-separated table that any CSV reader splits into the right cells (and a Parquet copy).

    Numbers are written with 8 significant digits and missing values as empty cells;
    true/false flags as ``true``/``false``; text cells are quoted (``"…"``, inner quotes
    doubled, RFC 4180 style) when they hold a tab, a line break (``\\n`` or ``\\r``), a quote,
    a ``#``, or leading/trailing white space, so that such ids cannot break a row. The
    ``header`` lines are written first, each prefixed with ``# ``.
    """
    columns = [_tsv_cells(df[c]) for c in df.columns]
    with Path(path).open("w", encoding="utf-8", newline="") as handle:
        for line in header:
            handle.write(f"# {line}\n" if line else "#\n")
        handle.write("\t".join(_quote(str(c)) for c in df.columns) + "\n")
        for row in zip(*columns):
            handle.write("\t".join(row) + "\n")


def _quote(text: str) -> str:
    return '"' + text.replace('"', '""') + '"' if _QUOTE_IF.search(text) else text


def _tsv_cells(values: pd.Series) -> list[str]:
    """The cells of one column as text."""
    dtype = values.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return ["" if v is pd.NA or v is None else ("true" if v else "false") for v in values.tolist()]
    if pd.api.types.is_integer_dtype(dtype):
        return ["" if v is pd.NA or v is None else str(int(v)) for v in values.tolist()]
    if pd.api.types.is_float_dtype(dtype):
        return [f"{v:.8g}" if v == v else "" for v in values.to_numpy(dtype=np.float64, na_value=np.nan).tolist()]
    out = []
    for v in values.tolist():
        if v is None or v is pd.NA or (isinstance(v, float) and v != v):
            out.append("")
        elif isinstance(v, (bool, np.bool_)):
            out.append("true" if v else "false")
        elif isinstance(v, (float, np.floating)):
            out.append(f"{v:.8g}")
        elif isinstance(v, (int, np.integer)):
            out.append(str(int(v)))
        else:
            out.append(_quote(str(v)))
    return out



def write_json(obj: dict, path: Path) -> None:
    """Write strict JSON (RFC 8259): NaN and infinities become ``null``, never bare ``NaN``."""
    import json

    text = json.dumps(_strict(obj), indent=2, allow_nan=False)
    Path(path).write_text(text + "\n", encoding="utf-8")


def _strict(value):
    """``value`` with numpy scalars and arrays, paths and tuples made plain; non-finite floats → None."""
    if isinstance(value, dict):
        return {str(k): _strict(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_strict(v) for v in value]
    if isinstance(value, np.ndarray):
        return _strict(value.tolist())
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if isinstance(value, Path):
        return str(value)
    if value is None or isinstance(value, (str, int, float, bool)):
        return value
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def write_zarr_matrix(path: Path, values: np.ndarray, row_ids: np.ndarray, columns: list[str]) -> None:
    """A 2-D Zarr array ``values`` with row ids and column names, as a Zarr v3 group."""
    import zarr

    group = zarr.open_group(str(path), mode="w")
    arr = group.create_array("values", shape=values.shape, dtype=values.dtype,
                             chunks=(min(values.shape[0], 65536), values.shape[1]))
    arr[:] = values
    ids = group.create_array("row_ids", shape=(len(row_ids),), dtype=str)
    ids[:] = np.asarray(row_ids, dtype=str)
    group.attrs["columns"] = list(columns)


#: Appended to messages about damaged result files.
REFIT_HINT = "restore the file written by 'axiscope fit' or refit"


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
        raise InputError(f"{path}: not a readable table ({reason}); {REFIT_HINT}") from exc
    return check_result_table(table, path, required=required, numeric=numeric)


def check_result_table(table: pd.DataFrame, path: Path, *, required: Sequence[str],
                       numeric: Sequence[str] = ()) -> pd.DataFrame:
    """Check that ``table`` (read from ``path``) has the ``required`` columns and numbers in ``numeric``."""
    lacking = [c for c in required if c not in table.columns]
    if lacking:
        raise InputError(f"{path}: missing column(s) {', '.join(lacking)}; {REFIT_HINT}")
    for column in numeric:
        try:
            table[column] = table[column].astype(np.float64)
        except (ValueError, TypeError) as exc:
            raise InputError(f"{path}: column {column} holds values that are not numbers; {REFIT_HINT}") from exc
    return table
