"""What a scikit-learn PCA user expects of :class:`AxiscopePCA`, checked against scikit-learn.

Outside references, named at each check: ``sklearn.decomposition.PCA`` with
``svd_solver="full"`` (LAPACK), ``sklearn.preprocessing.StandardScaler``,
``sklearn.decomposition.IncrementalPCA``, scikit-learn's private
``sklearn.decomposition._pca._assess_dimension`` (its implementation of Minka's evidence),
scikit-learn's bundled iris and wine data, and numpy/LAPACK. Matrices are small (≤ 400 × 30).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse
from sklearn.datasets import load_iris, load_wine
from sklearn.decomposition import PCA, IncrementalPCA
from sklearn.decomposition._pca import _assess_dimension
from sklearn.preprocessing import StandardScaler

from axiscope.estimator import AxiscopePCA
from axiscope.model.probabilistic import minka_log_evidence


def _signs(A, B):
    """Flip the rows of A (axes) to the signs of B's rows: axes are defined up to sign."""
    return A * np.sign(np.sum(A * B, axis=1))[:, None]


def _planted(n, p, rank, noise, seed):
    """Low-rank signal plus Gaussian noise, column means far from zero (invented data)."""
    rng = np.random.default_rng(seed)
    signal = rng.standard_normal((n, rank)) * np.linspace(5, 2, rank) @ rng.standard_normal((rank, p))
    return signal + noise * rng.standard_normal((n, p)) + rng.uniform(-10, 10, p)


@pytest.fixture(scope="module")
def tall():
    return _planted(120, 12, 4, 0.5, seed=1)


@pytest.fixture(scope="module")
def wide():
    return _planted(15, 40, 3, 0.3, seed=2)


# ------------------------------------------------------------------ fitted attributes


@pytest.mark.parametrize("shape", ["tall", "wide"])
@pytest.mark.parametrize("k", [1, 3, 6])
def test_covariance_pca_attributes_match_sklearn(request, shape, k):
    X = request.getfixturevalue(shape)
    ours = AxiscopePCA(k, scale="none").fit(X)
    # reference: sklearn.decomposition.PCA, full LAPACK SVD (explained_variance_ = s²/(n−1))
    ref = PCA(k, svd_solver="full").fit(X)
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_, rtol=1e-10)
    np.testing.assert_allclose(ours.explained_variance_ratio_, ref.explained_variance_ratio_, rtol=1e-10)
    np.testing.assert_allclose(ours.singular_values_, ref.singular_values_, rtol=1e-10)
    np.testing.assert_allclose(ours.noise_variance_, ref.noise_variance_, rtol=1e-10)
    np.testing.assert_allclose(_signs(ours.components_, ref.components_), ref.components_, atol=1e-10)
    np.testing.assert_allclose(ours.mean_, ref.mean_, rtol=1e-12)
    T = ref.transform(X)
    np.testing.assert_allclose(_signs(ours.transform(X).T, T.T).T, T, atol=1e-9)


def test_explained_variance_convention_is_n_minus_1_and_model_keeps_population(tall):
    ours = AxiscopePCA(3, scale="none").fit(tall)
    n = tall.shape[0]
    scores = ours.transform(tall)
    # reference: numpy's sample variance (ddof=1) of the scores, and the population one
    np.testing.assert_allclose(ours.explained_variance_, scores.var(axis=0, ddof=1), rtol=1e-10)
    np.testing.assert_allclose(ours.model_.variance, scores.var(axis=0, ddof=0), rtol=1e-10)
    np.testing.assert_allclose(ours.model_.variance * n / (n - 1), ours.explained_variance_, rtol=1e-12)


def test_none_means_every_axis_of_the_centred_rank(wide, tall):
    for X in (wide, tall):
        n, p = X.shape
        ours = AxiscopePCA(scale="none", method="exact").fit(X)
        assert ours.n_components_ == min(n - 1, p)
        # reference: sklearn PCA(full); sklearn's None keeps min(n, p) axes, the last of a wide
        # centred matrix of zero variance: the first min(n − 1, p) agree
        ref = PCA(svd_solver="full").fit(X)
        k = ours.n_components_
        np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_[:k], rtol=1e-9)


# ------------------------------------------------------------------ probabilistic model


