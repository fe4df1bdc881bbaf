"""Property-based tests (Hypothesis): the readers give back what was written, and a saved
model loads back identical.

Readers: a random matrix (shape, dtype float32/float64/int16/int32/int64, on-disk chunking,
orientation) with random unique ids (any Unicode, separators and quotes included) is
written with the format's own library (numpy, h5py, zarr, Python's csv module), opened
with :func:`axiscope.io.open_matrix`, and every block read back must equal the array
(reference: the array itself, cast to the reader's documented dtype: float64 for 64-bit
floats and for text, float32 for float32, float32 or float64 for integers). Integers are
drawn below 2²⁴ in magnitude, where float32 is exact; larger integers are the subject of
issue 10, case 4 (tests/bad_inputs).

Model: a random valid model (orthonormal components from numpy's QR, positive
non-increasing singular values, random preprocessing settings and extras) saved and
loaded gives identical arrays, dtypes, settings and scalars.
"""

from __future__ import annotations

import csv
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from axiscope import PreprocessSpec
from axiscope.io import open_matrix
from axiscope.model.store import Model, load_model

FAST = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])

DTYPES = ("float32", "float64", "int16", "int32", "int64")

#: Id characters: any Unicode letter, digit, punctuation or symbol, plus the separators of
#: the text formats and spaces inside an id. Not NUL, line breaks or surrounding spaces
#: (the readers strip those; issue 10 decides NUL separately).
_ID_CHARS = st.one_of(
    st.characters(categories=("L", "N", "P", "S"), exclude_characters="\x00"),
    st.sampled_from([",", ";", "\t", '"', "'", " ", "|", "é", "ß", "字", "🧬"]),
)
_ID = st.text(_ID_CHARS, min_size=1, max_size=8).map(str.strip).filter(bool)


def ids(n: int):
    return st.lists(_ID, min_size=n, max_size=n, unique=True)


@st.composite
def matrices(draw, *, min_side: int = 2, max_rows: int = 30, max_cols: int = 12):
    """A samples × features matrix of a random dtype, with unique sample and feature ids."""
    n = draw(st.integers(min_side, max_rows))
    p = draw(st.integers(min_side, max_cols))
    dtype = draw(st.sampled_from(DTYPES))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    if dtype.startswith("float"):
        X = (rng.standard_normal((n, p)) * 10.0 ** rng.integers(-3, 6)).astype(dtype)
    else:
        high = min(np.iinfo(dtype).max, 2**24 - 1)
        X = rng.integers(-high, high, size=(n, p), endpoint=True).astype(dtype)
    return X, draw(ids(n)), draw(ids(p))


def allowed_dtypes(X: np.ndarray, fmt: str) -> set:
    """The reader's documented logical dtypes: float64 for 64-bit floats and text, float32 for
    float32; integers are decoded to float32 or, when float32 cannot hold every value of
    their type, float64 (both exact for the values drawn here)."""
    if fmt == "text" or X.dtype == np.float64:
        return {np.dtype(np.float64)}
    if X.dtype == np.float32:
        return {np.dtype(np.float32)}
    return {np.dtype(np.float32), np.dtype(np.float64)}


def check_reads(path: Path, X: np.ndarray, want_samples, want_features, fmt: str, data, **options) -> None:
    with open_matrix(path, **options) as src:
        assert src.shape == X.shape
        assert src.dtype in allowed_dtypes(X, fmt)
        want = X.astype(src.dtype)
        assert np.array_equal(want.astype(np.float64), X.astype(np.float64))  # the cast is exact
        got = src.read_samples(0, X.shape[0])
        assert got.dtype == src.dtype
        np.testing.assert_array_equal(got, want)
        start = data.draw(st.integers(0, X.shape[0]), label="start")
        stop = data.draw(st.integers(start, X.shape[0]), label="stop")
        np.testing.assert_array_equal(src.read_samples(start, stop), want[start:stop])
        assert list(src.sample_ids) == list(want_samples)
        assert list(src.feature_ids) == list(want_features)


def _chunks(data, shape):
    return (data.draw(st.integers(1, shape[0]), label="chunk rows"),
            data.draw(st.integers(1, shape[1]), label="chunk columns"))


