"""Tests of :mod:`axiscope.shrinkage` (shrinkage of projected scores when p ≫ n).

Outside references: the asymptotic limits of the spiked covariance model, recalled from
memory from Baik & Silverstein (2006, doi:10.1016/j.jmva.2005.08.003; sample eigenvalue
``ℓ(1 + γ/(ℓ−1))``) and Lee, Zou & Wright (2010, doi:10.1214/10-AOS821; shrinkage factor
``(ℓ−1)/(ℓ−1+γ)``), and simulations of that model whose truth (spikes, axes, noise) the
test planted.
"""

from __future__ import annotations

import numpy as np
import pytest

from axiscope import PreprocessSpec, Resources, fit
from axiscope.io import array_source
from axiscope.model.shrinkage import spiked_shrinkage
from axiscope.scoring.score import score


def test_factors_from_exact_asymptotic_eigenvalues():
    # A consistency check of the inversion and of the noise iteration only: the inputs are
    # made with the same asymptotic formula that the code inverts, so an error in the
    # formula itself would pass here. The real guard is the simulation test below
    # (test_corrected_held_out_scores_match_training_variance_in_spiked_simulation), which
    # checks the corrected scores of held-out samples drawn from a planted spiked model.
    n, p, sigma2 = 501, 10_000, 2.0
    gamma = p / (n - 1)
    spikes = np.array([80.0, 40.0, 15.0])  # in units of σ², all above 1 + √γ ≈ 5.5
    # reference: Baik & Silverstein (2006) limit of the sample eigenvalues (recalled from memory)
    lam_sample = sigma2 * spikes * (1 + gamma / (spikes - 1))
    total = sigma2 * (spikes.sum() + (p - 3))  # trace of the population covariance
    to_pop = (n - 1) / n  # the function takes population-convention variances (s²/n)
    est = spiked_shrinkage(lam_sample * to_pop, n_samples=n, n_features=p, total_variance=total * to_pop)
    # reference: Lee, Zou & Wright (2010), factor (ℓ−1)/(ℓ−1+γ) (recalled from memory)
    np.testing.assert_allclose(est.factor, (spikes - 1) / (spikes - 1 + gamma), rtol=1e-9)
    np.testing.assert_allclose(est.spike, spikes, rtol=1e-9)
    assert est.noise_variance == pytest.approx(sigma2, rel=1e-9)
    assert est.gamma == pytest.approx(gamma)


def test_factor_below_detection_threshold_and_continuity_at_it():
    # only numbers enter the formula, so a huge p makes the noise estimate essentially exact
    n, p = 2_500_001, 10_000_000
    gamma = p / (n - 1)  # 4
    edge = (1 + np.sqrt(gamma)) ** 2  # reference: Marchenko–Pastur bulk edge (1 + √γ)², recalled from memory
    lam = np.array([edge * (1 + 1e-4), edge * (1 - 1e-4), 0.8 * edge])
    total = float(p)  # noise variance 1 (the axes at or below the edge carry no detectable spike)
    to_pop = (n - 1) / n
    est = spiked_shrinkage(lam * to_pop, n_samples=n, n_features=p, total_variance=total * to_pop)
    assert est.noise_variance == pytest.approx(1.0, rel=1e-5)
    # at the edge both branches give 1/(1 + √γ): the spike formula (ℓ−1)/(ℓ−1+γ) with ℓ = 1 + √γ,
    # and sqrt(σ²/λ̂) with λ̂ = σ²(1 + √γ)²
    np.testing.assert_allclose(est.factor[:2], 1 / (1 + np.sqrt(gamma)), rtol=0.03)
    assert np.isfinite(est.spike[0]) and np.isnan(est.spike[1])
    # below the edge: a new sample's projection has the noise variance only, factor sqrt(σ²/λ̂)
    assert est.factor[2] == pytest.approx(np.sqrt(1 / (0.8 * edge)), rel=1e-5)