@pytest.mark.parametrize("shape", ["tall", "wide"])
def test_probabilistic_model_matches_sklearn(request, shape):
    X = request.getfixturevalue(shape)
    new = _planted(30, X.shape[1], 2, 1.0, seed=9)
    ours = AxiscopePCA(3, scale="none").fit(X)
    # reference: sklearn PCA(full).get_covariance / get_precision / score_samples / score
    ref = PCA(3, svd_solver="full").fit(X)
    np.testing.assert_allclose(ours.get_covariance(), ref.get_covariance(), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(ours.get_precision(), ref.get_precision(), rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(ours.score_samples(new), ref.score_samples(new), rtol=1e-9)
    np.testing.assert_allclose(ours.score(X), ref.score(X), rtol=1e-9)


def test_probabilistic_model_under_unit_scaling_is_a_density_of_the_input(tall):
    ours = AxiscopePCA(3).fit(tall)
    # reference: StandardScaler (population SD) then sklearn PCA(full) on the standardized data;
    # the density of x is that of z = (x − μ)/σ times the Jacobian Π 1/σ_j
    sc = StandardScaler().fit(tall)
    ref = PCA(3, svd_solver="full").fit(sc.transform(tall))
    D = np.diag(sc.scale_)
    np.testing.assert_allclose(ours.get_covariance(), D @ ref.get_covariance() @ D, rtol=1e-9, atol=1e-10)
    Dinv = np.diag(1 / sc.scale_)
    np.testing.assert_allclose(ours.get_precision(), Dinv @ ref.get_precision() @ Dinv, rtol=1e-7, atol=1e-10)
    expected = ref.score_samples(sc.transform(tall)) - np.sum(np.log(sc.scale_))
    np.testing.assert_allclose(ours.score_samples(tall), expected, rtol=1e-9)


def test_score_samples_flags_an_outlier(tall):
    ours = AxiscopePCA(4, scale="none").fit(tall)
    odd = tall[:5].copy()
    odd[0] += 20.0 * np.std(tall, axis=0)  # planted: far from the model in every feature
    ll = ours.score_samples(odd)
    assert np.argmin(ll) == 0 and ll[0] < ll[1:].min() - 100


def test_counts_per_has_no_density():
    counts = np.random.default_rng(3).poisson(20, size=(40, 6)).astype(float)
    est = AxiscopePCA(2, counts_per=100.0).fit(counts)
    with pytest.raises(ValueError, match="counts_per"):
        est.score_samples(counts)


# ------------------------------------------------------------------ choosing n_components


@pytest.mark.parametrize("share", [0.01, 0.5, 0.8, 0.95, 0.999])
def test_share_of_variance_matches_sklearn(share):
    X = load_iris().data  # reference data: scikit-learn's bundled iris (150 × 4)
    ours = AxiscopePCA(share, scale="none").fit(X)
    ref = PCA(share, svd_solver="full").fit(X)  # reference: sklearn PCA(full)
    assert ours.n_components_ == ref.n_components_
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_, rtol=1e-10)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("rank", [1, 3, 5])
def test_mle_choice_matches_sklearn(seed, rank):
    X = _planted(200, 10, rank, 1.0, seed=seed)
    ours = AxiscopePCA("mle", scale="none").fit(X)
    ref = PCA("mle", svd_solver="full").fit(X)  # reference: sklearn PCA(n_components='mle')
    assert ours.n_components_ == ref.n_components_ == rank  # the planted rank is found


def test_minka_evidence_matches_sklearn_values():
    X = load_wine().data  # reference data: scikit-learn's bundled wine data (178 × 13)
    X = StandardScaler().fit_transform(X)
    lam = PCA(svd_solver="full").fit(X).explained_variance_
    for k in range(1, 13):
        # reference: scikit-learn's implementation of Minka (2000), _assess_dimension
        np.testing.assert_allclose(minka_log_evidence(lam, k, 178), _assess_dimension(lam, k, 178), rtol=1e-12)


def test_mle_needs_more_samples_than_features(wide):
    with pytest.raises(ValueError, match="n_components='mle' needs at least as many samples"):
        AxiscopePCA("mle").fit(wide)


@pytest.mark.parametrize("bad", [0, -1, 1.0, 1.5, "all", True])
def test_bad_n_components_is_refused(tall, bad):
    with pytest.raises(ValueError, match="n_components="):
        AxiscopePCA(bad).fit(tall)


# ------------------------------------------------------------------ whiten, dtype, inverse


def test_whiten_matches_sklearn(tall):
    ours = AxiscopePCA(3, scale="none", whiten=True).fit(tall)
    ref = PCA(3, svd_solver="full", whiten=True).fit(tall)  # reference: sklearn PCA(full, whiten)
    T = ref.transform(tall)
    Z = ours.transform(tall)
    np.testing.assert_allclose(_signs(Z.T, T.T).T, T, atol=1e-9)
    np.testing.assert_allclose(_signs(ours.fit_transform(tall).T, T.T).T, T, atol=1e-9)
    np.testing.assert_allclose(Z.std(axis=0, ddof=1), 1.0, rtol=1e-10)
    np.testing.assert_allclose(ours.inverse_transform(Z), ref.inverse_transform(T), atol=1e-9)


def test_float32_in_float32_out(tall):
    X32 = tall.astype(np.float32)
    ours = AxiscopePCA(3, scale="none").fit(X32)
    assert ours.components_.dtype == np.float32
    assert ours.explained_variance_.dtype == np.float32
    assert ours.transform(X32).dtype == np.float32
    assert ours.fit_transform(X32).dtype == np.float32
    assert ours.inverse_transform(ours.transform(X32)).dtype == np.float32
    # reference: sklearn PCA(full) on the same float32 values in float64; accuracy of float32
    # inputs (relative rounding 6e-8 per value) after float64 accumulation
    ref = PCA(3, svd_solver="full").fit(X32.astype(np.float64))
    np.testing.assert_allclose(_signs(ours.components_, ref.components_), ref.components_, atol=1e-5)
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_, rtol=1e-5)
    assert AxiscopePCA(3).fit(tall).transform(tall).dtype == np.float64


