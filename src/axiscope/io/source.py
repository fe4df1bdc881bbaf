"""The matrix a reader yields: :class:`MatrixSource`, its storage back-end, and in-memory arrays.

A :class:`MatrixSource` reads blocks of samples (``read_samples(start, stop)``) in the
logical orientation (samples x features), whatever the file's orientation, thread-safely,
and turns every read failure into an :class:`~axiscope.errors.InputError`. Each file
format (:mod:`.hdf5`, :mod:`.zarr_store`, :mod:`.npy`, :mod:`.text`) provides a
:class:`Backend` that reads slabs in the file's own orientation, and assembles its source
with :func:`build_source`; :func:`array_source` wraps an array already in memory.
"""

from __future__ import annotations

import os
import pathlib
from collections.abc import Callable, Sequence
from types import TracebackType
from typing import Any

import numpy as np

from ..errors import InputError, counted, reason
from .ids import IdResolver, check_ids, generated_ids, to_str_ids

__all__ = ["SAMPLES_IN", "Backend", "MemoryBackend", "MatrixSource", "array_source", "build_source",
           "describe_source", "is_numeric", "orient_block", "pread_rows", "select_matrix", "slab_key",
           "value_limit"]

#: Values of ``samples_in``: samples are the file's rows, or its columns.
SAMPLES_IN = ("rows", "columns")

_ID_HEAD = 5


def is_numeric(dtype: np.dtype) -> bool:
    """Whether ``dtype`` is a real numeric or boolean dtype."""
    return dtype.kind in "biuf"


def logical_dtype(stored: np.dtype) -> np.dtype:
    """Decoded dtype: the precision the values are computed in.

    float64 for 64-bit (or wider) floats and for integers of 32 or more bits (float32
    holds integers exactly only up to 2**24, and 32-bit integers go beyond it); float32
    for narrower floats and integers and for booleans, which it holds exactly.
    """
    if stored.kind == "f" and stored.itemsize >= 8:
        return np.dtype(np.float64)
    if stored.kind in "iu" and stored.itemsize >= 4:
        return np.dtype(np.float64)
    return np.dtype(np.float32)


def precision_note(stored: np.dtype) -> dict[str, str]:
    """What a record of the run should say about the precision chosen for integer input."""
    if stored.kind in "iu" and stored.itemsize >= 4:
        return {"computed_in": f"float64, since {stored.name} values can exceed 2**24, the largest integer "
                               "float32 holds exactly"}
    return {}


def file_size(path: pathlib.Path) -> int:
    """Bytes on disk of a file, or the sum over all files below a directory."""
    if not path.exists():  # an in-memory array
        return 0
    if path.is_dir():
        total = 0
        for root, _dirs, files in os.walk(path):
            total += sum(os.path.getsize(os.path.join(root, name)) for name in files)
        return total
    return path.stat().st_size


def value_limit(dtype: np.dtype, shape: tuple[int, int]) -> float:
    """Largest magnitude of a value that a matrix of ``shape`` may hold in ``dtype``.

    ``sqrt(max / (16·n·p))`` with ``max`` the largest finite number of ``dtype``: then no
    sum of squared values over the whole matrix, nor the product with a random test
    matrix (entries below 6 in practice, 16 leaves room), overflows in ``dtype``. For a
    float64 matrix of 10⁶ × 10⁶ this is about 3e147; for float32, 4.6e12.
    """
    largest = float(np.finfo(dtype).max)
    cells = max(1, int(shape[0]) * int(shape[1]))
    return float(np.sqrt(largest / (16.0 * cells)))


# ------------------------------------------------------------------------------ back-ends


class Backend:
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


def orient_block(block: np.ndarray, samples_in: str, dtype: np.dtype, *, owned: bool = False) -> np.ndarray:
    """Turn a slab read in file orientation into a fresh C-contiguous logical block.

    ``owned``: no one else holds or reads ``block`` (a decoder's fresh result, or the rows of
    a decoded chunk band served to this read alone): it is returned as it is when it already
    has the orientation, order and dtype wanted, instead of being copied (measured: 32 ms of
    a 1,250 × 20,000 float32 block's read, the copy and its page faults).
    """
    if samples_in == "columns":
        block = block.T
    if owned and block.dtype == dtype and block.flags.c_contiguous and block.flags.writeable:
        return block
    return np.array(block, dtype=dtype, order="C", copy=True)


