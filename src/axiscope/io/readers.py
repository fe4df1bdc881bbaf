"""Chunked readers for 2-D numeric matrices stored on disk.

This module knows about file formats and ids, nothing about the analysis. A matrix is
opened with :func:`open_matrix`, which returns a :class:`MatrixSource`; the caller then
reads it in blocks of samples with :meth:`MatrixSource.read_samples`. The whole matrix
is never loaded, except for delimited text, which is parsed once into memory.

Supported inputs
----------------
* HDF5 (``.h5``, ``.hdf5``): a 2-D numeric dataset.
* Zarr directory stores (format 2 and 3): a 2-D numeric array, possibly inside groups.
* ``.npy``: a 2-D numeric array (C or Fortran order).
* Delimited text (``.csv``, ``.tsv``, ``.txt`` and the same with ``.gz``): the first
  column holds the ids along the file's row axis, the header row the ids along the
  file's column axis.

The file orientation is given by ``samples_in``: ``"rows"`` if the file is
samples x features, ``"columns"`` if it is features x samples. Everything exposed by a
:class:`MatrixSource` (``shape``, ids, blocks) is in the logical orientation
(samples x features).
"""

from __future__ import annotations

import contextlib
import csv
import gzip
import logging
import math
import os
import pathlib
import threading
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from types import TracebackType
from typing import Any, TextIO

import numpy as np

from axiscope.errors import InputError, OptionError

__all__ = ["SAMPLES_IN", "MatrixSource", "array_source", "describe_source", "open_matrix", "opened"]

logger = logging.getLogger(__name__)

SAMPLES_IN = ("rows", "columns")

_HDF5_SUFFIXES = (".h5", ".hdf5")
_TEXT_DELIMITERS = {".csv": ",", ".tsv": "\t", ".txt": "\t"}
_SUPPORTED = ".h5, .hdf5, .npy, .csv, .tsv, .txt (optionally .gz) or a Zarr directory"
_NA_TOKENS = frozenset({"", "na", "nan", "n/a", "null"})
_TEXT_BLOCK_ROWS = 512
_REASON_MAX_CHARS = 160
_ID_HEAD = 5


# ----------------------------------------------------------------------------- helpers


def _one_line(text: str, limit: int = _REASON_MAX_CHARS) -> str:
    """Collapse ``text`` to a single line of at most ``limit`` characters."""
    flat = " ".join(str(text).split())
    return flat if len(flat) <= limit else flat[: limit - 3] + "..."


def _reason(exc: BaseException) -> str:
    """Short one-line description of an exception: its type and first words."""
    message = _one_line(str(exc))
    return f"{type(exc).__name__}: {message}" if message else type(exc).__name__


def _is_numeric(dtype: np.dtype) -> bool:
    """Whether ``dtype`` is a real numeric or boolean dtype."""
    return dtype.kind in "biuf"


def _logical_dtype(stored: np.dtype) -> np.dtype:
    """Decoded dtype: float64 for 64-bit (or wider) floats, float32 for everything else."""
    if stored.kind == "f" and stored.itemsize >= 8:
        return np.dtype(np.float64)
    return np.dtype(np.float32)


def _generated_ids(prefix: str, n: int) -> np.ndarray:
    """Ids ``prefix_000001`` ... zero-padded to six digits, wider if needed."""
    width = max(6, len(str(n)))
    ids = np.empty(n, dtype=object)
    ids[:] = [f"{prefix}_{i:0{width}d}" for i in range(1, n + 1)]
    return ids


def _to_str_ids(values: Any) -> np.ndarray:
    """Convert a 1-D array or sequence of bytes/str/numbers to an object array of str."""
    items = values.tolist() if isinstance(values, np.ndarray) else list(values)
    out = np.empty(len(items), dtype=object)
    out[:] = [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in items]
    return out


def _file_size(path: pathlib.Path) -> int:
    """Bytes on disk of a file, or the sum over all files below a directory."""
    if not path.exists():  # an in-memory array
        return 0
    if path.is_dir():
        total = 0
        for root, _dirs, files in os.walk(path):
            total += sum(os.path.getsize(os.path.join(root, name)) for name in files)
        return total
    return path.stat().st_size


