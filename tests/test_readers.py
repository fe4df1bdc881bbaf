"""Tests of the readers of :mod:`axiscope.io` (one module per format).

Unless stated otherwise the reference for every data check is the numpy array written
to disk by the test itself; reads must reproduce it exactly.
"""

from __future__ import annotations

import gzip
import os
import pathlib
import threading

import h5py
import numpy as np
import pytest
import zarr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from axiscope.errors import InputError, OptionError
from axiscope.io import SAMPLES_IN, MatrixSource, describe_source, open_matrix

# ------------------------------------------------------------------------------ helpers


def logical_matrix(n_samples: int, n_features: int, dtype: str = "float32", seed: int = 0) -> np.ndarray:
    """A reproducible logical (samples x features) matrix with distinct values."""
    rng = np.random.default_rng(seed)
    if np.dtype(dtype).kind in "iu":
        return rng.integers(-1000, 1000, size=(n_samples, n_features)).astype(dtype)
    return rng.standard_normal((n_samples, n_features)).astype(dtype)


def file_layout(matrix: np.ndarray, samples_in: str) -> np.ndarray:
    """The matrix as stored in the file for the given orientation."""
    return matrix if samples_in == "rows" else np.ascontiguousarray(matrix.T)


def read_all(source: MatrixSource, block: int) -> np.ndarray:
    """Concatenate ``read_samples`` over blocks of ``block`` samples, checking each block."""
    parts = []
    for start in range(0, source.shape[0], block):
        stop = min(start + block, source.shape[0])
        part = source.read_samples(start, stop)
        assert part.shape == (stop - start, source.shape[1])
        assert part.dtype == source.dtype
        # the caller's own: C-ordered, writeable, and sharing no memory with another read's block
        # (rows of a decoded chunk band may be handed out as a view of it: io/chunk_bands.py)
        assert part.flags.c_contiguous and part.flags.writeable
        assert not any(np.shares_memory(part, other) for other in parts)
        parts.append(part)
    whole = np.concatenate(parts, axis=0)
    if parts:  # changing one block in place changes no other, nor a later read
        parts[0] += 1
        again = source.read_samples(0, parts[0].shape[0])
        np.testing.assert_array_equal(again, whole[: parts[0].shape[0]])
    return whole


def assert_round_trip(source: MatrixSource, expected: np.ndarray) -> None:
    """Several block splittings must all reproduce the written array exactly."""
    assert source.shape == expected.shape
    for block in (1, 3, 7, expected.shape[0]):
        np.testing.assert_array_equal(read_all(source, block), expected)  # reference: array written


def write_hdf5(path: pathlib.Path, stored: np.ndarray, chunks: tuple[int, int] | None = None,
               name: str = "X", **extra: np.ndarray) -> pathlib.Path:
    with h5py.File(path, "w") as handle:
        handle.create_dataset(name, data=stored, chunks=chunks)
        for key, value in extra.items():
            handle.create_dataset(key, data=value)
    return path


def write_zarr(path: pathlib.Path, stored: np.ndarray, zarr_format: int, chunks: tuple[int, int],
               name: str = "X", **extra: np.ndarray) -> pathlib.Path:
    group = zarr.open_group(str(path), mode="w", zarr_format=zarr_format)
    array = group.create_array(name, shape=stored.shape, chunks=chunks, dtype=stored.dtype)
    array[...] = stored
    for key, value in extra.items():
        ids = group.create_array(key, shape=value.shape, dtype=str)
        ids[...] = value
    return path


