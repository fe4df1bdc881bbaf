"""Opening a matrix file: which format a path holds, and the reader that opens it.

A new input format is a module beside this one with an ``open_<format>(path, *, dataset,
sample_ids, feature_ids, samples_in) -> MatrixSource`` function, a line in
:func:`detect_format` and an entry in :data:`OPENERS`.
"""

from __future__ import annotations

import contextlib
import os
import pathlib
import warnings
from collections.abc import Iterator
from typing import Any

from ..errors import InputError, OptionError
from .hdf5 import SUFFIXES as HDF5_SUFFIXES
from .hdf5 import check_storage as hdf5_check_storage
from .hdf5 import check_written, open_hdf5
from .npy import open_npy
from .source import SAMPLES_IN, MatrixSource
from .sparse import COMPRESSED_AXES, find_sparse_group, open_npz, open_sparse_container, parse_sparse_names
from .text import open_text, text_suffix
from .zarr_store import MARKERS as ZARR_MARKERS
from .zarr_store import check_chunks, is_zarr_dir, open_zarr, refuse_pickle

__all__ = ["OPENERS", "SUPPORTED", "detect_format", "open_matrix", "opened"]

#: The reader of each format.
OPENERS = {"hdf5": open_hdf5, "zarr": open_zarr, "npy": open_npy, "text": open_text}
#: What the readers accept, for messages.
SUPPORTED = (".h5, .hdf5, .npy, .npz (SciPy sparse), .csv, .tsv, .txt (optionally .gz) or a Zarr directory; "
             "HDF5 and Zarr may hold a sparse matrix as data, indices, indptr and shape")


def detect_format(path: pathlib.Path) -> str:
    """Format name from the path (extension, or Zarr markers for a directory)."""
    if path.is_dir():
        if is_zarr_dir(path):
            return "zarr"
        raise InputError(f"{path}: is a directory but not a Zarr store (no {', '.join(ZARR_MARKERS)}); "
                         f"pass a file: {SUPPORTED}")
    suffix = path.suffix.lower()
    if suffix in HDF5_SUFFIXES:
        return "hdf5"
    if suffix == ".npy":
        return "npy"
    if suffix == ".npz":
        return "npz"
    if text_suffix(path) is not None:
        return "text"
    raise InputError(f"{path.name}: unknown file type {suffix or '(no extension)'!r}; supported: {SUPPORTED}")


