"""One-pass mode with covariates (``--passes 1 --adjust-for``) and on sparse input.

References: the explicit computation — the dense standardised matrix (centred, divided by
the population SD) residualised on the covariates with ``numpy.linalg.lstsq`` (LAPACK
``gelsd``), then ``numpy.linalg.svd`` (LAPACK ``gesdd``). On a matrix whose adjusted part
has exact low rank the two-sketch approximation (Tropp, Yurtsever, Udell & Cevher 2017,
SIAM J. Matrix Anal. Appl. 38(4)) is exact, so the tolerances are those of
``tests/test_onepass.py::test_exact_on_exact_low_rank`` (1e-8 on the singular values and
the loadings' cosines, 1e-7 on the squared distances). With noise, the error estimated
from the separate sketch must agree with the true error within the 0.1% and 99.9%
quantiles of a chi-square with 20 degrees of freedom divided by 20
(``scipy.stats.chi2.ppf([0.001, 0.999], 20) / 20``). Sparse input must give the numbers of
its dense copy to 1e-6 relative (float64), the sparse tests' own tolerance. Invented data
only where the test planted the truth it checks.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
import scipy.stats

from axiscope.core.adjust import Covariates
from axiscope.core.options import EngineSettings
from axiscope.fitting.run import fit
from axiscope.io import array_source

ONE_PASS = EngineSettings(method="one-pass", seed=3)


def _planted(n: int, p: int, r: int, *, noise: float, seed: int):
    """Rank-``r`` signal plus a 3-level batch shift and a depth trend, features far from zero
    and on scales over 4 decades; the table of covariates and their design matrix ``C``."""
    rng = np.random.default_rng(seed)
    X = (rng.standard_normal((n, r)) * np.linspace(6, 3, r)) @ rng.standard_normal((r, p))
    X += noise * rng.standard_normal((n, p))
    batch = rng.choice(["A", "B", "C"], n)
    depth = rng.normal(10.0, 2.0, n)
    X += (batch == "B")[:, None] * rng.normal(0, 3, p) + (batch == "C")[:, None] * rng.normal(0, 2, p)
    X += depth[:, None] * rng.normal(0, 0.5, p)
    X = X * np.exp(rng.uniform(-4.6, 4.6, p)) + rng.uniform(500, 1500, p)
    ids = [f"s{i}" for i in range(n)]
    table = pd.DataFrame({"sample_id": ids, "batch": batch, "depth": depth})
    C = np.column_stack([np.ones(n), batch == "B", batch == "C", depth]).astype(float)
    return X, ids, table, C


def _residualised(X: np.ndarray, C: np.ndarray) -> np.ndarray:
    """The standardised matrix (population SD) minus its least-squares fit on ``C`` (lstsq)."""
    Xs = (X - X.mean(axis=0)) / X.std(axis=0)
    coef, *_ = np.linalg.lstsq(C, Xs, rcond=None)
    return Xs - C @ coef


@pytest.mark.parametrize("n,p,r", [(300, 200, 3), (150, 400, 5)])
def test_adjusted_exact_on_exact_low_rank(n, p, r):
    """Source: lstsq residualisation + numpy.linalg.svd; the adjusted matrix has rank r exactly."""
    X, ids, table, C = _planted(n, p, r, noise=0.0, seed=n)
    A = _residualised(X, C)
    _, s, vt = np.linalg.svd(A, full_matrices=False)
    assert s[r] < 1e-9 * s[0]  # the plant: exact rank r once the covariates are out
    result = fit(array_source(X, sample_ids=ids), n_components=r, engine=ONE_PASS,
                 covariates=Covariates(table, ["batch", "depth"]))
    fac = result.factorization
    np.testing.assert_allclose(fac.singular_values, s[:r], rtol=1e-8)
    cosines = np.abs(np.sum(fac.components[result.preprocessing.kept] * vt[:r].T, axis=0))
    np.testing.assert_allclose(cosines, 1.0, atol=1e-8)
    np.testing.assert_allclose(result.sample_sq_dist, np.sum(A**2, axis=1), rtol=1e-7)
    np.testing.assert_allclose(result.model.total_inertia, np.sum(A**2) / n, rtol=1e-10)
    assert result.manifest["passes"]["count"] == 1
    assert result.manifest["adjusted_for"]["terms"] == ["intercept", "batch=B", "batch=C", "depth"]


def test_adjusted_noisy_error_estimate_agrees():
    """With noise: the Weyl bounds hold and the estimated error is the true one (chi-square, 20 rows)."""
    X, ids, table, C = _planted(500, 300, 4, noise=0.3, seed=11)
    A = _residualised(X, C)
    _, s, _ = np.linalg.svd(A, full_matrices=False)
    result = fit(array_source(X, sample_ids=ids), n_components=4, engine=ONE_PASS,
                 covariates=Covariates(table, ["batch", "depth"]))
    fac = result.factorization
    assert np.all(np.abs(fac.singular_values - s[:4]) / s[:4] <= fac.accuracy.singular_value)
    true_rel = np.linalg.norm(A - fac.scores @ fac.components.T) / np.linalg.norm(A)
    estimated = result.manifest["one_pass"]["estimated_relative_error"]
    low, high = scipy.stats.chi2.ppf([0.001, 0.999], 20) / 20
    assert low <= (estimated / true_rel) ** 2 <= high


def test_cli_one_pass_adjusted_then_score_with_annotations(tmp_path):
    """``fit --passes 1 --adjust-for`` then ``score --annotations`` on the training samples: on an
    adjusted matrix of exact low rank, the scores of the fit come back (same tolerance as
    tests/test_adjust.py::test_command_line_fit_and_score)."""
    from axiscope.cli._app import main

    X, ids, table, _ = _planted(120, 40, 3, noise=0.0, seed=5)
    np.save(tmp_path / "m.npy", X)
    (tmp_path / "ids.txt").write_text("\n".join(ids) + "\n")
    table.to_csv(tmp_path / "ann.tsv", sep="\t", index=False)
    common = ["--sample-ids", str(tmp_path / "ids.txt"), "-q", "--threads", "1"]
    assert main(["fit", str(tmp_path / "m.npy"), "--out", str(tmp_path / "fit"), "-k", "3", "--passes", "1",
                 *common, "--annotations", str(tmp_path / "ann.tsv"), "--adjust-for", "batch,depth"]) == 0
    manifest = json.loads((tmp_path / "fit" / "manifest.json").read_text())
    assert manifest["options"]["method"] == "one-pass"
    assert manifest["adjusted_for"]["columns"] == ["batch", "depth"]
    assert main(["score", str(tmp_path / "fit"), str(tmp_path / "m.npy"), "--out", str(tmp_path / "score"),
                 *common, "--annotations", str(tmp_path / "ann.tsv")]) == 0
    fitted = pd.read_csv(tmp_path / "fit" / "sample_scores.tsv", sep="\t", comment="#")
    scored = pd.read_csv(tmp_path / "score" / "scores.tsv", sep="\t", comment="#")
    cols = ["PC1", "PC2", "PC3"]
    np.testing.assert_allclose(scored[cols].to_numpy(), fitted[cols].to_numpy(), rtol=1e-6, atol=1e-9)


def _counts(n: int = 300, p: int = 120, seed: int = 0) -> sp.csr_matrix:
    """Poisson counts around a planted rank-3 rate matrix, about 90% zeros (as in tests/test_sparse.py)."""
    rng = np.random.default_rng(seed)
    rates = 0.1 * rng.gamma(1.0, 1.0, (n, 3)) @ (rng.gamma(0.3, 1.0, (3, p)) * np.array([[3.0], [1.5], [0.8]]))
    counts = rng.poisson(rates).astype(np.float64)
    counts[:, :3] += rng.poisson(0.3, (n, 3))  # no column all zero
    return sp.csr_matrix(counts)


def _same(a, b):
    fa, fb = a.factorization, b.factorization
    np.testing.assert_allclose(fa.singular_values, fb.singular_values, rtol=1e-6)
    np.testing.assert_allclose(fa.components, fb.components, atol=1e-6)
    np.testing.assert_allclose(fa.scores, fb.scores, atol=1e-6 * np.abs(fb.scores).max())
    np.testing.assert_allclose(a.sample_sq_dist, b.sample_sq_dist, rtol=1e-6)
    np.testing.assert_allclose(a.manifest["one_pass"]["estimated_relative_error"],
                               b.manifest["one_pass"]["estimated_relative_error"], rtol=1e-6)


@pytest.mark.parametrize("adjusted", [False, True])
def test_sparse_one_pass_equals_dense_copy(monkeypatch, adjusted):
    """Sparse blocks (never densified) give the dense copy's one-pass result to 1e-6 (float64)."""
    import axiscope.core.onepass as onepass
    from axiscope.core.sparse_ops import is_sparse

    X = _counts()
    seen = []
    original = onepass.sparse_transposed_product

    def spy(block, rows):
        assert is_sparse(block)  # compressed: SciPy's CSC, or the tiled layout of the compiled loops
        seen.append(block.nnz)
        return original(block, rows)

    monkeypatch.setattr(onepass, "sparse_transposed_product", spy)
    ids = [f"s{i}" for i in range(X.shape[0])]
    covariates = None
    if adjusted:
        rng = np.random.default_rng(1)
        table = pd.DataFrame({"sample_id": ids, "batch": rng.choice(["A", "B"], X.shape[0]),
                              "depth": np.asarray(X.sum(axis=1)).ravel()})
        covariates = Covariates(table, ["batch", "depth"])
    kw = dict(n_components=3, engine=ONE_PASS, covariates=covariates)
    sparse = fit(array_source(X, sample_ids=ids), **kw)
    dense = fit(array_source(X.toarray(), sample_ids=ids), **kw)
    assert seen and sum(seen) == X.nnz  # every block went through the sparse product
    _same(sparse, dense)
    assert sparse.manifest["passes"]["count"] == 1