@pytest.mark.parametrize("scale", ["none", "unit"])
@pytest.mark.parametrize("whiten", [False, True])
def test_inverse_transform_matches_sklearn(tall, scale, whiten):
    ours = AxiscopePCA(4, scale=scale, whiten=whiten).fit(tall)
    # reference: sklearn PCA(full), after StandardScaler (population SD) for unit scaling
    sc = StandardScaler(with_std=scale == "unit").fit(tall)
    ref = PCA(4, svd_solver="full", whiten=whiten).fit(sc.transform(tall))
    expected = sc.inverse_transform(ref.inverse_transform(ref.transform(sc.transform(tall))))
    np.testing.assert_allclose(ours.inverse_transform(ours.transform(tall)), expected, rtol=1e-9, atol=1e-9)


def test_inverse_transform_under_allele_frequency_scaling():
    rng = np.random.default_rng(5)
    G = rng.binomial(2, rng.uniform(0.1, 0.9, 25), size=(60, 25)).astype(float)
    ours = AxiscopePCA(24, scale="allele-frequency").fit(G)
    # reference: numpy/LAPACK on (G − 2q)/sqrt(2q(1−q)), q = mean/2: keeping 24 of the 24 axes of
    # a centred 60 × 25 matrix (rank ≤ 25) loses only the 25th
    q = G.mean(axis=0) / 2
    d = np.sqrt(2 * q * (1 - q))
    U, s, Vt = np.linalg.svd((G - 2 * q) / d, full_matrices=False)
    expected = ((U[:, :24] * s[:24]) @ Vt[:24]) * d + 2 * q
    np.testing.assert_allclose(ours.inverse_transform(ours.transform(G)), expected, rtol=1e-9, atol=1e-9)


# ------------------------------------------------------------------ partial_fit


def test_partial_fit_matches_incremental_pca(tall):
    ours = AxiscopePCA(4, scale="none")
    ref = IncrementalPCA(4)
    for start in range(0, tall.shape[0], 20):
        ours.partial_fit(tall[start:start + 20])
        ref.partial_fit(tall[start:start + 20])
    # reference: sklearn.decomposition.IncrementalPCA, the same update (Ross et al. 2008)
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_, rtol=1e-9)
    np.testing.assert_allclose(ours.singular_values_, ref.singular_values_, rtol=1e-9)
    np.testing.assert_allclose(_signs(ours.components_, ref.components_), ref.components_, atol=1e-9)
    np.testing.assert_allclose(ours.mean_, ref.mean_, rtol=1e-12)
    # noise: IncrementalPCA averages the tail of its last small SVD only; ours is the mean of
    # the eigenvalues not kept, from the exact running total (reference: numpy's sample
    # variances of all samples)
    total = np.var(tall, axis=0, ddof=1).sum()
    np.testing.assert_allclose(ours.noise_variance_, (total - ref.explained_variance_.sum()) / (12 - 4), rtol=1e-9)
    assert ours.n_samples_seen_ == ref.n_samples_seen_ == tall.shape[0]
    T = ref.transform(tall)
    np.testing.assert_allclose(_signs(ours.transform(tall).T, T.T).T, T, atol=1e-8)


def test_partial_fit_is_exact_when_the_rank_fits():
    X = _planted(90, 15, 4, 0.0, seed=4)  # planted: centred rank 4, no noise
    inc = AxiscopePCA(6, scale="none")
    for start in range(0, 90, 3):  # batches of 3 samples, fewer than the 6 axes asked for
        inc.partial_fit(X[start:start + 3])
    ref = PCA(4, svd_solver="full").fit(X)  # reference: sklearn PCA(full) on all 90 samples
    assert inc.n_components_ == 4  # the rank seen: axes of zero variance are not invented
    np.testing.assert_allclose(inc.explained_variance_, ref.explained_variance_, rtol=1e-9)
    np.testing.assert_allclose(_signs(inc.components_, ref.components_), ref.components_, atol=1e-9)


