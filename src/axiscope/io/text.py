"""Delimited text input (``.csv``, ``.tsv``, ``.txt``, optionally gzipped), streamed in row blocks.

Layout: the header row holds the ids along the file's column axis, the first column the
ids along its row axis; one row per line (quoted cells follow the usual CSV rules).

What a cell may hold:

* a plain ASCII decimal number: an optional sign, digits ``0-9`` with an optional
  decimal point, an optional exponent (``1``, ``-2.5``, ``.5``, ``3e-7``); spaces around
  it are ignored. ``inf``, ``-inf``, ``infinity`` are read as infinite values, which a fit
  refuses unless missing values are allowed;
* nothing, or an NA-like word (``NA``, ``NaN``, ``N/A``, ``null``, any case): a missing
  value (NaN).

Anything else is an error naming the line and column. This refuses on purpose what
Python's ``float`` would quietly accept: digit-group separators (``1_000``), digits of
other scripts (Arabic-Indic ``١٢٣``, full-width ``１``), and stray bytes such as NUL.
A byte-order mark at the start of the file is removed; the text must be UTF-8.

Memory: the file is read once, block by block (about :data:`BLOCK_CELLS` cells at a
time), and each parsed block is written as float64 to an anonymous scratch file in the
temporary folder (or ``scratch``), which has no name on disk and disappears with the
process, even a killed one. Sample blocks are then read from it by positioned reads, as
for ``.npy`` input: whatever the file's size, only the ids and a few blocks are held in
memory. Samples stored as the file's columns cost one more read of the file (to count
its rows), and the scratch file holds them transposed, so that a block of samples is
still one contiguous read.
"""

from __future__ import annotations

import csv
import gzip
import itertools
import math
import os
import pathlib
import re
import tempfile
import zlib
from collections.abc import Iterator, Sequence
from typing import IO, TextIO

import numpy as np

from ..errors import InputError, OptionError, one_line, reason
from .ids import to_str_ids
from .source import Backend, MatrixSource, build_source, pread_rows

__all__ = ["BLOCK_CELLS", "DELIMITERS", "TextBackend", "open_text", "parse_cell", "text_suffix"]

#: Delimiter of each text suffix.
DELIMITERS = {".csv": ",", ".tsv": "\t", ".txt": "\t"}
#: Cells read as missing values (compared in lower case, after removing surrounding spaces).
NA_TOKENS = frozenset({"", "na", "nan", "n/a", "null"})
#: Cells parsed and written to the scratch file at a time (about 2 MB as Python strings).
BLOCK_CELLS = 1 << 15
_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|[+-]?(?:inf|infinity)",
                     re.IGNORECASE)
_READ_ERRORS = (UnicodeDecodeError, csv.Error, OSError, EOFError, zlib.error)


def text_suffix(path: pathlib.Path) -> str | None:
    """The delimiter-defining suffix of a (possibly gzipped) text file, else None."""
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] == ".gz":
        suffixes = suffixes[:-1]
    if suffixes and suffixes[-1] in DELIMITERS:
        return suffixes[-1]
    return None


def _open_handle(path: pathlib.Path) -> TextIO:
    """Open a (possibly gzipped) UTF-8 text file for csv reading; a leading byte-order mark is dropped."""
    if path.suffix.lower() == ".gz":
        return gzip.open(path, "rt", encoding="utf-8-sig", newline="")
    return open(path, encoding="utf-8-sig", newline="")


class _Rows:
    """``(line_number, fields)`` of every non-blank row, header included; remembers the last line."""

    def __init__(self, path: pathlib.Path, delimiter: str) -> None:
        self.path = path
        self.delimiter = delimiter
        self.line = 0

    def __iter__(self) -> Iterator[tuple[int, list[str]]]:
        with _open_handle(self.path) as handle:
            reader = csv.reader(handle, delimiter=self.delimiter)
            for fields in reader:
                self.line = reader.line_num
                if fields and any(field.strip() for field in fields):
                    yield reader.line_num, fields


