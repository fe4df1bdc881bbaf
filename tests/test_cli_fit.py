"""``axiscope fit`` and ``axiscope inspect`` through typer's test runner.

Good input: the documented files and columns (issue 2, "Outputs"), checked against the
Python API and a dense numpy reference. Bad input: every case of the issue's "Bad input"
list, each asserting exit code 2, one line on standard error that names the file (or the
option) and says what to do, no traceback, and no output directory nor temporary
directory left beside it.
"""

from __future__ import annotations

import json

import h5py
import numpy as np
import pandas as pd
import pytest
import zarr
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.model.store import load_model

runner = CliRunner()


def _invoke(*args: str):
    return runner.invoke(app, [str(a) for a in args])


# --------------------------------------------------------------------------- good input


@pytest.fixture
def small_h5(write_matrix, planted):
    X = planted(80, 60, rank=4, seed=3).X
    s_ids = [f"donor{i:03d}" for i in range(80)]
    f_ids = [f"g{i:04d}" for i in range(60)]
    return write_matrix(X, "h5", chunks=(16, 60), sample_ids=s_ids, feature_ids=f_ids), X, s_ids, f_ids


def test_fit_writes_documented_outputs(small_h5, tmp_path, dense, orient):
    path, X, s_ids, f_ids = small_h5
    out = tmp_path / "results"
    res = _invoke("fit", path, "--out", out, "-k", "4", "--top", "5", "--quiet")
    assert res.exit_code == 0, res.stderr
    assert "Traceback" not in res.stderr
    for name in ("components.tsv", "sample_scores.tsv", "feature_loadings.tsv", "top_features.tsv",
                 "manifest.json"):
        assert (out / name).is_file(), name
    assert (out / "model").is_dir()
    assert not list(tmp_path.glob(".results.tmp-*"))

    comps = pd.read_csv(out / "components.tsv", sep="\t")
    assert list(comps.columns[:5]) == ["axis", "singular_value", "variance", "variance_ratio", "cumulative_ratio"]
    assert list(comps.axis) == ["PC1", "PC2", "PC3", "PC4"]
    ref = dense(X)  # reference: dense standardization (population SD) + LAPACK SVD
    np.testing.assert_allclose(comps.singular_value, ref.s[:4], rtol=1e-6)
    np.testing.assert_allclose(comps.variance, ref.s[:4] ** 2 / 80, rtol=1e-6)
    # 60 unit-variance features: the total variance is 60
    np.testing.assert_allclose(comps.variance_ratio, ref.s[:4] ** 2 / 80 / 60, rtol=1e-6)
    np.testing.assert_allclose(comps.cumulative_ratio, np.cumsum(ref.s[:4] ** 2) / 80 / 60, rtol=1e-6)

    V, S = orient(ref.components(4), ref.scores(4))
    scores = pd.read_csv(out / "sample_scores.tsv", sep="\t")
    assert list(scores.columns) == ["sample_id", "PC1", "PC2", "PC3", "PC4"]
    assert list(scores.sample_id) == s_ids
    np.testing.assert_allclose(scores[["PC1", "PC2", "PC3", "PC4"]].to_numpy(), S, atol=1e-5 * np.abs(S).max())

    loadings = pd.read_csv(out / "feature_loadings.tsv", sep="\t")
    assert list(loadings.columns) == ["feature_id", "PC1", "PC2", "PC3", "PC4"]
    assert list(loadings.feature_id) == f_ids
    np.testing.assert_allclose(loadings[["PC1", "PC2", "PC3", "PC4"]].to_numpy(), V, atol=1e-6)

    top = pd.read_csv(out / "top_features.tsv", sep="\t")
    assert list(top.columns[:5]) == ["axis", "side", "rank", "feature_id", "loading"]
    for j, axis in enumerate(["PC1", "PC2", "PC3", "PC4"]):
        pos = top[(top.axis == axis) & (top.side == "positive")].sort_values("rank")
        neg = top[(top.axis == axis) & (top.side == "negative")].sort_values("rank")
        # reference: numpy argsort of the LAPACK loadings
        assert list(pos.feature_id) == [f_ids[i] for i in np.argsort(-V[:, j])[:5]]
        assert list(neg.feature_id) == [f_ids[i] for i in np.argsort(V[:, j])[:5]]
        assert list(pos["rank"]) == [1, 2, 3, 4, 5]

    manifest = json.loads((out / "manifest.json").read_text())
    for key in ("axiscope_version", "input", "options", "passes", "accuracy", "versions", "command_line"):
        assert key in manifest, key
    assert manifest["input"]["shape"] == [80, 60]
    assert manifest["input"]["path"].endswith(path.name)
    assert manifest["options"]["seed"] == 0
    assert manifest["passes"]["count"] >= 1

    model = load_model(out / "model")
    np.testing.assert_allclose(model.components, V, atol=1e-6)
    assert list(model.feature_ids) == f_ids
    assert not any(p.suffix in (".pkl", ".pickle") for p in (out / "model").iterdir())