def open_matrix(path: str | os.PathLike[str], *, dataset: str | None = None,
                sample_ids: str | None = None, feature_ids: str | None = None,
                samples_in: str = "rows", allow_external_data: bool = False,
                allow_missing_chunks: bool = False,
                scratch: str | os.PathLike[str] | None = None,
                sparse_names: str | None = None, compressed_axis: str = "auto") -> MatrixSource:
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
    allow_external_data : bool, default=False
        HDF5: accept datasets whose values are kept in other files (external links,
        external raw storage, virtual datasets). Refused by default, since such a file can
        make a run read any file the user can read.
    allow_missing_chunks : bool, default=False
        Zarr and HDF5: accept arrays with chunks that were never written, read as the fill
        value (their number is logged). By default a missing chunk is damage and an error.
    scratch : path, optional
        Text: folder of the anonymous scratch file the parsed values are streamed to
        (8 bytes per cell; default: the temporary folder).
    sparse_names : str, optional
        Sparse input in HDF5 or Zarr: names of the values, indices and pointer arrays and
        of the shape (attribute or dataset) in the group, comma-separated (default
        ``"data,indices,indptr,shape"``). A group holding the three arrays is read as a
        sparse matrix (see :mod:`axiscope.io.sparse`); ``dataset`` names the group.
    compressed_axis : {"auto", "rows", "columns"}, default="auto"
        Sparse input: whether ``indptr`` runs over the stored rows (CSR) or columns (CSC);
        ``auto`` reads the group's ``format`` attribute, else the length of ``indptr``.

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
        raise OptionError(f"samples_in={samples_in!r} is not valid; use one of: {', '.join(SAMPLES_IN)}")
    path = pathlib.Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file; check the path")
    kind = detect_format(path)
    names = parse_sparse_names(sparse_names)
    if compressed_axis not in COMPRESSED_AXES:
        raise OptionError(f"compressed_axis={compressed_axis!r} is not one of "
                          f"{', '.join(map(repr, COMPRESSED_AXES))}; choose one of them")
    if kind == "npz":
        return open_npz(path, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                        samples_in=samples_in, compressed_axis=compressed_axis)
    if kind in ("hdf5", "zarr"):
        sparse = _open_if_sparse(path, kind, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                                 samples_in=samples_in, names=names, compressed_axis=compressed_axis,
                                 allow_external_data=allow_external_data,
                                 allow_missing_chunks=allow_missing_chunks)
        if sparse is not None:
            if sparse.held_bytes == 0:  # read by ranges of samples, nothing held: another process can open it
                sparse.reopen = {"path": str(path.resolve()), "dataset": sparse.dataset,
                                 "sample_ids": _absolute(sample_ids), "feature_ids": _absolute(feature_ids),
                                 "samples_in": samples_in, "sparse_names": sparse_names,
                                 "compressed_axis": compressed_axis, "allow_external_data": bool(allow_external_data),
                                 "allow_missing_chunks": bool(allow_missing_chunks)}
            return sparse
    if kind in ("npy", "text") and dataset is not None:
        raise OptionError(f"{path.name}: dataset={dataset!r} only applies to HDF5 and Zarr input; leave it out")
    extra: dict[str, Any] = {}
    if kind == "hdf5":
        extra["allow_external_data"] = bool(allow_external_data)
        extra["allow_missing_chunks"] = bool(allow_missing_chunks)
    elif kind == "zarr":
        extra["allow_missing_chunks"] = bool(allow_missing_chunks)
    elif kind == "text":
        extra["scratch"] = scratch
    source = OPENERS[kind](path, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                           samples_in=samples_in, **extra)
    if kind in ("hdf5", "zarr", "npy"):  # how another process opens the same matrix (cluster workers)
        source.reopen = {"path": str(path.resolve()), "dataset": source.dataset,
                         "sample_ids": _absolute(sample_ids), "feature_ids": _absolute(feature_ids),
                         "samples_in": samples_in, **extra}
    return source


def _absolute(ids: str | None) -> str | None:
    """An id option that names a file, as an absolute path (another process may run elsewhere)."""
    if ids is not None and pathlib.Path(ids).is_file():
        return str(pathlib.Path(ids).resolve())
    return ids


def _open_if_sparse(path: pathlib.Path, kind: str, *, dataset: str | None, names, allow_external_data: bool,
                    allow_missing_chunks: bool, **options: Any):
    """The sparse matrix of an HDF5 file or Zarr store, or None when it holds a dense one."""
    handle = None
    try:
        if kind == "hdf5":
            import h5py

            handle = h5py.File(path, "r")
        else:
            import zarr

            refuse_pickle(path)
            handle = zarr.open(store=str(path), mode="r")
        with warnings.catch_warnings():  # the dense opener reports what Zarr warns about
            warnings.simplefilter("ignore")
            group = find_sparse_group(kind, handle, dataset, names, path.name)
    except (InputError, OptionError):
        if kind == "hdf5" and handle is not None:
            handle.close()
        raise
    except Exception:  # not readable here: the dense opener reports it in its own words
        if kind == "hdf5" and handle is not None:
            handle.close()
        return None
    if group is None:
        if kind == "hdf5":
            handle.close()
        return None

    def check_storage(obj: Any, name: str) -> dict[str, Any]:
        if kind == "hdf5":
            hdf5_check_storage(obj, path, name, allow_external_data)
            return check_written(obj, path, name, allow_missing_chunks)
        return check_chunks(path, name, obj, allow_missing_chunks)

    try:
        return open_sparse_container(path, kind, handle, group, **options, names=names,
                                     check_storage=check_storage)
    except BaseException:
        if kind == "hdf5":
            handle.close()
        raise


@contextlib.contextmanager
def opened(source: MatrixSource | str | os.PathLike[str], **options: Any) -> Iterator[MatrixSource]:
    """A source as given, or the matrix at a path opened with ``options`` and closed after."""
    if isinstance(source, MatrixSource):
        yield source
        return
    with open_matrix(source, **options) as src:
        yield src