def parse_cell(text: str) -> float:
    """One cell as a float: an ASCII decimal number, or NaN for an empty or NA-like cell.

    Raises ``ValueError`` for anything else (see the module's rules).
    """
    stripped = text.strip(" \t")
    if stripped.lower() in NA_TOKENS:
        return math.nan
    if _NUMBER.fullmatch(stripped) is None:
        raise ValueError(stripped)
    return float(stripped)


def _parse_block(path: pathlib.Path, lines: Sequence[int], values: list[list[str]],
                 header: Sequence[str]) -> np.ndarray:
    """Convert a block of text rows to float64, naming the first bad cell on failure."""
    text = "".join(itertools.chain.from_iterable(values))
    if text.isascii() and "_" not in text:
        # ASCII without underscores: numpy's conversion accepts exactly the plain decimal
        # numbers (and inf/nan words); anything else falls through to the cell-wise check
        try:
            return np.array(values, dtype=np.float64)
        except ValueError:
            pass
    out = np.empty((len(values), len(header)), dtype=np.float64)
    for i, (line, row) in enumerate(zip(lines, values)):
        for j, cell in enumerate(row):
            try:
                out[i, j] = parse_cell(cell)
            except ValueError:
                raise InputError(
                    f"{path.name}: line {line}, column {header[j]!r}: {one_line(cell, 40)!r} is not a number; "
                    "fix the cell (plain ASCII decimal digits, no '_' separators; empty or NA if missing) "
                    "or remove the row") from None
    return out


class TextBackend(Backend):
    """Parsed text held in an anonymous scratch file, in logical orientation, read by positioned reads."""

    def __init__(self, handle: IO[bytes], file_shape: tuple[int, int], samples_in: str) -> None:
        self._handle: IO[bytes] | None = handle
        self.stored_dtype = np.dtype(np.float64)
        self.file_shape = file_shape
        rows, cols = file_shape
        self._n_features = cols if samples_in == "rows" else rows

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        if self._handle is None:
            raise ValueError("source is closed")
        return pread_rows(self._handle.fileno(), 0, start, stop, self._n_features, self.stored_dtype, dtype)

    def plain_rows(self, samples_in: str) -> bool:
        return self._handle is not None

    def close(self) -> None:
        if self._handle is not None:
            self._handle.close()
            self._handle = None


def _scratch_file(scratch: str | os.PathLike[str] | None) -> IO[bytes]:
    """An anonymous file (no name on disk where the system allows it) in ``scratch`` or the temporary folder."""
    folder = os.fspath(scratch) if scratch is not None else None
    try:
        if folder is not None:
            os.makedirs(folder, exist_ok=True)
        return tempfile.TemporaryFile(prefix="axiscope-text-", dir=folder)
    except OSError as exc:
        where = folder or tempfile.gettempdir()
        raise InputError(f"cannot make a scratch file in {where} for the parsed text ({reason(exc)}); "
                         "choose a writable folder with scratch=...") from exc