def test_sparse_one_pass_with_transforms_equals_dense():
    """log and counts per million on the stored values; the dense copy's numbers back."""
    from axiscope.core.preprocess import PreprocessSpec

    X = _counts(seed=4)
    spec = PreprocessSpec(counts_per=1e6, log_transform=True)
    sparse = fit(array_source(X), n_components=3, engine=ONE_PASS, preprocess=spec)
    dense = fit(array_source(X.toarray()), n_components=3, engine=ONE_PASS, preprocess=spec)
    _same(sparse, dense)


@pytest.mark.parametrize("sparse", [False, True])
def test_non_finite_value_is_named(sparse):
    """A NaN stops the pass with the sample and feature named (dense and sparse blocks)."""
    from axiscope.errors import InputError

    X = _counts(n=60, p=20, seed=2).toarray()
    X[37, 5] = np.nan
    data = sp.csr_matrix(X) if sparse else X
    ids = [f"s{i}" for i in range(60)]
    with pytest.raises(InputError, match="sample 's37', feature 'feature_000006' is (NaN or infinite|stored as nan)"):
        fit(array_source(data, sample_ids=ids), n_components=2, engine=ONE_PASS)


def test_cli_sparse_npz_one_pass_equals_dense_npy(tmp_path):
    """``fit --passes 1`` on a SciPy .npz file and on its dense copy: the same singular values (1e-6)."""
    from axiscope.cli._app import main

    X = _counts(seed=7)
    sp.save_npz(tmp_path / "m.npz", X)
    np.save(tmp_path / "m.npy", X.toarray())
    for name in ("m.npz", "m.npy"):
        assert main(["fit", str(tmp_path / name), "--out", str(tmp_path / name.replace(".", "-")), "-k", "3",
                     "--passes", "1", "-q", "--threads", "1"]) == 0
    got = [pd.read_csv(tmp_path / d / "components.tsv", sep="\t").singular_value.to_numpy() for d in ("m-npz", "m-npy")]
    np.testing.assert_allclose(got[0], got[1], rtol=1e-6)
    manifest = json.loads((tmp_path / "m-npz" / "manifest.json").read_text())
    assert manifest["input"]["storage"].startswith("sparse") and manifest["passes"]["count"] == 1