def write_text(path: pathlib.Path, stored: np.ndarray, row_ids: list[str], col_ids: list[str],
               delimiter: str) -> pathlib.Path:
    lines = [delimiter.join(["id", *col_ids])]
    lines += [delimiter.join([rid, *(repr(float(v)) for v in row)]) for rid, row in zip(row_ids, stored)]
    text = "\n".join(lines) + "\n"
    if path.suffix == ".gz":
        with gzip.open(path, "wt", encoding="utf-8") as handle:
            handle.write(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def id_list(prefix: str, n: int) -> np.ndarray:
    return np.array([f"{prefix}{i}" for i in range(n)])


# ------------------------------------------------------------------------- round trips


@pytest.mark.parametrize("samples_in", SAMPLES_IN)
@pytest.mark.parametrize("chunks", [None, (4, 3)])
def test_hdf5_round_trip(tmp_path: pathlib.Path, samples_in: str, chunks: tuple[int, int] | None) -> None:
    expected = logical_matrix(11, 6)
    path = write_hdf5(tmp_path / "m.h5", file_layout(expected, samples_in), chunks=chunks)
    with open_matrix(path, samples_in=samples_in) as source:
        assert source.format == "hdf5" and source.dataset == "/X"
        assert source.dtype == np.float32
        assert source.disk_chunks == chunks
        assert source.sample_chunk == (None if chunks is None else chunks[0 if samples_in == "rows" else 1])
        assert source.nbytes == 11 * 6 * 4
        assert source.file_size == path.stat().st_size
        assert_round_trip(source, expected)
        assert source.sample_ids[0] == "sample_000001" and source.feature_ids[-1] == "feature_000006"
        assert source.ids_source == {"samples": "generated", "features": "generated"}


@pytest.mark.parametrize("zarr_format", [2, 3])
@pytest.mark.parametrize("samples_in", SAMPLES_IN)
def test_zarr_round_trip(tmp_path: pathlib.Path, zarr_format: int, samples_in: str) -> None:
    expected = logical_matrix(10, 7, "float64")
    stored = file_layout(expected, samples_in)
    path = write_zarr(tmp_path / "m.zarr", stored, zarr_format, chunks=(3, 4),
                      sample_ids=id_list("s", 10), feature_ids=id_list("f", 7))
    with open_matrix(path, samples_in=samples_in) as source:
        assert source.format == "zarr" and source.dataset == "/X"
        assert source.dtype == np.float64
        assert source.disk_chunks == (3, 4)
        assert source.sample_chunk == (3 if samples_in == "rows" else 4)
        assert_round_trip(source, expected)
        assert list(source.sample_ids) == list(id_list("s", 10))
        assert list(source.feature_ids) == list(id_list("f", 7))
        assert source.ids_source["samples"] == "dataset 'sample_ids'"
        assert source.file_size > 0


@pytest.mark.parametrize("zarr_format", [2, 3])
def test_zarr_single_array_store(tmp_path: pathlib.Path, zarr_format: int) -> None:
    expected = logical_matrix(5, 4)
    array = zarr.create_array(str(tmp_path / "a.zarr"), shape=expected.shape, chunks=(2, 4),
                              dtype=expected.dtype, zarr_format=zarr_format)
    array[...] = expected
    with open_matrix(tmp_path / "a.zarr") as source:
        assert source.dataset is None
        assert_round_trip(source, expected)


@pytest.mark.parametrize("samples_in", SAMPLES_IN)
@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("dtype", ["float32", "float64", "int16", ">f8"])
def test_npy_round_trip(tmp_path: pathlib.Path, samples_in: str, order: str, dtype: str) -> None:
    expected = logical_matrix(9, 5, dtype)
    stored = np.asarray(file_layout(expected, samples_in), order=order)
    path = tmp_path / "m.npy"
    np.save(path, stored)
    with open_matrix(path, samples_in=samples_in) as source:
        assert source.format == "npy"
        assert source.dtype == (np.float64 if np.dtype(dtype).itemsize == 8 else np.float32)
        assert source.stored_dtype == np.dtype(dtype)
        assert source.disk_chunks is None and source.sample_chunk is None
        assert_round_trip(source, expected.astype(source.dtype))


@pytest.mark.parametrize("samples_in", SAMPLES_IN)
@pytest.mark.parametrize("name,delimiter", [("m.csv", ","), ("m.tsv.gz", "\t"), ("m.txt", "\t")])
def test_text_round_trip(tmp_path: pathlib.Path, samples_in: str, name: str, delimiter: str) -> None:
    expected = logical_matrix(8, 5, "float64")
    rows, cols = (id_list("s", 8), id_list("g", 5))
    if samples_in == "columns":
        rows, cols = cols, rows
    path = write_text(tmp_path / name, file_layout(expected, samples_in), list(rows), list(cols), delimiter)
    with open_matrix(path, samples_in=samples_in) as source:
        assert source.format == "text" and source.dtype == np.float64
        assert_round_trip(source, expected)  # repr() of a float64 round-trips exactly
        assert list(source.sample_ids) == list(id_list("s", 8))
        assert list(source.feature_ids) == list(id_list("g", 5))


def test_text_missing_values_are_nan(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "m.tsv"
    path.write_text("id\ta\tb\tc\nr1\t1\t\tNA\nr2\tNaN\t2.5\t3\n", encoding="utf-8")
    with open_matrix(path) as source:
        block = source.read_samples(0, 2)
    expected = np.array([[1, np.nan, np.nan], [np.nan, 2.5, 3]])  # reference: values typed above
    np.testing.assert_array_equal(block, expected)


@pytest.mark.parametrize("stored,expected", [("float32", np.float32), ("float64", np.float64),
                                             ("int16", np.float32), ("float16", np.float32),
                                             ("bool", np.float32), ("uint16", np.float32),
                                             ("int32", np.float64), ("uint32", np.float64),
                                             ("int64", np.float64), ("uint64", np.float64)])
def test_dtype_rules(tmp_path: pathlib.Path, stored: str, expected: type) -> None:
    data = np.abs(logical_matrix(4, 3, "int16")).astype(stored)
    with open_matrix(write_hdf5(tmp_path / "m.h5", data)) as source:
        assert source.dtype == expected
        np.testing.assert_array_equal(source.read_samples(0, 4), data.astype(expected))


# ---------------------------------------------------------------------------------- ids


def test_hdf5_ids_from_datasets_and_files(tmp_path: pathlib.Path) -> None:
    data = logical_matrix(4, 3)
    samples = np.array([b"a", b"b", b"c", b"d"])  # bytes: must be decoded
    features = np.array(["x", "y", "z"], dtype=h5py.string_dtype())  # variable-length strings
    path = write_hdf5(tmp_path / "m.h5", data, names=samples, genes=features)
    id_file = tmp_path / "ids.txt"
    id_file.write_text("g1\ng2\ng3\n", encoding="utf-8")
    with open_matrix(path, sample_ids="names", feature_ids="genes") as source:
        assert list(source.sample_ids) == ["a", "b", "c", "d"]
        assert list(source.feature_ids) == ["x", "y", "z"]
        assert source.ids_source == {"samples": "dataset 'names'", "features": "dataset 'genes'"}
    with open_matrix(path, feature_ids=str(id_file)) as source:
        assert list(source.feature_ids) == ["g1", "g2", "g3"]
        assert source.ids_source["features"] == f"file {id_file}"
        assert source.ids_source["samples"] == "generated"


def test_default_id_datasets_next_to_matrix(tmp_path: pathlib.Path) -> None:
    data = logical_matrix(3, 4)
    path = tmp_path / "m.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("grp/X", data=data)
        handle.create_dataset("grp/sample_ids", data=np.array([b"p", b"q", b"r"]))
    with open_matrix(path) as source:
        assert source.dataset == "/grp/X"
        assert list(source.sample_ids) == ["p", "q", "r"]


def test_columns_orientation_ids(tmp_path: pathlib.Path) -> None:
    expected = logical_matrix(5, 3)
    path = write_hdf5(tmp_path / "m.h5", expected.T.copy(),
                      sample_ids=np.array([f"s{i}".encode() for i in range(5)]))
    with open_matrix(path, samples_in="columns") as source:
        assert source.shape == (5, 3)
        assert source.sample_ids[4] == "s4"


def test_generated_ids_widen(tmp_path: pathlib.Path) -> None:
    data = np.zeros((2, 1_000_001), dtype=np.float32)
    np.save(tmp_path / "wide.npy", data)
    with open_matrix(tmp_path / "wide.npy") as source:
        assert source.feature_ids[0] == "feature_0000001"
        assert source.feature_ids[-1] == "feature_1000001"


def test_describe_source(tmp_path: pathlib.Path) -> None:
    path = write_hdf5(tmp_path / "m.h5", logical_matrix(6, 4, "int16"), chunks=(2, 4))
    with open_matrix(path) as source:
        info = describe_source(source)
    assert info["format"] == "hdf5" and info["dataset"] == "/X"
    assert info["shape"] == [6, 4] and info["dtype"] == "float32" and info["stored_dtype"] == "int16"
    assert info["disk_chunks"] == [2, 4] and info["sample_chunk"] == 2
    assert info["nbytes"] == 6 * 4 * 4
    assert info["first_sample_ids"] == [f"sample_00000{i}" for i in range(1, 6)]


def test_concurrent_reads(tmp_path: pathlib.Path) -> None:
    expected = logical_matrix(64, 9)
    path = write_hdf5(tmp_path / "m.h5", expected, chunks=(8, 9))
    with open_matrix(path) as source:
        results: dict[int, np.ndarray] = {}

        def work(start: int) -> None:
            results[start] = source.read_samples(start, start + 8)

        threads = [threading.Thread(target=work, args=(s,)) for s in range(0, 64, 8)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
    np.testing.assert_array_equal(np.concatenate([results[s] for s in sorted(results)]), expected)


# ------------------------------------------------------------------------------- errors


def test_several_datasets_error(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "m.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("a", data=np.zeros((3, 3)))
        handle.create_dataset("g/b", data=np.zeros((3, 3)))
    with pytest.raises(InputError, match=r"m\.h5: several 2-D datasets \(/a, /g/b\); choose one with dataset=\.\.\.$"):
        open_matrix(path)
    with open_matrix(path, dataset="g/b") as source:
        assert source.dataset == "/g/b"


def test_several_zarr_arrays_error(tmp_path: pathlib.Path) -> None:
    path = write_zarr(tmp_path / "m.zarr", np.zeros((3, 3)), 3, (3, 3))
    zarr.open_group(str(path), mode="a").create_array("Y", shape=(3, 3), dtype="f4")
    with pytest.raises(InputError, match=r"several 2-D datasets \(/X, /Y\)"):
        open_matrix(path)


def test_no_2d_dataset_error(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "m.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("v", data=np.zeros(5))
    with pytest.raises(InputError, match="no 2-D numeric dataset"):
        open_matrix(path)


def test_non_numeric_dataset_error(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "m.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("S", data=np.array([[b"a", b"b"], [b"c", b"d"]]))
    with pytest.raises(InputError, match="dataset '/S' is not numeric"):
        open_matrix(path, dataset="/S")


def test_unknown_extension(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "m.xlsx"
    path.write_bytes(b"x")
    with pytest.raises(InputError, match=r"m\.xlsx: unknown file type.*supported: \.h5"):
        open_matrix(path)


def test_missing_file(tmp_path: pathlib.Path) -> None:
    with pytest.raises(InputError, match=r"x\.h5: no such file"):
        open_matrix(tmp_path / "x.h5")


def test_plain_directory_error(tmp_path: pathlib.Path) -> None:
    with pytest.raises(InputError, match="is a directory but not a Zarr store"):
        open_matrix(tmp_path)


def test_bad_samples_in() -> None:
    with pytest.raises(OptionError, match=r"^samples_in='diagonal' is not valid; use one of: rows, columns$"):
        open_matrix("whatever.h5", samples_in="diagonal")


def test_non_numeric_text_cell(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "x.tsv"
    rows = ["id\tg00011\tg00012"] + [f"s{i}\t1\t2" for i in range(3)] + ["s3\t1\tabc"]
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"^x\.tsv: line 5, column 'g00012': 'abc' is not a number; "
                                          r"fix the cell \(plain ASCII decimal digits, no '_' separators; "
                                          r"empty or NA if missing\) or remove the row$"):
        open_matrix(path)


def test_ragged_text_row(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "x.csv"
    path.write_text("id,a,b\ns1,1,2\ns2,1\ns3,4,5\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"x\.csv: line 3 has 2 fields, expected 3"):
        open_matrix(path)


def test_duplicate_ids(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "x.csv"
    path.write_text("id,a,b\ns1,1,2\ns2,1,3\ns1,4,5\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"1 duplicated sample id \(first column of x\.csv\), e\.g\. 's1'; make the sample ids unique"):
        open_matrix(path)
    h5 = write_hdf5(tmp_path / "m.h5", np.zeros((3, 2)), feature_ids=np.array([b"f", b"f"]))
    with pytest.raises(InputError, match=r"1 duplicated feature id \(dataset 'feature_ids'\)"):
        open_matrix(h5)


def test_ids_length_mismatch(tmp_path: pathlib.Path) -> None:
    path = write_hdf5(tmp_path / "m.h5", np.zeros((3, 2)))
    id_file = tmp_path / "ids.txt"
    id_file.write_text("a\nb\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"2 sample ids \(file .*ids\.txt\) but the matrix has 3 samples; give sample_ids matching the samples"):
        open_matrix(path, sample_ids=str(id_file))


def test_unknown_ids_name(tmp_path: pathlib.Path) -> None:
    path = write_hdf5(tmp_path / "m.h5", np.zeros((3, 2)))
    with pytest.raises(InputError, match="neither a dataset in the file nor an existing file"):
        open_matrix(path, sample_ids="nope")


def test_fewer_than_two_samples(tmp_path: pathlib.Path) -> None:
    path = write_hdf5(tmp_path / "m.h5", np.zeros((1, 50)))
    with pytest.raises(InputError, match=r"1 sample x 50 features.*need at least 2.*check samples_in$"):
        open_matrix(path)
    np.save(tmp_path / "m.npy", np.zeros((50, 1)))
    with pytest.raises(InputError, match=r"50 samples x 1 feature \("):
        open_matrix(tmp_path / "m.npy")


def test_truncated_hdf5(tmp_path: pathlib.Path) -> None:
    path = write_hdf5(tmp_path / "m.h5", logical_matrix(200, 50))
    size = path.stat().st_size
    with open(path, "r+b") as handle:
        handle.truncate(size // 2)
    with pytest.raises(InputError, match=r"m\.h5: .*truncated or corrupted") as info:
        with open_matrix(path) as source:
            source.read_samples(0, 200)  # if opening succeeds, the read must fail cleanly
    assert "\n" not in str(info.value)


def test_truncated_npy(tmp_path: pathlib.Path) -> None:
    path = tmp_path / "m.npy"
    np.save(path, logical_matrix(20, 10))
    os.truncate(path, path.stat().st_size - 40)
    with pytest.raises(InputError, match="truncated"):
        open_matrix(path)


@pytest.mark.parametrize("zarr_format", [2, 3])
def test_corrupted_zarr_chunk(tmp_path: pathlib.Path, zarr_format: int) -> None:
    path = write_zarr(tmp_path / "m.zarr", logical_matrix(8, 4), zarr_format, chunks=(4, 4))
    chunk = path / "X" / ("1.0" if zarr_format == 2 else "c/1/0")
    assert chunk.is_file()
    chunk.write_bytes(b"\x00garbage bytes that are not a compressed chunk" * 3)
    with open_matrix(path) as source:
        np.testing.assert_array_equal(source.read_samples(0, 4), logical_matrix(8, 4)[:4])
        with pytest.raises(InputError, match=r"m\.zarr \(dataset /X\): reading samples 2:8 failed") as info:
            source.read_samples(2, 8)
    assert "\n" not in str(info.value)
    assert info.value.__cause__ is not None


def test_text_rejects_id_options(tmp_path: pathlib.Path) -> None:
    path = write_text(tmp_path / "m.csv", np.zeros((2, 2)), ["a", "b"], ["c", "d"], ",")
    with pytest.raises(OptionError):
        open_matrix(path, sample_ids="ids.txt")


def test_read_after_close_and_bad_range(tmp_path: pathlib.Path) -> None:
    path = write_hdf5(tmp_path / "m.h5", np.zeros((3, 2)))
    source = open_matrix(path)
    with pytest.raises(ValueError):
        source.read_samples(2, 4)
    assert source.read_samples(1, 1).shape == (0, 2)
    source.close()
    with pytest.raises(ValueError):
        source.read_samples(0, 1)


# --------------------------------------------------------------------------- hypothesis


@st.composite
def layouts(draw: st.DrawFn) -> tuple[int, int, tuple[int, int], str, int]:
    n_samples = draw(st.integers(2, 23))
    n_features = draw(st.integers(2, 13))
    samples_in = draw(st.sampled_from(SAMPLES_IN))
    rows, cols = (n_samples, n_features) if samples_in == "rows" else (n_features, n_samples)
    chunks = (draw(st.integers(1, rows)), draw(st.integers(1, cols)))
    block = draw(st.integers(1, n_samples))
    return n_samples, n_features, chunks, samples_in, block


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(layout=layouts(), backend=st.sampled_from(["hdf5", "zarr2", "zarr3"]), seed=st.integers(0, 2**16))
def test_hypothesis_round_trip(tmp_path: pathlib.Path, layout: tuple[int, int, tuple[int, int], str, int],
                               backend: str, seed: int) -> None:
    n_samples, n_features, chunks, samples_in, block = layout
    expected = logical_matrix(n_samples, n_features, "float64", seed)
    stored = file_layout(expected, samples_in)
    if backend == "hdf5":
        path = write_hdf5(tmp_path / f"h{seed}.h5", stored, chunks=chunks)
    else:
        path = write_zarr(tmp_path / f"z{seed}_{backend}.zarr", stored, int(backend[-1]), chunks=chunks)
    with open_matrix(path, samples_in=samples_in) as source:
        assert source.disk_chunks == chunks
        np.testing.assert_array_equal(read_all(source, block), expected)  # reference: array written


def test_the_io_package_re_exports_the_reading_api() -> None:
    import axiscope.io as io
    from axiscope.io.formats import OPENERS

    assert set(io.__all__) == {"SAMPLES_IN", "MatrixSource", "array_source", "describe_source",
                               "open_matrix", "opened"}
    assert all(hasattr(io, name) for name in io.__all__)
    assert sorted(OPENERS) == ["hdf5", "npy", "text", "zarr"]  # one reader module per format


#: Ids as people write them: any printable text, with the delimiters, quotes and spaces inside
#: (not at either end, where the reader strips spaces), never a NUL or a line break.
_ID_TEXT = st.text(
    alphabet=st.characters(blacklist_categories=("Cs", "Cc"), whitelist_characters=",\t\"' ;|"),
    min_size=1, max_size=12,
).map(str.strip).filter(bool)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(n_rows=st.integers(2, 9), n_cols=st.integers(2, 7), suffix=st.sampled_from([".csv", ".tsv", ".csv.gz"]),
       samples_in=st.sampled_from(SAMPLES_IN), data=st.data(), seed=st.integers(0, 2**16))
def test_hypothesis_text_round_trip(tmp_path: pathlib.Path, n_rows: int, n_cols: int, suffix: str,
                                    samples_in: str, data: st.DataObject, seed: int) -> None:
    import csv
    import io

    row_ids = data.draw(st.lists(_ID_TEXT, min_size=n_rows, max_size=n_rows, unique=True))
    col_ids = data.draw(st.lists(_ID_TEXT, min_size=n_cols, max_size=n_cols, unique=True))
    stored = np.random.default_rng(seed).standard_normal((n_rows, n_cols)) * 10.0 ** np.random.default_rng(
        seed).integers(-30, 30, size=(n_rows, n_cols))
    buffer = io.StringIO()
    writer = csv.writer(buffer, delimiter="\t" if suffix == ".tsv" else ",", lineterminator="\n")
    writer.writerow(["id", *col_ids])
    writer.writerows([rid, *(repr(float(v)) for v in row)] for rid, row in zip(row_ids, stored))
    path = tmp_path / f"t{seed}{suffix}"
    if suffix.endswith(".gz"):
        path.write_bytes(gzip.compress(buffer.getvalue().encode("utf-8")))
    else:
        path.write_text(buffer.getvalue(), encoding="utf-8")
    expected = stored if samples_in == "rows" else stored.T
    with open_matrix(path, samples_in=samples_in) as source:
        # reference: the values and ids written with Python's csv module (shortest repr round-trips)
        samples, features = (row_ids, col_ids) if samples_in == "rows" else (col_ids, row_ids)
        assert source.sample_ids.tolist() == samples and source.feature_ids.tolist() == features
        np.testing.assert_array_equal(read_all(source, 3), expected)


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(dtype=st.sampled_from(["int8", "uint16", "int32", "uint32", "int64", "uint64", "float16", "float32",
                              "float64", ">f4", "<i8", "bool"]),
       chunked=st.booleans(), seed=st.integers(0, 2**16))
def test_hypothesis_dtypes(tmp_path: pathlib.Path, dtype: str, chunked: bool, seed: int) -> None:
    stored = np.dtype(dtype)
    rng = np.random.default_rng(seed)
    if stored.kind in "iu":
        info = np.iinfo(stored)
        data = rng.integers(info.min, info.max, size=(7, 5), dtype=stored, endpoint=True)
    elif stored.kind == "b":
        data = rng.integers(0, 2, size=(7, 5)).astype(bool)
    else:
        data = rng.standard_normal((7, 5)).astype(stored)
    path = write_hdf5(tmp_path / f"d{seed}.h5", data, chunks=(3, 2) if chunked else None)
    with open_matrix(path) as source:
        # 32- and 64-bit integers are computed in float64, which holds every integer up to 2**53
        # exactly (IEEE 754 double: 53-bit significand); the narrower types fit float32's 24 bits
        wide_int = stored.kind in "iu" and stored.itemsize >= 4
        assert source.dtype == (np.float64 if wide_int or stored == np.float64 else np.float32)
        np.testing.assert_array_equal(read_all(source, 2), data.astype(source.dtype))