@FAST
@given(matrices(), st.sampled_from(["rows", "columns"]), st.data())
def test_npy_reads_back_what_was_written(m, samples_in, data):
    X, s_ids, f_ids = m
    stored = X if samples_in == "rows" else np.ascontiguousarray(X.T)
    if data.draw(st.booleans(), label="fortran order"):
        stored = np.asfortranarray(stored)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "m.npy"
        np.save(path, stored)
        for name, values in (("s.txt", s_ids), ("f.txt", f_ids)):
            (Path(tmp) / name).write_text("\n".join(values) + "\n", encoding="utf-8")
        check_reads(path, X, s_ids, f_ids, "npy", data, samples_in=samples_in,
                    sample_ids=str(Path(tmp) / "s.txt"), feature_ids=str(Path(tmp) / "f.txt"))


@FAST
@given(matrices(), st.sampled_from(["rows", "columns"]), st.data())
def test_hdf5_reads_back_what_was_written(m, samples_in, data):
    import h5py

    X, s_ids, f_ids = m
    stored = X if samples_in == "rows" else np.ascontiguousarray(X.T)
    chunks = _chunks(data, stored.shape) if data.draw(st.booleans(), label="chunked") else None
    compression = "gzip" if chunks and data.draw(st.booleans(), label="gzip") else None
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "m.h5"
        with h5py.File(path, "w") as handle:
            handle.create_dataset("X", data=stored, chunks=chunks, compression=compression)
            text = h5py.string_dtype("utf-8")
            handle.create_dataset("sample_ids", data=np.array(s_ids, dtype=object), dtype=text)
            handle.create_dataset("feature_ids", data=np.array(f_ids, dtype=object), dtype=text)
        check_reads(path, X, s_ids, f_ids, "hdf5", data, samples_in=samples_in)


@FAST
@given(matrices(), st.sampled_from(["rows", "columns"]), st.sampled_from([2, 3]), st.data())
def test_zarr_reads_back_what_was_written(m, samples_in, zarr_format, data):
    import zarr

    X, s_ids, f_ids = m
    stored = X if samples_in == "rows" else np.ascontiguousarray(X.T)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "m.zarr"
        with warnings.catch_warnings():  # zarr notes that text arrays have no v3 specification yet
            warnings.simplefilter("ignore")
            group = zarr.open_group(str(path), mode="w", zarr_format=zarr_format)
            array = group.create_array("X", shape=stored.shape, chunks=_chunks(data, stored.shape),
                                       dtype=stored.dtype)
            array[...] = stored
            for name, values in (("sample_ids", s_ids), ("feature_ids", f_ids)):
                values = np.array(values, dtype=str)
                group.create_array(name, shape=values.shape, dtype=values.dtype)[...] = values
        check_reads(path, X, s_ids, f_ids, "zarr", data, samples_in=samples_in)


@FAST
@given(matrices(), st.sampled_from(["rows", "columns"]), st.sampled_from([".tsv", ".csv", ".tsv.gz"]),
       st.data())
def test_text_reads_back_what_was_written(m, samples_in, suffix, data):
    import gzip

    X, s_ids, f_ids = m
    stored = X if samples_in == "rows" else X.T
    row_ids, col_ids = (s_ids, f_ids) if samples_in == "rows" else (f_ids, s_ids)
    cell = (lambda v: repr(float(v))) if X.dtype.kind == "f" else (lambda v: str(int(v)))
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / f"m{suffix}"
        opener = gzip.open if suffix.endswith(".gz") else open
        with opener(path, "wt", encoding="utf-8", newline="") as handle:
            # reference writer: Python's csv module, which quotes ids holding the delimiter
            writer = csv.writer(handle, delimiter="," if suffix == ".csv" else "\t")
            writer.writerow(["id", *col_ids])
            for rid, row in zip(row_ids, stored):
                writer.writerow([rid, *(cell(v) for v in row)])
        check_reads(path, X, s_ids, f_ids, "text", data, samples_in=samples_in)


# ------------------------------------------------------------------------- model round trip


