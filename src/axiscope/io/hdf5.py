"""HDF5 input (``.h5``, ``.hdf5``): a 2-D numeric dataset, ids from 1-D datasets or id files.

A contiguous, unfiltered dataset of a native numeric type whose storage lies in the opened
file itself is read in sample-row blocks by positioned reads of that file (no library
lock, no decoding); anything else goes through h5py under a lock.

A matrix whose storage was not all written (chunks absent from the chunk index, or a
contiguous dataset without storage) is refused unless ``allow_missing_chunks`` is given:
HDF5 would read the absent parts as the fill value.

Data kept in other files is refused unless ``allow_external_data`` is given: a dataset
reached through an external link, a dataset with external raw storage, and a virtual
dataset (whose values come from source datasets, possibly in other files). Such a file can
otherwise make a run read any file the user can read. With ``allow_external_data``, a
virtual dataset whose source file or dataset is missing is still an error (HDF5 would
read it as fill values).
"""

from __future__ import annotations

import itertools
import logging
import math
import os
import pathlib
import threading
from typing import Any

import numpy as np

from ..errors import InputError, agree, counted, reason
from .chunk_bands import ChunkBands, chunk_bands
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
        import h5py

        self._handle = handle
        self._dataset = dataset
        self._lock = threading.Lock()
        self.stored_dtype = np.dtype(dataset.dtype)
        self.file_shape = (int(dataset.shape[0]), int(dataset.shape[1]))
        chunks = dataset.chunks
        self.disk_chunks = (int(chunks[0]), int(chunks[1])) if chunks else None
        #: per orientation: the decoded bands of chunks shared by the blocks read from them
        self._bands: dict[str, ChunkBands] = {}
        self._offset: int | None = None
        self._fd: int | None = None
        if chunks is None and self.stored_dtype.isnative and self.stored_dtype.kind in "fiub":
            try:
                plist = dataset.id.get_create_plist()
                offset = dataset.id.get_offset()
                if (plist.get_layout() == h5py.h5d.CONTIGUOUS and plist.get_nfilters() == 0
                        and plist.get_external_count() == 0 and offset is not None
                        and _in_file(dataset, path)):
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
        def decode(a: int, b: int) -> np.ndarray:
            with self._lock:
                return self._dataset[slab_key(a, b, samples_in)]

        bands = chunk_bands(self, samples_in)
        block = decode(start, stop) if bands is None else bands.read(start, stop, decode)
        # a decoder's fresh result, or rows of a band served to this read alone (chunk_bands.py)
        return orient_block(block, samples_in, dtype, owned=True)

    def close(self) -> None:
        with self._lock:
            if self._handle is not None:
                self._handle.close()
                self._handle = None
            if self._fd is not None:
                os.close(self._fd)
                self._fd = None


def _in_file(obj: Any, path: pathlib.Path) -> bool:
    """Whether an HDF5 object lives in the file at ``path`` (not reached through an external link)."""
    try:
        return os.path.samefile(obj.file.filename, path)
    except (OSError, ValueError):
        return False


def _virtual_sources(dataset: Any, path: pathlib.Path) -> list[tuple[str, str, pathlib.Path | None]]:
    """``(file name, dataset name, resolved path or None)`` of each source of a virtual dataset.

    A relative source file name is looked up beside the virtual dataset's file, then in
    the working directory (HDF5's own order); ``"."`` is the file itself.
    """
    found = []
    for source in dataset.virtual_sources():
        name = source.file_name
        if name == ".":
            found.append((name, source.dset_name, path))
            continue
        candidates = [pathlib.Path(name)] if os.path.isabs(name) else [path.parent / name, pathlib.Path(name)]
        resolved = next((c for c in candidates if c.is_file()), None)
        found.append((name, source.dset_name, resolved))
    return found


def _check_virtual_sources(dataset: Any, path: pathlib.Path, name: str) -> None:
    """Every source of a virtual dataset must exist; HDF5 would read a missing one as fill values."""
    import h5py

    for file_name, dset_name, resolved in _virtual_sources(dataset, path):
        if resolved is None:
            raise InputError(f"{path.name}: virtual dataset {name!r} takes values from {file_name!r}, which "
                             "does not exist; HDF5 would read fill values in its place. Put the source file "
                             "back, or store the matrix itself")
        try:
            with h5py.File(resolved, "r") as handle:
                present = isinstance(handle.get(dset_name), h5py.Dataset)
        except OSError:
            present = False
        if not present:
            raise InputError(f"{path.name}: virtual dataset {name!r} takes values from dataset {dset_name!r} "
                             f"of {file_name!r}, which cannot be opened; HDF5 would read fill values in its "
                             "place. Repair the source, or store the matrix itself")


def external_mechanism(obj: Any, path: pathlib.Path) -> str | None:
    """How a dataset's values come from outside the opened file, or None if they do not."""
    if not _in_file(obj, path):
        return f"is reached through an external link to {obj.file.filename!r}"
    plist = obj.id.get_create_plist()
    if plist.get_external_count() > 0:
        files = ", ".join(repr(os.fsdecode(plist.get_external(i)[0]))
                          for i in range(min(plist.get_external_count(), 3)))
        return f"keeps its values in external raw storage ({files})"
    if obj.is_virtual:
        files = ", ".join(sorted({repr(s.file_name) for s in obj.virtual_sources()})[:3])
        return f"is a virtual dataset with sources in {files}"
    return None


