"""Delimited text input (``.csv``, ``.tsv``, ``.txt``, optionally gzipped), parsed into memory.

The first column holds the ids along the file's row axis, the header row the ids along
its column axis; empty and NA-like cells become NaN. The file is read twice (once to
count rows, once to parse them in blocks) and held in memory as float64.
"""

from __future__ import annotations

import csv
import gzip
import math
import pathlib
from collections.abc import Iterator, Sequence
from typing import TextIO

import numpy as np

from ..errors import InputError, OptionError, one_line, reason
from .ids import to_str_ids
from .source import MatrixSource, MemoryBackend, build_source

__all__ = ["DELIMITERS", "open_text", "text_suffix"]

#: Delimiter of each text suffix.
DELIMITERS = {".csv": ",", ".tsv": "\t", ".txt": "\t"}
_NA_TOKENS = frozenset({"", "na", "nan", "n/a", "null"})
_BLOCK_ROWS = 512


def text_suffix(path: pathlib.Path) -> str | None:
    """The delimiter-defining suffix of a (possibly gzipped) text file, else None."""
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] == ".gz":
        suffixes = suffixes[:-1]
    if suffixes and suffixes[-1] in DELIMITERS:
        return suffixes[-1]
    return None


def _open_handle(path: pathlib.Path) -> TextIO:
    """Open a (possibly gzipped) text file for csv reading."""
    if path.suffix.lower() == ".gz":
        return gzip.open(path, "rt", encoding="utf-8", newline="")
    return open(path, encoding="utf-8", newline="")


def _rows(path: pathlib.Path, delimiter: str) -> Iterator[tuple[int, list[str]]]:
    """Yield ``(line_number, fields)`` for every non-blank row, header included."""
    with _open_handle(path) as handle:
        reader = csv.reader(handle, delimiter=delimiter)
        for fields in reader:
            if fields and any(field.strip() for field in fields):
                yield reader.line_num, fields


def _parse_cell(text: str) -> float:
    """Parse one cell; empty and NA-like cells become NaN. Raises ValueError otherwise."""
    stripped = text.strip()
    if stripped.lower() in _NA_TOKENS:
        return math.nan
    return float(stripped)


def _parse_block(path: pathlib.Path, lines: Sequence[int], values: list[list[str]],
                 header: Sequence[str]) -> np.ndarray:
    """Convert a block of text rows to float64, naming the first bad cell on failure."""
    try:
        return np.array(values, dtype=np.float64)
    except ValueError:
        pass
    out = np.empty((len(values), len(header)), dtype=np.float64)
    for i, (line, row) in enumerate(zip(lines, values)):
        for j, cell in enumerate(row):
            try:
                out[i, j] = _parse_cell(cell)
            except ValueError:
                raise InputError(f"{path.name}: line {line}, column {header[j]!r}: {one_line(cell, 40)!r} "
                                 "is not a number; fix the cell or remove the row") from None
    return out


def _read(path: pathlib.Path, delimiter: str, samples_in: str) -> tuple[np.ndarray, list[str], list[str]]:
    """Parse a delimited text matrix into a logical float64 array plus file row/column ids."""
    n_data = sum(1 for _ in _rows(path, delimiter)) - 1
    rows_iter = _rows(path, delimiter)
    first = next(rows_iter, None)
    if first is None or n_data < 0:
        raise InputError(f"{path.name}: file is empty; it needs a header row and one row per "
                         f"{'sample' if samples_in == 'rows' else 'feature'}")
    column_ids = [cell.strip() for cell in first[1][1:]]
    width = len(column_ids) + 1
    data = np.empty((n_data, len(column_ids)) if samples_in == "rows" else (len(column_ids), n_data),
                    dtype=np.float64)
    row_ids: list[str] = []
    lines: list[int] = []
    values: list[list[str]] = []

    def flush() -> None:
        block = _parse_block(path, lines, values, column_ids)
        start = len(row_ids) - len(values)
        if samples_in == "rows":
            data[start:start + len(values)] = block
        else:
            data[:, start:start + len(values)] = block.T
        lines.clear()
        values.clear()

    for line, fields in rows_iter:
        if len(fields) != width:
            raise InputError(f"{path.name}: line {line} has {len(fields)} fields, expected {width} "
                             "(as in the header); fix the row")
        row_ids.append(fields[0].strip())
        lines.append(line)
        values.append(fields[1:])
        if len(values) >= _BLOCK_ROWS:
            flush()
    if values:
        flush()
    return data, row_ids, column_ids


def open_text(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
              feature_ids: str | None, samples_in: str) -> MatrixSource:
    """Open a delimited text matrix, parsed into memory (``dataset`` does not apply)."""
    if sample_ids is not None or feature_ids is not None:
        raise OptionError(f"{path.name}: text input carries its own ids (first column and header row); "
                          "leave out sample_ids and feature_ids")
    delimiter = DELIMITERS[text_suffix(path) or ".tsv"]
    try:
        data, row_ids, column_ids = _read(path, delimiter, samples_in)
    except (UnicodeDecodeError, csv.Error, OSError, EOFError) as exc:
        raise InputError(f"{path.name}: cannot read as delimited text ({reason(exc)}); "
                         "check the file is uncorrupted UTF-8 text") from exc
    backend = MemoryBackend(data, (len(row_ids), len(column_ids)))
    if samples_in == "rows":
        found = {"sample": (row_ids, "first column"), "feature": (column_ids, "header row")}
    else:
        found = {"sample": (column_ids, "header row"), "feature": (row_ids, "first column")}

    def resolve(given: str, default: str, argument: str) -> tuple[np.ndarray | None, str]:
        values, where = found[default.split("_")[0]]
        return to_str_ids(values), f"{where} of {path.name}"

    return build_source(path, "text", None, samples_in, backend, resolve, None, None)