def _is_zarr_dir(path: pathlib.Path) -> bool:
    """Whether a directory looks like a Zarr (format 2 or 3) store."""
    return any((path / marker).exists() for marker in ("zarr.json", ".zarray", ".zgroup"))


def _text_suffix(path: pathlib.Path) -> str | None:
    """The delimiter-defining suffix of a (possibly gzipped) text file, else None."""
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] == ".gz":
        suffixes = suffixes[:-1]
    if suffixes and suffixes[-1] in _TEXT_DELIMITERS:
        return suffixes[-1]
    return None


def _read_id_file(path: pathlib.Path, option: str) -> np.ndarray:
    """Read a one-column id file (one id per line, no header)."""
    if not path.is_file():
        raise InputError(f"{path}: no such file (given with {option}); pass an existing id file or dataset name")
    with open(path, encoding="utf-8") as handle:
        lines = [line.strip() for line in handle]
    while lines and not lines[-1]:
        lines.pop()
    for number, line in enumerate(lines, start=1):
        if not line:
            raise InputError(f"{path}: line {number} is empty; put one id on each line")
    return _to_str_ids(lines)


# ------------------------------------------------------------------------------ backends


class _Backend:
    """Reads logical sample blocks from one storage kind. Subclasses override ``read``."""

    stored_dtype: np.dtype
    file_shape: tuple[int, int]
    disk_chunks: tuple[int, int] | None = None

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        raise NotImplementedError

    def plain_rows(self, samples_in: str) -> bool:
        """Whether sample blocks are plain positioned reads (re-reading costs no decoding)."""
        return False

    def close(self) -> None:
        """Release file handles (default: nothing to release)."""


def _orient_block(block: np.ndarray, samples_in: str, dtype: np.dtype) -> np.ndarray:
    """Turn a slab read in file orientation into a fresh C-contiguous logical block."""
    if samples_in == "columns":
        block = block.T
    return np.array(block, dtype=dtype, order="C", copy=True)


def _slab_key(start: int, stop: int, samples_in: str) -> tuple[slice, slice]:
    """Index selecting samples ``start:stop`` in file orientation."""
    if samples_in == "rows":
        return (slice(start, stop), slice(None))
    return (slice(None), slice(start, stop))


def _pread_rows(fd: int, offset: int, start: int, stop: int, n_cols: int,
                stored: np.dtype, dtype: np.dtype) -> np.ndarray:
    """Rows ``start..stop`` of a C-ordered 2-D array at byte ``offset`` of a file, by ``os.preadv``."""
    direct = stored == dtype  # native float32/float64: no conversion needed
    buffer = np.empty((stop - start, n_cols), dtype=dtype if direct else stored)
    view = memoryview(buffer.reshape(-1).view(np.uint8))
    position = offset + start * n_cols * stored.itemsize
    done = 0
    while done < len(view):
        count = os.preadv(fd, [view[done:]], position + done)
        if count == 0:
            raise EOFError("file ends early; it may be truncated")
        done += count
    return buffer if direct else buffer.astype(dtype, order="C")


class _Hdf5Backend(_Backend):
    """HDF5 dataset via h5py; reads are serialised with a lock.

    A contiguous, unfiltered dataset of a native numeric type is read in sample-row
    blocks with positioned reads of the file itself: no library lock, no decoding.
    """

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
            return _pread_rows(self._fd, self._offset, start, stop, self.file_shape[1],
                               self.stored_dtype, dtype)
        with self._lock:
            block = self._dataset[_slab_key(start, stop, samples_in)]
        return _orient_block(block, samples_in, dtype)

    def close(self) -> None:
        with self._lock:
            if self._handle is not None:
                self._handle.close()
                self._handle = None
            if self._fd is not None:
                os.close(self._fd)
                self._fd = None


class _ZarrBackend(_Backend):
    """Zarr array (format 2 or 3); concurrent reads are safe."""

    def __init__(self, array: Any) -> None:
        self._array = array
        self.stored_dtype = np.dtype(array.dtype)
        self.file_shape = (int(array.shape[0]), int(array.shape[1]))
        chunks = array.chunks
        self.disk_chunks = (int(chunks[0]), int(chunks[1])) if chunks else None

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        block = self._array[_slab_key(start, stop, samples_in)]
        return _orient_block(np.asarray(block), samples_in, dtype)