def test_fit_parquet_and_overwrite(small_h5, tmp_path):
    path = small_h5[0]
    out = tmp_path / "res"
    assert _invoke("fit", path, "--out", out, "-k", "3", "--format", "parquet", "-q").exit_code == 0
    for name in ("components", "sample_scores", "feature_loadings", "top_features"):
        tsv = pd.read_csv(out / f"{name}.tsv", sep="\t")
        pq = pd.read_parquet(out / f"{name}.parquet")  # reference: pandas/pyarrow reader
        assert list(pq.columns) == list(tsv.columns)
        num = tsv.select_dtypes("number").columns
        np.testing.assert_allclose(pq[num].to_numpy(), tsv[num].to_numpy(), rtol=1e-7)
    # an existing directory needs --overwrite, and is left untouched without it
    before = (out / "components.tsv").read_bytes()
    res = _invoke("fit", path, "--out", out, "-k", "2", "-q")
    assert res.exit_code == 2
    assert "--overwrite" in res.stderr and "Traceback" not in res.stderr
    assert (out / "components.tsv").read_bytes() == before
    res = _invoke("fit", path, "--out", out, "-k", "2", "-q", "--overwrite")
    assert res.exit_code == 0, res.stderr
    assert len(pd.read_csv(out / "components.tsv", sep="\t")) == 2
    assert not (out / "components.parquet").exists()  # replaced, not merged
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_fit_options_reach_the_fit(write_matrix, tmp_path, dense):
    """--samples-in columns, --scale none, --log, --counts-per, --top-variable, text input."""
    rng = np.random.default_rng(4)
    X = rng.poisson(rng.gamma(2.0, 10.0, size=(40, 30))).astype(float) + 1
    path = write_matrix(X, "tsv", samples_in="columns")
    out = tmp_path / "o"
    res = _invoke("fit", path, "--out", out, "-k", "3", "--samples-in", "columns", "--scale", "none",
                  "--log", "--counts-per", "1000", "-q")
    assert res.exit_code == 0, res.stderr
    comps = pd.read_csv(out / "components.tsv", sep="\t")
    ref = dense(X, scale="none", log_transform=True, counts_per=1000.0)  # reference: dense numpy + LAPACK
    np.testing.assert_allclose(comps.singular_value, ref.s[:3], rtol=1e-6)
    scores = pd.read_csv(out / "sample_scores.tsv", sep="\t")
    assert list(scores.sample_id) == [f"s{i:05d}" for i in range(40)]
    out2 = tmp_path / "o2"
    assert _invoke("fit", path, "--out", out2, "-k", "3", "--samples-in", "columns",
                   "--top-variable", "10", "-q").exit_code == 0
    assert len(pd.read_csv(out2 / "feature_loadings.tsv", sep="\t")) == 10


def test_inspect(small_h5):
    path = small_h5[0]
    res = _invoke("inspect", path)
    assert res.exit_code == 0, res.stderr
    assert "80 × 60" in res.stdout and "16, 60" in res.stdout and "donor000" in res.stdout
    res = _invoke("inspect", path, "--json", "--memory-limit", "1GB")
    info = json.loads(res.stdout)
    assert info["shape"] == [80, 60]
    assert info["disk_chunks"] == [16, 60]
    assert info["dtype"] == "float64"
    assert info["nbytes"] == 80 * 60 * 8
    assert info["first_sample_ids"][0] == "donor000"
    assert info["fit_plan"]["memory_limit"] == 10**9
    res = _invoke("inspect", path.with_name("absent.h5"))
    assert res.exit_code == 2 and "absent.h5" in res.stderr and "Traceback" not in res.stderr


