"""Tests of :mod:`axiscope.scoring` and ``axiscope score``.

Outside references: the dense textbook computation of the conftest (numpy/LAPACK SVD of
the preprocessed matrix), scikit-learn's PCA, scipy.stats distributions, the published
formulas of the control limits (written out in this file, independently of the library),
and simulations whose truth the test planted.
"""

from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from typer.testing import CliRunner

from axiscope import PreprocessSpec, Resources, fit, load_model
from axiscope.cli import app
from axiscope.errors import InputError, ModelError, OptionError
from axiscope.io import array_source
from axiscope.scoring.score import score

runner = CliRunner()


def spiked_gaussian(rng, n, p, spikes, U, offset=3.0):
    """Gaussian samples ``offset + U·diag(√spikes)·z + e`` (planted truth: the covariance)."""
    k = len(spikes)
    return offset + (rng.standard_normal((n, k)) * np.sqrt(spikes)) @ U.T + rng.standard_normal((n, p))


@pytest.fixture(scope="module")
def calibration():
    """A model fitted on 2000 Gaussian samples and 4000 new samples from the same distribution."""
    rng = np.random.default_rng(11)
    p, spikes = 40, np.array([12.0, 8.0, 5.0])
    U, _ = np.linalg.qr(rng.standard_normal((p, 3)))
    X_train = spiked_gaussian(rng, 2000, p, spikes, U)
    X_new = spiked_gaussian(rng, 4000, p, spikes, U)
    result = fit(array_source(X_train), n_components=3, resources=Resources(threads=1))
    return {"X_train": X_train, "X_new": X_new, "U": U, "spikes": spikes, "fit": result}


# ------------------------------------------------------------------ reproducing scores


def test_scoring_the_training_file_reproduces_training_scores(write_matrix, planted, dense, orient, tmp_path):
    P = planted(120, 60, rank=4, seed=3)
    path = write_matrix(P.X, "zarr3", feature_ids=[f"g{j}" for j in range(60)],
                        sample_ids=[f"s{i}" for i in range(120)])
    result = fit(path, n_components=4, resources=Resources(threads=1))
    result.model.save(tmp_path / "model")
    scored = score(tmp_path / "model", path, threads=1)
    got = scored.scores[result.axis_names].to_numpy()
    # reference: the fit's own training scores (the requirement, ≤ 1e-5 relative)
    rel = np.linalg.norm(got - result.scores) / np.linalg.norm(result.scores)
    assert rel <= 1e-5
    # reference: numpy/LAPACK SVD of the densely standardized matrix (conftest.dense_reference)
    ref = dense(P.X)
    _, ref_scores = orient(ref.components(4), ref.scores(4))
    np.testing.assert_allclose(got, ref_scores, rtol=0, atol=1e-6 * np.abs(ref_scores).max())
    assert list(scored.scores["sample_id"]) == [f"s{i}" for i in range(120)]


def test_permuted_and_extra_feature_columns_give_identical_scores(planted):
    P = planted(80, 30, rank=3, seed=5)
    ids = np.array([f"g{j}" for j in range(30)])
    result = fit(array_source(P.X, feature_ids=ids), n_components=3, resources=Resources(threads=1))
    rng = np.random.default_rng(0)
    extra = rng.standard_normal((80, 7)) * 100  # junk features the model does not use
    order = rng.permutation(37)
    shuffled = np.hstack([P.X, extra])[:, order]
    shuffled_ids = np.concatenate([ids, [f"junk{j}" for j in range(7)]])[order]
    a = score(result.model, array_source(P.X, feature_ids=ids), threads=1)
    b = score(result.model, array_source(shuffled, feature_ids=shuffled_ids), threads=1)
    # reference: the unpermuted matrix (planted by the test); matching is by id, so equal
    np.testing.assert_allclose(b.scores.iloc[:, 1:].to_numpy(), a.scores.iloc[:, 1:].to_numpy(), rtol=0, atol=1e-12)
    np.testing.assert_allclose(b.diagnostics["q"], a.diagnostics["q"], rtol=1e-12)
    assert b.manifest["counts"]["extra_features_ignored"] == 7


# -------------------------------------------------------------------------- diagnostics


