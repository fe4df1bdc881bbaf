"""Tests of :class:`axiscope.estimator.AxiscopePCA`.

Outside references: scikit-learn's own estimator checks (``check_estimator``), scikit-learn's
StandardScaler + PCA (LAPACK) on scikit-learn's bundled wine data set, and the command line
(``axiscope fit`` / ``axiscope score``) for the model format round trip.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_wine
from sklearn.decomposition import PCA
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.utils.estimator_checks import check_estimator
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.errors import ModelError
from axiscope.estimator import AxiscopePCA

runner = CliRunner()


def _align(A, B):
    """Flip the columns of A to the signs of B (PCA axes are defined up to sign)."""
    return A * np.sign(np.sum(A * B, axis=0))


@pytest.fixture(scope="module")
def wine():
    data = load_wine()  # reference data: scikit-learn's bundled wine data set (178 × 13)
    return data.data, data.target, list(data.feature_names)


@pytest.mark.filterwarnings("ignore::sklearn.exceptions.SkipTestWarning")
@pytest.mark.parametrize("params", [{}, {"scale": "none", "whiten": True}], ids=["default", "covariance-whiten"])
def test_check_estimator_passes(params):
    # reference: scikit-learn's estimator conventions; no check is skipped by us (the array-API
    # checks skip themselves unless SCIPY_ARRAY_API is set, as for every estimator). With
    # scale='none' partial_fit is available and checked too.
    results = check_estimator(AxiscopePCA(**params), on_fail=None)
    failed = [(r["check_name"], repr(r["exception"])) for r in results if r["status"] == "failed"]
    assert failed == []
    assert len(results) > 40


def test_matches_standard_scaler_plus_pca_without_a_scaler(wine):
    X, _, _ = wine
    ours = AxiscopePCA(n_components=4).fit(X)
    # reference: scikit-learn StandardScaler (population SD) + PCA (full LAPACK SVD)
    ref = make_pipeline(StandardScaler(), PCA(n_components=4, svd_solver="full")).fit(X)
    T_ref = ref.transform(X)
    np.testing.assert_allclose(_align(ours.transform(X), T_ref), T_ref, atol=1e-8)
    np.testing.assert_allclose(_align(ours.fit_transform(X), T_ref), T_ref, atol=1e-8)
    pca = ref.named_steps["pca"]
    n = X.shape[0]
    # variance convention: s²/(n−1) on the estimator, as in scikit-learn; s²/n in the model
    # and the command line's tables
    np.testing.assert_allclose(ours.explained_variance_, pca.explained_variance_, rtol=1e-10)
    np.testing.assert_allclose(ours.model_.variance, pca.explained_variance_ * (n - 1) / n, rtol=1e-10)
    np.testing.assert_allclose(ours.explained_variance_ratio_, pca.explained_variance_ratio_, rtol=1e-10)
    np.testing.assert_allclose(ours.singular_values_, pca.singular_values_, rtol=1e-10)
    np.testing.assert_allclose(np.abs(ours.components_), np.abs(pca.components_), atol=1e-10)
    # inverse transform of the scores, against scikit-learn's inverse of the same pipeline
    np.testing.assert_allclose(ours.inverse_transform(ours.transform(X)), ref.inverse_transform(T_ref), atol=1e-8)


def test_pipeline_with_a_classifier(wine):
    X, y, _ = wine
    ours = Pipeline([("pca", AxiscopePCA(n_components=3)), ("clf", LogisticRegression(max_iter=2000))]).fit(X,
                                                                                                            y)
    # reference: the same pipeline with scikit-learn's StandardScaler + PCA; L2 logistic
    # regression does not depend on the signs of its inputs, so predictions are identical
    ref = make_pipeline(StandardScaler(), PCA(n_components=3, svd_solver="full"),
                        LogisticRegression(max_iter=2000)).fit(X, y)
    np.testing.assert_array_equal(ours.predict(X), ref.predict(X))
    np.testing.assert_allclose(np.sort(ours.predict_proba(X), axis=None), np.sort(ref.predict_proba(X), axis=None), atol=1e-6)


def test_feature_names_out_and_pandas_output(wine):
    X, _, names = wine
    df = pd.DataFrame(X, columns=names)
    est = AxiscopePCA(n_components=3).set_output(transform="pandas").fit(df)
    out = est.transform(df)
    assert list(out.columns) == ["PC1", "PC2", "PC3"]
    assert list(est.get_feature_names_out()) == ["PC1", "PC2", "PC3"]
    assert list(est.feature_names_in_) == names
    assert list(est.model_.feature_ids) == names


def test_log_transform_inverse_transform_round_trip():
    rng = np.random.default_rng(0)
    counts = rng.poisson(rng.uniform(1, 50, size=12), size=(100, 12)).astype(float)
    est = AxiscopePCA(n_components=11, log_transform=True, scale="none").fit(counts)
    back = est.inverse_transform(est.transform(counts))
    # reference: numpy — with k = p − 1 of a centred matrix of rank ≤ p the reconstruction keeps
    # everything but the last axis; compare in log space with the dense SVD computed here
    L = np.log1p(counts)
    C = L - L.mean(axis=0)
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    expected = np.expm1((U[:, :11] * s[:11]) @ Vt[:11] + L.mean(axis=0))
    np.testing.assert_allclose(back, expected, rtol=1e-8, atol=1e-8)
    with pytest.raises(ValueError, match="cannot undo counts_per"):
        AxiscopePCA(n_components=2, counts_per=100.0).fit(counts).inverse_transform(np.zeros((1, 2)))


def test_save_then_score_from_the_cli(wine, tmp_path):
    X, _, names = wine
    df = pd.DataFrame(X, columns=names)
    est = AxiscopePCA(n_components=3).fit(df)
    est.save(tmp_path / "model")
    # the new file orders its columns differently: matching is by name
    reordered = df[names[::-1]]
    reordered.insert(0, "id", [f"w{i}" for i in range(len(df))])
    reordered.to_csv(tmp_path / "new.tsv", sep="\t", index=False)
    r = runner.invoke(app, ["score", str(tmp_path / "model"), str(tmp_path / "new.tsv"), "--out", str(tmp_path / "scored")])
    assert r.exit_code == 0, r.output
    scores = pd.read_csv(tmp_path / "scored" / "scores.tsv", sep="\t")[["PC1", "PC2", "PC3"]].to_numpy()
    # reference: scikit-learn StandardScaler (population SD) + PCA (full LAPACK SVD); axes
    # aligned by sign; the CLI writes 8 significant digits
    T_ref = make_pipeline(StandardScaler(), PCA(n_components=3, svd_solver="full")).fit(X).transform(X)
    np.testing.assert_allclose(_align(scores, T_ref), T_ref, rtol=1e-6, atol=1e-6)
    # format round trip (save → load, same code path): the loaded estimator transforms alike
    loaded = AxiscopePCA.load(tmp_path / "model")
    np.testing.assert_allclose(loaded.transform(df), est.transform(df), atol=1e-12)
    assert loaded.get_params()["n_components"] == 3


def test_cli_fit_then_load_in_python(wine, tmp_path):
    X, _, names = wine
    pd.DataFrame(X, columns=names, index=[f"w{i}" for i in range(len(X))]).to_csv(tmp_path / "wine.tsv", sep="\t")
    r = runner.invoke(app, ["fit", str(tmp_path / "wine.tsv"), "--out", str(tmp_path / "fit"), "-k", "3", "--quiet"])
    assert r.exit_code == 0, r.output
    est = AxiscopePCA.load(tmp_path / "fit" / "model")
    table = pd.read_csv(tmp_path / "fit" / "sample_scores.tsv", sep="\t")
    # reference: the scores written by 'axiscope fit' (8 significant digits)
    np.testing.assert_allclose(est.transform(pd.DataFrame(X, columns=names)), table[["PC1", "PC2", "PC3"]].to_numpy(),
                               rtol=1e-6, atol=1e-6)
    with pytest.raises(ModelError, match="not a model directory"):
        AxiscopePCA.load(tmp_path / "fit")


def test_invalid_parameters_raise_value_error(wine):
    X, _, _ = wine
    # 178 samples × 13 features, centred: rank at most min(177, 13) = 13, as scikit-learn allows
    with pytest.raises(ValueError, match=r"n_components=14 is too large.*at most .* = 13"):
        AxiscopePCA(n_components=14).fit(X)
    with pytest.raises(ValueError, match=r"n_components=14 is too large.*at most .* = 13"):
        AxiscopePCA(n_components=14, center=False).fit(X)
    with pytest.raises(ValueError, match="scale="):
        AxiscopePCA(scale="zscore").fit(X)
    with pytest.raises(ValueError, match="method="):
        AxiscopePCA(method="fast").fit(X)


def test_as_many_axes_as_the_rank(wine):
    """178 × 13 centred has rank 13: all thirteen axes, as sklearn.decomposition.PCA gives
    (reference: PCA(n_components=13, svd_solver="full") after StandardScaler)."""
    X, _, _ = wine
    ours = AxiscopePCA(n_components=13).fit(X)
    ref = make_pipeline(StandardScaler(), PCA(n_components=13, svd_solver="full")).fit(X)
    np.testing.assert_allclose(ours.singular_values_, ref[-1].singular_values_, rtol=1e-8)
    np.testing.assert_allclose(ours.explained_variance_ratio_.sum(), 1.0, rtol=1e-10)
