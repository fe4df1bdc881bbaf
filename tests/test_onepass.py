"""One-pass mode (``method="one-pass"``, ``axiscope fit --passes 1``).

Checks against LAPACK (numpy.linalg.svd of the dense standardised matrix, formed here):
on a matrix of exact low rank the two-sketch approximation of Tropp, Yurtsever, Udell &
Cevher (2017, SIAM J. Matrix Anal. Appl. 38(4)) is exact, whatever the feature means and
scales, so any slip in the centring or scaling folded in after the pass shows; with noise,
the reported bounds must hold and the error estimated from the separate sketch must agree
with the true error (its square is a mean of 20 squared Gaussian projections: a scaled
chi-square with 20 degrees of freedom divided by 20, whose 0.1% and 99.9% quantiles are
about 0.33 and 2.3 — scipy.stats.chi2.ppf([0.001, 0.999], 20) / 20).
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import scipy.stats
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.core.options import EngineSettings, Resources
from axiscope.core.preprocess import PreprocessSpec
from axiscope.errors import OptionError
from axiscope.fitting.run import fit
from axiscope.io import array_source


def _standardised(X: np.ndarray) -> np.ndarray:
    X = X.astype(np.float64)
    return (X - X.mean(axis=0)) / X.std(axis=0)


def _low_rank(n: int, p: int, r: int, *, noise: float, seed: int) -> np.ndarray:
    """Rank-``r`` signal (plus noise) with feature means near 1000 and scales over 4 decades."""
    rng = np.random.default_rng(seed)
    signal = (rng.standard_normal((n, r)) * np.linspace(6, 3, r)) @ rng.standard_normal((r, p))
    X = signal + noise * rng.standard_normal((n, p))
    return X * np.exp(rng.uniform(-4.6, 4.6, p)) + rng.uniform(500, 1500, p)


def _one_pass(X, k, **kwargs):
    return fit(array_source(X), n_components=k, engine=EngineSettings(method="one-pass", seed=3), **kwargs)


@pytest.mark.parametrize("n,p,r", [(300, 200, 3), (150, 400, 5)])
def test_exact_on_exact_low_rank(n, p, r):
    """Source: numpy.linalg.svd (LAPACK) of the standardised matrix, rank r exactly."""
    X = _low_rank(n, p, r, noise=0.0, seed=n)
    _, s, vt = np.linalg.svd(_standardised(X), full_matrices=False)
    result = _one_pass(X, r)
    fac = result.factorization
    np.testing.assert_allclose(fac.singular_values, s[:r], rtol=1e-8)
    cosines = np.abs(np.sum(fac.components[result.preprocessing.kept] * vt[:r].T, axis=0))
    np.testing.assert_allclose(cosines, 1.0, atol=1e-8)
    # per-sample squared distances: exact too when the sketch holds the whole row space
    np.testing.assert_allclose(result.sample_sq_dist, np.sum(_standardised(X) ** 2, axis=1), rtol=1e-7)
    assert result.manifest["passes"]["count"] == 1


def test_exact_on_exact_low_rank_float32_far_means():
    """float32 input with means 1000 spreads away: centred blockwise, so still close to LAPACK's."""
    X = _low_rank(400, 120, 2, noise=0.0, seed=9).astype(np.float32)
    _, s, _ = np.linalg.svd(_standardised(X), full_matrices=False)
    fac = _one_pass(X, 2).factorization
    np.testing.assert_allclose(fac.singular_values, s[:2], rtol=1e-4)  # float32 rounding of the products


def test_supplementary_features_add_nothing():
    """Features left out before the pass have zero rows in the test matrix: still exact."""
    X = _low_rank(200, 150, 3, noise=0.0, seed=4)
    rng = np.random.default_rng(0)
    X[:, :20] = rng.standard_normal((200, 20)) * 50  # unrelated features, left out of the axes
    exclude = np.zeros(150, dtype=bool)
    exclude[:20] = True
    _, s, _ = np.linalg.svd(_standardised(X[:, 20:]), full_matrices=False)
    fac = _one_pass(X, 3, exclude_features=exclude).factorization
    np.testing.assert_allclose(fac.singular_values, s[:3], rtol=1e-8)


def test_noisy_bounds_hold_and_error_estimate_agrees():
    """Source: numpy.linalg.svd; the bounds are Weyl's and Wedin's from the estimated error."""
    X = _low_rank(500, 300, 4, noise=0.3, seed=11)
    Xs = _standardised(X)
    _, s, vt = np.linalg.svd(Xs, full_matrices=False)
    result = _one_pass(X, 4)
    fac = result.factorization
    true_value_error = np.abs(fac.singular_values - s[:4]) / s[:4]
    assert np.all(true_value_error <= fac.accuracy.singular_value)
    sines = np.sqrt(np.maximum(0.0, 1 - np.sum(fac.components * vt[:4].T, axis=0) ** 2))
    assert np.all(sines <= fac.accuracy.vector)
    approx = fac.scores @ fac.components.T
    true_rel = np.linalg.norm(Xs - approx) / np.linalg.norm(Xs)
    estimated = result.manifest["one_pass"]["estimated_relative_error"]
    low, high = scipy.stats.chi2.ppf([0.001, 0.999], 20) / 20
    assert low <= (estimated / true_rel) ** 2 <= high
    # the variance ratios use the exact total from the statistics pass
    np.testing.assert_allclose(result.model.total_inertia, np.sum(Xs**2) / Xs.shape[0], rtol=1e-10)


def test_same_bytes_whatever_the_threads():
    X = _low_rank(600, 100, 3, noise=0.2, seed=5)
    runs = [fit(array_source(X), n_components=3, engine=EngineSettings(method="one-pass", seed=1),
                resources=Resources(threads=t, memory_limit="200MB")) for t in (1, 2)]
    assert runs[0].factorization.scores.tobytes() == runs[1].factorization.scores.tobytes()
    assert runs[0].factorization.components.tobytes() == runs[1].factorization.components.tobytes()


@pytest.mark.parametrize("spec", [PreprocessSpec(top_variable=10), PreprocessSpec(min_variance=0.5),
                                  PreprocessSpec(missing="mean")])
def test_options_that_need_statistics_first_are_refused(spec):
    X = _low_rank(50, 30, 2, noise=0.1, seed=1)
    with pytest.raises(OptionError, match="one-pass"):
        fit(array_source(X), n_components=2, preprocess=spec, engine=EngineSettings(method="one-pass"))


def test_cli_passes_one(tmp_path):
    X = _low_rank(300, 80, 3, noise=0.0, seed=2).astype(np.float32)
    np.save(tmp_path / "x.npy", X)
    run = CliRunner().invoke(app, ["fit", str(tmp_path / "x.npy"), "--out", str(tmp_path / "r"), "-k", "3",
                                   "--passes", "1"])
    assert run.exit_code == 0, run.output
    assert "1 pass over the data" in run.stdout
    manifest = json.loads((tmp_path / "r" / "manifest.json").read_text())
    assert manifest["options"]["method"] == "one-pass"
    assert manifest["one_pass"]["sample_distances"] == "estimated"
    bad = subprocess.run([sys.executable, "-c", "import sys; from axiscope.cli import main; sys.exit(main())", "fit",
                          str(tmp_path / "x.npy"), "--out", str(tmp_path / "r2"), "--passes", "1", "--method",
                          "exact"], capture_output=True, text=True)
    assert bad.returncode == 2 and bad.stderr.count("\n") == 1, bad.stderr
    assert not (tmp_path / "r2").exists()