def test_partial_fit_accuracy_against_a_full_fit():
    """Beyond rank k the update drops the tail at each step. Measured on planted data
    (400 × 30, 5 spikes of SD 5…2 over unit noise, batches of 25, 20 seeds run while
    writing this test): relative error of the explained variances at most 1.04e-4 (median
    1.9e-5), sine of the largest principal angle at most 1.18e-3 (median 2.6e-4); the
    bounds below are twice the largest. The first three seeds are rerun here."""
    worst_var, worst_sine = 0.0, 0.0
    for seed in range(3):
        X = _planted(400, 30, 5, 1.0, seed=seed)
        inc = AxiscopePCA(5, scale="none")
        for start in range(0, 400, 25):
            inc.partial_fit(X[start:start + 25])
        full = AxiscopePCA(5, scale="none").fit(X)
        # reference: the full fit agrees with LAPACK (test_covariance_pca_attributes_match_sklearn)
        worst_var = max(worst_var, np.max(np.abs(inc.explained_variance_ / full.explained_variance_ - 1)))
        cosines = np.linalg.svd(inc.components_ @ full.components_.T, compute_uv=False)
        worst_sine = max(worst_sine, float(np.sqrt(max(0.0, 1 - cosines.min() ** 2))))
    assert worst_var < 2.1e-4
    assert worst_sine < 2.4e-3


def test_partial_fit_refuses_what_needs_all_samples(tall):
    # available only where it can work; the AttributeError is caused by the reason
    assert not hasattr(AxiscopePCA(2), "partial_fit") and hasattr(AxiscopePCA(2, scale="none"), "partial_fit")
    with pytest.raises(AttributeError, match="partial_fit") as info:
        AxiscopePCA(2).partial_fit(tall)
    assert "partial_fit needs scale='none'" in str(info.value.__cause__)
    with pytest.raises(AttributeError) as info:
        AxiscopePCA(2, scale="none", top_variable=5).partial_fit(tall)
    assert "top_variable" in str(info.value.__cause__)
    with pytest.raises(ValueError, match="n_components=0.5 must be a positive whole number"):
        AxiscopePCA(0.5, scale="none").partial_fit(tall)
    with pytest.raises(ValueError, match="X has 5 features"):
        AxiscopePCA(2, scale="none").partial_fit(tall).partial_fit(tall[:, :5])


# ------------------------------------------------------------------ sparse input


def test_sparse_input_is_refused_until_the_readers_take_it(tall):
    from axiscope.estimator import SPARSE_FORMATS

    if SPARSE_FORMATS:
        pytest.skip("sparse input is supported: its tests are in the sparse suite")
    X = scipy.sparse.csr_array(tall)
    with pytest.raises(TypeError, match="does not take sparse input .csr matrix. yet"):
        AxiscopePCA(2).fit(X)
    est = AxiscopePCA(2).fit(tall)
    with pytest.raises(TypeError, match="does not take sparse input"):
        est.transform(X)


def test_inverse_transform_without_centring(tall):
    ours = AxiscopePCA(6, center=False, scale="none").fit(tall)
    # reference: numpy/LAPACK rank-6 truncated SVD of the uncentred matrix
    U, s, Vt = np.linalg.svd(tall, full_matrices=False)
    np.testing.assert_allclose(ours.inverse_transform(ours.transform(tall)), (U[:, :6] * s[:6]) @ Vt[:6],
                               rtol=1e-9, atol=1e-9)


def test_partial_fit_model_saves_and_loads(tall, tmp_path):
    est = AxiscopePCA(3, scale="none", whiten=True)
    for start in range(0, tall.shape[0], 40):
        est.partial_fit(tall[start:start + 40])
    est.save(tmp_path / "model")
    loaded = AxiscopePCA.load(tmp_path / "model")
    # reference: the estimator that was saved (format round trip)
    assert loaded.whiten is True
    np.testing.assert_allclose(loaded.transform(tall), est.transform(tall), rtol=1e-12)


def test_share_of_variance_under_unit_scaling_matches_sklearn():
    X = load_wine().data  # reference data: scikit-learn's bundled wine data (178 × 13)
    ours = AxiscopePCA(0.8).fit(X)
    # reference: StandardScaler (population SD) then sklearn PCA(0.8, full)
    ref = PCA(0.8, svd_solver="full").fit(StandardScaler().fit_transform(X))
    assert ours.n_components_ == ref.n_components_
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_, rtol=1e-10)