# ---------------------------------------------------------------------------- bad input


def _make_h5(path, **datasets):
    with h5py.File(path, "w") as handle:
        for name, value in datasets.items():
            handle.create_dataset(name, data=value)
    return path


def _make_zarr(path, **arrays):
    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    for name, value in arrays.items():
        value = np.asarray(value)
        array = group.create_array(name, shape=value.shape, dtype=value.dtype if value.dtype.kind != "U" else str,
                                   chunks=value.shape if value.ndim else None)
        array[...] = value
    return path


def _text(path, text):
    path.write_text(text, encoding="utf-8")
    return path


M = np.arange(1.0, 31.0).reshape(6, 5) ** 1.5  # a small numeric matrix, not constant


def _case_missing(d):
    return [d / "absent.h5"], "absent.h5"


def _case_unknown_extension(d):
    p = d / "matrix.xlsx"
    p.write_bytes(b"PK\x03\x04 not a matrix")
    return [p], "matrix.xlsx"


def _case_h5_no_2d(d):
    return [_make_h5(d / "vec.h5", values=np.arange(10.0), labels=np.array([b"a", b"b"]))], "vec.h5"


def _case_h5_string_2d(d):
    return [_make_h5(d / "strings.h5", X=np.array([[b"a", b"b"], [b"c", b"d"]]))], "strings.h5"


def _case_h5_several(d):
    return [_make_h5(d / "two.h5", counts=M, logged=np.log1p(M))], "two.h5"


def _case_h5_wrong_dataset(d):
    return [_make_h5(d / "one.h5", counts=M), "--dataset", "/nope"], "one.h5"


def _case_zarr_no_2d(d):
    return [_make_zarr(d / "vec.zarr", values=np.arange(10.0))], "vec.zarr"


def _case_zarr_several(d):
    return [_make_zarr(d / "two.zarr", a=M, b=M + 1)], "two.zarr"


def _case_text_non_numeric(d):
    text = "id\tg1\tg2\tg3\ns1\t1\t2\t3\ns2\t4\tfive\t6\ns3\t7\t8\t9\n"
    return [_text(d / "m.tsv", text)], ("m.tsv", "line 3", "g2", "five")


def _case_text_ragged(d):
    text = "id,g1,g2,g3\ns1,1,2,3\ns2,4,5\ns3,7,8,9\n"
    return [_text(d / "m.csv", text)], ("m.csv", "line 3")


def _case_duplicate_samples(d):
    text = "id\tg1\tg2\tg3\ns1\t1\t2\t3\ns2\t4\t5\t7\ns1\t7\t8\t1\n"
    return [_text(d / "m.tsv", text)], ("m.tsv", "'s1'")


def _case_duplicate_features(d):
    text = "id\tg1\tg2\tg1\ns1\t1\t2\t3\ns2\t4\t5\t7\ns3\t7\t8\t1\n"
    return [_text(d / "m.tsv", text)], ("m.tsv", "'g1'")


def _case_duplicate_ids_h5(d):
    p = _make_h5(d / "ids.h5", X=M, sample_ids=np.array([b"a", b"b", b"c", b"a", b"e", b"f"]))
    return [p], ("ids.h5", "'a'")


def _case_one_sample(d):
    return [_make_h5(d / "row.h5", X=M[:1])], "row.h5"


def _case_one_feature(d):
    np.save(d / "col.npy", M[:, :1])
    return [d / "col.npy"], "col.npy"


def _case_k_too_large(d):
    np.save(d / "m.npy", M)  # 6 × 5, centred: rank at most min(6 − 1, 5) = 5
    return [d / "m.npy", "-k", "6"], ("m.npy", "choose at most 5")


def _case_nan(d):
    X = M.copy()
    X[3, 2] = np.nan
    return [_make_h5(d / "nan.h5", X=X), "-k", "2"], ("nan.h5", "sample_000004", "feature_000003", "--missing mean")


def _case_inf(d):
    X = M.copy()
    X[1, 4] = -np.inf
    np.save(d / "inf.npy", X)
    return [d / "inf.npy", "-k", "2"], ("inf.npy", "sample_000002", "feature_000005", "--missing mean")