def test_t2_and_q_values_match_scikit_learn_pca(calibration):
    from sklearn.decomposition import PCA
    from sklearn.preprocessing import StandardScaler

    X_train, X_new = calibration["X_train"], calibration["X_new"][:200]
    res = score(calibration["fit"].model, array_source(X_new), threads=1)
    # reference: scikit-learn StandardScaler (population SD) + PCA (LAPACK, variances with n−1)
    scaler = StandardScaler().fit(X_train)
    pca = PCA(n_components=3, svd_solver="full").fit(scaler.transform(X_train))
    Z = scaler.transform(X_new)
    T = pca.transform(Z)
    t2_ref = np.sum(T**2 / pca.explained_variance_, axis=1)  # Hotelling's T², textbook definition
    q_ref = np.sum((Z - pca.inverse_transform(T)) ** 2, axis=1)  # squared prediction error
    np.testing.assert_allclose(res.diagnostics["t2"], t2_ref, rtol=1e-8)
    np.testing.assert_allclose(res.diagnostics["q"], q_ref, rtol=1e-8)


def test_t2_limit_matches_f_distribution_formula(calibration):
    model = calibration["fit"].model
    res = score(model, array_source(calibration["X_new"][:50]), threads=1, confidence=0.99)
    n, k = model.n_samples, model.n_components
    for level in (0.99, 0.95):
        # reference: Tracy, Young & Mason (1992), J. Quality Technology 24(2), limit of T² for a
        # new observation, k(n−1)(n+1)/(n(n−k))·F(k, n−k), with scipy.stats.f
        expected = k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(level, k, n - k)
        assert res.limits[level].t2 == pytest.approx(expected, rel=1e-12)
        # diagnostics.tsv carries the limit at the requested confidence and the one at 0.95
        column = "t2_limit" if level == 0.99 else "t2_limit_95"
        np.testing.assert_allclose(res.diagnostics[column], expected, rtol=1e-12)
    np.testing.assert_array_equal(res.diagnostics["confidence"], 0.99)


def test_q_limit_matches_jackson_mudholkar_formula(calibration):
    from sklearn.decomposition import PCA
    from sklearn.preprocessing import StandardScaler

    X_train = calibration["X_train"]
    model = calibration["fit"].model
    res = score(model, array_source(calibration["X_new"][:50]), threads=1)
    assert res.q_method == "jackson-mudholkar"
    # the manifest says that θ2, θ3 are estimates from the residuals, not eigenvalue moments
    assert "var(Q) = 2 theta2 and E[(Q - theta1)^3] = 8 theta3" in res.manifest["limits"]["q"]
    Z = StandardScaler().fit_transform(X_train)
    # reference: numpy.linalg.eigvalsh of the (population) covariance; θ1 = sum of the
    # eigenvalues left out of the model
    eig = np.sort(np.linalg.eigvalsh(Z.T @ Z / Z.shape[0]))[::-1]
    theta1 = eig[3:].sum()
    # θ2, θ3 from the central moments of the training residuals (scipy.stats.moment), using
    # Var Q = 2θ2 and E(Q − θ1)³ = 8θ3 for Gaussian quadratic forms (Jackson & Mudholkar 1979)
    pca = PCA(n_components=3, svd_solver="full").fit(Z)
    q_train = np.sum((Z - pca.inverse_transform(pca.transform(Z))) ** 2, axis=1)
    theta2 = stats.moment(q_train, 2) / 2
    theta3 = stats.moment(q_train, 3) / 8
    assert q_train.mean() == pytest.approx(theta1, rel=1e-9)
    # for Gaussian data these estimate the eigenvalue moments (reference: eigvalsh), loosely
    assert theta2 == pytest.approx(np.sum(eig[3:] ** 2), rel=0.15)
    for level in (0.99, 0.95):
        # reference: Jackson & Mudholkar (1979), Technometrics 21(3), 341–349, eq. for Q_α
        h0 = 1 - 2 * theta1 * theta3 / (3 * theta2**2)
        c = stats.norm.ppf(level)
        expected = theta1 * (c * np.sqrt(2 * theta2 * h0**2) / theta1 + 1
                             + theta2 * h0 * (h0 - 1) / theta1**2) ** (1 / h0)
        # the library adds the expected excess of new samples' residuals (tested below)
        assert res.limits[level].q - res.limits[level].q_offset == pytest.approx(expected, rel=1e-7)
        # diagnostics.tsv carries the limit at the requested confidence and the one at 0.95
        column = "q_limit" if level == 0.99 else "q_limit_95"
        np.testing.assert_allclose(res.diagnostics[column] - res.limits[level].q_offset, expected, rtol=1e-7)
    # Box (1954): g·χ²_h with g = var/(2 mean), h = 2 mean²/var (scipy.stats.chi2)
    box = score(model, array_source(calibration["X_new"][:50]), threads=1, q_method="box")
    m, v = q_train.mean(), q_train.var()
    box_lim = box.limits[0.99]
    assert box_lim.q - box_lim.q_offset == pytest.approx(v / (2 * m) * stats.chi2.ppf(0.99, 2 * m**2 / v), rel=1e-7)
    # without the adjustment the limit is the bare formula
    bare = score(model, array_source(calibration["X_new"][:50]), threads=1, adjust_q=False)
    assert bare.limits[0.99].q_offset == 0.0
    assert bare.limits[0.99].q == pytest.approx(res.limits[0.99].q - res.limits[0.99].q_offset, rel=1e-12)
    assert box.q_method == "box"