@st.composite
def models(draw):
    p = draw(st.integers(2, 40))
    k = draw(st.integers(1, min(p, 6)))
    n = draw(st.integers(max(k, 2), 500))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    V, _ = np.linalg.qr(rng.standard_normal((p, k)))  # orthonormal columns (LAPACK QR)
    s = np.sort(rng.uniform(0.1, 10.0, k))[::-1] * np.sqrt(n)
    std = rng.uniform(0.1, 3.0, p)
    counts_per = draw(st.one_of(st.none(), st.floats(1.0, 1e9)))
    spec = PreprocessSpec(
        center=draw(st.booleans()),
        scale=draw(st.sampled_from(["unit", "none", "allele-frequency"])),
        log_transform=draw(st.booleans()),
        counts_per=counts_per,
        min_variance=draw(st.one_of(st.none(), st.floats(0.0, 1e3))),
        top_variable=draw(st.one_of(st.none(), st.integers(2, 10**6))),
        missing=draw(st.sampled_from(["error", "mean"])),
    )
    extras = {
        "residual_moments": np.array([rng.uniform(0, 5), rng.uniform(0, 5), rng.normal()]),
        "shrinkage_factor": rng.uniform(0.01, 1.0, k),
        "input_feature_ids": np.array(draw(ids(p)), dtype=str),
    }
    return Model(
        spec=spec,
        feature_ids=np.array(draw(ids(p)), dtype=str),
        mean=rng.normal(size=p) * 100,
        scale=std if spec.scale == "unit" else np.ones(p),
        std=std,
        components=V,
        singular_values=s,
        n_samples=n,
        total_inertia=float(np.sum(s**2) / n * draw(st.floats(1.0, 10.0))),
        n_input_features=p + draw(st.integers(0, 100)),
        extras=extras,
        info={"method": draw(st.sampled_from(["exact", "randomized"])), "note": draw(_ID)},
    )


@FAST
@given(models())
def test_model_round_trip_is_identical(model):
    with tempfile.TemporaryDirectory() as tmp:
        model.save(Path(tmp) / "model")
        loaded = load_model(Path(tmp) / "model")
    assert loaded.spec == model.spec
    for name in ("feature_ids", "mean", "scale", "std", "components", "singular_values"):
        got, want = getattr(loaded, name), getattr(model, name)
        assert got.dtype == want.dtype, name
        np.testing.assert_array_equal(got, want)
    assert (loaded.n_samples, loaded.total_inertia, loaded.n_input_features) == (
        model.n_samples, model.total_inertia, model.n_input_features)
    assert sorted(loaded.extras) == sorted(model.extras)
    for name, value in model.extras.items():
        np.testing.assert_array_equal(loaded.extras[name], value)
    assert loaded.info == model.info


@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_components_rounded_to_their_dtype_are_accepted_and_tampered_ones_refused(dtype, tmp_path):
    # The orthonormality tolerance (model/store.py) accepts LAPACK's orthonormal basis
    # (numpy QR) rounded to the stored dtype, and refuses a change of 10 × the tolerance.
    from axiscope.errors import ModelError
    from axiscope.model.store import orthonormality_tolerance

    rng = np.random.default_rng(0)
    p, k = 2000, 5
    V, _ = np.linalg.qr(rng.standard_normal((p, k)))
    s = np.array([50.0, 40.0, 30.0, 20.0, 10.0])
    base = dict(spec=PreprocessSpec(), feature_ids=np.array([f"f{j}" for j in range(p)]),
                mean=np.zeros(p), scale=np.ones(p), std=np.ones(p), singular_values=s, n_samples=100,
                total_inertia=float(p), n_input_features=p)
    Model(components=V.astype(dtype), **base).save(tmp_path / "ok")
    assert load_model(tmp_path / "ok").components.dtype == np.dtype(dtype)
    tol = orthonormality_tolerance(np.dtype(dtype), p)
    bent = V.copy()
    bent[:, 0] *= 1 + 5 * tol  # |v0|² − 1 ≈ 10 × tol
    Model(components=bent.astype(dtype), **base).save(tmp_path / "bent")
    with pytest.raises(ModelError, match="not orthonormal"):
        load_model(tmp_path / "bent")