class _NpyBackend(_Backend):
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
        return _orient_block(self._map()[_slab_key(start, stop, samples_in)], samples_in, dtype)

    def _pread_block(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        """Read contiguous samples straight into a new array with ``os.preadv``."""
        if self._fd is None:
            raise ValueError("source is closed")
        n_features = self.file_shape[1] if samples_in == "rows" else self.file_shape[0]
        return _pread_rows(self._fd, self._offset, start, stop, n_features, self.stored_dtype, dtype)

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


class _MemoryBackend(_Backend):
    """A matrix already held in memory in logical orientation (parsed text)."""

    def __init__(self, data: np.ndarray, file_shape: tuple[int, int]) -> None:
        self._data = data
        self.stored_dtype = data.dtype
        self.file_shape = file_shape

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        return np.array(self._data[start:stop], dtype=dtype, order="C", copy=True)


# -------------------------------------------------------------------------- MatrixSource


class MatrixSource:
    """A 2-D numeric matrix on disk, read in blocks of samples.

    Create instances with :func:`open_matrix`. The matrix is never loaded whole,
    except for delimited text, which is parsed into memory when opened.

    Attributes
    ----------
    path : pathlib.Path
        The input file or Zarr directory.
    format : str
        ``"hdf5"``, ``"zarr"``, ``"npy"`` or ``"text"``.
    dataset : str or None
        Dataset/array path inside an HDF5 file or Zarr store; None otherwise.
    samples_in : str
        ``"rows"`` if the file is samples x features, ``"columns"`` if features x samples.
    shape : tuple of int
        Logical shape ``(n_samples, n_features)``.
    dtype : numpy.dtype
        float64 if the stored values are float64, float32 otherwise.
    stored_dtype : numpy.dtype
        The dtype stored on disk (float64 for text).
    sample_ids, feature_ids : numpy.ndarray
        1-D object arrays of str.
    disk_chunks : tuple of int or None
        On-disk chunk shape in file orientation; None if contiguous.
    sample_chunk : int or None
        On-disk chunk length along the sample axis; None if not chunked.
    nbytes : int
        Decoded size of the logical matrix.
    file_size : int
        Bytes on disk (summed over all files of a Zarr directory).
    plain_reads : bool
        Whether sample blocks are read by plain positioned reads of an uncompressed file
        (contiguous HDF5 or ``.npy`` with samples contiguous), so that reading again costs
        no decoding.
    ids_source : dict
        Where the ids came from, keys ``"samples"`` and ``"features"``.
    """

    def __init__(self, *, path: pathlib.Path, format: str, dataset: str | None, samples_in: str,
                 backend: _Backend, sample_ids: np.ndarray, feature_ids: np.ndarray,
                 ids_source: dict[str, str]) -> None:
        self.path = path
        self.format = format
        self.dataset = dataset
        self.samples_in = samples_in
        self._backend: _Backend | None = backend
        rows, cols = backend.file_shape
        self.shape: tuple[int, int] = (rows, cols) if samples_in == "rows" else (cols, rows)
        self.stored_dtype: np.dtype = backend.stored_dtype
        self.dtype: np.dtype = _logical_dtype(backend.stored_dtype)
        self.disk_chunks = backend.disk_chunks
        if self.disk_chunks is None:
            self.sample_chunk: int | None = None
        else:
            self.sample_chunk = self.disk_chunks[0 if samples_in == "rows" else 1]
        self.sample_ids = sample_ids
        self.feature_ids = feature_ids
        self.ids_source = ids_source
        self.nbytes = self.shape[0] * self.shape[1] * self.dtype.itemsize
        self.file_size = _file_size(path)
        #: Sample blocks are plain positioned reads of an uncompressed file: reading
        #: them again costs no decoding.
        self.plain_reads: bool = backend.plain_rows(samples_in)

    def _where(self) -> str:
        """``path`` plus the dataset name, for messages."""
        return f"{self.path.name} (dataset {self.dataset})" if self.dataset else self.path.name

    def read_samples(self, start: int, stop: int) -> np.ndarray:
        """Read samples ``start`` to ``stop`` (exclusive) of the logical matrix.

        Parameters
        ----------
        start, stop : int
            Sample range, ``0 <= start <= stop <= n_samples``.

        Returns
        -------
        numpy.ndarray
            A fresh C-contiguous array of shape ``(stop - start, n_features)`` and dtype
            :attr:`dtype`.

        Raises
        ------
        InputError
            If the underlying file cannot be read (corrupted chunk, truncated file, ...).
        ValueError
            If the range is out of bounds or the source is closed.
        """
        n_samples, n_features = self.shape
        if not 0 <= start <= stop <= n_samples:
            raise ValueError(f"sample range {start}:{stop} is outside 0:{n_samples}")
        backend = self._backend
        if backend is None:
            raise ValueError(f"{self.path.name}: source is closed")
        if start == stop:
            return np.empty((0, n_features), dtype=self.dtype)
        try:
            block = backend.read(start, stop, self.samples_in, self.dtype)
        except InputError:
            raise
        except Exception as exc:  # any reader/codec failure becomes a one-line input error
            raise InputError(
                f"{self._where()}: reading samples {start}:{stop} failed ({_reason(exc)}); "
                "the file may be corrupted or truncated, re-create or re-copy it"
            ) from exc
        if block.shape != (stop - start, n_features):
            raise InputError(
                f"{self._where()}: reading samples {start}:{stop} returned shape {block.shape} "
                f"instead of {(stop - start, n_features)}; the file may be corrupted"
            )
        return block

    def close(self) -> None:
        """Close the underlying file handles; further reads raise ``ValueError``."""
        if self._backend is not None:
            self._backend.close()
            self._backend = None

    def __enter__(self) -> MatrixSource:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()

    def __repr__(self) -> str:
        return (f"MatrixSource({str(self.path)!r}, format={self.format!r}, dataset={self.dataset!r}, "
                f"samples_in={self.samples_in!r}, shape={self.shape}, dtype={self.dtype})")


# --------------------------------------------------------------------------- open_matrix


def open_matrix(path: str | os.PathLike[str], *, dataset: str | None = None,
                sample_ids: str | None = None, feature_ids: str | None = None,
                samples_in: str = "rows") -> MatrixSource:
    """Open a 2-D numeric matrix for block-wise reading.

    Parameters
    ----------
    path : str or path-like
        HDF5 file, Zarr directory, ``.npy`` file or delimited text file.
    dataset : str, optional
        Dataset/array inside an HDF5 file or Zarr store. Default: the only 2-D numeric
        one (searched recursively).
    sample_ids, feature_ids : str, optional
        Name of a 1-D dataset in the same HDF5 file / Zarr store, or path of a one-column
        text file. Default: datasets named ``sample_ids`` / ``feature_ids`` if present,
        else generated ids. Not allowed for text input, whose ids come from the file.
    samples_in : {"rows", "columns"}
        Whether samples are the rows or the columns of the stored matrix.

    Returns
    -------
    MatrixSource

    Raises
    ------
    InputError
        If the file is missing, unsupported, unreadable or inconsistent.
    OptionError
        If ``samples_in`` is invalid, or ``dataset``/ids options do not apply to the format.
    """
    if samples_in not in SAMPLES_IN:
        raise OptionError(f"--samples-in {samples_in!r} is not valid; use one of: {', '.join(SAMPLES_IN)}")
    path = pathlib.Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file; check the path")
    kind = _detect_format(path)
    if kind in ("npy", "text") and dataset is not None:
        raise OptionError(f"{path.name}: --dataset only applies to HDF5 and Zarr input; drop it")
    opener = {"hdf5": _open_hdf5, "zarr": _open_zarr, "npy": _open_npy, "text": _open_text}[kind]
    return opener(path, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                  samples_in=samples_in)


def _detect_format(path: pathlib.Path) -> str:
    """Format name from the path (extension, or Zarr markers for a directory)."""
    if path.is_dir():
        if _is_zarr_dir(path):
            return "zarr"
        raise InputError(f"{path}: is a directory but not a Zarr store (no zarr.json, .zarray or .zgroup); "
                         f"pass a file: {_SUPPORTED}")
    suffix = path.suffix.lower()
    if suffix in _HDF5_SUFFIXES:
        return "hdf5"
    if suffix == ".npy":
        return "npy"
    if _text_suffix(path) is not None:
        return "text"
    raise InputError(f"{path.name}: unknown file type {suffix or '(no extension)'!r}; supported: {_SUPPORTED}")


def _check_matrix_shape(where: str, file_shape: tuple[int, int], samples_in: str) -> None:
    """Require at least 2 samples and 2 features."""
    rows, cols = file_shape
    n_samples, n_features = (rows, cols) if samples_in == "rows" else (cols, rows)
    if n_samples >= 2 and n_features >= 2:
        return
    hint = ""
    if n_samples < 2 <= n_features:
        hint = f"; samples are read from the file {samples_in}, check --samples-in"
    raise InputError(
        f"{where}: matrix has {n_samples} samples x {n_features} features (samples in {samples_in}); "
        f"need at least 2 of each{hint}"
    )


def _check_ids(where: str, ids: np.ndarray, expected: int, axis: str, option: str,
               source: str) -> None:
    """Validate the length and uniqueness of ids along one axis."""
    if len(ids) != expected:
        raise InputError(
            f"{where}: {len(ids)} {axis} ids ({source}, {option}) but the matrix has {expected} {axis}s; "
            f"give ids matching the {axis} axis or check --samples-in"
        )
    counts = Counter(ids.tolist())
    duplicated = [value for value, count in counts.items() if count > 1]
    if duplicated:
        raise InputError(
            f"{where}: {len(duplicated)} duplicated {axis} ids ({source}), e.g. {duplicated[0]!r}; "
            f"make the {axis} ids unique"
        )


def _build_source(path: pathlib.Path, kind: str, dataset: str | None, samples_in: str,
                  backend: _Backend, resolve_ids: Callable[[str, str, str], tuple[np.ndarray | None, str]],
                  sample_ids: str | None, feature_ids: str | None) -> MatrixSource:
    """Check the shape, resolve and check ids, and assemble the source."""
    where = f"{path.name} (dataset {dataset})" if dataset else path.name
    _check_matrix_shape(where, backend.file_shape, samples_in)
    rows, cols = backend.file_shape
    n_samples, n_features = (rows, cols) if samples_in == "rows" else (cols, rows)
    ids: dict[str, np.ndarray] = {}
    sources: dict[str, str] = {}
    for axis, given, default, option, count in (
        ("sample", sample_ids, "sample_ids", "--sample-ids", n_samples),
        ("feature", feature_ids, "feature_ids", "--feature-ids", n_features),
    ):
        values, source = resolve_ids(given or "", default, option)
        if values is None:
            values, source = _generated_ids(axis, count), "generated"
        _check_ids(where, values, count, axis, option, source)
        ids[axis], sources[axis + "s"] = values, source
    return MatrixSource(path=path, format=kind, dataset=dataset, samples_in=samples_in, backend=backend,
                        sample_ids=ids["sample"], feature_ids=ids["feature"], ids_source=sources)


# ---------------------------------------------------------------------------------- HDF5


def _hdf5_candidates(handle: Any) -> list[str]:
    """Names of all 2-D numeric datasets in an HDF5 file, searched recursively."""
    import h5py

    found: list[str] = []

    def visit(name: str, obj: Any) -> None:
        if isinstance(obj, h5py.Dataset) and obj.ndim == 2 and _is_numeric(np.dtype(obj.dtype)):
            found.append("/" + name)

    handle.visititems(visit)
    return sorted(found)


def _select_matrix(path: pathlib.Path, dataset: str | None, candidates: list[str],
                   lookup: Callable[[str], Any]) -> tuple[str, Any]:
    """Pick the matrix dataset by name or as the only 2-D numeric candidate."""
    if dataset is None:
        if not candidates:
            raise InputError(f"{path.name}: no 2-D numeric dataset found; store the matrix as a 2-D numeric "
                             "dataset or choose one with --dataset")
        if len(candidates) > 1:
            listed = ", ".join(candidates[:10]) + (", ..." if len(candidates) > 10 else "")
            raise InputError(f"{path.name}: several 2-D datasets ({listed}); choose one with --dataset")
        dataset = candidates[0]
    obj = lookup(dataset)
    if obj is None:
        listed = ", ".join(candidates[:10]) or "none"
        raise InputError(f"{path.name}: no dataset {dataset!r} (2-D numeric datasets: {listed}); "
                         "fix --dataset")
    shape = tuple(obj.shape)
    if len(shape) != 2:
        raise InputError(f"{path.name}: dataset {dataset} has {len(shape)} dimensions {shape}, not 2; "
                         "choose a 2-D dataset with --dataset")
    if not _is_numeric(np.dtype(obj.dtype)):
        raise InputError(f"{path.name}: dataset {dataset} is not numeric (dtype {obj.dtype}); "
                         "choose a numeric dataset with --dataset")
    return dataset, obj


def _container_ids(path: pathlib.Path, given: str, default: str, option: str, matrix_name: str,
                   lookup: Callable[[str], Any]) -> tuple[np.ndarray | None, str]:
    """Resolve ids from a dataset in the same container, an id file, or nothing."""
    if given:
        obj = lookup(given)
        if obj is not None:
            return _ids_from_dataset(path, given, obj), f"dataset {given!r}"
        file_path = pathlib.Path(given)
        if file_path.is_file():
            return _read_id_file(file_path, option), f"file {file_path}"
        raise InputError(f"{path.name}: {option} {given!r} is neither a dataset in the file nor an existing "
                         "file; give a 1-D dataset name or a one-column id file")
    parent = matrix_name.rstrip("/").rsplit("/", 1)[0] if "/" in matrix_name.strip("/") else ""
    for name in dict.fromkeys([f"{parent}/{default}".lstrip("/"), default]):
        obj = lookup(name)
        if obj is not None and len(obj.shape) == 1:
            return _ids_from_dataset(path, name, obj), f"dataset {name!r}"
    return None, "generated"


def _ids_from_dataset(path: pathlib.Path, name: str, obj: Any) -> np.ndarray:
    """Read a 1-D id dataset/array into an object array of str."""
    if len(obj.shape) != 1:
        raise InputError(f"{path.name}: id dataset {name} has shape {tuple(obj.shape)}, not 1-D; "
                         "give a 1-D dataset of ids")
    try:
        values = obj[...]
    except Exception as exc:
        raise InputError(f"{path.name}: cannot read id dataset {name} ({_reason(exc)}); "
                         "the file may be corrupted") from exc
    return _to_str_ids(np.asarray(values).reshape(-1))


def _open_hdf5(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
               feature_ids: str | None, samples_in: str) -> MatrixSource:
    """Open a matrix stored in an HDF5 file."""
    import h5py

    try:
        handle = h5py.File(path, "r")
    except OSError as exc:
        raise InputError(f"{path.name}: cannot open as HDF5 ({_reason(exc)}); the file may be truncated "
                         "or corrupted, re-create or re-copy it") from exc
    try:
        def lookup(name: str) -> Any:
            try:
                obj = handle.get(name)
            except (KeyError, ValueError, OSError):
                return None
            return obj if isinstance(obj, h5py.Dataset) else None

        name, obj = _select_matrix(path, dataset, _hdf5_candidates(handle), lookup)
        name = obj.name
        backend = _Hdf5Backend(handle, obj, path)
        if samples_in == "columns" and backend.disk_chunks is None:
            logger.warning("%s: dataset %s is stored contiguously; reading samples as columns reads "
                           "strided slabs and may be slow (a chunked copy reads faster)", path.name, name)
        return _build_source(
            path, "hdf5", name, samples_in, backend,
            lambda given, default, option: _container_ids(path, given, default, option, name, lookup),
            sample_ids, feature_ids)
    except BaseException:
        handle.close()
        raise


# ---------------------------------------------------------------------------------- Zarr


def _open_zarr(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
               feature_ids: str | None, samples_in: str) -> MatrixSource:
    """Open a matrix stored in a Zarr (format 2 or 3) directory store."""
    import zarr

    if zarr.config.get("threading.max_workers", None) is None:
        # Zarr decodes chunks on a pool of its own, by default of cores + 4 threads; one per
        # core decodes faster here (measured 3.0 s → 2.1 s for 3.2 GB on 2 cores). Only a
        # default: a value the caller configured is kept.
        zarr.config.set({"threading.max_workers": os.cpu_count() or 1})
    try:
        root = zarr.open(store=str(path), mode="r")
    except Exception as exc:
        raise InputError(f"{path.name}: cannot open as a Zarr store ({_reason(exc)}); "
                         "its metadata may be corrupted") from exc
    if isinstance(root, zarr.Array):
        if dataset not in (None, "", "/"):
            raise OptionError(f"{path.name}: the store is a single array, it has no dataset {dataset!r}; "
                              "drop --dataset")
        if root.ndim != 2 or not _is_numeric(np.dtype(root.dtype)):
            raise InputError(f"{path.name}: the array has shape {tuple(root.shape)} and dtype {root.dtype}; "
                             "a 2-D numeric array is needed")
        backend = _ZarrBackend(root)
        return _build_source(path, "zarr", None, samples_in, backend,
                             lambda given, default, option: _plain_ids(path, given, option),
                             sample_ids, feature_ids)

    def lookup(name: str) -> Any:
        try:
            obj = root[name.strip("/")]
        except (KeyError, ValueError, FileNotFoundError):
            return None
        return obj if isinstance(obj, zarr.Array) else None

    candidates = sorted(
        "/" + name for name, obj in root.members(max_depth=None)
        if isinstance(obj, zarr.Array) and obj.ndim == 2 and _is_numeric(np.dtype(obj.dtype))
    )
    name, obj = _select_matrix(path, dataset, candidates, lookup)
    name = "/" + obj.path.strip("/")
    backend = _ZarrBackend(obj)
    return _build_source(
        path, "zarr", name, samples_in, backend,
        lambda given, default, option: _container_ids(path, given, default, option, name, lookup),
        sample_ids, feature_ids)


# ----------------------------------------------------------------------------------- npy


def _plain_ids(path: pathlib.Path, given: str, option: str) -> tuple[np.ndarray | None, str]:
    """Ids for containers without named datasets: an id file or nothing."""
    if not given:
        return None, "generated"
    file_path = pathlib.Path(given)
    return _read_id_file(file_path, option), f"file {file_path}"


def _read_npy_header(path: pathlib.Path) -> tuple[tuple[int, ...], bool, np.dtype, int]:
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


def _open_npy(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
              feature_ids: str | None, samples_in: str) -> MatrixSource:
    """Open a matrix stored in a ``.npy`` file."""
    try:
        shape, fortran, stored, offset = _read_npy_header(path)
    except Exception as exc:
        raise InputError(f"{path.name}: not a readable .npy file ({_reason(exc)}); "
                         "it may be truncated or corrupted") from exc
    if len(shape) != 2:
        raise InputError(f"{path.name}: array has {len(shape)} dimensions {shape}, not 2; save a 2-D matrix")
    if not _is_numeric(stored) or stored.hasobject:
        raise InputError(f"{path.name}: array is not numeric (dtype {stored}); save a numeric matrix")
    expected = offset + math.prod(shape) * stored.itemsize
    actual = path.stat().st_size
    if actual < expected:
        raise InputError(f"{path.name}: file has {actual} bytes but its header needs {expected}; "
                         "it is truncated, re-create or re-copy it")
    if samples_in == "rows" and fortran:
        logger.warning("%s: array is stored in Fortran order; reading rows as samples goes through a "
                       "memory map and may be slow", path.name)
    backend = _NpyBackend(path, (int(shape[0]), int(shape[1])), stored, fortran, offset)
    try:
        return _build_source(path, "npy", None, samples_in, backend,
                             lambda given, default, option: _plain_ids(path, given, option),
                             sample_ids, feature_ids)
    except BaseException:
        backend.close()
        raise


# ---------------------------------------------------------------------------------- text


def _open_text_handle(path: pathlib.Path) -> TextIO:
    """Open a (possibly gzipped) text file for csv reading."""
    if path.suffix.lower() == ".gz":
        return gzip.open(path, "rt", encoding="utf-8", newline="")
    return open(path, encoding="utf-8", newline="")


def _text_rows(path: pathlib.Path, delimiter: str) -> Iterator[tuple[int, list[str]]]:
    """Yield ``(line_number, fields)`` for every non-blank row, header included."""
    with _open_text_handle(path) as handle:
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
                raise InputError(f"{path.name}: line {line}, column {header[j]!r}: {_one_line(cell, 40)!r} "
                                 "is not a number; fix the cell or remove the row") from None
    return out


def _read_text(path: pathlib.Path, delimiter: str, samples_in: str
               ) -> tuple[np.ndarray, list[str], list[str]]:
    """Parse a delimited text matrix into a logical float64 array plus file row/column ids."""
    n_data = sum(1 for _ in _text_rows(path, delimiter)) - 1
    rows_iter = _text_rows(path, delimiter)
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
        if len(values) >= _TEXT_BLOCK_ROWS:
            flush()
    if values:
        flush()
    return data, row_ids, column_ids


def _open_text(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
               feature_ids: str | None, samples_in: str) -> MatrixSource:
    """Open a delimited text matrix, parsed into memory."""
    if sample_ids is not None or feature_ids is not None:
        raise OptionError(f"{path.name}: text input carries its own ids (first column and header row); "
                          "drop --sample-ids/--feature-ids")
    delimiter = _TEXT_DELIMITERS[_text_suffix(path) or ".tsv"]
    try:
        data, row_ids, column_ids = _read_text(path, delimiter, samples_in)
    except (UnicodeDecodeError, csv.Error, OSError, EOFError) as exc:
        raise InputError(f"{path.name}: cannot read as delimited text ({_reason(exc)}); "
                         "check the file is uncorrupted UTF-8 text") from exc
    file_shape = (len(row_ids), len(column_ids))
    backend = _MemoryBackend(data, file_shape)
    if samples_in == "rows":
        found = {"sample": (row_ids, "first column"), "feature": (column_ids, "header row")}
    else:
        found = {"sample": (column_ids, "header row"), "feature": (row_ids, "first column")}

    def resolve(given: str, default: str, option: str) -> tuple[np.ndarray | None, str]:
        values, where = found[default.split("_")[0]]
        return _to_str_ids(values), f"{where} of {path.name}"

    return _build_source(path, "text", None, samples_in, backend, resolve, None, None)


# ----------------------------------------------------------------------------- describe


def describe_source(source: MatrixSource) -> dict[str, Any]:
    """Summary of an opened matrix for display (no data is read).

    Parameters
    ----------
    source : MatrixSource

    Returns
    -------
    dict
        Keys ``path``, ``format``, ``dataset``, ``samples_in``, ``shape``, ``dtype``,
        ``stored_dtype``, ``disk_chunks``, ``sample_chunk``, ``nbytes``, ``file_size``,
        ``ids_source``, ``first_sample_ids`` and ``first_feature_ids``; all values are plain
        Python objects (str, int, list, dict, None).
    """
    return {
        "path": str(source.path),
        "format": source.format,
        "dataset": source.dataset,
        "samples_in": source.samples_in,
        "shape": [int(source.shape[0]), int(source.shape[1])],
        "dtype": str(source.dtype),
        "stored_dtype": str(source.stored_dtype),
        "disk_chunks": list(source.disk_chunks) if source.disk_chunks else None,
        "sample_chunk": source.sample_chunk,
        "nbytes": int(source.nbytes),
        "file_size": int(source.file_size),
        "ids_source": dict(source.ids_source),
        "first_sample_ids": [str(v) for v in source.sample_ids[:_ID_HEAD]],
        "first_feature_ids": [str(v) for v in source.feature_ids[:_ID_HEAD]],
    }


@contextlib.contextmanager
def opened(source: MatrixSource | str | os.PathLike[str], **options: Any) -> Iterator[MatrixSource]:
    """A source as given, or the matrix at a path opened with ``options`` and closed after."""
    if isinstance(source, MatrixSource):
        yield source
        return
    with open_matrix(source, **options) as src:
        yield src


# ------------------------------------------------------------------------ in-memory arrays


def array_source(data: Any, *, sample_ids: Sequence[str] | None = None,
                 feature_ids: Sequence[str] | None = None, name: str = "<array>") -> MatrixSource:
    """Wrap an in-memory 2-D array (samples × features) as a :class:`MatrixSource`.

    The array is not copied; blocks are copied as they are read. Used by the Python API
    and the scikit-learn estimator, and for small data in tests.
    """
    array = np.asarray(data)
    if array.ndim != 2:
        raise InputError(f"{name}: expected a 2-D array, got {array.ndim} dimension(s)")
    if not _is_numeric(array.dtype):
        raise InputError(f"{name}: values of dtype {array.dtype} are not numeric")
    backend = _MemoryBackend(array, array.shape)

    def resolve(given: str, default: str, option: str) -> tuple[np.ndarray | None, str]:
        values = sample_ids if option == "--sample-ids" else feature_ids
        if values is None:
            return None, "generated"
        return _to_str_ids(values), "given"

    return _build_source(pathlib.Path(name), "array", None, "rows", backend, resolve, None, None)
