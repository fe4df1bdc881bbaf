"""Zarr inputs (formats 2 and 3): missing or damaged chunks and metadata, wrong shapes and types."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import Case, good_matrix

FIT = ["fit", "-k", "2", "-q", "--threads", "1"]


def _store(name: str, fmt: int, *, data=None, chunks=(10, 12), damage=None, dtype=None):
    """A builder: a store with array ``X`` (chunks of 10 rows), then ``damage(store_path)``."""

    def build(d: Path) -> list[str]:
        import warnings

        import zarr

        path = d / name
        values = good_matrix() if data is None else data
        with warnings.catch_warnings():  # zarr warns that text arrays have no v3 specification
            warnings.simplefilter("ignore")
            group = zarr.open_group(str(path), mode="w", zarr_format=fmt)
            array = group.create_array("X", shape=values.shape, chunks=chunks[: values.ndim],
                                       dtype=dtype or values.dtype)
            array[...] = values
        if damage is not None:
            damage(path)
        return [*FIT, str(path)]

    return build


def _chunk_files(path: Path) -> list[Path]:
    """The chunk files of array ``X`` (format 2: ``X/0.0``; format 3: ``X/c/0/0``)."""
    root = path / "X"
    return sorted(p for p in root.rglob("*") if p.is_file() and not p.name.startswith(".")
                  and p.name != "zarr.json")


def _delete_chunk(path: Path) -> None:
    _chunk_files(path)[1].unlink()


def _chunk_to_directory(path: Path) -> None:
    chunk = _chunk_files(path)[1]
    chunk.unlink()
    chunk.mkdir()


def _garble_chunk(path: Path) -> None:
    chunk = _chunk_files(path)[1]
    chunk.write_bytes(b"\x00garbage" * 20)


def _delete_metadata(path: Path) -> None:
    for name in (".zarray", "zarr.json"):
        target = path / "X" / name
        if target.exists():
            target.unlink()


def _garble_metadata(path: Path) -> None:
    for name in (".zarray", "zarr.json"):
        target = path / "X" / name
        if target.exists():
            target.write_text("{ not json")


def _pickle_codec(d: Path) -> list[str]:
    """A format-2 array of Python objects stored with the pickle codec (never unpickled)."""
    import json

    path = d / "pickled.zarr"
    (path / "X").mkdir(parents=True)
    (path / ".zgroup").write_text(json.dumps({"zarr_format": 2}))
    meta = {"zarr_format": 2, "shape": [4, 3], "chunks": [4, 3], "dtype": "|O", "compressor": None,
            "fill_value": 0, "order": "C", "filters": [{"id": "pickle", "protocol": 4}]}
    (path / "X" / ".zarray").write_text(json.dumps(meta))
    # the chunk is not a pickle at all: nothing may try to unpickle it
    (path / "X" / "0.0").write_bytes(b"not a pickle; must never be loaded")
    return [*FIT, str(path)]


def _not_a_store(d: Path) -> list[str]:
    path = d / "folder"
    path.mkdir()
    (path / "readme.txt").write_text("no zarr here\n")
    return [*FIT, str(path)]


CASES = [
    Case("zarr2_garbled_chunk", "zarr", _store("garbled2.zarr", 2, damage=_garble_chunk), 2, "garbled2.zarr"),
    Case("zarr3_garbled_chunk", "zarr", _store("garbled3.zarr", 3, damage=_garble_chunk), 2, "garbled3.zarr"),
    Case("zarr2_missing_array_metadata", "zarr", _store("nometa2.zarr", 2, damage=_delete_metadata), 2,
         "nometa2.zarr"),  # zarr's own warning joins the error line
    Case("zarr3_garbled_metadata", "zarr", _store("badmeta3.zarr", 3, damage=_garble_metadata), 2, "badmeta3.zarr"),  # was a JSONDecodeError traceback
    Case("zarr3_1d_array", "zarr", _store("oned.zarr", 3, data=np.arange(30.0)), 2, "oned.zarr"),
    Case("zarr3_3d_array", "zarr", _store("threed.zarr", 3, data=np.zeros((4, 5, 6)), chunks=(2, 5, 6)), 2,
         "threed.zarr"),
    Case("zarr3_string_array", "zarr", _store("strings.zarr", 3, data=np.array([["a", "b"]] * 10)), 2,
         "strings.zarr"),
    Case("zarr3_empty_matrix", "zarr", _store("empty.zarr", 3, data=np.zeros((0, 12))), 2, "empty.zarr"),
    Case("zarr_directory_not_a_store", "zarr", _not_a_store, 2, "folder"),
    Case("zarr2_missing_chunk", "zarr", _store("hole2.zarr", 2, damage=_delete_chunk), 2,
         "--allow-missing-chunks"),
    Case("zarr3_missing_chunk", "zarr", _store("hole3.zarr", 3, damage=_delete_chunk), 2,
         "--allow-missing-chunks"),
    Case("zarr3_chunk_is_directory", "zarr", _store("dirchunk.zarr", 3, damage=_chunk_to_directory), 2,
         "dirchunk.zarr"),
    Case("zarr2_pickle_codec", "zarr", _pickle_codec, 2, "pickle"),
]