def test_flagged_fraction_is_calibrated_on_samples_from_the_model_distribution(calibration):
    res = score(calibration["fit"].model, array_source(calibration["X_new"]), threads=1)
    d = res.diagnostics
    assert len(d) >= 4000
    lim = res.limits[0.95]
    # reference: definition of a 95% limit; the share beyond it is binomial with SD
    # sqrt(0.05·0.95/4000) = 0.0034 (scipy.stats.binom), tolerance 3 SD = ±0.011
    sd = stats.binom(len(d), 0.05).std() / len(d)
    assert sd == pytest.approx(0.00345, abs=1e-5)
    assert abs(np.mean(d["t2"] > lim.t2) - 0.05) <= 3 * sd
    assert abs(np.mean(d["q"] > lim.q) - 0.05) <= 3 * sd
    # at the default 0.99 the flags are rare (expected 2% for either limit, 1% each)
    assert np.mean(d["flag"] != "within") <= 0.04


def test_gross_outliers_are_flagged(calibration):
    X = calibration["X_new"][:60].copy()
    sd = calibration["X_train"].std(axis=0)
    # planted contamination: 10 samples with 8 SD added to a quarter of the features
    X[:10, :10] += 8 * sd[:10]
    # planted: 10 samples far along the first planted axis (12 SD of that axis)
    X[10:20] += 12 * np.sqrt(calibration["spikes"][0]) * calibration["U"][:, 0]
    res = score(calibration["fit"].model, array_source(X), threads=1)
    flags = res.diagnostics["flag"].to_numpy()
    assert set(flags[:10]) <= {"q", "both"}
    assert set(flags[10:20]) <= {"t2", "both"}
    assert np.mean(flags[20:] != "within") <= 0.1


def test_missing_features_filled_with_the_training_mean(planted):
    P = planted(100, 30, rank=3, seed=8)
    ids = np.array([f"g{j}" for j in range(30)])
    model = fit(array_source(P.X, feature_ids=ids), n_components=3, resources=Resources(threads=1)).model
    keep = np.arange(30) >= 3  # the new file lacks g0, g1, g2
    src = array_source(P.X[:20, keep], feature_ids=ids[keep])
    with pytest.raises(InputError, match="3 of the model's 30 features are missing"):
        score(model, src, threads=1)
    one_short = array_source(P.X[:20, 1:], feature_ids=ids[1:])
    with pytest.raises(InputError, match=r"1 of the model's 30 features is missing \(first: 'g0'\); supply it or"):
        score(model, one_short, threads=1)
    res = score(model, src, fill_missing="mean", threads=1, max_missing_fraction=0.05)
    # reference: the same samples with the absent features set to their training mean
    # (numpy mean of the planted matrix), which add nothing to the scores
    full = P.X[:20].copy()
    full[:, :3] = P.X[:, :3].mean(axis=0)
    ref = score(model, array_source(full, feature_ids=ids), threads=1)
    np.testing.assert_allclose(res.scores.iloc[:, 1:].to_numpy(), ref.scores.iloc[:, 1:].to_numpy(), atol=1e-10)
    np.testing.assert_allclose(res.diagnostics["missing_fraction"], 3 / 30)
    assert set(res.diagnostics["flag"]) == {"missing"}  # 0.1 > max_missing_fraction 0.05
    relaxed = score(model, src, fill_missing="mean", threads=1, max_missing_fraction=0.2)
    assert "missing" not in set(relaxed.diagnostics["flag"])


