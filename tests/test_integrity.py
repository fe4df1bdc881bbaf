"""Input integrity: data from other files, missing chunks, precision of integer and float
input, values out of range, damaged or tricky text and ids (issue 10).

Each check names its outside reference: mostly the numpy array the test wrote to disk
(reads must reproduce it exactly), LAPACK through ``numpy.linalg`` for fits, and the
IEEE 754 limits as numpy reports them (``numpy.finfo``).
"""

from __future__ import annotations

import gzip
import pathlib

import h5py
import numpy as np
import pytest
import zarr
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.errors import InputError
from axiscope.io import open_matrix

runner = CliRunner()


def _invoke(*args) -> object:
    return runner.invoke(app, [str(a) for a in args])


def _read_all(source) -> np.ndarray:
    return source.read_samples(0, source.shape[0])


def _one_line_error(res, *fragments: str) -> str:
    """Exit code 2, one line on standard error holding every fragment, no traceback."""
    assert res.exit_code == 2, (res.exit_code, res.stderr, res.output)
    lines = [line for line in res.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, res.stderr
    assert "Traceback" not in res.stderr
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])
    return lines[0]


# --------------------------------------------------------------------- HDF5: other files


@pytest.fixture
def target(tmp_path) -> tuple[pathlib.Path, np.ndarray]:
    """``t.h5`` holding X = 40 × 12 Gaussian (the values a link must lead to)."""
    X = np.random.default_rng(7).standard_normal((40, 12))
    path = tmp_path / "t.h5"
    with h5py.File(path, "w") as handle:
        handle["X"] = X
    return path, X


@pytest.fixture
def linked(tmp_path, target) -> pathlib.Path:
    """``l.h5``: a large ``pad`` dataset of its own, and X as an external link to ``t.h5``."""
    path = tmp_path / "l.h5"
    with h5py.File(path, "w") as handle:
        handle["pad"] = np.full((500, 100), 3.0)
        handle["X"] = h5py.ExternalLink("t.h5", "/X")
    return path


def test_external_link_refused_by_default(linked):
    with pytest.raises(InputError, match=r"l\.h5: 'X' is an external link to '/X' in 't\.h5'.*"
                                         r"allow_external_data=True"):
        open_matrix(linked, dataset="X")


def test_external_link_allowed_reads_the_target(linked, target, monkeypatch):
    # Reference: the array written to t.h5. Before the fix the positioned-read fast path
    # took the dataset's offset inside t.h5 and read those bytes of l.h5 instead.
    monkeypatch.chdir(linked.parent)
    with open_matrix(linked, dataset="X", allow_external_data=True) as src:
        assert not src.plain_reads  # read through h5py, not by offsets into l.h5
        np.testing.assert_array_equal(_read_all(src), target[1])


def test_external_link_cli_one_line(linked, tmp_path):
    res = _invoke("fit", linked, "--dataset", "X", "--out", tmp_path / "out", "-k", "2", "--quiet")
    _one_line_error(res, "external link", "--allow-external-data")
    assert not (tmp_path / "out").exists()


def test_external_link_cli_allowed_fits_the_target(linked, target, tmp_path, monkeypatch):
    monkeypatch.chdir(linked.parent)
    out = tmp_path / "out"
    res = _invoke("fit", linked, "--dataset", "X", "--out", out, "-k", "2", "--quiet", "--method", "exact",
                  "--allow-external-data")
    assert res.exit_code == 0, res.stderr
    X = target[1]
    Z = (X - X.mean(axis=0)) / X.std(axis=0)  # standardized with the population SD
    s = np.linalg.svd(Z, compute_uv=False)  # reference: LAPACK on the target's values
    import pandas as pd

    comps = pd.read_csv(out / "components.tsv", sep="\t")
    np.testing.assert_allclose(comps.singular_value, s[:2], rtol=1e-7)  # the table has 8 digits