def check_storage(obj: Any, path: pathlib.Path, name: str, allow_external_data: bool) -> None:
    """Refuse data kept outside the opened file, unless allowed; check virtual sources exist."""
    mechanism = external_mechanism(obj, path)
    if mechanism is None:
        return
    if not allow_external_data:
        raise InputError(f"{path.name}: dataset {name!r} {mechanism}, not data stored in this file; "
                         "refused, since such a file can make a run read other files. If you trust it, "
                         "pass allow_external_data=True")
    logger.info("%s: dataset %s is %s (allowed by allow_external_data)", path.name, name, mechanism)
    if obj.is_virtual:
        _check_virtual_sources(obj, path, name)


def _external_link(handle: Any, name: str) -> Any:
    """The first external link on the way to ``name`` inside an HDF5 file, or None."""
    import h5py

    parts = [part for part in name.split("/") if part]
    for depth in range(1, len(parts) + 1):
        prefix = "/" + "/".join(parts[:depth])
        try:
            link = handle.get(prefix, getlink=True)
        except (KeyError, ValueError, OSError):
            return None
        if isinstance(link, h5py.ExternalLink):
            return link
    return None


def check_written(obj: Any, path: pathlib.Path, name: str, allow_missing_chunks: bool) -> dict[str, Any]:
    """Refuse a dataset with chunks (or contiguous storage) never written, unless allowed.

    HDF5 reads storage that was never written as the fill value, so a dataset created and
    only partly written would silently become blocks of zeros. Counts come from the
    library's chunk index (``H5Dget_num_chunks``); no data are read.
    """
    if obj.is_virtual or obj.id.get_create_plist().get_external_count() > 0 or obj.size == 0:
        return {}
    fill = obj.fillvalue
    fill = fill.item() if hasattr(fill, "item") else fill
    if obj.chunks is None:
        if obj.id.get_storage_size() > 0:
            return {}
        missing, total = 1, 1
        what = f"dataset {name!r} was never written (no storage is allocated)"
    else:
        counts = [max(1, math.ceil(n / c)) for n, c in zip(obj.shape, obj.chunks)]
        total = math.prod(counts)
        stored = obj.id.get_num_chunks()
        if stored >= total:
            return {}
        present = {tuple(obj.id.get_chunk_info(i).chunk_offset) for i in range(stored)}
        missing = total - stored
        first = next(offset for offset in itertools.product(
            *(range(0, n, c) for n, c in zip(obj.shape, obj.chunks))) if offset not in present)
        what = (f"the chunk at {tuple(int(v) for v in first)} of dataset {name!r} was never written "
                f"({missing} of {counted(total, 'chunk')} {agree(missing, 'is', 'are')} absent)")
    if not allow_missing_chunks:
        raise InputError(
            f"{path.name}: {what}; it would be read as the fill value {fill!r}. Write the whole dataset, or "
            "pass allow_missing_chunks=True if chunks holding only the fill value were left out on purpose")
    logger.warning("%s: %d of %d chunks of dataset %s are absent and read as the fill value %r "
                   "(allow_missing_chunks)", path.name, missing, total, name, fill)
    return {"missing_chunks": missing, "chunks": total, "fill_value": fill}


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
              feature_ids: str | None, samples_in: str, allow_external_data: bool = False,
              allow_missing_chunks: bool = False) -> MatrixSource:
    """Open a matrix stored in an HDF5 file.

    ``allow_external_data`` accepts datasets (matrix or ids) whose values are kept in other
    files: external links, external raw storage, virtual datasets. ``allow_missing_chunks``
    accepts a matrix whose storage was not all written (read as the fill value).
    """
    import h5py

    try:
        handle = h5py.File(path, "r")
    except OSError as exc:
        raise InputError(f"{path.name}: cannot open as HDF5 ({reason(exc)}); the file may be truncated "
                         "or corrupted, re-create or re-copy it") from exc
    try:
        def lookup(name: str) -> Any:
            link = _external_link(handle, name)
            if link is not None and not allow_external_data:
                raise InputError(f"{path.name}: {name!r} is an external link to {link.path!r} in "
                                 f"{link.filename!r}, not data stored in this file; refused, since such a file "
                                 "can make a run read other files. If you trust it, pass allow_external_data=True")
            try:
                obj = handle.get(name)
            except (KeyError, ValueError, OSError):
                return None
            if not isinstance(obj, h5py.Dataset):
                return None
            check_storage(obj, path, name, allow_external_data)
            return obj

        name, obj = select_matrix(path, dataset, _candidates(handle), lookup)
        name = obj.name
        notes = check_written(obj, path, name, allow_missing_chunks)
        backend = Hdf5Backend(handle, obj, path)
        if samples_in == "columns" and backend.disk_chunks is None:
            logger.warning("%s: dataset %s is stored contiguously; reading samples as columns reads "
                           "strided slabs and may be slow (a chunked copy reads faster)", path.name, name)
        source = build_source(
            path, "hdf5", name, samples_in, backend,
            lambda given, default, argument: container_ids(path, given, default, argument, name, lookup),
            sample_ids, feature_ids)
        source.notes.update(notes)
        return source
    except BaseException:
        handle.close()
        raise