def _convert(path: pathlib.Path, delimiter: str, samples_in: str, out: IO[bytes]
             ) -> tuple[tuple[int, int], list[str], list[str]]:
    """Parse the file block by block into ``out`` (logical orientation, float64, C order).

    Returns the file shape, the row ids and the column ids.
    """
    n_rows = None
    if samples_in == "columns":  # the transposed layout needs the number of rows first
        n_rows = sum(1 for _ in _Rows(path, delimiter)) - 1
    rows = _Rows(path, delimiter)
    iterator = iter(rows)
    first = next(iterator, None)
    if first is None or n_rows == -1:
        raise InputError(f"{path.name}: file is empty; it needs a header row and one row per "
                         f"{'sample' if samples_in == 'rows' else 'feature'}")
    column_ids = [cell.strip() for cell in first[1][1:]]
    width = len(column_ids) + 1
    block_rows = max(1, BLOCK_CELLS // width)
    row_ids: list[str] = []
    lines: list[int] = []
    values: list[list[str]] = []
    fd = out.fileno()

    def flush() -> None:
        block = _parse_block(path, lines, values, column_ids)
        start = len(row_ids) - len(values)
        if samples_in == "rows":
            _write_all(fd, block, start * block.shape[1] * 8)
        else:  # each file column is a sample: write this block's part of every sample
            for j in range(block.shape[1]):
                _write_all(fd, np.ascontiguousarray(block[:, j]), (j * n_rows + start) * 8)
        lines.clear()
        values.clear()

    for line, fields in iterator:
        if len(fields) != width:
            raise InputError(f"{path.name}: line {line} has {len(fields)} fields, expected {width} "
                             "(as in the header); fix the row")
        row_ids.append(fields[0].strip())
        lines.append(line)
        values.append(fields[1:])
        if len(values) >= block_rows:
            flush()
    if values:
        flush()
    if n_rows is not None and len(row_ids) != n_rows:
        raise InputError(f"{path.name}: the file changed while it was read ({n_rows} rows, then "
                         f"{len(row_ids)}); read it again when it is complete")
    return (len(row_ids), len(column_ids)), row_ids, column_ids


def _write_all(fd: int, block: np.ndarray, offset: int) -> None:
    """Write a C-contiguous array at ``offset`` of the scratch file."""
    view = memoryview(block.reshape(-1).view(np.uint8))
    done = 0
    try:
        while done < len(view):
            done += os.pwrite(fd, view[done:], offset + done)
    except OSError as exc:
        raise InputError(f"writing the parsed text to its scratch file failed ({reason(exc)}); free space in "
                         f"{tempfile.gettempdir()} or choose another folder with scratch=...") from exc


def open_text(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
              feature_ids: str | None, samples_in: str,
              scratch: str | os.PathLike[str] | None = None) -> MatrixSource:
    """Open a delimited text matrix, streamed into an anonymous scratch file (``dataset`` does not apply).

    ``scratch`` is the folder of the scratch file (default: the temporary folder); it
    needs room for 8 bytes per cell. See the module's docstring for what a cell may hold.
    """
    if sample_ids is not None or feature_ids is not None:
        raise OptionError(f"{path.name}: text input carries its own ids (first column and header row); "
                          "leave out sample_ids and feature_ids")
    delimiter = DELIMITERS[text_suffix(path) or ".tsv"]
    handle = _scratch_file(scratch)
    try:
        try:
            file_shape, row_ids, column_ids = _convert(path, delimiter, samples_in, handle)
        except _READ_ERRORS as exc:
            raise _read_error(path, exc) from exc
        backend = TextBackend(handle, file_shape, samples_in)
        if samples_in == "rows":
            found = {"sample": (row_ids, "first column"), "feature": (column_ids, "header row")}
        else:
            found = {"sample": (column_ids, "header row"), "feature": (row_ids, "first column")}

        def resolve(given: str, default: str, argument: str) -> tuple[np.ndarray | None, str]:
            values, where = found[default.split("_")[0]]
            return to_str_ids(values), f"{where} of {path.name}"

        return build_source(path, "text", None, samples_in, backend, resolve, None, None)
    except BaseException:
        handle.close()
        raise


def _read_error(path: pathlib.Path, exc: BaseException) -> InputError:
    """One line for a file that cannot be read as text: damaged compression, not UTF-8, no room."""
    if isinstance(exc, (zlib.error, EOFError, gzip.BadGzipFile)):
        why = f"zlib: {one_line(str(exc))}" if isinstance(exc, zlib.error) else reason(exc)
        return InputError(f"{path.name}: the compressed data are damaged ({why}); "
                          "re-create or re-copy the file")
    if isinstance(exc, UnicodeDecodeError):
        return InputError(f"{path.name}: not UTF-8 text ({reason(exc)}); save the file as UTF-8")
    return InputError(f"{path.name}: cannot read as delimited text ({reason(exc)}); "
                      "check the file is uncorrupted UTF-8 text")
