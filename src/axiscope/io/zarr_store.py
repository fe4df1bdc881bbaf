"""Zarr input (directory stores, format 2 and 3): a 2-D numeric array, possibly inside groups.

Chunks are decoded by Zarr itself; concurrent reads are safe. Ids come from 1-D arrays
beside the matrix (see :func:`axiscope.io.ids.container_ids`) or id files.

Two checks come before any chunk is decoded:

* a store whose metadata names a pickle codec is refused (decoding it would run code kept
  in the file); nothing is ever unpickled;
* every chunk of the matrix must exist as a file (one listing of the array's folder):
  Zarr reads a chunk that is absent as the fill value, so a deleted chunk would silently
  become a block of zeros. ``allow_missing_chunks`` accepts arrays written sparsely on
  purpose (Zarr leaves out chunks that hold only the fill value unless told otherwise),
  and the number of missing chunks is logged and kept in :attr:`MatrixSource.notes`.
"""

from __future__ import annotations

import itertools
import json
import logging
import math
import os
import pathlib
import warnings
from collections.abc import Iterator
from typing import Any

import numpy as np

from ..errors import InputError, OptionError, agree, counted, one_line, reason
from .chunk_bands import ChunkBands, chunk_bands
from .ids import container_ids, plain_ids
from .source import Backend, MatrixSource, build_source, is_numeric, orient_block, select_matrix, slab_key

__all__ = ["ZarrBackend", "is_zarr_dir", "open_zarr", "missing_chunks"]

logger = logging.getLogger(__name__)

#: Files that mark a directory as a Zarr store (format 3, format 2 array, format 2 group).
MARKERS = ("zarr.json", ".zarray", ".zgroup")


def is_zarr_dir(path: pathlib.Path) -> bool:
    """Whether a directory looks like a Zarr (format 2 or 3) store."""
    return any((path / marker).exists() for marker in MARKERS)


class ZarrBackend(Backend):
    """Zarr array (format 2 or 3); concurrent reads are safe."""

    def __init__(self, array: Any) -> None:
        self._array = array
        self.stored_dtype = np.dtype(array.dtype)
        self.file_shape = (int(array.shape[0]), int(array.shape[1]))
        chunks = array.chunks
        self.disk_chunks = (int(chunks[0]), int(chunks[1])) if chunks else None
        #: per orientation: the decoded bands of chunks shared by the blocks read from them
        self._bands: dict[str, ChunkBands] = {}

    def read(self, start: int, stop: int, samples_in: str, dtype: np.dtype) -> np.ndarray:
        def decode(a: int, b: int) -> np.ndarray:
            return np.asarray(self._array[slab_key(a, b, samples_in)])

        bands = chunk_bands(self, samples_in)
        block = decode(start, stop) if bands is None else bands.read(start, stop, decode)
        # a decoder's fresh result, or rows of a band served to this read alone (chunk_bands.py)
        return orient_block(block, samples_in, dtype, owned=True)


# ------------------------------------------------------------------ checks before decoding


def _metadata_files(root: pathlib.Path) -> Iterator[tuple[pathlib.Path, Any]]:
    """``(file, parsed JSON)`` of every metadata file of a store, without entering array folders."""
    folders = [root]
    while folders:
        folder = folders.pop()
        is_array = (folder / ".zarray").is_file()
        for marker in (".zarray", ".zgroup", ".zmetadata", "zarr.json"):
            file = folder / marker
            if not file.is_file():
                continue
            try:
                content = json.loads(file.read_text(encoding="utf-8"))
            except (OSError, UnicodeDecodeError, ValueError):
                continue  # zarr reports unreadable metadata itself
            if marker == "zarr.json" and isinstance(content, dict) and content.get("node_type") == "array":
                is_array = True
            yield file, content
        if not is_array:
            try:
                folders.extend(sorted(child for child in folder.iterdir() if child.is_dir()))
            except OSError:
                continue


def _names_pickle(value: Any) -> bool:
    """Whether a metadata document names a pickle codec anywhere (``id`` in format 2, ``name`` in 3)."""
    if isinstance(value, dict):
        for key, item in value.items():
            if key in ("id", "name", "object_codec_id") and isinstance(item, str) \
                    and item.lower().rsplit(".", 1)[-1] == "pickle":
                return True
            if _names_pickle(item):
                return True
    elif isinstance(value, list):
        return any(_names_pickle(item) for item in value)
    return False


def refuse_pickle(path: pathlib.Path) -> None:
    """Refuse a store whose metadata names a pickle codec, before Zarr opens anything."""
    for file, content in _metadata_files(path):
        if _names_pickle(content):
            where = file.parent.relative_to(path).as_posix()
            array = f"array {where!r}" if where != "." else "the store"
            raise InputError(f"{path.name}: {array} uses the pickle codec ({file.name}); refused, since decoding "
                             "it would run code kept in the file (nothing was unpickled). Store the matrix "
                             "as a numeric array without a pickle codec")


def missing_chunks(array: Any, folder: pathlib.Path) -> tuple[list[str], int]:
    """Keys of the stored chunks (shards, when sharded) of ``array`` that are not files in ``folder``.

    Returns the missing keys (in grid order) and the number of stored chunks expected.
    The folder is listed once.
    """
    metadata = array.metadata
    grid = getattr(metadata, "chunk_grid", None)
    stored_shape = tuple(grid.chunk_shape) if grid is not None else tuple(metadata.chunks)
    counts = [max(1, math.ceil(n / c)) for n, c in zip(array.shape, stored_shape)]
    present: set[str] = set()
    for directory, _dirs, files in os.walk(folder):
        relative = pathlib.Path(directory).relative_to(folder).as_posix()
        prefix = "" if relative == "." else relative + "/"
        present.update(prefix + name for name in files)
    missing = [key for key in (metadata.encode_chunk_key(coords)
                               for coords in itertools.product(*(range(c) for c in counts)))
               if key not in present]
    return missing, math.prod(counts)