def _case_ids_file_length(d):
    np.save(d / "m.npy", M)
    ids = _text(d / "samples.txt", "a\nb\nc\n")
    return [d / "m.npy", "--sample-ids", ids], ("m.npy", "samples.txt")


def _case_truncated_h5(d):
    p = d / "big.h5"
    with h5py.File(p, "w") as handle:
        handle.create_dataset("X", data=np.random.default_rng(0).standard_normal((200, 100)))
    size = p.stat().st_size
    with open(p, "r+b") as handle:
        handle.truncate(size // 2)
    return [p], "big.h5"


def _case_corrupted_zarr_chunk(d):
    p = d / "c.zarr"
    group = zarr.open_group(str(p), mode="w", zarr_format=3)
    array = group.create_array("X", shape=(40, 20), chunks=(10, 20), dtype="float32",
                               compressors=zarr.codecs.ZstdCodec())
    array[...] = np.random.default_rng(1).standard_normal((40, 20)).astype("float32")
    chunk = next(f for f in (p / "X").rglob("*") if f.is_file() and f.name != "zarr.json")
    chunk.write_bytes(b"\x00garbage" * 7)
    return [p], "c.zarr"


def _case_corrupted_zarr_chunk_v2(d):
    p = d / "c2.zarr"
    group = zarr.open_group(str(p), mode="w", zarr_format=2)
    array = group.create_array("X", shape=(40, 20), chunks=(10, 20), dtype="float32")
    array[...] = np.random.default_rng(1).standard_normal((40, 20)).astype("float32")
    chunk = p / "X" / "2.0"
    assert chunk.is_file()
    chunk.write_bytes(chunk.read_bytes()[:9])  # truncated chunk
    return [p], "c2.zarr"


BAD_INPUTS = {
    "missing file": _case_missing,
    "unknown extension": _case_unknown_extension,
    "HDF5 without a 2-D dataset": _case_h5_no_2d,
    "HDF5 with a non-numeric 2-D dataset": _case_h5_string_2d,
    "HDF5 with several 2-D datasets": _case_h5_several,
    "HDF5 --dataset not found": _case_h5_wrong_dataset,
    "Zarr without a 2-D array": _case_zarr_no_2d,
    "Zarr with several 2-D arrays": _case_zarr_several,
    "text non-numeric cell": _case_text_non_numeric,
    "text ragged rows": _case_text_ragged,
    "duplicate sample ids": _case_duplicate_samples,
    "duplicate feature ids": _case_duplicate_features,
    "duplicate ids in HDF5": _case_duplicate_ids_h5,
    "fewer than 2 samples": _case_one_sample,
    "fewer than 2 features": _case_one_feature,
    "-k too large": _case_k_too_large,
    "NaN without --missing": _case_nan,
    "Inf without --missing": _case_inf,
    "ids file of the wrong length": _case_ids_file_length,
    "truncated HDF5": _case_truncated_h5,
    "corrupted Zarr v3 chunk": _case_corrupted_zarr_chunk,
    "truncated Zarr v2 chunk": _case_corrupted_zarr_chunk_v2,
}

# phrases that say what to do (each message must contain one)
_FIX_WORDS = ("choose", "pass", "fix", "give", "make", "use", "remove", "re-create", "re-copy", "store",
              "save", "check", "drop", "raise", "relax", "rename", "supported", "need at least")


@pytest.mark.parametrize("case", list(BAD_INPUTS), ids=list(BAD_INPUTS))
def test_bad_input_one_line_exit_2_no_output(case, tmp_path):
    inputs = tmp_path / "inputs"
    inputs.mkdir()
    args, expected = BAD_INPUTS[case](inputs)
    before = sorted(p.name for p in inputs.iterdir())
    runs = tmp_path / "runs"
    out = runs / "out"
    res = _invoke("fit", *args[:1], "--out", out, *args[1:], "-q")
    assert res.exit_code == 2, (res.exit_code, res.stdout, res.stderr, res.exception)
    message = res.stderr.strip()
    assert "Traceback" not in res.stderr and "Traceback" not in res.stdout
    assert message.count("\n") == 0, f"more than one line: {message!r}"
    assert message.startswith("error: ")
    for part in (expected if isinstance(expected, tuple) else (expected,)):
        assert part in message, f"{part!r} not in {message!r}"
    assert any(word in message.lower() for word in _FIX_WORDS), f"no fix in {message!r}"
    # nothing written: no output directory, no temporary directory beside it
    assert not out.exists()
    assert not runs.exists() or list(runs.iterdir()) == []
    assert sorted(p.name for p in inputs.iterdir()) == before


def test_bad_option_values(small_h5, tmp_path):
    path = small_h5[0]
    for args, needle in (
        (["--memory-limit", "lots"], "--memory-limit lots is not a size"),
        (["--scale", "zscore"], "--scale"),
        (["--power-iterations", "many"], "'many'"),
        (["--samples-in", "diagonal"], "--samples-in"),
    ):
        res = _invoke("fit", path, "--out", tmp_path / "o", "-q", *args)
        assert res.exit_code == 2, args
        assert needle in res.stderr and "Traceback" not in res.stderr
        assert not (tmp_path / "o").exists()


def test_wide_fits_also_write_loadings_as_zarr(tmp_path, monkeypatch):
    # Above the feature threshold the loadings also go to Zarr with their ids; the TSV
    # written beside them is the reference (the same model read back two ways).
    import zarr

    from axiscope.io import output as writers
    from axiscope.fitting.run import fit
    from axiscope.io import array_source

    monkeypatch.setattr(writers, "ZARR_FEATURE_THRESHOLD", 10)
    X = np.random.default_rng(3).standard_normal((40, 30))
    result = fit(array_source(X), n_components=3)
    result.write(tmp_path / "out")
    group = zarr.open_group(str(tmp_path / "out" / "feature_loadings.zarr"), mode="r")
    table = pd.read_csv(tmp_path / "out" / "feature_loadings.tsv", sep="\t")
    assert list(group.attrs["columns"]) == ["PC1", "PC2", "PC3"]
    assert list(group["row_ids"][:]) == table["feature_id"].tolist()
    np.testing.assert_allclose(group["values"][:], table[["PC1", "PC2", "PC3"]].to_numpy(), rtol=1e-7)


@pytest.mark.parametrize("args", [["fit", "x.h5", "--out", "o", "--scale", "zscore"],
                                  ["fit", "x.h5", "--out", "o", "--bogus"],
                                  ["fit", "x.h5", "--out", "o", "-k", "0"]])
def test_console_script_reports_usage_errors_in_one_line(args, capsys):
    # The console entry point shows command-line usage errors like input errors: one line
    # on standard error and exit code 2 (common practice for usage errors, no source).
    from axiscope.cli import main

    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and "axiscope fit --help" in err[0]


# ------------------------------------------------------- inspect predicts the fit's plan


@pytest.fixture
def plan_h5(write_matrix, planted):
    """1200 × 500 float64 in HDF5 chunks of 100 rows: enough samples that the plan splits them."""
    X = planted(1200, 500, rank=5, seed=12).X
    return write_matrix(X, "h5", chunks=(100, 500))


@pytest.mark.parametrize("extra", [[], ["--threads", "1"], ["--threads", "2", "--log", "--counts-per", "1e4"],
                                   ["--top-variable", "100", "-k", "4", "--oversample", "3"]])
def test_inspect_predicts_the_plan_fit_uses(plan_h5, tmp_path, extra):
    """Both commands call one planning function; the plan inspect prints is the one in the
    fit's manifest (the reference: the plan fit records), at 64 MB and the defaults."""
    if "--log" in extra:  # log(1 + x) needs values above -1
        import h5py

        with h5py.File(plan_h5, "r+") as handle:
            handle["X"][...] = np.abs(handle["X"][...])
    res = _invoke("inspect", plan_h5, "--json", "--memory-limit", "64MB", *extra)
    assert res.exit_code == 0, res.stderr
    predicted = json.loads(res.stdout)["fit_plan"]
    out = tmp_path / "fit"
    res = _invoke("fit", plan_h5, "--out", out, "--memory-limit", "64MB", *extra, "-q")
    assert res.exit_code == 0, res.stderr
    used = json.loads((out / "manifest.json").read_text())["plan"]
    assert predicted == used
    assert used["block_rows"] < 1200  # the plan has something to predict


def test_inspect_text_names_the_plan(plan_h5):
    res = _invoke("inspect", plan_h5, "--memory-limit", "64MB", "--threads", "2")
    assert res.exit_code == 0, res.stderr
    assert "blocks of 100 samples" in res.stdout and "2 threads" in res.stdout


# ------------------------------------------------------------------------- the summary


def test_summary_states_the_accuracy_against_the_requested_tolerance(small_h5, tmp_path):
    path = small_h5[0]
    res = _invoke("fit", path, "--out", tmp_path / "a", "-k", "4", "--method", "randomized")
    assert res.exit_code == 0, res.stderr
    assert "every singular value is within" in res.stdout and "below the requested 1e-06" in res.stdout
    assert "Halko" not in res.stdout and "≤" not in res.stdout  # no probabilistic norm bound
    accuracy = json.loads((tmp_path / "a" / "manifest.json").read_text())["accuracy"]
    assert [a["axis"] for a in accuracy["axes"]] == ["PC1", "PC2", "PC3", "PC4"]
    assert all(set(a) == {"axis", "singular_value_error", "loading_error", "relative_gap", "below_tol"}
               for a in accuracy["axes"])
    # no power iteration and a tight tolerance: the summary names the axes that miss it
    res = _invoke("fit", path, "--out", tmp_path / "b", "-k", "4", "--method", "randomized",
                  "--power-iterations", "0", "--oversample", "0", "--tol", "1e-12")
    assert res.exit_code == 0, res.stderr
    accuracy = json.loads((tmp_path / "b" / "manifest.json").read_text())["accuracy"]
    missed = [a["axis"] for a in accuracy["axes"] if not a["below_tol"]]
    assert missed and "above the requested 1e-12" in res.stdout and missed[-1] in res.stdout


def test_scratch_folder_option_makes_the_folder(write_matrix, planted, tmp_path):
    X = planted(2000, 3000, rank=4, dtype="float32", seed=46).X
    path = write_matrix(X, "zarr3", chunks=(128, 1000))
    scratch = tmp_path / "scratch" / "inner"
    res = _invoke("fit", path, "--out", tmp_path / "o", "-k", "3", "--memory-limit", "20MB",
                  "--scratch", scratch, "-q")
    assert res.exit_code == 0, res.stderr
    assert json.loads((tmp_path / "o" / "manifest.json").read_text())["plan"]["cache"] == "scratch"
    assert scratch.is_dir()


# ------------------------------------------------------- names shared with the Python API


def test_command_parameters_are_named_like_the_api_arguments():
    """The command line turns parameter names in error messages into its options, so each
    option that feeds an option object is a parameter of the same name."""
    import dataclasses
    import inspect

    from axiscope.cli.fit_cmd import fit_command
    from axiscope.cli.inspect_cmd import inspect_command
    from axiscope.core.options import EngineSettings, InputLayout, Resources
    from axiscope.core.preprocess import PreprocessSpec

    fit_params = set(inspect.signature(fit_command).parameters)
    for kind in (EngineSettings, Resources, InputLayout, PreprocessSpec):
        assert {f.name for f in dataclasses.fields(kind)} <= fit_params, kind.__name__
    assert "n_components" in fit_params
    inspect_params = set(inspect.signature(inspect_command).parameters)
    assert {"n_components", "oversample", "memory_limit", "threads", "scratch", "counts_per",
            "log_transform", "top_variable"} <= inspect_params


def test_top_default_is_the_shared_one():
    """fit, explain and the Python API list the same number of features per side by default."""
    import inspect

    import typer

    from axiscope.defaults import DEFAULT_TOP_FEATURES
    from axiscope.explain.cards import explain_axes
    from axiscope.fitting.result import FitResult

    commands = typer.main.get_command(app).commands
    for name in ("fit", "explain"):
        (top,) = [p for p in commands[name].params if p.name == "top"]
        assert top.default == DEFAULT_TOP_FEATURES, name
    assert inspect.signature(explain_axes).parameters["top"].default == DEFAULT_TOP_FEATURES
    assert inspect.signature(FitResult.top_features).parameters["n"].default == DEFAULT_TOP_FEATURES


@pytest.mark.parametrize("args", [["--log" + "1p"], ["--normalize" + "-total", "1e6"], ["--scale", "bi" + "nomial"]])
def test_old_option_spellings_are_refused(small_h5, tmp_path, args):
    res = _invoke("fit", small_h5[0], "--out", tmp_path / "o", *args, "-q")
    assert res.exit_code == 2 and not (tmp_path / "o").exists()