def test_shrinkage_correction_divides_scores_by_stored_factors(calibration):
    from sklearn.decomposition import PCA
    from sklearn.preprocessing import StandardScaler

    model = calibration["fit"].model
    X_train, X_new = calibration["X_train"], calibration["X_new"][:40]
    corrected = score(model, array_source(X_new), threads=1, correct_shrinkage=True)
    f = model.extras["shrinkage_factor"]  # their estimate is tested in test_shrinkage.py
    # reference: scikit-learn StandardScaler + PCA (LAPACK) scores divided by the stored
    # factors; T² (textbook definition) from those corrected scores
    scaler = StandardScaler().fit(X_train)
    pca = PCA(n_components=3, svd_solver="full").fit(scaler.transform(X_train))
    T = pca.transform(scaler.transform(X_new)) / f
    got = corrected.scores.iloc[:, 1:].to_numpy()
    np.testing.assert_allclose(np.abs(got), np.abs(T), rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(corrected.diagnostics["t2"], np.sum(T**2 / pca.explained_variance_, axis=1), rtol=1e-8)


def test_bad_options_raise_option_errors(calibration):
    model = calibration["fit"].model
    X = array_source(calibration["X_new"][:10])
    # The Python API's messages name its arguments (the command line's name options).
    with pytest.raises(OptionError, match=r"^confidence=1\.0 is out of range; choose a value between 0\.5 and 1"):
        score(model, X, confidence=1.0)
    with pytest.raises(OptionError, match=r"^fill_missing='median' is not supported"):
        score(model, X, fill_missing="median")
    with pytest.raises(OptionError, match=r"^max_missing_fraction=2 is out of range"):
        score(model, X, max_missing_fraction=2)
    with pytest.raises(OptionError, match=r"^q_method='median' is not valid; use one of: jackson-mudholkar, box$"):
        score(model, X, q_method="median")


# ------------------------------------------------------------------------------- CLI


@pytest.fixture
def cli_setup(tmp_path, write_matrix, planted):
    P = planted(60, 25, rank=3, seed=4)
    ids = [f"g{j}" for j in range(25)]
    train = write_matrix(P.X, "tsv", feature_ids=ids, name="train")
    result = fit(train, n_components=3, resources=Resources(threads=1))
    result.model.save(tmp_path / "model")
    return {"P": P, "ids": ids, "train": train, "model": tmp_path / "model", "fit": result}


def _no_output(out):
    leftovers = [p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}")]
    return not out.exists() and not leftovers


def test_cli_score_writes_scores_diagnostics_and_manifest(cli_setup, tmp_path):
    out = tmp_path / "scored"
    r = runner.invoke(app, ["score", str(cli_setup["model"]), str(cli_setup["train"]), "--out", str(out), "--threads", "1"])
    assert r.exit_code == 0, r.output
    assert "within limits" in r.output
    scores = pd.read_csv(out / "scores.tsv", sep="\t")
    diag = pd.read_csv(out / "diagnostics.tsv", sep="\t")
    assert list(diag.columns) == ["sample_id", "t2", "q", "flag", "missing_fraction", "confidence", "t2_limit",
                                  "q_limit", "t2_limit_95", "q_limit_95"]
    # reference: the fit's training scores (written with 8 significant digits)
    np.testing.assert_allclose(scores[["PC1", "PC2", "PC3"]].to_numpy(), cli_setup["fit"].scores, rtol=1e-6, atol=1e-6)
    manifest = json.loads((out / "manifest.json").read_text())
    # reference: hashlib SHA-256 of model.json, computed here
    import hashlib

    assert manifest["model"]["checksum"] == hashlib.sha256((cli_setup["model"] / "model.json").read_bytes()).hexdigest()
    assert manifest["counts"]["samples"] == 60


def test_cli_missing_features_without_fill_is_an_error(cli_setup, tmp_path, write_matrix):
    X = cli_setup["P"].X[:, 2:]
    path = write_matrix(X, "tsv", feature_ids=cli_setup["ids"][2:], name="partial")
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(cli_setup["model"]), str(path), "--out", str(out)])
    assert r.exit_code == 2
    assert "2 of the model's 25 features are missing (first: 'g0', 'g1')" in r.stderr
    assert "pass --fill-missing mean" in r.stderr and "Traceback" not in r.output
    assert _no_output(out)
    r = runner.invoke(app, ["score", str(cli_setup["model"]), str(path), "--out", str(out), "--fill-missing", "mean"])
    assert r.exit_code == 0, r.output
    np.testing.assert_allclose(pd.read_csv(out / "diagnostics.tsv", sep="\t")["missing_fraction"], 2 / 25)