def check_chunks(path: pathlib.Path, name: str, array: Any, allow_missing_chunks: bool) -> dict[str, Any]:
    """Stop at the first missing chunk of the matrix, or count them when they are allowed."""
    folder = path / array.path.strip("/") if array.path.strip("/") else path
    missing, total = missing_chunks(array, folder)
    if not missing:
        return {}
    n = len(missing)
    fill = array.fill_value
    fill = fill.item() if hasattr(fill, "item") else fill
    if not allow_missing_chunks:
        kind = "a folder, not a file" if (folder / missing[0]).is_dir() else "missing"
        raise InputError(
            f"{path.name}: chunk {missing[0]!r} of array {name!r} is {kind} ({n} of {counted(total, 'chunk')} "
            f"{agree(n, 'is', 'are')} absent); it would be read as the fill value {fill!r}. Restore the "
            "store, or pass allow_missing_chunks=True if the writer left out chunks holding only the fill "
            "value (zarr-python does unless write_empty_chunks=True)")
    logger.warning("%s: %d of %s of array %s %s absent and read as the fill value %r (allow_missing_chunks)",
                   path.name, n, counted(total, "chunk"), name, agree(n, "is", "are"), fill)
    return {"missing_chunks": n, "chunks": total, "fill_value": fill}


def _decoding_threads(zarr: Any) -> None:
    """One decoding thread per core, unless the caller configured Zarr otherwise."""
    if zarr.config.get("threading.max_workers", None) is None:
        # Zarr decodes chunks on a pool of its own, by default of cores + 4 threads; one per
        # core decodes faster here (measured 3.0 s → 2.1 s for 3.2 GB on 2 cores). Only a
        # default: a value the caller configured is kept.
        zarr.config.set({"threading.max_workers": os.cpu_count() or 1})


def open_zarr(path: pathlib.Path, *, dataset: str | None, sample_ids: str | None,
              feature_ids: str | None, samples_in: str, allow_missing_chunks: bool = False) -> MatrixSource:
    """Open a matrix stored in a Zarr (format 2 or 3) directory store.

    ``allow_missing_chunks`` reads chunks that are not in the store as the fill value
    (logged with their number); by default a missing chunk is an error.
    """
    import zarr

    _decoding_threads(zarr)
    refuse_pickle(path)
    try:
        root = zarr.open(store=str(path), mode="r")
    except Exception as exc:
        raise InputError(f"{path.name}: cannot open as a Zarr store ({reason(exc)}); "
                         "its metadata may be corrupted") from exc
    # Zarr warns (Python warnings) about objects it does not recognise while walking the
    # store; they become part of the one error line, or log lines when the store opens.
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            source = _open_matrix(zarr, root, path, dataset, sample_ids, feature_ids, samples_in,
                                  allow_missing_chunks)
        except (InputError, OptionError) as exc:
            if caught:
                exc.args = (f"{exc.args[0]} (Zarr: {one_line(str(caught[0].message))})",) + exc.args[1:]
            raise
        except Exception as exc:  # metadata Zarr cannot parse, found while walking the store
            raise InputError(f"{path.name}: cannot read the Zarr store ({reason(exc)}); "
                             "its metadata may be corrupted") from exc
    for warning in caught:
        logger.warning("%s: %s", path.name, one_line(str(warning.message)))
    return source


def _open_matrix(zarr: Any, root: Any, path: pathlib.Path, dataset: str | None, sample_ids: str | None,
                 feature_ids: str | None, samples_in: str, allow_missing_chunks: bool) -> MatrixSource:
    """The matrix of an opened store, checked, with its ids."""
    if isinstance(root, zarr.Array):
        if dataset not in (None, "", "/"):
            raise OptionError(f"{path.name}: the store is a single array, it has no dataset {dataset!r}; "
                              "leave out dataset=...")
        if root.ndim != 2 or not is_numeric(np.dtype(root.dtype)):
            raise InputError(f"{path.name}: the array has shape {tuple(root.shape)} and dtype {root.dtype}; "
                             "a 2-D numeric array is needed")
        notes = check_chunks(path, "/", root, allow_missing_chunks)
        source = build_source(path, "zarr", None, samples_in, ZarrBackend(root),
                              lambda given, default, argument: plain_ids(path, given, argument),
                              sample_ids, feature_ids)
        source.notes.update(notes)
        return source

    def lookup(name: str) -> Any:
        try:
            obj = root[name.strip("/")]
        except (KeyError, ValueError, FileNotFoundError):
            return None
        return obj if isinstance(obj, zarr.Array) else None

    candidates = sorted(
        "/" + name for name, obj in root.members(max_depth=None)
        if isinstance(obj, zarr.Array) and obj.ndim == 2 and is_numeric(np.dtype(obj.dtype))
    )
    name, obj = select_matrix(path, dataset, candidates, lookup)
    name = "/" + obj.path.strip("/")
    notes = check_chunks(path, name, obj, allow_missing_chunks)
    source = build_source(
        path, "zarr", name, samples_in, ZarrBackend(obj),
        lambda given, default, argument: container_ids(path, given, default, argument, name, lookup),
        sample_ids, feature_ids)
    source.notes.update(notes)
    return source
