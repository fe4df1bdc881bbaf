"""HDF5 input (``.h5``, ``.hdf5``): a 2-D numeric dataset, ids from 1-D datasets or id files.

A contiguous, unfiltered dataset of a native numeric type is read in sample-row blocks by
positioned reads of the file itself (no library lock, no decoding); anything else goes
through h5py under a lock.
"""

from __future__ import annotations

import logging
import os
import pathlib
import threading
from typing import Any

import numpy as np

from ..errors import InputError, reason
from .ids import container_ids
from .source import (
    Backend,
    MatrixSource,
    build_source,
    is_numeric,
    orient_block,
    pread_rows,
    select_matrix,
    slab_key,
)

__all__ = ["SUFFIXES", "Hdf5Backend", "open_hdf5"]

logger = logging.getLogger(__name__)

SUFFIXES = (".h5", ".hdf5")


class Hdf5Backend(Backend):
    """HDF5 dataset via h5py; reads through the library are serialised with a lock."""

    def __init__(self, handle: Any, dataset: Any, path: pathlib.Path) -> None:
        self._handle = handle
        self._dataset = dataset
        self._lock = threading.Lock()
        self.stored_dtype = np.dtype(dataset.dtype)
        self.file_shape = (int(dataset.shape[0]), int(dataset.shape[1]))
        chunks = dataset.chunks
        self.disk_chunks = (int(chunks[0]), int(chunks[1])) if chunks else None
        self._offset: int | None = None
        self._fd: int | None = None
        if chunks is None and self.stored_dtype.isnative and self.stored_dtype.kind in "fiub":
            try:
                plist = dataset.id.get_create_plist()
                offset = dataset.id.get_offset()
                if plist.get_nfilters() == 0 and offset is not None:
                    self._offset = int(offset)
                    self._fd = os.open(path, os.O_RDONLY)
            except Exception:  # any doubt: read through the library
                self._offset = self._fd = None

    def plain_rows(self, samples_in: str) -> bool:
        return self._fd is not None and samples_in == "rows"

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        if self.plain_rows(samples_in):
            return pread_rows(self._fd, self._offset, start, stop, self.file_shape[1],
                              self.stored_dtype, dtype)
        with self._lock:
            block = self._dataset[slab_key(start, stop, samples_in)]
        return orient_block(block, samples_in, dtype)

    def close(self) -> None:
        with self._lock:
            if self._handle is not None:
                self._handle.close()
                self._handle = None
            if self._fd is not None:
                os.close(self._fd)
                self._fd = None


def _candidates(handle: Any) -> list[str]:
    """Names of all 2-D numeric datasets in an HDF5 file, searched recursively."""
    import h5py

    found: list[str] = []

    def visit(name: str, obj: Any) -> None:
        if isinstance(obj, h5py.Dataset) and obj.ndim == 2 and is_numeric(np.dtype(obj.dtype)):
            found.append("/" + name)

    handle.visititems(visit)
    return sorted(found)


def open_hdf5(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
              feature_ids: str | None, samples_in: str) -> MatrixSource:
    """Open a matrix stored in an HDF5 file."""
    import h5py

    try:
        handle = h5py.File(path, "r")
    except OSError as exc:
        raise InputError(f"{path.name}: cannot open as HDF5 ({reason(exc)}); the file may be truncated "
                         "or corrupted, re-create or re-copy it") from exc
    try:
        def lookup(name: str) -> Any:
            try:
                obj = handle.get(name)
            except (KeyError, ValueError, OSError):
                return None
            return obj if isinstance(obj, h5py.Dataset) else None

        name, obj = select_matrix(path, dataset, _candidates(handle), lookup)
        name = obj.name
        backend = Hdf5Backend(handle, obj, path)
        if samples_in == "columns" and backend.disk_chunks is None:
            logger.warning("%s: dataset %s is stored contiguously; reading samples as columns reads "
                           "strided slabs and may be slow (a chunked copy reads faster)", path.name, name)
        return build_source(
            path, "hdf5", name, samples_in, backend,
            lambda given, default, argument: container_ids(path, given, default, argument, name, lookup),
            sample_ids, feature_ids)
    except BaseException:
        handle.close()
        raise