def test_cli_tampered_model_array_is_an_error(cli_setup, tmp_path):
    model = tmp_path / "tampered"
    shutil.copytree(cli_setup["model"], model)
    arr = np.load(model / "components.npy")
    arr[0, 0] += 1e-3
    np.save(model / "components.npy", arr)
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(model), str(cli_setup["train"]), "--out", str(out)])
    assert r.exit_code == 2
    assert "components.npy: checksum does not match" in r.stderr
    assert _no_output(out)


def test_cli_missing_model_array_is_an_error(cli_setup, tmp_path):
    model = tmp_path / "incomplete"
    shutil.copytree(cli_setup["model"], model)
    (model / "extra_residual_moments.npy").unlink()
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(model), str(cli_setup["train"]), "--out", str(out)])
    assert r.exit_code == 2
    assert "extra_residual_moments.npy: missing from the model" in r.stderr
    assert _no_output(out)


def test_cli_wrong_model_version_is_an_error(cli_setup, tmp_path):
    model = tmp_path / "newer"
    shutil.copytree(cli_setup["model"], model)
    meta = json.loads((model / "model.json").read_text())
    meta["version"] = 99
    (model / "model.json").write_text(json.dumps(meta))
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(model), str(cli_setup["train"]), "--out", str(out)])
    assert r.exit_code == 2
    assert "model format version 99 is not supported" in r.stderr
    assert _no_output(out)
    with pytest.raises(ModelError):
        load_model(model)


@pytest.mark.parametrize("edit", ["n_samples", "drop_preprocessing"])
def test_cli_edited_model_description_is_an_error(cli_setup, tmp_path, edit):
    # An edited model.json (a changed sample count would silently move the T² limit) or a
    # malformed one is refused with one line, exit 2 and no output.
    model = tmp_path / "edited"
    shutil.copytree(cli_setup["model"], model)
    meta = json.loads((model / "model.json").read_text())
    if edit == "n_samples":
        meta["n_samples"] = 5000
    else:
        del meta["preprocessing"]
    (model / "model.json").write_text(json.dumps(meta))
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(model), str(cli_setup["train"]), "--out", str(out)])
    assert r.exit_code == 2
    assert "model.json" in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert _no_output(out)
    with pytest.raises(ModelError):
        load_model(model)


def test_cli_non_model_directory_is_an_error(cli_setup, tmp_path):
    other = tmp_path / "not_a_model"
    other.mkdir()
    (other / "notes.txt").write_text("hello\n")
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(other), str(cli_setup["train"]), "--out", str(out)])
    assert r.exit_code == 2
    assert "neither a model folder (no model.json) nor the result folder of a fit" in r.stderr
    assert _no_output(out)