def test_no_shrinkage_when_samples_far_outnumber_features():
    est = spiked_shrinkage(np.array([30.0, 10.0]), n_samples=100_000, n_features=50, total_variance=88.0)
    # reference: γ → 0 limit of (ℓ−1)/(ℓ−1+γ) is 1
    assert np.all(est.factor > 0.999)


def test_corrected_held_out_scores_match_training_variance_in_spiked_simulation():
    rng = np.random.default_rng(0)
    n, p, m = 300, 6000, 3000
    spikes = np.array([60.0, 40.0, 25.0])  # population variances along 3 planted axes; noise 1
    U, _ = np.linalg.qr(rng.standard_normal((p, 3)))
    # planted training factors with exactly the population variances (removes the sampling
    # noise of the factor variances, which the finite n would otherwise add to the check)
    Z = rng.standard_normal((n, 3))
    Z -= Z.mean(axis=0)
    Z, _ = np.linalg.qr(Z)
    Z *= np.sqrt(n * (spikes - 1))
    X_train = (Z @ U.T + rng.standard_normal((n, p))).astype(np.float32)
    X_new = ((rng.standard_normal((m, 3)) * np.sqrt(spikes - 1)) @ U.T + rng.standard_normal((m, p))).astype(np.float32)
    result = fit(array_source(X_train), n_components=3, preprocess=PreprocessSpec(scale="none"),
                 resources=Resources(threads=1))
    train_var = result.scores.var(axis=0)
    raw = score(result.model, array_source(X_new), threads=1).scores.iloc[:, 1:].to_numpy()
    corrected = score(result.model, array_source(X_new), threads=1, correct_shrinkage=True).scores.iloc[:, 1:].to_numpy()
    # uncorrected: measurably shrunk (expected variance ratios ((ℓ−1)/(ℓ−1+γ))² ≈ 0.55, 0.43, 0.30)
    assert np.all(raw.var(axis=0) / train_var < 0.8)
    # corrected: per-axis variance within 10% of the training score variance (the criterion)
    np.testing.assert_allclose(corrected.var(axis=0) / train_var, 1.0, atol=0.10)
    # the estimated factors are close to the asymptotic ones of the planted spikes
    gamma = p / (n - 1)
    np.testing.assert_allclose(result.model.extras["shrinkage_factor"], (spikes - 1) / (spikes - 1 + gamma), rtol=0.05)


def test_q_limit_offset_matches_the_excess_of_new_residuals_in_spiked_simulation():
    rng = np.random.default_rng(5)
    n, p, m = 300, 4000, 2000
    spikes = np.array([50.0, 30.0, 20.0])
    U, _ = np.linalg.qr(rng.standard_normal((p, 3)))

    def draw(N):
        return ((rng.standard_normal((N, 3)) * np.sqrt(spikes - 1)) @ U.T + rng.standard_normal((N, p))).astype(np.float32)

    result = fit(array_source(draw(n)), n_components=3, preprocess=PreprocessSpec(scale="none"),
                 resources=Resources(threads=1))
    res = score(result.model, array_source(draw(m)), threads=1)
    q_train = result.sample_sq_dist - np.sum(result.scores**2, axis=1)
    observed = res.diagnostics["q"].mean() - q_train.mean()  # planted truth: same distribution
    offset = res.limits[0.99].q_offset
    # reference: the spiked-model excess Σ_j λ_j(1 − f_j²) (Lee, Zou & Wright 2010 factors) plus
    # 2θ1/n (mean-estimation error, textbook) should explain the observed excess of new samples'
    # residuals over the training residuals (≈ 100 here, vs an SD of Q ≈ 90)
    assert observed > 50
    assert offset == pytest.approx(observed, rel=0.15)
    # with the offset the 0.95 limit is close to calibrated; without it clearly not
    q = res.diagnostics["q"].to_numpy()
    assert abs(np.mean(q > res.limits[0.95].q) - 0.05) <= 0.03
    assert np.mean(q > res.limits[0.95].q - offset) > 0.08