def test_external_raw_storage(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # HDF5 resolves a relative raw file name from the working directory
    values = np.arange(40 * 12, dtype="<f8").reshape(40, 12)
    values.tofile(tmp_path / "raw.bin")
    path = tmp_path / "e.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("X", shape=(40, 12), dtype="<f8", external=[("raw.bin", 0, h5py.h5f.UNLIMITED)])
    with pytest.raises(InputError, match=r"dataset '/X' keeps its values in external raw storage "
                                         r"\('raw\.bin'\).*allow_external_data=True"):
        open_matrix(path)
    with open_matrix(path, allow_external_data=True) as src:
        assert not src.plain_reads
        np.testing.assert_array_equal(_read_all(src), values)  # reference: the raw bytes written


def _virtual(tmp_path, source: pathlib.Path) -> pathlib.Path:
    layout = h5py.VirtualLayout(shape=(40, 12), dtype="f8")
    layout[:] = h5py.VirtualSource(source.name, "X", shape=(40, 12))
    path = tmp_path / "v.h5"
    with h5py.File(path, "w") as handle:
        handle.create_virtual_dataset("X", layout, fillvalue=0)
    return path


def test_virtual_dataset(tmp_path, target, monkeypatch):
    monkeypatch.chdir(tmp_path)
    path = _virtual(tmp_path, target[0])
    with pytest.raises(InputError, match=r"is a virtual dataset with sources in 't\.h5'.*allow_external_data"):
        open_matrix(path)
    with open_matrix(path, allow_external_data=True) as src:
        np.testing.assert_array_equal(_read_all(src), target[1])  # reference: array in t.h5


def test_virtual_dataset_missing_source_is_an_error(tmp_path, target, monkeypatch):
    monkeypatch.chdir(tmp_path)
    path = _virtual(tmp_path, target[0])
    target[0].unlink()
    # HDF5 itself would read the fill value (zeros) here
    with h5py.File(path, "r") as handle:
        assert not handle["X"][...].any()
    with pytest.raises(InputError, match=r"v\.h5: virtual dataset '/X' takes values from 't\.h5', which "
                                         r"does not exist"):
        open_matrix(path, allow_external_data=True)


def test_external_id_dataset_refused(tmp_path, target):
    path = tmp_path / "m.h5"
    with h5py.File(path, "w") as handle:
        handle["X"] = np.zeros((40, 12))
        handle["sample_ids"] = h5py.ExternalLink("t.h5", "/X")
    with pytest.raises(InputError, match=r"'sample_ids' is an external link"):
        open_matrix(path, dataset="X")


# --------------------------------------------------------------------- Zarr: missing chunks


def _zarr_store(tmp_path, zarr_format: int, X: np.ndarray, chunks=(4, 4)) -> pathlib.Path:
    path = tmp_path / f"m{zarr_format}.zarr"
    group = zarr.open_group(str(path), mode="w", zarr_format=zarr_format)
    array = group.create_array("X", shape=X.shape, chunks=chunks, dtype=X.dtype)
    array[...] = X
    return path


CHUNK_KEY = {2: "1.1", 3: "c/1/1"}  # the chunk of rows 4-7, columns 4-7 in each format's key encoding


@pytest.mark.parametrize("zarr_format", [2, 3])
@pytest.mark.parametrize("damage", ["deleted", "folder"])
def test_missing_zarr_chunk_is_an_error(tmp_path, zarr_format, damage):
    X = np.random.default_rng(1).standard_normal((10, 6)) + 5.0
    path = _zarr_store(tmp_path, zarr_format, X)
    chunk = path / "X" / CHUNK_KEY[zarr_format]
    chunk.unlink()
    if damage == "folder":
        chunk.mkdir()
    # Zarr itself reads the absent chunk as the fill value (zeros): the silent wrong answer
    np.testing.assert_array_equal(zarr.open(str(path), mode="r")["X"][4:8, 4:6], 0.0)
    kind = "missing" if damage == "deleted" else "a folder, not a file"
    with pytest.raises(InputError, match=rf"chunk '{CHUNK_KEY[zarr_format]}' of array '/X' is {kind} "
                                         r"\(1 of 6 chunks is absent\).*allow_missing_chunks=True"):
        open_matrix(path)


@pytest.mark.parametrize("zarr_format", [2, 3])
def test_missing_chunks_allowed_are_counted(tmp_path, zarr_format, caplog):
    X = np.random.default_rng(1).standard_normal((10, 6)) + 5.0
    path = _zarr_store(tmp_path, zarr_format, X)
    (path / "X" / CHUNK_KEY[zarr_format]).unlink()
    with open_matrix(path, allow_missing_chunks=True) as src:
        assert src.notes == {"missing_chunks": 1, "chunks": 6, "fill_value": 0.0}
        expected = X.copy()
        expected[4:8, 4:6] = 0.0  # reference: the written array with the deleted chunk at the fill value
        np.testing.assert_array_equal(_read_all(src), expected)
    assert "1 of 6 chunks of array /X is absent" in caplog.text


def test_missing_chunk_cli(tmp_path):
    X = np.random.default_rng(1).standard_normal((10, 6)) + 5.0
    path = _zarr_store(tmp_path, 3, X)
    (path / "X" / "c" / "0" / "0").unlink()
    res = _invoke("fit", path, "--out", tmp_path / "out", "-k", "2", "--quiet")
    _one_line_error(res, "chunk 'c/0/0'", "--allow-missing-chunks")
    res = _invoke("fit", path, "--out", tmp_path / "out", "-k", "2", "--quiet", "--allow-missing-chunks")
    assert res.exit_code == 0, res.stderr
    assert "1 of 6 chunks of array /X is absent" in res.stderr


def test_sharded_zarr_checks_shards(tmp_path):
    X = np.random.default_rng(2).standard_normal((10, 6))
    path = tmp_path / "s.zarr"
    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    group.create_array("X", shape=X.shape, chunks=(2, 2), shards=(4, 4), dtype=X.dtype)[...] = X
    with open_matrix(path) as src:  # every shard present: nothing to say
        np.testing.assert_array_equal(_read_all(src), X)
    (path / "X" / "c" / "2" / "1").unlink()
    with pytest.raises(InputError, match=r"chunk 'c/2/1' of array '/X' is missing"):
        open_matrix(path)


# --------------------------------------------------------------------- Zarr: pickle codec


class _Planted:
    """Unpickling this creates a file: proof that something was unpickled."""

    def __init__(self, marker: pathlib.Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (pathlib.Path.touch, (self.marker,))


@pytest.mark.parametrize("dtype", ["|O", "<f8"])
def test_pickle_codec_refused_and_nothing_unpickled(tmp_path, dtype):
    import json
    import pickle

    path = tmp_path / "p.zarr"
    (path / "X").mkdir(parents=True)
    (path / ".zgroup").write_text(json.dumps({"zarr_format": 2}))
    (path / "X" / ".zarray").write_text(json.dumps({
        "zarr_format": 2, "shape": [4, 3], "chunks": [4, 3], "dtype": dtype, "order": "C",
        "fill_value": None, "filters": [{"id": "pickle", "protocol": 5}], "compressor": None}))
    marker = tmp_path / "unpickled"
    (path / "X" / "0.0").write_bytes(pickle.dumps(_Planted(marker)))
    with pytest.raises(InputError, match=r"p\.zarr: array 'X' uses the pickle codec \(\.zarray\); refused.*"
                                         r"nothing was unpickled"):
        open_matrix(path)
    res = _invoke("fit", path, "--out", tmp_path / "out", "-k", "2", "--quiet")
    _one_line_error(res, "pickle codec")
    assert not marker.exists()


# --------------------------------------------------------------------- precision of integers


def _aligned(actual: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """``actual`` with each column's sign matched to ``reference`` (signs of axes are arbitrary)."""
    signs = np.sign(np.sum(actual * reference, axis=0))
    return actual * signs


def _planted_counts(offset: float, seed: int = 3) -> np.ndarray:
    """Integers ``offset + 300·(rank-3 signal + noise)``: SD ≈ 300 around a large offset."""
    rng = np.random.default_rng(seed)
    signal = rng.standard_normal((120, 3)) @ rng.standard_normal((3, 30)) + 0.3 * rng.standard_normal((120, 30))
    return np.round(offset + 300.0 * signal).astype(np.int64)


@pytest.mark.parametrize("offset", [1e9, 2.0**40])
@pytest.mark.parametrize("method", ["exact", "randomized"])
def test_large_integers_are_computed_in_float64(tmp_path, offset, method):
    from axiscope import fit
    from axiscope.core.options import EngineSettings

    X = _planted_counts(offset)
    path = tmp_path / "counts.h5"
    with h5py.File(path, "w") as handle:
        handle["X"] = X
    with open_matrix(path) as src:
        assert src.dtype == np.float64
        assert "float64" in src.notes["computed_in"] and "2**24" in src.notes["computed_in"]
        result = fit(src, n_components=3, engine=EngineSettings(method=method))
    # reference: the exact integers standardized in float64 and LAPACK's SVD (numpy.linalg.svd)
    A = X.astype(np.float64)
    Z = (A - A.mean(axis=0)) / A.std(axis=0)
    U, s, _ = np.linalg.svd(Z, full_matrices=False)
    assert result.preprocessing.kept.shape[0] == 30  # float32 called every feature constant at 2**40
    np.testing.assert_allclose(result.model.singular_values, s[:3], rtol=1e-6)
    reference = U[:, :3] * s[:3]
    np.testing.assert_allclose(_aligned(result.scores, reference), reference, rtol=0, atol=1e-6 * s[0])


# --------------------------------------------------------------------- the constant rule


def test_constant_rule_follows_the_input_precision():
    from axiscope import fit
    from axiscope.core.options import EngineSettings
    from axiscope.core.preprocess import PreprocessSpec
    from axiscope.io import array_source

    rng = np.random.default_rng(5)
    X = 0.01 * rng.standard_normal((200, 6))  # features of variance ≈ 1e-4
    X[:, 0] = 1e6 + 0.05 * rng.standard_normal(200)  # mean 1e6, SD 0.05: far above float64's resolution
    X[:, 1] = 1e-12 + 1e-13 * rng.standard_normal(200)  # tiny units, 10% spread: not constant either
    result = fit(array_source(X), n_components=2, preprocess=PreprocessSpec(scale="none"),
                 engine=EngineSettings(method="exact"))
    assert result.preprocessing.kept.tolist() == list(range(6))
    # reference: covariance PCA of the same float64 values by LAPACK (numpy.linalg.svd)
    s = np.linalg.svd(X - X.mean(axis=0), compute_uv=False)
    ratio = s**2 / np.sum(s**2)
    np.testing.assert_allclose(result.components_table().variance_ratio[:2], ratio[:2], rtol=1e-9)


def test_constant_rule_in_float32_and_the_rules_named():
    from axiscope import fit
    from axiscope.core.preprocess import PreprocessSpec
    from axiscope.io import array_source

    rng = np.random.default_rng(6)
    X = rng.standard_normal((100, 8)).astype(np.float32)
    # one feature jittering by a single float32 step (0.0625 at 1e6): constant in float32
    X[:, 0] = np.float32(1e6) + np.float32(0.0625) * rng.integers(0, 2, 100)
    X[:, 1] = 2.5  # exactly constant
    X[:, 2] *= 1e-3  # lowest variance of the rest: below min_variance
    result = fit(array_source(X), n_components=2,
                 preprocess=PreprocessSpec(min_variance=1e-4, top_variable=4))
    prep = result.preprocessing
    assert prep.reason.tolist()[:3] == ["constant", "constant", "min_variance"]
    assert sorted(prep.reason.tolist()).count("top_variable") == 1  # 5 left, the top 4 kept
    rules = prep.rules
    assert set(rules) == {"constant", "min_variance", "top_variable"}
    # float32's machine epsilon, 2**-23 (IEEE 754 single precision, as numpy.finfo reports it)
    assert f"{2.0**-23:.3g}" in rules["constant"] and "float32" in rules["constant"]
    assert "min_variance=0.0001" in rules["min_variance"] and "top_variable=4" in rules["top_variable"]


# --------------------------------------------------------------------- genotype dosages


def test_allele_frequency_refuses_values_that_are_not_dosages():
    from axiscope import fit
    from axiscope.core.preprocess import PreprocessSpec
    from axiscope.io import array_source

    G = np.random.default_rng(8).integers(0, 3, size=(50, 10)).astype(np.float64)
    G[7, 3] = 267.0
    # the line names the sample and feature holding the first such value
    with pytest.raises(InputError, match=r"sample 'sample_000008', feature 'feature_000004' holds 267, "
                                         r"but scale='allele-frequency' reads genotype dosages 0, 1 or 2"):
        fit(array_source(G), n_components=2, preprocess=PreprocessSpec(scale="allele-frequency"))
    G[7, 3] = 0.5
    with pytest.raises(InputError, match=r"holds 0\.5, "):
        fit(array_source(G), n_components=2, preprocess=PreprocessSpec(scale="allele-frequency"))


def test_allele_frequency_accepts_missing_when_allowed():
    from axiscope import fit
    from axiscope.core.preprocess import PreprocessSpec
    from axiscope.io import array_source

    G = np.random.default_rng(8).integers(0, 3, size=(50, 10)).astype(np.float64)
    G[7, 3] = np.nan
    result = fit(array_source(G), n_components=2,
                 preprocess=PreprocessSpec(scale="allele-frequency", missing="mean"))
    assert result.manifest["n_missing_imputed"] == 1
    with pytest.raises(InputError, match=r"NaN or infinite"):
        fit(array_source(G), n_components=2, preprocess=PreprocessSpec(scale="allele-frequency"))


def test_allele_frequency_cli_one_line(tmp_path):
    G = np.random.default_rng(8).integers(0, 3, size=(50, 10)).astype(np.float64)
    G[7, 3] = 3.0
    path = tmp_path / "g.npy"
    np.save(path, G)
    res = _invoke("fit", path, "--out", tmp_path / "out", "-k", "2", "--quiet", "--scale", "allele-frequency")
    _one_line_error(res, "genotype dosages", "holds 3, ", "--scale unit")


# --------------------------------------------------------------------- values out of range


def test_value_limit_formula():
    from axiscope.io.source import value_limit

    # sqrt(max / (16·n·p)), max from numpy.finfo (IEEE 754: 1.797e308 for double, 3.403e38 for single)
    assert value_limit(np.dtype(np.float64), (100, 10)) == pytest.approx(np.sqrt(1.7976931348623157e308 / 16e3))
    assert value_limit(np.dtype(np.float32), (100, 10)) == pytest.approx(np.sqrt(3.4028234663852886e38 / 16e3))


@pytest.mark.parametrize("dtype,value", [(np.float64, 1e200), (np.float32, 1e19)])
def test_fit_refuses_a_value_whose_square_overflows(tmp_path, dtype, value):
    X = np.random.default_rng(0).standard_normal((60, 8)).astype(dtype)
    X[3, 2] = value
    path = tmp_path / "big.npy"
    np.save(path, X)
    res = _invoke("fit", path, "--out", tmp_path / "out", "-k", "2", "--quiet")
    _one_line_error(res, "big.npy: sample 'sample_000004', feature 'feature_000003' is", "a 60 × 8 matrix can hold "
                    "values up to", "rescale the input")
    assert not (tmp_path / "out").exists()


@pytest.fixture
def trained(tmp_path):
    """A 2-axis fit of 60 Gaussian samples × 8 features, written to a result folder."""
    from axiscope import fit
    from axiscope.io import array_source

    X = np.random.default_rng(0).standard_normal((60, 8))
    fit(array_source(X), n_components=2).write(tmp_path / "fit")
    return tmp_path / "fit"


def _dense_scores(model_dir: pathlib.Path, Y: np.ndarray) -> np.ndarray:
    """Scores by the documented formula ((y − mean) / scale)·V, in float64 by numpy."""
    from axiscope.model.store import load_model

    model = load_model(model_dir / "model")
    return ((Y.astype(np.float64) - model.mean) / model.scale) @ model.components


def test_score_flags_samples_whose_squares_overflow(trained, tmp_path, caplog):
    from axiscope.scoring.score import score
    from axiscope.io import array_source

    Y = np.random.default_rng(1).standard_normal((10, 8))
    Y[4, 1] = 1e200
    result = score(trained, array_source(Y))
    d = result.diagnostics
    assert d["flag"][4] == "both" and np.isinf(d["q"][4]) and np.isinf(d["t2"][4])
    assert np.isfinite(d["q"].drop(index=4)).all() and np.isfinite(d["t2"].drop(index=4)).all()
    assert "1 sample holds values so large" in caplog.text
    # the other samples are placed as without the large one (reference: the formula in numpy)
    others = np.delete(np.arange(10), 4)
    expected = _dense_scores(trained, Y[others])
    np.testing.assert_allclose(result.scores[["PC1", "PC2"]].to_numpy()[others], expected, rtol=1e-10, atol=1e-12)
    res = _invoke("score", trained, _saved(tmp_path, Y), "--out", tmp_path / "scored", "--quiet")
    assert res.exit_code == 0, res.stderr
    assert "Traceback" not in res.stderr


def _saved(tmp_path, Y) -> pathlib.Path:
    path = tmp_path / "new.npy"
    np.save(path, Y)
    return path


def test_score_places_large_float32_values_in_float64(trained):
    from axiscope.scoring.score import score
    from axiscope.io import array_source

    Y = np.random.default_rng(2).standard_normal((10, 8)).astype(np.float32)
    Y[6, 0] = 1e30  # its square, 1e60, overflows float32 (largest 3.4e38, numpy.finfo)
    result = score(trained, array_source(Y))
    expected = _dense_scores(trained, Y)  # reference: the formula in float64 by numpy
    # float32 rounding of the other rows: a few units of 2**-23 times the scores (about 1)
    np.testing.assert_allclose(result.scores[["PC1", "PC2"]].to_numpy(), expected, rtol=1e-5, atol=1e-6)
    assert np.isfinite(result.diagnostics["q"][6]) and result.diagnostics["flag"][6] != "within"


# --------------------------------------------------------------------- text: damage and tricky cells


def _text_matrix(n: int = 3000, p: int = 5, seed: int = 0) -> tuple[str, np.ndarray]:
    """CSV text of an n × p matrix written with 6 decimals, and the values it holds."""
    X = np.round(np.random.default_rng(seed).standard_normal((n, p)), 6)
    lines = ["id," + ",".join(f"g{j}" for j in range(p))]
    lines += [f"s{i}," + ",".join(f"{v:.6f}" for v in row) for i, row in enumerate(X)]
    return "\n".join(lines) + "\n", X


def test_gzip_with_damaged_body(tmp_path):
    text, _ = _text_matrix()
    raw = bytearray(gzip.compress(text.encode()))
    raw[200:260] = bytes(b ^ 0xFF for b in raw[200:260])  # header intact, deflate stream damaged
    path = tmp_path / "damaged.csv.gz"
    path.write_bytes(bytes(raw))
    with pytest.raises(InputError, match=r"damaged\.csv\.gz: the compressed data are damaged \(zlib: .*\); "
                                         r"re-create or re-copy the file"):
        open_matrix(path)
    truncated = tmp_path / "truncated.csv.gz"
    truncated.write_bytes(gzip.compress(text.encode())[: len(raw) // 2])
    res = _invoke("fit", truncated, "--out", tmp_path / "out", "-k", "2", "--quiet")
    _one_line_error(res, "truncated.csv.gz: the compressed data are damaged (EOFError")


@pytest.mark.parametrize("cell", ["1_000", "\u0661\u0662\u0663", "\uff11", "0x10", "1\x00", "1,5"])
def test_cells_that_are_not_ascii_decimal_numbers(tmp_path, cell):
    # Python's float() reads the first three (1000, 123, 1): refused here, by the stated rule
    path = tmp_path / "x.tsv"
    path.write_text(f"id\ta\tb\ns1\t1\t2\ns2\t{cell}\t4\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"x\.tsv: line 3, column 'a': .* is not a number; fix the cell"):
        open_matrix(path)


def test_numbers_and_missing_words_accepted(tmp_path):
    path = tmp_path / "x.csv"
    path.write_text("id,a,b,c,d\ns1, 1 ,-2.5,.5,3e-7\ns2,+4.,1E+3,NA,\ns3,inf,-Infinity,n/a,NULL\n",
                    encoding="utf-8")
    with open_matrix(path) as src:
        # reference: the values typed above, by the module's stated rules
        expected = [[1, -2.5, 0.5, 3e-7], [4, 1e3, np.nan, np.nan], [np.inf, -np.inf, np.nan, np.nan]]
        np.testing.assert_array_equal(_read_all(src), np.array(expected))


def test_text_not_utf8(tmp_path):
    path = tmp_path / "latin.csv"
    path.write_bytes("id,a,b\ns\xe9,1,2\nt,3,4\n".encode("latin-1"))
    res = _invoke("fit", path, "--out", tmp_path / "out", "-k", "1", "--quiet")
    _one_line_error(res, "latin.csv: not UTF-8 text", "save the file as UTF-8")


def test_byte_order_marks_are_dropped(tmp_path):
    path = tmp_path / "bom.csv"
    path.write_text("id,a,b\ns1,1,2\ns2,3,4\n", encoding="utf-8-sig")
    assert path.read_bytes()[:3] == b"\xef\xbb\xbf"  # the UTF-8 byte-order mark (Unicode standard, ch. 23.8)
    with open_matrix(path) as src:
        assert src.feature_ids.tolist() == ["a", "b"]
        np.testing.assert_array_equal(_read_all(src), [[1, 2], [3, 4]])
    gz = tmp_path / "bom.tsv.gz"
    gz.write_bytes(gzip.compress("\ufeffid\ta\tb\ns1\t1\t2\ns2\t3\t4\n".encode()))
    with open_matrix(gz) as src:
        assert src.sample_ids.tolist() == ["s1", "s2"]
    ids = tmp_path / "ids.txt"
    ids.write_text("first\nsecond\n", encoding="utf-8-sig")
    npy = tmp_path / "m.npy"
    np.save(npy, np.eye(2))
    with open_matrix(npy, sample_ids=str(ids)) as src:
        assert src.sample_ids.tolist() == ["first", "second"]


def test_nul_inside_an_id_refused(tmp_path):
    path = tmp_path / "nul.csv"
    path.write_text("id,a,b\ns\x001,1,2\ns2,3,4\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"nul\.csv: sample id 1 \('s\\x001', first column of nul\.csv\) holds "
                                         r"a NUL character; remove it from the sample ids"):
        open_matrix(path)
    ids = tmp_path / "ids.txt"
    ids.write_bytes(b"a\nb\x00c\nd\n")
    npy = tmp_path / "m.npy"
    np.save(npy, np.eye(3))
    with pytest.raises(InputError, match=r"feature id 2 .* holds a NUL character"):
        open_matrix(npy, feature_ids=str(ids))


def test_ids_not_utf8(tmp_path):
    h5 = tmp_path / "latin.h5"
    with h5py.File(h5, "w") as handle:
        handle["X"] = np.eye(3)
        handle["sample_ids"] = np.array([b"a", "\xe9t\xe9".encode("latin-1"), b"c"], dtype="S4")
    res = _invoke("fit", h5, "--out", tmp_path / "out", "-k", "1", "--quiet")
    _one_line_error(res, "latin.h5 (id dataset 'sample_ids'): id 2 (b'\\xe9t\\xe9') is not UTF-8 text")
    ids = tmp_path / "ids.txt"
    ids.write_bytes("a\n\xe9\nc\n".encode("latin-1"))
    npy = tmp_path / "m.npy"
    np.save(npy, np.eye(3))
    with pytest.raises(InputError, match=r"ids\.txt: not UTF-8 text"):
        open_matrix(npy, sample_ids=str(ids))


# --------------------------------------------------------------------- text: streamed, bounded memory


@pytest.mark.parametrize("samples_in", ["rows", "columns"])
def test_text_streams_through_an_anonymous_scratch_file(tmp_path, samples_in):
    text, X = _text_matrix(1500, 7)
    path = tmp_path / "m.csv"
    path.write_text(text, encoding="utf-8")
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    expected = X if samples_in == "rows" else X.T  # reference: the values written as text
    with open_matrix(path, samples_in=samples_in, scratch=scratch) as src:
        assert src.shape == expected.shape and src.dtype == np.float64
        assert not list(scratch.iterdir())  # the scratch file has no name on disk
        for step in (1, 7, 500):
            parts = [src.read_samples(a, min(a + step, src.shape[0])) for a in range(0, src.shape[0], step)]
            np.testing.assert_array_equal(np.concatenate(parts), expected)
    assert not list(scratch.iterdir())


def test_text_memory_is_bounded_by_blocks_not_the_file(tmp_path):
    import tracemalloc

    from axiscope.io.text import BLOCK_CELLS

    n, p = 2_000, 500  # 1,000,000 cells: 8 MB as float64, about 9 MB of text
    rng = np.random.default_rng(3)
    path = tmp_path / "big.csv"
    with open(path, "w", encoding="utf-8") as handle:
        handle.write("id," + ",".join(f"g{j}" for j in range(p)) + "\n")
        for i, row in enumerate(rng.standard_normal((n, p))):
            handle.write(f"s{i}," + ",".join(f"{v:.5f}" for v in row) + "\n")
    tracemalloc.start()
    try:
        with open_matrix(path) as src:
            for a in range(0, n, 100):
                src.read_samples(a, min(a + 100, n))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    float_bytes = n * p * 8
    # two blocks of BLOCK_CELLS cells as Python strings (at most 72 bytes each: a str object and
    # its list slot) or float64, a read block of 100 samples, and the 2,000 ids (about 120 bytes each).
    # Parsed whole, the text would take at least float_bytes.
    bound = 2 * BLOCK_CELLS * 72 + 100 * p * 8 + n * 120
    assert peak < bound < float_bytes, (peak, bound, float_bytes)


# --------------------------------------------------------------------- HDF5: storage never written


def test_hdf5_chunks_never_written(tmp_path, caplog):
    path = tmp_path / "partial.h5"
    with h5py.File(path, "w") as handle:
        dataset = handle.create_dataset("X", shape=(10, 6), chunks=(4, 4), dtype="f8")
        dataset[0:4, :] = 1.0
        dataset[8:10, :] = 2.0  # rows 4-7 never written: 2 of 6 chunks absent
        handle.create_dataset("C", shape=(10, 6), dtype="f8")  # contiguous, never written
    with pytest.raises(InputError, match=r"partial\.h5: the chunk at \(4, 0\) of dataset '/X' was never written "
                                         r"\(2 of 6 chunks are absent\); it would be read as the fill value 0\.0"):
        open_matrix(path, dataset="X")
    with pytest.raises(InputError, match=r"dataset '/C' was never written \(no storage is allocated\)"):
        open_matrix(path, dataset="C")
    with open_matrix(path, dataset="X", allow_missing_chunks=True) as src:
        assert src.notes == {"missing_chunks": 2, "chunks": 6, "fill_value": 0.0}
        expected = np.zeros((10, 6))  # reference: what was written, the fill value elsewhere
        expected[0:4], expected[8:10] = 1.0, 2.0
        np.testing.assert_array_equal(_read_all(src), expected)
    assert "2 of 6 chunks of dataset /X are absent" in caplog.text


def test_the_manifest_says_why_integers_are_computed_in_float64_and_why_features_were_dropped():
    """The record of the run carries the precision rule and the rule behind each drop."""
    from axiscope import fit
    from axiscope.io import array_source

    X = np.random.default_rng(4).integers(10**9, 10**9 + 300, size=(40, 6)).astype(np.int64)
    X[:, 2] = 7  # a constant feature
    manifest = fit(array_source(X), n_components=2).manifest
    assert manifest["input"]["stored_dtype"] == "int64"
    assert manifest["input"]["computed_in"].startswith("float64")
    assert manifest["features_dropped"] == {"constant": 1}
    assert "eps" in manifest["features_dropped_rules"]["constant"]