def slab_key(start: int, stop: int, samples_in: str) -> tuple[slice, slice]:
    """Index selecting samples ``start:stop`` in file orientation."""
    if samples_in == "rows":
        return (slice(start, stop), slice(None))
    return (slice(None), slice(start, stop))


def pread_rows(fd: int, offset: int, start: int, stop: int, n_cols: int,
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


class MemoryBackend(Backend):
    """A matrix already held in memory in logical orientation (an array)."""

    def __init__(self, data: np.ndarray, file_shape: tuple[int, int]) -> None:
        self._data = data
        self.stored_dtype = data.dtype
        self.file_shape = file_shape

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        return np.array(self._data[start:stop], dtype=dtype, order="C", copy=True)


# -------------------------------------------------------------------------- MatrixSource


class MatrixSource:
    """A 2-D numeric matrix on disk, read in blocks of samples.

    Create instances with :func:`axiscope.io.open_matrix`. The matrix is never loaded
    whole; delimited text is parsed once, block by block, into an anonymous scratch file
    when opened.

    Attributes
    ----------
    path : pathlib.Path
        The input file or Zarr directory.
    format : str
        ``"hdf5"``, ``"zarr"``, ``"npy"``, ``"text"`` or ``"array"``.
    dataset : str or None
        Dataset/array path inside an HDF5 file or Zarr store; None otherwise.
    samples_in : str
        ``"rows"`` if the file is samples x features, ``"columns"`` if features x samples.
    shape : tuple of int
        Logical shape ``(n_samples, n_features)``.
    dtype : numpy.dtype
        The precision blocks are read and computed in (:func:`logical_dtype`): float64 for
        float64 and for integers of 32 or more bits, float32 otherwise.
    stored_dtype : numpy.dtype
        The dtype stored on disk (float64 for text, as parsed).
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
    value_limit : float
        Largest magnitude a finite value may have (:func:`value_limit`); reading a larger
        one is an error naming its cell, unless the caller asks not to check.
    notes : dict
        What the reader accepted or decided that a record of the run should say (plain
        JSON values): ``missing_chunks``/``chunks``/``fill_value`` when chunks never written
        were allowed (Zarr, HDF5), ``computed_in`` when integers are computed in float64.
    """

    #: Keyword arguments of :func:`axiscope.io.open_matrix` that open this matrix again in
    #: another process (set for HDF5, Zarr and ``.npy`` files; None for text and arrays).
    reopen: dict[str, Any] | None = None

    def __init__(self, *, path: pathlib.Path, format: str, dataset: str | None, samples_in: str,
                 backend: Backend, sample_ids: np.ndarray, feature_ids: np.ndarray,
                 ids_source: dict[str, str]) -> None:
        self.path = path
        self.format = format
        self.dataset = dataset
        self.samples_in = samples_in
        self._backend: Backend | None = backend
        rows, cols = backend.file_shape
        self.shape: tuple[int, int] = (rows, cols) if samples_in == "rows" else (cols, rows)
        self.stored_dtype: np.dtype = backend.stored_dtype
        self.dtype: np.dtype = logical_dtype(backend.stored_dtype)
        self.disk_chunks = backend.disk_chunks
        if self.disk_chunks is None:
            self.sample_chunk: int | None = None
        else:
            self.sample_chunk = self.disk_chunks[0 if samples_in == "rows" else 1]
        self.sample_ids = sample_ids
        self.feature_ids = feature_ids
        self.ids_source = ids_source
        self.notes: dict[str, Any] = precision_note(self.stored_dtype)
        self.value_limit: float = value_limit(self.dtype, self.shape)
        self.nbytes = self.shape[0] * self.shape[1] * self.dtype.itemsize
        self.file_size = file_size(path)
        #: Sample blocks are plain positioned reads of an uncompressed file: reading
        #: them again costs no decoding.
        self.plain_reads: bool = backend.plain_rows(samples_in)

    def _where(self) -> str:
        """``path`` plus the dataset name, for messages."""
        return f"{self.path.name} (dataset {self.dataset})" if self.dataset else self.path.name

    def read_samples(self, start: int, stop: int, *, check_range: bool = True) -> np.ndarray:
        """Read samples ``start`` to ``stop`` (exclusive) of the logical matrix.

        Parameters
        ----------
        start, stop : int
            Sample range, ``0 <= start <= stop <= n_samples``.
        check_range : bool, default=True
            Refuse finite values larger in magnitude than :attr:`value_limit` (their sums
            of squares would overflow). Scoring turns it off and flags such samples instead.

        Returns
        -------
        numpy.ndarray
            A fresh C-contiguous array of shape ``(stop - start, n_features)`` and dtype
            :attr:`dtype`.

        Raises
        ------
        InputError
            If the underlying file cannot be read (corrupted chunk, truncated file, ...),
            or a value is out of range (``check_range``).
        ValueError
            If the range is out of bounds or the source is closed.
        """
        backend = self._open_backend(start, stop)
        n_features = self.shape[1]
        if start == stop:
            return np.empty((0, n_features), dtype=self.dtype)
        try:
            block = backend.read(start, stop, self.samples_in, self.dtype)
        except InputError:
            raise
        except Exception as exc:  # any reader/codec failure becomes a one-line input error
            raise InputError(
                f"{self._where()}: reading samples {start}:{stop} failed ({reason(exc)}); "
                "the file may be corrupted or truncated, re-create or re-copy it"
            ) from exc
        if block.shape != (stop - start, n_features):
            raise InputError(
                f"{self._where()}: reading samples {start}:{stop} returned shape {block.shape} "
                f"instead of {(stop - start, n_features)}; the file may be corrupted"
            )
        if check_range:
            self._check_range(block, start)
        return block

    def _open_backend(self, start: int, stop: int) -> Backend:
        """The backend, after checking that samples ``start:stop`` exist and the source is open."""
        n_samples = self.shape[0]
        if not 0 <= start <= stop <= n_samples:
            raise ValueError(f"sample range {start}:{stop} is outside 0:{n_samples}")
        if self._backend is None:
            raise ValueError(f"{self.path.name}: source is closed")
        return self._backend

    def _check_range(self, block: np.ndarray, start: int) -> None:
        """Stop at the first finite value beyond :attr:`value_limit`, naming its cell."""
        limit = self.value_limit
        if block.size == 0 or (-limit <= block.min() and block.max() <= limit):
            return  # the common case: two reductions, no copy (NaN fails both tests)
        with np.errstate(invalid="ignore"):
            bad = np.isfinite(block) & (np.abs(block) > limit)
        if not bad.any():
            return
        rows, cols = np.nonzero(bad)
        row, col = int(rows[0]), int(cols[0])
        n, p = self.shape
        raise InputError(
            f"{self._where()}: sample {self.sample_ids[start + row]!r}, feature {self.feature_ids[col]!r} is "
            f"{float(block[row, col]):g}; in {self.dtype.name} a {n} × {p} matrix can hold values up to "
            f"±{limit:.3g} (beyond that, sums of squared values overflow); rescale the input, e.g. divide "
            "it by a power of ten")

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


# ------------------------------------------------------------------------------ assembly


def _check_matrix_shape(where: str, file_shape: tuple[int, int], samples_in: str) -> None:
    """Require at least 2 samples and 2 features."""
    rows, cols = file_shape
    n_samples, n_features = (rows, cols) if samples_in == "rows" else (cols, rows)
    if n_samples >= 2 and n_features >= 2:
        return
    hint = ""
    if n_samples < 2 <= n_features:
        hint = f"; samples are read from the file {samples_in}, check samples_in"
    raise InputError(
        f"{where}: matrix has {counted(n_samples, 'sample')} x {counted(n_features, 'feature')} "
        f"(samples in {samples_in}); need at least 2 of each{hint}"
    )


def build_source(path: pathlib.Path, kind: str, dataset: str | None, samples_in: str,
                 backend: Backend, resolve_ids: IdResolver,
                 sample_ids: str | None, feature_ids: str | None) -> MatrixSource:
    """Check the shape, resolve and check ids, and assemble the source.

    ``resolve_ids(given, default, argument)`` finds the ids of one axis (see
    :data:`axiscope.io.ids.IdResolver`); ids it does not find are generated.
    """
    where = f"{path.name} (dataset {dataset})" if dataset else path.name
    _check_matrix_shape(where, backend.file_shape, samples_in)
    rows, cols = backend.file_shape
    n_samples, n_features = (rows, cols) if samples_in == "rows" else (cols, rows)
    ids: dict[str, np.ndarray] = {}
    sources: dict[str, str] = {}
    for axis, given, argument, count in (
        ("sample", sample_ids, "sample_ids", n_samples),
        ("feature", feature_ids, "feature_ids", n_features),
    ):
        values, source = resolve_ids(given or "", argument, argument)
        if values is None:
            values, source = generated_ids(axis, count), "generated"
        check_ids(where, values, count, axis, argument, source)
        ids[axis], sources[axis + "s"] = values, source
    return MatrixSource(path=path, format=kind, dataset=dataset, samples_in=samples_in, backend=backend,
                        sample_ids=ids["sample"], feature_ids=ids["feature"], ids_source=sources)


def select_matrix(path: pathlib.Path, dataset: str | None, candidates: list[str],
                  lookup: Callable[[str], Any]) -> tuple[str, Any]:
    """Pick the matrix in a container (HDF5 file, Zarr group) by name or as the only 2-D numeric candidate."""
    if dataset is None:
        if not candidates:
            raise InputError(f"{path.name}: no 2-D numeric dataset found; store the matrix as a 2-D numeric "
                             "dataset or name one with dataset=...")
        if len(candidates) > 1:
            listed = ", ".join(candidates[:10]) + (", ..." if len(candidates) > 10 else "")
            raise InputError(f"{path.name}: several 2-D datasets ({listed}); choose one with dataset=...")
        dataset = candidates[0]
    obj = lookup(dataset)
    if obj is None:
        listed = ", ".join(candidates[:10]) or "none"
        raise InputError(f"{path.name}: no dataset {dataset!r} (2-D numeric datasets: {listed}); "
                         "fix dataset=...")
    shape = tuple(obj.shape)
    if len(shape) != 2:
        raise InputError(f"{path.name}: dataset {dataset!r} has {len(shape)} dimensions {shape}, not 2; "
                         "choose a 2-D dataset with dataset=...")
    if not is_numeric(np.dtype(obj.dtype)):
        raise InputError(f"{path.name}: dataset {dataset!r} is not numeric (dtype {obj.dtype}); "
                         "choose a numeric dataset with dataset=...")
    return dataset, obj


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
        ``ids_source``, ``notes``, ``first_sample_ids`` and ``first_feature_ids``; all values are plain
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
        "notes": dict(source.notes),
        "first_sample_ids": [str(v) for v in source.sample_ids[:_ID_HEAD]],
        "first_feature_ids": [str(v) for v in source.feature_ids[:_ID_HEAD]],
    }