def test_cli_no_overlapping_feature_ids_is_an_error(cli_setup, tmp_path, write_matrix):
    path = write_matrix(cli_setup["P"].X, "tsv", feature_ids=[f"other{j}" for j in range(25)], name="foreign")
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(cli_setup["model"]), str(path), "--out", str(out), "--fill-missing", "mean"])
    assert r.exit_code == 2
    assert "no feature id of the model occurs in this file (the model has 25 features" in r.stderr
    assert "check --feature-ids and --samples-in" in r.stderr
    assert _no_output(out)


def test_model_stores_what_the_limits_need(cli_setup):
    from sklearn.decomposition import PCA
    from sklearn.preprocessing import StandardScaler

    model = load_model(cli_setup["model"])
    theta = model.extras["residual_moments"]
    # θ1 is exact: total variance minus the variance of the k axes; reference: numpy
    # eigvalsh of the population covariance of the standardized training matrix
    X = cli_setup["P"].X
    Z = StandardScaler().fit_transform(X)  # population SD, as the model
    eig = np.sort(np.linalg.eigvalsh(Z.T @ Z / Z.shape[0]))[::-1]
    assert theta[0] == pytest.approx(eig[3:].sum(), rel=1e-8)
    # θ2, θ3: estimates from the training residuals through var(Q) = 2θ2 and
    # E[(Q − θ1)³] = 8θ3 (Gaussian quadratic forms, Jackson & Mudholkar 1979); reference:
    # residuals of scikit-learn PCA (full LAPACK SVD) of the standardized matrix, central
    # moments with scipy.stats.moment
    pca = PCA(n_components=3, svd_solver="full").fit(Z)
    q = np.sum((Z - pca.inverse_transform(pca.transform(Z))) ** 2, axis=1)
    assert q.mean() == pytest.approx(theta[0], rel=1e-8)  # Box's mean is θ1
    np.testing.assert_allclose(theta[1:], [stats.moment(q, 2) / 2, stats.moment(q, 3) / 8], rtol=1e-6)


@pytest.mark.parametrize("n", [12, 40])
def test_q_offset_for_estimated_scales_is_the_inverse_chi_square_mean(n):
    # residual_excess (scoring/score.py) adds, under unit scaling, θ1·(E[σ²/s²] − 1) for the
    # scales estimated from n training samples: s² = σ²·χ²_{n−1}/(n−1), so
    # E[σ²/s²] = (n−1)·E[1/χ²_{n−1}] = (n−1)/(n−3), an excess of 2θ1/(n−3). Reference for E[1/χ²_ν]: numerical
    # integration with scipy.stats.chi2(ν).expect, independent of the closed form; the
    # other two terms are written from the docstring's formula. With n − 1 written for
    # n − 3 the offset moves by 2θ1·(1/(n−3) − 1/(n−1)), 4% of θ1 at n = 12.
    from axiscope.scoring.score import residual_excess

    rng = np.random.default_rng(n)
    X = rng.standard_normal((n, 8)) @ np.diag(np.linspace(3, 1, 8)) + 5.0
    unit = fit(array_source(X), n_components=2, resources=Resources(threads=1)).model
    theta1 = float(unit.extras["residual_moments"][0])
    f = unit.extras["shrinkage_factor"]
    shrink_and_mean = np.sum(unit.variance * (1 - f**2)) + 2 * theta1 / n
    inverse_chi2_mean = stats.chi2(n - 1).expect(lambda x: 1 / x)
    expected = shrink_and_mean + theta1 * ((n - 1) * inverse_chi2_mean - 1)
    assert residual_excess(unit) == pytest.approx(expected, rel=1e-8)
    # the check tells the two apart by far more than its tolerance
    written_with_n_minus_1 = shrink_and_mean + 2 * theta1 / (n - 1)
    assert written_with_n_minus_1 != pytest.approx(expected, rel=1e-3)
    # covariance PCA (scale none): no scale was estimated, no such term
    none = fit(array_source(X), n_components=2, preprocess=PreprocessSpec(scale="none"),
               resources=Resources(threads=1)).model
    theta1 = float(none.extras["residual_moments"][0])
    f = none.extras["shrinkage_factor"]
    assert residual_excess(none) == pytest.approx(np.sum(none.variance * (1 - f**2)) + 2 * theta1 / n, rel=1e-10)


