"""``.npy`` input: a 2-D numeric array in C or Fortran order, ids from id files.

Samples stored contiguously are read by positioned reads straight into fresh arrays; the
other orientation goes through a memory map.
"""

from __future__ import annotations

import logging
import math
import os
import pathlib
import threading

import numpy as np

from ..errors import InputError, reason
from .ids import plain_ids
from .source import Backend, MatrixSource, build_source, is_numeric, orient_block, pread_rows, slab_key

__all__ = ["NpyBackend", "open_npy"]

logger = logging.getLogger(__name__)


class NpyBackend(Backend):
    """``.npy`` file: positional reads where samples are contiguous, else a memory map."""

    def __init__(self, path: pathlib.Path, shape: tuple[int, int], stored: np.dtype,
                 fortran_order: bool, offset: int) -> None:
        self._path = path
        self._offset = offset
        self._fortran = fortran_order
        self.stored_dtype = stored
        self.file_shape = shape
        self._fd: int | None = os.open(path, os.O_RDONLY)
        self._memmap: np.memmap | None = None
        self._memmap_lock = threading.Lock()

    def _contiguous(self, samples_in: str) -> bool:
        """Whether each sample's values are one contiguous run of bytes in the file."""
        return (samples_in == "rows") != self._fortran

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        if self._contiguous(samples_in):
            return self._pread_block(start, stop, samples_in, dtype)
        return orient_block(self._map()[slab_key(start, stop, samples_in)], samples_in, dtype)

    def _pread_block(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        """Read contiguous samples straight into a new array with ``os.preadv``."""
        if self._fd is None:
            raise ValueError("source is closed")
        n_features = self.file_shape[1] if samples_in == "rows" else self.file_shape[0]
        return pread_rows(self._fd, self._offset, start, stop, n_features, self.stored_dtype, dtype)

    def plain_rows(self, samples_in: str) -> bool:
        return self._fd is not None and self._contiguous(samples_in)

    def _map(self) -> np.memmap:
        """Memory map of the array, created on first use."""
        with self._memmap_lock:
            if self._memmap is None:
                order = "F" if self._fortran else "C"
                self._memmap = np.memmap(self._path, dtype=self.stored_dtype, mode="r",
                                         offset=self._offset, shape=self.file_shape, order=order)
            return self._memmap

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self._memmap = None


def read_header(path: pathlib.Path) -> tuple[tuple[int, ...], bool, np.dtype, int]:
    """Shape, Fortran flag, dtype and data offset of a ``.npy`` file."""
    from numpy.lib import format as npy_format

    with open(path, "rb") as handle:
        version = npy_format.read_magic(handle)
        if version == (1, 0):
            shape, fortran, dtype = npy_format.read_array_header_1_0(handle)
        elif version == (2, 0):
            shape, fortran, dtype = npy_format.read_array_header_2_0(handle)
        else:
            shape, fortran, dtype = npy_format._read_array_header(handle, version)  # noqa: SLF001
        return tuple(shape), bool(fortran), np.dtype(dtype), handle.tell()


def open_npy(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
             feature_ids: str | None, samples_in: str) -> MatrixSource:
    """Open a matrix stored in a ``.npy`` file (``dataset`` does not apply and is ignored)."""
    try:
        shape, fortran, stored, offset = read_header(path)
    except Exception as exc:
        raise InputError(f"{path.name}: not a readable .npy file ({reason(exc)}); "
                         "it may be truncated or corrupted") from exc
    if len(shape) != 2:
        raise InputError(f"{path.name}: array has {len(shape)} dimensions {shape}, not 2; save a 2-D matrix")
    if not is_numeric(stored) or stored.hasobject:
        raise InputError(f"{path.name}: array is not numeric (dtype {stored}); save a numeric matrix")
    expected = offset + math.prod(shape) * stored.itemsize
    actual = path.stat().st_size
    if actual < expected:
        raise InputError(f"{path.name}: file has {actual} bytes but its header needs {expected}; "
                         "it is truncated, re-create or re-copy it")
    if samples_in == "rows" and fortran:
        logger.warning("%s: array is stored in Fortran order; reading rows as samples goes through a "
                       "memory map and may be slow", path.name)
    backend = NpyBackend(path, (int(shape[0]), int(shape[1])), stored, fortran, offset)
    try:
        return build_source(path, "npy", None, samples_in, backend,
                            lambda given, default, argument: plain_ids(path, given, argument),
                            sample_ids, feature_ids)
    except BaseException:
        backend.close()
        raise