# ------------------------------------------------------------------------ in-memory arrays


def array_source(data: Any, *, sample_ids: Sequence[str] | None = None,
                 feature_ids: Sequence[str] | None = None, name: str = "<array>") -> MatrixSource:
    """Wrap an in-memory 2-D array (samples × features) as a :class:`MatrixSource`.

    The array is not copied; blocks are copied as they are read. Used by the Python API
    and the scikit-learn estimator, and for small data in tests. ``axiscope.io.array_source``
    also takes SciPy sparse matrices and arrays (:func:`axiscope.io.sparse.array_source`).
    """
    array = np.asarray(data)
    if array.ndim != 2:
        raise InputError(f"{name}: expected a 2-D array, got {counted(array.ndim, 'dimension')}")
    if not is_numeric(array.dtype):
        raise InputError(f"{name}: values of dtype {array.dtype} are not numeric")
    backend = MemoryBackend(array, array.shape)
    given = {"sample_ids": sample_ids, "feature_ids": feature_ids}

    def resolve(_given: str, _default: str, argument: str) -> tuple[np.ndarray | None, str]:
        values = given[argument]
        if values is None:
            return None, "generated"
        return to_str_ids(values), "given"

    return build_source(pathlib.Path(name), "array", None, "rows", backend, resolve, None, None)
