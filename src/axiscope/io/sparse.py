"""Sparse input: CSR or CSC matrices in HDF5 or Zarr groups, SciPy ``.npz`` files, in-memory matrices.

On disk a sparse matrix is a group (HDF5 group or Zarr group; the file's root counts) that
holds three 1-D arrays and the matrix shape:

* ``data``: the stored values (any real numeric dtype),
* ``indices``: for each stored value, its column (CSR) or row (CSC),
* ``indptr``: where each row (CSR) or column (CSC) starts in ``data``/``indices``; one
  more entry than rows (columns), starting at 0, never decreasing, ending at ``len(data)``,
* ``shape``: an attribute of the group, or a 1-D dataset of two integers (rows, columns).

The four names are configurable (``sparse_names="data,indices,indptr,shape"``); which
axis ``indptr`` runs over is read from a ``format`` attribute of the group (``"csr"`` or
``"csc"``), or from the length of ``indptr``, or given with ``compressed_axis``. A SciPy
``.npz`` file (``scipy.sparse.save_npz``) holds the same arrays plus ``format`` and
``shape``; it is read without pickle (``allow_pickle=False``), and since a zip member can
only be decompressed whole, its arrays are held in memory (12 bytes per stored value).

Checks before any pass: the arrays exist and are 1-D; the shape is two positive integers;
``indptr`` has the right length, starts at 0, never decreases and ends at the number of
stored values; every index lies inside the matrix (one read of ``indices``, in slabs; for
an HDF5 or Zarr file whose blocks of samples are slices of the arrays, in each slice the
passes read instead, before any product, so the first pass stops at a bad index with the
same message and no output is written).
Stored NaN or infinite values are an error when read (an absent entry is a zero, so a
sparse file cannot mark a value as missing).

Blocks of samples come out as :class:`scipy.sparse.csr_matrix` with float32 values when the
file stores float32 and float64 otherwise (:meth:`SparseMatrixSource.read_sparse`; the
products accumulate in float64 whatever the values' dtype), duplicates summed, indices sorted. When samples
run along the compressed axis (CSR with samples as rows, CSC with samples as columns) a
block is one slice of each array. Otherwise (CSC with samples as rows, the usual layout
of feature × cell matrices read the other way round) the matrix is converted once to
sample order, in memory, the first time a block is read: slabs of features are read,
regrouped by sample with SciPy and scattered into one CSR copy (values in the blocks' dtype:
8 or 12 bytes per stored value, plus 8 per sample, held for the rest of the run and counted by the memory plan);
this costs one more read of the stored values, and a pass after it costs no reading at all.
:meth:`MatrixSource.read_samples` still returns dense blocks (``toarray``) for the readers
of dense blocks (scoring, supplementary features), which size their blocks for dense rows.
"""

from __future__ import annotations

import logging
import pathlib
import threading
from typing import Any

import numpy as np

from ..errors import InputError, OptionError, counted, reason
from .ids import container_ids, to_str_ids
from .source import Backend, MatrixSource, build_source, is_numeric
from .source import array_source as dense_array_source

__all__ = ["array_source", "SPARSE_NAMES", "COMPRESSED_AXES", "SparseMatrixSource", "SparseBackend", "parse_sparse_names",
           "find_sparse_group", "open_sparse_container", "open_npz", "sparse_array_source", "is_scipy_sparse"]

logger = logging.getLogger(__name__)

#: Default names of the values, indices, pointer arrays and of the shape.
SPARSE_NAMES = "data,indices,indptr,shape"
#: Values of ``compressed_axis``: from the file, or the stored rows or columns.
COMPRESSED_AXES = ("auto", "rows", "columns")
#: Stored values read at once when checking indices or converting CSC to CSR.
_SLAB = 1 << 22
_FORMATS = {"csr": "rows", "csc": "columns"}