def test_q_calibrated_when_features_far_outnumber_training_samples():
    # Simulation whose truth is planted: new samples drawn from the training distribution
    # (3 spikes + unit noise, 300 training samples × 4,000 features, default unit scaling).
    # At 0.95 confidence 5% ± 2% of them should exceed the Q limit; this regime needs the
    # offset for axes fitted to the training samples and for scales estimated from them.
    # Not ±3 binomial SD (±0.011) as in the test above: given one training set of 300 the
    # rate varies by more than the binomial spread, and it runs high on average (measured
    # for training seeds 0–5: Q 0.049–0.078, mean 0.064; T² 0.048–0.064, mean 0.059), a
    # known shortfall of the limits when features far outnumber samples.
    rng = np.random.default_rng(0)
    n, p, m = 300, 4000, 4000
    spikes = np.array([8.0, 6.0, 4.0])
    U = np.linalg.qr(rng.standard_normal((p, 3)))[0]

    def draw(count):
        return (rng.standard_normal((count, 3)) * np.sqrt(spikes * p / 50)) @ U.T + rng.standard_normal((count, p)) + 3.0

    model = fit(array_source(draw(n)), n_components=3, resources=Resources(threads=1)).model
    res = score(model, array_source(draw(m)), confidence=0.95, correct_shrinkage=True, threads=1)
    q_rate = float(np.mean(res.diagnostics["q"] > res.limits[0.95].q))
    t2_rate = float(np.mean(res.diagnostics["t2"] > res.limits[0.95].t2))
    assert 0.03 <= q_rate <= 0.07, q_rate
    assert 0.03 <= t2_rate <= 0.07, t2_rate


@pytest.mark.parametrize("center", [True, False])
def test_absent_features_and_missing_cells_both_take_the_training_mean(center):
    # Documented behaviour: an absent feature and a missing cell both count as the training
    # mean of that feature; the reference is the same samples with that mean written in.
    rng = np.random.default_rng(1)
    X = rng.gamma(2.0, size=(300, 50))
    ids = [f"f{i}" for i in range(50)]
    model = fit(array_source(X, feature_ids=ids), n_components=4, preprocess=PreprocessSpec(center=center),
                resources=Resources(threads=1)).model
    filled = X[:5].copy()
    filled[:, 7] = model.extras["feature_mean"][7]
    reference = score(model, array_source(filled, feature_ids=ids), threads=1)
    holes = X[:5].copy()
    holes[:, 7] = np.nan
    absent = np.delete(X[:5], 7, axis=1)
    for new, new_ids in ((holes, ids), (absent, ids[:7] + ids[8:])):
        res = score(model, array_source(new, feature_ids=new_ids), fill_missing="mean",
                    max_missing_fraction=1.0, threads=1)
        np.testing.assert_allclose(res.scores[model.axis_names], reference.scores[model.axis_names], atol=1e-10)
        np.testing.assert_allclose(res.diagnostics["q"], reference.diagnostics["q"], rtol=1e-9, atol=1e-9)


def test_q_limit_falls_back_to_box_with_a_warning_when_h0_is_not_positive(calibration, caplog):
    import dataclasses

    model = calibration["fit"].model
    theta1, theta2, _ = model.extras["residual_moments"]
    # planted: a third moment so large that h0 = 1 − 2θ1θ3/(3θ2²) < 0
    theta3 = 3 * theta2**2 / theta1
    skewed = dataclasses.replace(model, extras={**model.extras, "residual_moments": np.array([theta1, theta2, theta3])})
    with caplog.at_level("WARNING", logger="axiscope.scoring.score"):
        res = score(skewed, array_source(calibration["X_new"][:20]), threads=1)
    assert res.q_method == "box" and res.manifest["options"]["q_limit_method"] == "box"
    assert "h0" in caplog.text and "Box" in caplog.text
    assert res.manifest["limits"]["q"].startswith("Box (1954)")
    for level in (0.99, 0.95):
        # reference: Box (1954) g·χ²_h with mean θ1 and variance 2θ2 (scipy.stats.chi2)
        m, v = theta1, 2 * theta2
        lim = res.limits[level]
        assert lim.q - lim.q_offset == pytest.approx(v / (2 * m) * stats.chi2.ppf(level, 2 * m**2 / v), rel=1e-10)