def test_caller_array_is_left_alone():
    """Blocks are centred in place only when they are the reader's fresh copies: the caller's
    array is unchanged after a fit and after a direct call on blocks that are views of it."""
    from axiscope.core.onepass import one_pass_factorization
    from axiscope.core.passes import array_from_blocks
    from axiscope.core.preprocess import FeatureStatistics

    X, *_ = _planted(80, 30, 2, noise=0.1, seed=1)
    before = X.copy()
    fit(array_source(X), n_components=2, engine=ONE_PASS)
    stats_of = lambda b: (FeatureStatistics.from_block_stats(b).mean, np.ones(X.shape[1]))  # noqa: E731
    views = array_from_blocks(lambda i: X[40 * i : 40 * (i + 1)], [40, 40], 30, X.dtype, "views")
    one_pass_factorization(views, n_components=2, oversample=5, rng=np.random.default_rng(0), finish=stats_of)
    assert np.array_equal(X, before)


def test_estimator_one_pass_sparse_equals_dense():
    """``AxiscopePCA(method="one-pass")`` on a SciPy sparse matrix and on its dense copy (1e-6)."""
    from axiscope.estimator import AxiscopePCA

    X = _counts(seed=8)
    a = AxiscopePCA(n_components=3, method="one-pass", random_state=0).fit(X)
    b = AxiscopePCA(n_components=3, method="one-pass", random_state=0).fit(X.toarray())
    np.testing.assert_allclose(a.singular_values_, b.singular_values_, rtol=1e-6)
    scores = b.transform(X[:20].toarray())
    np.testing.assert_allclose(a.transform(X[:20]), scores, atol=1e-6 * np.abs(scores).max())