def is_scipy_sparse(data: Any) -> bool:
    """Whether ``data`` is a SciPy sparse matrix or array (without importing SciPy when it is not)."""
    return type(data).__module__.startswith("scipy.sparse")


def parse_sparse_names(text: str | None) -> tuple[str, str, str, str]:
    """The four names of ``sparse_names`` (values, indices, pointers, shape)."""
    parts = [p.strip() for p in (text or SPARSE_NAMES).split(",")]
    if len(parts) != 4 or not all(parts) or len(set(parts)) != 4:
        raise OptionError(f"sparse_names={text!r} is not four different comma-separated names (values, "
                          f"indices, pointers, shape); pass e.g. {SPARSE_NAMES!r}")
    return parts[0], parts[1], parts[2], parts[3]


class SparseBackend(Backend):
    """A compressed sparse matrix: ``data`` and ``indices`` read in slices, ``indptr`` held.

    Parameters
    ----------
    data, indices : array-like
        1-D objects sliceable with ``[a:b]`` (h5py datasets, Zarr arrays, numpy arrays).
    indptr : ndarray of int64
        Checked pointers, length ``major + 1``.
    file_shape : tuple of int
        Shape in file orientation.
    compressed : {"rows", "columns"}
        The file axis ``indptr`` runs over (CSR: rows).
    lock : bool
        Serialise reads (h5py is not thread-safe).
    index_check : tuple, optional
        ``(where, name, limit, axis)``: the indices were not checked when the file was opened;
        every slice read is checked instead (:func:`_check_index_slab`), before any product
        sees it, with the same message as the check at opening.
    """

    def __init__(self, data: Any, indices: Any, indptr: np.ndarray, file_shape: tuple[int, int],
                 compressed: str, *, lock: bool, close: Any = None, index_check: tuple | None = None) -> None:
        self._data, self._indices, self._indptr = data, indices, indptr
        self._index_check = index_check
        self.stored_dtype = np.dtype(data.dtype)
        #: dtype of the values of a block: float32 stays float32, anything else is float64
        self.value_dtype = np.dtype(np.float32 if self.stored_dtype == np.float32 else np.float64)
        self.file_shape = file_shape
        self.compressed = compressed
        self._lock = threading.Lock() if lock else None
        self._convert_lock = threading.Lock()
        self._rows: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        self._close = close
        self.nnz = int(indptr[-1])

    def _slice(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        if self._lock is None:
            data, indices = np.asarray(self._data[a:b]), np.asarray(self._indices[a:b])
        else:
            with self._lock:
                data, indices = np.asarray(self._data[a:b]), np.asarray(self._indices[a:b])
        if self._index_check is not None:
            _check_index_slab(*self._index_check, indices, a)
        return data, indices

    def sample_major(self, samples_in: str) -> bool:
        """Whether samples run along the compressed axis (a block is one slice of each array)."""
        return self.compressed == samples_in

    def sample_pointers(self, samples_in: str) -> np.ndarray | None:
        """``indptr`` over samples when samples run along the compressed axis, else None."""
        if self.sample_major(samples_in):
            return self._indptr
        return None if self._rows is None else self._rows[2]

    def read_csr(self, start: int, stop: int, samples_in: str):
        """Samples ``start:stop`` as a CSR matrix (samples × features) of :attr:`value_dtype`, canonical."""
        import scipy.sparse as sp

        n_features = self.file_shape[1] if samples_in == "rows" else self.file_shape[0]
        if self.sample_major(samples_in):
            a, b = int(self._indptr[start]), int(self._indptr[stop])
            data, indices = self._slice(a, b)
            data = data.astype(self.value_dtype, copy=True)
            pointers = (self._indptr[start : stop + 1] - a).astype(np.int64)
        else:
            data_all, indices_all, pointers_all = self._converted(samples_in)
            a, b = int(pointers_all[start]), int(pointers_all[stop])
            data, indices = data_all[a:b].copy(), indices_all[a:b]
            pointers = pointers_all[start : stop + 1] - a
        block = sp.csr_matrix((data, indices, pointers), shape=(stop - start, n_features))
        if not block.has_canonical_format:
            block.sum_duplicates()  # duplicates add up, as in SciPy; sorted indices
        return block

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        return np.asarray(self.read_csr(start, stop, samples_in).toarray(), dtype=dtype, order="C")

    def _converted(self, samples_in: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The whole matrix in sample order (values of :attr:`value_dtype`, built once, slab by slab)."""
        with self._convert_lock:
            if self._rows is None:
                self._rows = self._convert(samples_in)
            return self._rows

    def _convert(self, samples_in: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        import scipy.sparse as sp

        major = self._indptr.shape[0] - 1  # features, in the file's compressed axis
        n_samples = self.file_shape[1] if self.compressed == "rows" else self.file_shape[0]
        counts = np.zeros(n_samples, dtype=np.int64)
        for a in range(0, self.nnz, _SLAB):
            _, idx = self._slice(a, min(self.nnz, a + _SLAB))
            counts += np.bincount(idx, minlength=n_samples)
        pointers = np.zeros(n_samples + 1, dtype=np.int64)
        np.cumsum(counts, out=pointers[1:])
        data = np.empty(self.nnz, dtype=self.value_dtype)
        index_type = np.int32 if major < 2**31 else np.int64
        indices = np.empty(self.nnz, dtype=index_type)
        fill = pointers[:-1].copy()
        f0 = 0
        while f0 < major:  # slabs of whole features of about _SLAB stored values
            f1 = int(np.searchsorted(self._indptr, self._indptr[f0] + _SLAB, side="right")) - 1
            f1 = min(major, max(f1, f0 + 1))
            a, b = int(self._indptr[f0]), int(self._indptr[f1])
            values, idx = self._slice(a, b)
            slab = sp.csc_matrix((values.astype(self.value_dtype), idx, self._indptr[f0 : f1 + 1] - a),
                                 shape=(n_samples, f1 - f0)).tocsr()
            per_row = np.diff(slab.indptr)
            where = np.arange(slab.nnz, dtype=np.int64) + np.repeat(fill - slab.indptr[:-1], per_row)
            data[where] = slab.data
            indices[where] = slab.indices + f0
            fill += per_row
            f0 = f1
        logger.info("converted %s stored values to sample order in memory (%.0f MB)", f"{self.nnz:,}",
                    (data.nbytes + indices.nbytes + pointers.nbytes) / 1e6)
        return data, indices, pointers

    def close(self) -> None:
        if self._close is not None:
            self._close()
            self._close = None


class SparseMatrixSource(MatrixSource):
    """A :class:`MatrixSource` over a compressed sparse matrix.

    Products are computed in float64 (:attr:`dtype`) whatever the stored dtype: the implicit
    centring ``X·W − 1·(μᵀW)`` is a rank-one correction that must not lose digits. The
    blocks' values keep float32 when the file stores float32 (:attr:`stored_bytes`).

    Attributes (besides those of :class:`MatrixSource`)
    ----------------------------------------------------
    sparse : bool
        Always True; readers of blocks ask for :meth:`read_sparse`.
    nnz : int
        Number of stored values.
    held_bytes : int
        Memory the source itself holds or will hold for the run (the sample-order copy of
        a matrix compressed along features, the arrays of an ``.npz`` file).
    """

    sparse = True

    def __init__(self, *, backend: SparseBackend, held_bytes: int = 0, **kwargs: Any) -> None:
        super().__init__(backend=backend, **kwargs)
        self.dtype = np.dtype(np.float64)
        self.value_limit = float(np.sqrt(float(np.finfo(np.float64).max) / (16.0 * max(1, self.shape[0] * self.shape[1]))))
        self.nbytes = self.shape[0] * self.shape[1] * 8
        self.nnz = backend.nnz
        self.plain_reads = False
        self.held_bytes = int(held_bytes)
        #: bytes per stored value of a block (values in their block dtype, int32 or int64 indices)
        self.stored_bytes = backend.value_dtype.itemsize + (4 if self.shape[1] < 2**31 else 8)
        if not backend.sample_major(self.samples_in):
            self.held_bytes += self.stored_bytes * self.nnz + 8 * (self.shape[0] + 1)
        self.notes.pop("computed_in", None)
        n, p = self.shape
        self.notes.update({"storage": "sparse, compressed by " + ("samples" if backend.sample_major(self.samples_in)
                                                                   else "features (converted to sample order once)"),
                           "stored_values": self.nnz,
                           "density": round(self.nnz / max(1, n * p), 6),
                           "computed_in": "float64 (sparse input)"})

    def read_sparse(self, start: int, stop: int):
        """Samples ``start:stop`` as a :class:`scipy.sparse.csr_matrix` (float32 or float64), values checked.

        Raises
        ------
        InputError
            Unreadable storage, a stored NaN or infinite value, or one beyond :attr:`value_limit`.
        """
        backend = self._open_backend(start, stop)
        try:
            block = backend.read_csr(start, stop, self.samples_in)
        except InputError:
            raise
        except Exception as exc:
            raise InputError(f"{self._where()}: reading samples {start}:{stop} failed ({reason(exc)}); "
                             "the file may be corrupted or truncated, re-create or re-copy it") from exc
        self._check_stored(block, start)
        return block

    def _check_stored(self, block, start: int) -> None:
        values = block.data
        limit = self.value_limit
        if values.size == 0 or (-limit <= float(values.min()) and float(values.max()) <= limit):
            return
        values = values.astype(np.float64)  # compared in float64 (the limit may exceed float32's range)
        bad = ~np.isfinite(values) | (np.abs(np.nan_to_num(values, nan=0.0)) > limit)
        at = int(np.flatnonzero(bad)[0])
        row = int(np.searchsorted(block.indptr, at, side="right")) - 1
        col = int(block.indices[at])
        where = f"{self._where()}: sample {self.sample_ids[start + row]!r}, feature {self.feature_ids[col]!r}"
        if not np.isfinite(values[at]):
            raise InputError(f"{where} is stored as {values[at]}; sparse input cannot mark values as missing "
                             "(an absent entry is a zero): remove or replace non-finite values")
        raise InputError(f"{where} is {values[at]:g}, beyond ±{limit:.3g} where sums of squares overflow; "
                         "rescale the input, e.g. divide it by a power of ten")

    def sample_spans(self, max_rows: int, max_nonzeros: int) -> list[tuple[int, int]]:
        """Row ranges of at most ``max_rows`` samples and about ``max_nonzeros`` stored values each.

        A block closes before the sample that would take it past ``max_nonzeros`` (a single
        sample with more stays alone). Depends on the stored values and the two limits only.
        """
        backend = self._backend
        pointers = None if backend is None else backend.sample_pointers(self.samples_in)
        n = self.shape[0]
        if pointers is None:  # counts per sample are known once converted: count them now
            pointers = backend._converted(self.samples_in)[2]  # type: ignore[union-attr]
        spans, start = [], 0
        while start < n:
            stop = int(np.searchsorted(pointers, pointers[start] + max_nonzeros, side="right")) - 1
            stop = min(n, start + max_rows, max(stop, start + 1))
            spans.append((start, stop))
            start = stop
        return spans


# --------------------------------------------------------------------------------- checks


def _where(path: pathlib.Path, group: str | None) -> str:
    return f"{path.name} (sparse group {group})" if group not in (None, "", "/") else path.name


def _check_arrays(where: str, data: Any, indices: Any, pointers: Any, names: tuple[str, ...]) -> None:
    for obj, name, kind in ((data, names[0], "values"), (indices, names[1], "indices"),
                            (pointers, names[2], "pointers")):
        if len(obj.shape) != 1:
            raise InputError(f"{where}: {kind} array {name!r} has shape {tuple(obj.shape)}, not 1-D; "
                             "store data, indices and indptr as 1-D arrays")
    if not is_numeric(np.dtype(data.dtype)):
        raise InputError(f"{where}: values array {names[0]!r} is not numeric (dtype {data.dtype}); "
                         "store numbers")
    for obj, name in ((indices, names[1]), (pointers, names[2])):
        if np.dtype(obj.dtype).kind not in "iu":
            raise InputError(f"{where}: {name!r} has dtype {obj.dtype}, not integers; the sparse matrix is "
                             "damaged, re-create it")
    if data.shape[0] != indices.shape[0]:
        raise InputError(f"{where}: {names[0]!r} holds {data.shape[0]} values but {names[1]!r} "
                         f"{indices.shape[0]} indices; the sparse matrix is damaged, re-create it")


def _parse_shape(where: str, value: Any, shape_name: str) -> tuple[int, int]:
    try:
        shape = tuple(int(v) for v in np.asarray(value).reshape(-1).tolist())
    except (TypeError, ValueError):
        shape = ()
    if len(shape) != 2 or min(shape) < 1:
        raise InputError(f"{where}: shape {shape_name!r} is {value!r}, not two positive integers (rows, "
                         "columns); store the matrix shape there")
    return shape  # type: ignore[return-value]


def _compressed(where: str, declared: str | None, given: str, n_pointers: int, shape: tuple[int, int],
                pointer_name: str) -> str:
    """Which file axis ``indptr`` runs over: ``compressed_axis``, else the group's format, else its length."""
    if given not in COMPRESSED_AXES:
        raise OptionError(f"compressed_axis={given!r} is not one of {', '.join(map(repr, COMPRESSED_AXES))}; "
                          "choose one of them")
    if given == "auto" and declared is not None:
        given = declared
    if given == "auto":
        fits = [axis for axis, size in (("rows", shape[0]), ("columns", shape[1])) if n_pointers == size + 1]
        if len(fits) == 2:
            raise InputError(f"{where}: the matrix is square, so {pointer_name!r} may run over rows (CSR) or "
                             "columns (CSC); say which with compressed_axis='rows' or 'columns'")
        given = fits[0] if fits else "rows"
    size = shape[0] if given == "rows" else shape[1]
    if n_pointers != size + 1:
        raise InputError(f"{where}: {pointer_name!r} has {n_pointers} entries, but a matrix of shape {shape} "
                         f"compressed by {given} needs {size + 1}; the shape or the pointers are wrong")
    return given


def _check_pointers(where: str, pointers: np.ndarray, nnz: int, name: str) -> np.ndarray:
    pointers = np.asarray(pointers).astype(np.int64)
    if pointers[0] != 0:
        raise InputError(f"{where}: {name!r} starts at {int(pointers[0])}, not 0; the sparse matrix is "
                         "damaged, re-create it")
    steps = np.diff(pointers)
    if steps.size and steps.min() < 0:
        at = int(np.flatnonzero(steps < 0)[0])
        raise InputError(f"{where}: {name!r} decreases at entry {at + 1} ({int(pointers[at])} then "
                         f"{int(pointers[at + 1])}); the sparse matrix is damaged, re-create it")
    if pointers[-1] != nnz:
        raise InputError(f"{where}: {name!r} ends at {int(pointers[-1])} but {counted(nnz, 'value is', 'values are')} "
                         "stored; the sparse matrix is damaged, re-create it")
    return pointers


def _check_indices(where: str, indices: Any, nnz: int, limit: int, name: str, axis: str) -> None:
    for a in range(0, nnz, _SLAB):
        _check_index_slab(where, name, limit, axis, np.asarray(indices[a : min(nnz, a + _SLAB)]), a)


def _check_index_slab(where: str, name: str, limit: int, axis: str, idx: np.ndarray, first: int) -> None:
    """Every index of ``idx`` (entries ``first…`` of the file's array) inside ``[0, limit)``."""
    if idx.size and (idx.min() < 0 or idx.max() >= limit):
        at = int(np.flatnonzero((idx < 0) | (idx >= limit))[0])
        raise InputError(f"{where}: {name!r} entry {first + at} is {int(idx[at])}, outside the {limit} {axis} "
                         "of the matrix; the sparse matrix is damaged, re-create it")


def _decoded(value: Any) -> str | None:
    if isinstance(value, bytes):
        value = value.decode("ascii", "replace")
    if isinstance(value, np.ndarray) and value.shape == ():
        return _decoded(value[()])
    return value.lower() if isinstance(value, str) else None


def checked_backend(where: str, data: Any, indices: Any, pointers: Any, shape_value: Any,
                    declared: Any, names: tuple[str, str, str, str], compressed_axis: str, *,
                    lock: bool, close: Any = None, samples_in: str | None = None) -> SparseBackend:
    """A :class:`SparseBackend` after every structural check.

    The indices are checked in one read of them now, or, when ``samples_in`` says that
    samples run along the compressed axis (every block a slice of the arrays), in the slices
    the passes read: the first pass reads every index anyway, so a file is not read once
    more only for the check (measured on a 100,000 × 30,000 CSR file at 2%: 0.3 s of opening,
    240 MB of indices). A bad index then stops the first pass with the same one-line
    message, before any product sees it and before any output is written.
    """
    _check_arrays(where, data, indices, pointers, names)
    shape = _parse_shape(where, shape_value, names[3])
    fmt = _decoded(declared)
    compressed = _compressed(where, _FORMATS.get(fmt or ""), compressed_axis, int(pointers.shape[0]), shape,
                             names[2])
    pointer_values = _check_pointers(where, np.asarray(pointers[:]), int(data.shape[0]), names[2])
    minor, axis = (shape[1], "columns") if compressed == "rows" else (shape[0], "rows")
    if samples_in == compressed:
        return SparseBackend(data, indices, pointer_values, shape, compressed, lock=lock, close=close,
                             index_check=(where, names[1], minor, axis))
    _check_indices(where, indices, int(data.shape[0]), minor, names[1], axis)
    return SparseBackend(data, indices, pointer_values, shape, compressed, lock=lock, close=close)


def assemble(path: pathlib.Path, kind: str, group: str | None, samples_in: str, backend: SparseBackend,
             resolve_ids: Any, sample_ids: str | None, feature_ids: str | None,
             held_bytes: int = 0) -> SparseMatrixSource:
    """Check ids and shape (as for dense input) and build the sparse source."""
    dense = build_source(path, kind, group, samples_in, backend, resolve_ids, sample_ids, feature_ids)
    return SparseMatrixSource(path=path, format=kind, dataset=group, samples_in=samples_in, backend=backend,
                              sample_ids=dense.sample_ids, feature_ids=dense.feature_ids,
                              ids_source=dense.ids_source, held_bytes=held_bytes)


# ------------------------------------------------------------------------ HDF5 and Zarr


def _members(kind: str, handle: Any) -> tuple[list[str], list[str]]:
    """Groups of a container and their member names: (group paths, all 1-D/2-D array paths)."""
    groups, arrays = [], []
    if kind == "hdf5":
        import h5py

        groups.append("/")

        def visit(name: str, obj: Any) -> None:
            (groups if isinstance(obj, h5py.Group) else arrays).append("/" + name)

        handle.visititems(visit)
    else:
        import zarr

        if isinstance(handle, zarr.Array):
            return [], ["/"]
        groups.append("/")
        for name, obj in handle.members(max_depth=None):
            (arrays if isinstance(obj, zarr.Array) else groups).append("/" + name.strip("/"))
    return groups, arrays


def find_sparse_group(kind: str, handle: Any, dataset: str | None, names: tuple[str, str, str, str],
                      where: str = "the file") -> str | None:
    """The group holding a sparse matrix, or None when the container holds a dense one.

    With ``dataset``: that group if it holds the three arrays (a group holding only some
    of them is an error naming the missing ones). Without: the only group holding them,
    when the container has no 2-D numeric array.
    """
    groups, arrays = _members(kind, handle)
    present = set(arrays)

    def holds(group: str) -> bool:
        base = group.rstrip("/")
        return all(f"{base}/{n}" in present for n in names[:3])

    if dataset is not None:
        group = "/" + dataset.strip("/")
        if group not in groups:
            return None
        base = group.rstrip("/")
        missing = [n for n in names[:3] if f"{base}/{n}" not in present]
        if missing and len(missing) < 3:
            raise InputError(f"{where}: group {group!r} holds part of a sparse matrix but no "
                             f"{', '.join(repr(m) for m in missing)}; store data, indices and indptr together, "
                             "or name them with sparse_names=...")
        return None if missing else group
    found = [g for g in groups if holds(g)]
    if len(found) != 1:
        return None
    dense = [a for a in arrays if len(getattr(_get(kind, handle, a), "shape", ())) == 2]
    return None if dense else found[0]


def _get(kind: str, handle: Any, name: str) -> Any:
    try:
        return handle[name] if kind == "hdf5" else handle[name.strip("/")]
    except (KeyError, ValueError, FileNotFoundError):
        return None


def open_sparse_container(path: pathlib.Path, kind: str, handle: Any, group: str, *, samples_in: str,
                          sample_ids: str | None, feature_ids: str | None, names: tuple[str, str, str, str],
                          compressed_axis: str, check_storage: Any) -> SparseMatrixSource:
    """Open the sparse matrix in ``group`` of an opened HDF5 file or Zarr group.

    ``check_storage(obj, name) -> dict`` applies the container's own storage checks
    (external data, chunks never written) to each array and returns notes for the record.
    """
    where = _where(path, group)
    base = group.rstrip("/")
    node = handle[group] if kind == "hdf5" else (handle if group == "/" else handle[group.strip("/")])
    arrays = [_get(kind, handle, f"{base}/{n}") for n in names[:3]]
    notes: dict[str, Any] = {}
    for obj, name in zip(arrays, names[:3]):
        notes.update(check_storage(obj, f"{base}/{name}"))
    shape_obj = _get(kind, handle, f"{base}/{names[3]}")
    if shape_obj is not None:
        shape_value = np.asarray(shape_obj[...])
    elif names[3] in node.attrs:
        shape_value = node.attrs[names[3]]
    else:
        raise InputError(f"{where}: no shape (attribute or dataset {names[3]!r}) beside {', '.join(names[:3])}; "
                         f"store the matrix shape as a group attribute {names[3]!r}, or name it with "
                         "sparse_names=...")
    declared = node.attrs.get("format")
    backend = checked_backend(where, *arrays, shape_value, declared, names, compressed_axis,
                              lock=kind == "hdf5", close=handle.close if kind == "hdf5" else None,
                              samples_in=samples_in)

    def lookup(name: str) -> Any:
        obj = _get(kind, handle, name)
        return obj if obj is not None and hasattr(obj, "shape") else None

    source = assemble(path, kind, group, samples_in, backend,
                      lambda given, default, argument: container_ids(path, given, default, argument,
                                                                     f"{base}/{names[0]}", lookup),
                      sample_ids, feature_ids)
    source.notes.update(notes)
    return source


# ---------------------------------------------------------------------------------- .npz


def open_npz(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None, feature_ids: str | None,
             samples_in: str, compressed_axis: str = "auto") -> SparseMatrixSource:
    """Open a SciPy sparse ``.npz`` file (CSR or CSC), without pickle; its arrays are held in memory."""
    from .ids import plain_ids

    if dataset is not None:
        raise OptionError(f"{path.name}: dataset={dataset!r} only applies to HDF5 and Zarr input; leave it out")
    try:
        with np.load(path, allow_pickle=False) as archive:
            members = {name: archive[name] for name in archive.files}
    except (OSError, ValueError, EOFError) as exc:
        raise InputError(f"{path.name}: cannot read as a .npz archive ({reason(exc)}); it may be truncated, "
                         "or hold objects that need pickle (refused); re-create it with scipy.sparse.save_npz") from exc
    except Exception as exc:  # zip errors
        raise InputError(f"{path.name}: cannot read as a .npz archive ({reason(exc)}); re-create it with "
                         "scipy.sparse.save_npz") from exc
    fmt = _decoded(members.get("format"))
    if fmt is not None and fmt not in _FORMATS:
        raise InputError(f"{path.name}: holds a sparse matrix in {fmt!r} format; save it as CSR or CSC "
                         "(scipy: save_npz(path, matrix.tocsr()))")
    names = ("data", "indices", "indptr", "shape")
    absent = [n for n in names if n not in members]
    if absent:
        raise InputError(f"{path.name}: no {', '.join(repr(a) for a in absent)} in the archive; not a CSR/CSC "
                         "file of scipy.sparse.save_npz, re-create it with save_npz")
    data, indices = members["data"], members["indices"]
    backend = checked_backend(path.name, data, indices, members["indptr"], members["shape"], fmt, names,
                              compressed_axis, lock=False)
    return assemble(path, "npz", None, samples_in, backend,
                    lambda given, default, argument: plain_ids(path, given, argument),
                    sample_ids, feature_ids, held_bytes=int(data.nbytes + indices.nbytes))


# ------------------------------------------------------------------------- in memory


def sparse_array_source(matrix: Any, *, sample_ids: Any = None, feature_ids: Any = None,
                        name: str = "<array>") -> SparseMatrixSource:
    """Wrap an in-memory SciPy sparse matrix or array (samples × features) as a source.

    CSR input is not copied (blocks are sliced from it); any other layout is converted to
    CSR once.
    """
    import scipy.sparse as sp

    if len(matrix.shape) != 2:
        raise InputError(f"{name}: expected a 2-D matrix, got {counted(len(matrix.shape), 'dimension')}")
    if not is_numeric(np.dtype(matrix.dtype)):
        raise InputError(f"{name}: values of dtype {matrix.dtype} are not numeric")
    csr = sp.csr_matrix(matrix)  # no copy for a CSR matrix (or array) already
    shape = (int(csr.shape[0]), int(csr.shape[1]))
    backend = SparseBackend(csr.data, csr.indices, np.asarray(csr.indptr, dtype=np.int64), shape, "rows",
                            lock=False)
    given = {"sample_ids": sample_ids, "feature_ids": feature_ids}

    def resolve(_given: str, _default: str, argument: str) -> tuple[np.ndarray | None, str]:
        values = given[argument]
        return (None, "generated") if values is None else (to_str_ids(values), "given")

    return assemble(pathlib.Path(name), "array", None, "rows", backend, resolve, None, None)


def array_source(data: Any, *, sample_ids: Any = None, feature_ids: Any = None,
                 name: str = "<array>") -> MatrixSource:
    """Wrap an in-memory matrix (samples × features) as a :class:`MatrixSource`.

    A SciPy sparse matrix or array gives a :class:`SparseMatrixSource`
    (:func:`sparse_array_source`), fitted without densifying; anything else is a dense
    array (:func:`axiscope.io.source.array_source`). Exported as ``axiscope.io.array_source``.
    """
    if is_scipy_sparse(data):
        return sparse_array_source(data, sample_ids=sample_ids, feature_ids=feature_ids, name=name)
    return dense_array_source(data, sample_ids=sample_ids, feature_ids=feature_ids, name=name)
