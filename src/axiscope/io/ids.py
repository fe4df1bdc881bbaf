"""Sample and feature ids: generated, read from a one-column file or a 1-D dataset, checked.

Ids are 1-D object arrays of ``str``, unique along their axis. Messages name the Python
arguments that give ids (``sample_ids``, ``feature_ids``); see :mod:`axiscope.errors`.
"""

from __future__ import annotations

import pathlib
from collections import Counter
from collections.abc import Callable
from typing import Any

import numpy as np

from ..errors import InputError, counted, reason

__all__ = ["generated_ids", "to_str_ids", "decode_ids", "read_id_file", "check_ids", "ids_from_dataset",
           "container_ids", "plain_ids", "IdResolver"]

#: ``resolve(given, default, argument) -> (ids or None, where they came from)``: how a
#: format finds the ids of one axis. ``given`` is the user's value ("" when not given),
#: ``default`` the conventional dataset name (``"sample_ids"``/``"feature_ids"``) and
#: ``argument`` the Python argument that gives them, for messages.
IdResolver = Callable[[str, str, str], tuple[np.ndarray | None, str]]


def generated_ids(prefix: str, n: int) -> np.ndarray:
    """Ids ``prefix_000001`` ... zero-padded to six digits, wider if needed."""
    width = max(6, len(str(n)))
    ids = np.empty(n, dtype=object)
    ids[:] = [f"{prefix}_{i:0{width}d}" for i in range(1, n + 1)]
    return ids


def to_str_ids(values: Any) -> np.ndarray:
    """Convert a 1-D array or sequence of bytes/str/numbers to an object array of str.

    Bytes are decoded as UTF-8; ``UnicodeDecodeError`` is left to the caller, who knows
    where the ids came from (see :func:`decode_ids`).
    """
    items = values.tolist() if isinstance(values, np.ndarray) else list(values)
    out = np.empty(len(items), dtype=object)
    out[:] = [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in items]
    return out


def decode_ids(values: Any, where: str, fix: str) -> np.ndarray:
    """:func:`to_str_ids`, with ids that are not UTF-8 reported as one line naming the first."""
    try:
        return to_str_ids(values)
    except UnicodeDecodeError:
        items = values.tolist() if isinstance(values, np.ndarray) else list(values)
        for position, value in enumerate(items, start=1):
            if isinstance(value, bytes):
                try:
                    value.decode("utf-8")
                except UnicodeDecodeError:
                    raise InputError(f"{where}: id {position} ({value[:40]!r}) is not UTF-8 text; {fix}") from None
        raise


def read_id_file(path: pathlib.Path, argument: str) -> np.ndarray:
    """Read a one-column id file: UTF-8, one id per line, no header; a leading byte-order mark is dropped."""
    if not path.is_file():
        raise InputError(f"{path}: no such file (given as {argument}); pass an existing id file or dataset name")
    try:
        with open(path, encoding="utf-8-sig") as handle:  # a leading byte-order mark is dropped
            lines = [line.strip() for line in handle]
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: not UTF-8 text ({reason(exc)}); save the id file as UTF-8") from None
    while lines and not lines[-1]:
        lines.pop()
    for number, line in enumerate(lines, start=1):
        if not line:
            raise InputError(f"{path}: line {number} is empty; put one id on each line")
    return to_str_ids(lines)


def check_ids(where: str, ids: np.ndarray, expected: int, axis: str, argument: str, source: str) -> None:
    """Validate the length and uniqueness of ids along one axis, and refuse NUL characters in them."""
    if len(ids) != expected:
        raise InputError(
            f"{where}: {counted(len(ids), axis + ' id')} ({source}) but the matrix has "
            f"{counted(expected, axis)}; give {argument} matching the {axis}s or check samples_in"
        )
    for position, value in enumerate(ids.tolist(), start=1):
        if "\x00" in value:
            raise InputError(f"{where}: {axis} id {position} ({value[:40]!r}, {source}) holds a NUL character; "
                             f"remove it from the {axis} ids")
    counts = Counter(ids.tolist())
    duplicated = [value for value, count in counts.items() if count > 1]
    if duplicated:
        raise InputError(
            f"{where}: {counted(len(duplicated), 'duplicated ' + axis + ' id')} ({source}), "
            f"e.g. {duplicated[0]!r}; make the {axis} ids unique"
        )


def ids_from_dataset(path: pathlib.Path, name: str, obj: Any) -> np.ndarray:
    """Read a 1-D id dataset (HDF5) or array (Zarr) into an object array of str."""
    if len(obj.shape) != 1:
        raise InputError(f"{path.name}: id dataset {name!r} has shape {tuple(obj.shape)}, not 1-D; "
                         "give a 1-D dataset of ids")
    try:
        values = obj[...]
    except Exception as exc:
        raise InputError(f"{path.name}: cannot read id dataset {name!r} ({reason(exc)}); "
                         "the file may be corrupted") from exc
    return decode_ids(np.asarray(values).reshape(-1), f"{path.name} (id dataset {name!r})",
                      "store the ids as UTF-8 text")


def container_ids(path: pathlib.Path, given: str, default: str, argument: str, matrix_name: str,
                  lookup: Callable[[str], Any]) -> tuple[np.ndarray | None, str]:
    """Ids from a dataset in the same container (HDF5 file, Zarr group), an id file, or nothing.

    Without ``given``, a 1-D dataset named ``default`` beside the matrix (or at the root)
    is used when there is one.
    """
    if given:
        obj = lookup(given)
        if obj is not None:
            return ids_from_dataset(path, given, obj), f"dataset {given!r}"
        file_path = pathlib.Path(given)
        if file_path.is_file():
            return read_id_file(file_path, argument), f"file {file_path}"
        raise InputError(f"{path.name}: {argument}={given!r} is neither a dataset in the file nor an existing "
                         "file; give a 1-D dataset name or a one-column id file")
    parent = matrix_name.rstrip("/").rsplit("/", 1)[0] if "/" in matrix_name.strip("/") else ""
    for name in dict.fromkeys([f"{parent}/{default}".lstrip("/"), default]):
        obj = lookup(name)
        if obj is not None and len(obj.shape) == 1:
            return ids_from_dataset(path, name, obj), f"dataset {name!r}"
    return None, "generated"


def plain_ids(path: pathlib.Path, given: str, argument: str) -> tuple[np.ndarray | None, str]:
    """Ids for containers without named datasets (``.npy``, a single Zarr array): an id file or nothing."""
    if not given:
        return None, "generated"
    file_path = pathlib.Path(given)
    return read_id_file(file_path, argument), f"file {file_path}"