@pytest.mark.filterwarnings("ignore:invalid value encountered in log:RuntimeWarning")
def test_negative_values_under_log_transform_get_a_clear_message(caplog):
    # reference: np.log1p(-1) is −inf and np.log1p(-2) NaN (the real log's domain); a model with
    # log(1 + x) in its preprocessing cannot score such values, and the message should say why
    rng = np.random.default_rng(2)
    counts = rng.poisson(20.0, size=(80, 12)).astype(float)
    ids = [f"g{j}" for j in range(12)]
    model = fit(array_source(counts, feature_ids=ids), n_components=2,
                preprocess=PreprocessSpec(log_transform=True), resources=Resources(threads=1)).model
    bad = counts[:6].copy()
    bad[3, 5] = -2.0  # planted: one negative value
    with pytest.raises(InputError, match=r"NaN or infinite.*log\(1 \+ x\).*negative values"):
        score(model, array_source(bad, feature_ids=ids), threads=1)
    with caplog.at_level("WARNING", logger="axiscope.scoring.score"):
        res = score(model, array_source(bad, feature_ids=ids), fill_missing="mean", threads=1)
    assert "1 cell in 1 sample in <array> was NaN or infinite" in caplog.text and "log(1 + x)" in caplog.text
    np.testing.assert_allclose(res.diagnostics["missing_fraction"], np.where(np.arange(6) == 3, 1 / 12, 0.0))


def test_a_missing_feature_is_reported_in_the_singular(planted, caplog):
    P = planted(60, 13, rank=2, seed=5)
    ids = np.array([f"g{j}" for j in range(13)])
    model = fit(array_source(P.X, feature_ids=ids), n_components=2, resources=Resources(threads=1)).model
    with caplog.at_level("WARNING", logger="axiscope.scoring.score"):
        score(model, array_source(P.X[:5, 1:], feature_ids=ids[1:]), fill_missing="mean", threads=1)
    assert "1 of the model's 13 features is missing from <array> and was filled with its training mean" in caplog.text


# ------------------------------------------------------------- fit folders and formats


def test_score_accepts_the_result_folder_of_a_fit(cli_setup, tmp_path):
    result_dir = tmp_path / "fitted"
    cli_setup["fit"].write(result_dir)
    via_model = score(result_dir / "model", cli_setup["train"], threads=1)
    via_result = score(result_dir, cli_setup["train"], threads=1)
    pd.testing.assert_frame_equal(via_result.scores, via_model.scores)
    assert via_result.manifest["model"]["path"] == str(result_dir / "model")
    out = tmp_path / "scored"
    r = runner.invoke(app, ["score", str(result_dir), str(cli_setup["train"]), "--out", str(out), "-q"])
    assert r.exit_code == 0, r.stderr
    # reference: the scores of the model/ folder itself (the TSV holds 8 significant digits)
    np.testing.assert_allclose(pd.read_csv(out / "scores.tsv", sep="\t")[["PC1", "PC2", "PC3"]],
                               via_model.scores[["PC1", "PC2", "PC3"]], rtol=1e-7, atol=1e-9)


def test_cli_score_parquet_copies_every_table(cli_setup, tmp_path):
    out = tmp_path / "scored"
    r = runner.invoke(app, ["score", str(cli_setup["model"]), str(cli_setup["train"]), "--out", str(out),
                            "--format", "parquet", "-q"])
    assert r.exit_code == 0, r.stderr
    tables = sorted(p.stem for p in out.glob("*.tsv"))
    assert tables == ["diagnostics", "scores"]
    for name in tables:  # reference: the TSV written beside it (8 significant digits)
        tsv = pd.read_csv(out / f"{name}.tsv", sep="\t")
        parquet = pd.read_parquet(out / f"{name}.parquet")
        assert list(parquet.columns) == list(tsv.columns)
        numeric = tsv.select_dtypes("number").columns
        np.testing.assert_allclose(parquet[numeric].to_numpy(float), tsv[numeric].to_numpy(float), rtol=1e-7)
        assert (parquet["sample_id"].astype(str) == tsv["sample_id"].astype(str)).all()
