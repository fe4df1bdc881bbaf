"""How many axes carry signal (axiscope.decide.signal) and ``fit --components auto``.

Outside references: random-matrix laws (Marchenko & Pastur 1967; Tracy–Widom fluctuations,
Johnstone 2001), the optimal hard threshold of Gavish & Donoho (2014), the broken-stick
formula (Frontier 1976; Jackson 1993), LAPACK through numpy, numpy's quantile. Planted
matrices are used only where the test planted the truth.
"""

from __future__ import annotations

import json
import math
from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.core.preprocess import PreprocessSpec
from axiscope.decide.signal import (
    SIGNAL_TABLE,
    broken_stick,
    fit_with_signal,
    marchenko_pastur_median,
    noise_edge,
    optimal_threshold_coefficient,
    parallel_analysis,
)
from axiscope.fitting.run import fit
from axiscope.io import array_source
from axiscope.model.store import load_model
from axiscope.model.training import training_extras


def planted(n: int, p: int, strengths, seed: int) -> np.ndarray:
    """Unit Gaussian noise plus rank-r signal ``Σ_j √(n·p)·d_j/√(n·p)…``: orthonormal sample and
    feature directions with singular values ``strengths × (√n + √p)`` (well above the noise
    edge ``√n + √p`` of the noise's largest singular value)."""
    rng = np.random.default_rng(seed)
    r = len(strengths)
    U, _ = np.linalg.qr(rng.standard_normal((n, r)))
    V, _ = np.linalg.qr(rng.standard_normal((p, r)))
    d = np.asarray(strengths, dtype=np.float64) * (math.sqrt(n) + math.sqrt(p))
    return rng.standard_normal((n, p)) + (U * d) @ V.T


# ---------------------------------------------------------------------- recommendations


@pytest.mark.parametrize("n, p, seed", [(200, 80, 0), (120, 300, 1), (300, 300, 2)])
def test_pure_noise_gives_zero_or_one_axis(n, p, seed):
    # planted truth: no signal at all
    X = np.random.default_rng(seed).standard_normal((n, p))
    result, signal = fit_with_signal(array_source(X), max_components=10)
    assert signal.recommended in (0, 1)
    assert signal.criterion == "parallel_analysis"
    assert result.model.n_components == 1  # at least one axis is kept
    assert signal.summary["counts"]["noise_edge"] in (0, 1)


@pytest.mark.parametrize("n, p, strengths, scale", [
    (200, 100, [3.0], "unit"),
    (250, 120, [4.0, 3.0, 2.0], "unit"),
    (150, 400, [4.0, 3.5, 3.0, 2.5, 2.0], "unit"),
    (300, 90, [3.0, 2.0], "none"),
])
def test_planted_rank_is_recovered(n, p, strengths, scale):
    # planted truth: rank r signal whose singular values are 2-4× the noise edge √n + √p
    r = len(strengths)
    X = planted(n, p, strengths, seed=r + n)
    result, signal = fit_with_signal(array_source(X), max_components=12,
                                     preprocess=PreprocessSpec(scale=scale))
    assert signal.recommended == r
    assert result.model.n_components == r
    counts = signal.summary["counts"]
    assert counts["parallel_analysis"] == r
    if scale == "none":  # equal noise in every cell: the Gavish–Donoho assumption holds
        assert counts["optimal_threshold"] == r
        assert counts["noise_edge"] == r


def test_after_adjusting_for_a_batch_its_axis_is_not_counted(tmp_path):
    """Planted truth: rank-2 biology plus a strong two-level batch shift (a third axis). Unadjusted,
    the batch is one more axis; adjusted for it, the criteria count the two planted ones, and the
    kept axes equal those of numpy.linalg.svd (LAPACK) of the standardised matrix residualised on
    [1, batch] with numpy.linalg.lstsq."""
    from axiscope.core.adjust import Covariates

    n, p = 240, 120
    X = planted(n, p, [4.0, 3.0], seed=5)
    rng = np.random.default_rng(6)
    batch = np.where(rng.random(n) < 0.5, "A", "B")
    X[batch == "B"] += 0.9 * rng.choice([-1.0, 1.0], size=p)  # every feature shifted in batch B
    ids = [f"s{i:03d}" for i in range(n)]
    table = tmp_path / "samples.tsv"
    pd.DataFrame({"sample_id": ids, "batch": batch}).to_csv(table, sep="\t", index=False)
    source = array_source(X, sample_ids=ids)
    _, plain = fit_with_signal(source, max_components=10)
    assert plain.recommended == 3
    result, adjusted = fit_with_signal(array_source(X, sample_ids=ids), max_components=10,
                                       covariates=Covariates(table, ["batch"]))
    assert adjusted.recommended == 2 and result.model.n_components == 2
    assert adjusted.summary["counts"]["noise_edge"] == 2
    Z = (X - X.mean(axis=0)) / X.std(axis=0)
    C = np.column_stack([np.ones(n), batch == "B"]).astype(float)
    R = Z - C @ np.linalg.lstsq(C, Z, rcond=None)[0]
    s = np.linalg.svd(R, compute_uv=False)
    np.testing.assert_allclose(result.model.singular_values, s[:2], rtol=1e-6)


# ---------------------------------------------------------------------- published laws


def test_top_variance_of_standardised_noise_lies_at_the_marchenko_pastur_edge():
    # Marchenko & Pastur (1967): the largest eigenvalue of WᵀW/ν tends to (1 + √(p/ν))²;
    # Johnstone (2001): it fluctuates on the Tracy–Widom scale
    # σ = (√ν + √p)(1/√ν + 1/√p)^(1/3) / ν around it. Tolerance: 6σ (the TW1 law has mean
    # −1.21 and SD 1.27; recalled from memory).
    n, p = 2000, 500
    X = np.random.default_rng(3).standard_normal((n, p))
    result = fit(array_source(X), n_components=1, preprocess=PreprocessSpec(scale="unit"))
    nu = n - 1
    edge = noise_edge(nu, p)
    assert edge == pytest.approx((1 + math.sqrt(p / nu)) ** 2)
    sigma_tw = (math.sqrt(nu) + math.sqrt(p)) * (1 / math.sqrt(nu) + 1 / math.sqrt(p)) ** (1 / 3) / nu
    assert abs(float(result.model.variance[0]) - edge) < 6 * sigma_tw


def test_gavish_donoho_square_constant():
    # Gavish & Donoho (2014): ω(1) ≈ 2.858 for a square matrix with unknown noise (published
    # constant, recalled from memory)
    assert optimal_threshold_coefficient(1.0) == pytest.approx(2.858, abs=1e-3)


@pytest.mark.parametrize("beta", [0.1, 0.25, 0.5, 0.75, 1.0])
def test_gavish_donoho_against_their_cubic_approximation(beta):
    # Gavish & Donoho (2014): ω(β) ≈ 0.56β³ − 0.95β² + 1.82β + 1.43 (recalled from memory;
    # an approximation, hence the tolerance of 0.02)
    assert optimal_threshold_coefficient(beta) == pytest.approx(
        0.56 * beta**3 - 0.95 * beta**2 + 1.82 * beta + 1.43, abs=0.02)


def test_marchenko_pastur_median_against_lapack_eigenvalues():
    # LAPACK (numpy.linalg.eigvalsh): the median eigenvalue of WᵀW/n for a 1600 × 800 Gaussian
    # matrix (β = 0.5); the sample median is within 0.01 of the law's at this size
    n, p = 1600, 800
    W = np.random.default_rng(4).standard_normal((n, p))
    values = np.linalg.eigvalsh(W.T @ W / n)
    assert float(np.median(values)) == pytest.approx(marchenko_pastur_median(p / n), abs=0.01)


def test_broken_stick_against_the_closed_formula():
    # Frontier (1976), Jackson (1993): b_j = (1/m)·Σ_{i=j..m} 1/i, written here independently
    # in exact fractions
    for m in (1, 2, 7, 40):
        expected = [sum(Fraction(1, i) for i in range(j, m + 1)) / m for j in range(1, m + 1)]
        assert broken_stick(m) == pytest.approx([float(e) for e in expected], rel=1e-13)
        assert sum(expected) == 1  # the pieces make up the stick
    assert broken_stick(40, 5) == pytest.approx(broken_stick(40)[:5])


def test_parallel_analysis_permutes_each_feature_and_takes_numpy_s_quantile():
    rng = np.random.default_rng(5)
    Z = rng.standard_normal((60, 30))
    Z -= Z.mean(axis=0)
    permuted, threshold = parallel_analysis(Z, 4, permutations=7, quantile=0.95, rng=np.random.default_rng(9))
    assert permuted.shape == (7, 4)
    # numpy.quantile over the permutations, rank by rank
    assert threshold == pytest.approx(np.quantile(permuted, 0.95, axis=0))
    # a permutation of each column keeps its values: the trace (sum of all eigenvalues) is unchanged;
    # the first permuted copy's leading eigenvalues agree with LAPACK's on the same copy
    buffer = np.empty_like(Z)
    np.random.default_rng(9).permuted(Z, axis=0, out=buffer)
    assert np.sort(buffer, axis=0) == pytest.approx(np.sort(Z, axis=0))
    lapack = np.linalg.eigvalsh(buffer.T @ buffer)[::-1][:4]
    assert permuted[0] == pytest.approx(lapack, rel=1e-10)


def test_keeping_the_first_axes_matches_a_fit_of_that_many():
    # LAPACK path both times: the cut result equals a direct fit of r axes
    X = planted(150, 60, [3.0, 2.0], seed=11)
    full = fit(array_source(X), n_components=8, engine=None)
    cut = full.first_axes(2)
    direct = fit(array_source(X), n_components=2)
    assert cut.scores == pytest.approx(direct.scores, abs=1e-9)
    assert cut.model.components == pytest.approx(direct.model.components, abs=1e-9)
    for name in ("residual_moments", "shrinkage_factor"):
        assert cut.model.extras[name] == pytest.approx(direct.model.extras[name], rel=1e-9)
    assert cut.components_table().shape[0] == 2 and list(cut.sample_scores().columns) == ["sample_id", "PC1", "PC2"]
    assert [a["axis"] for a in cut.manifest["accuracy"]["axes"]] == ["PC1", "PC2"]
    assert cut.manifest["options"]["n_components"] == 2 and cut.manifest["n_components_fitted"] == 8
    extras = training_extras(direct.model.singular_values, direct.scores, direct.sample_sq_dist,
                             total_inertia=direct.model.total_inertia, n_features=60)
    assert cut.model.extras["residual_moments"] == pytest.approx(extras["residual_moments"])


# ---------------------------------------------------------------------- command line


def test_fit_components_auto_end_to_end(tmp_path):
    X = planted(160, 70, [3.0, 2.5, 2.0], seed=12).astype(np.float32)
    np.save(tmp_path / "x.npy", X)
    out = tmp_path / "result"
    run = CliRunner().invoke(app, ["fit", str(tmp_path / "x.npy"), "--out", str(out), "--components", "auto",
                                   "--max-components", "10", "--permutations", "9", "--threads", "1"])
    assert run.exit_code == 0, run.output
    manifest = json.loads((out / "manifest.json").read_text())
    record = manifest["signal_axes"]
    assert isinstance(record["recommended"], int) and record["recommended"] == 3  # planted rank
    assert record["kept"] == 3 and record["parallel_analysis"]["permutations"] == 9
    assert manifest["options"]["n_components"] == 3 and manifest["n_components_fitted"] == 10
    table = pd.read_csv(out / SIGNAL_TABLE, sep="\t")
    assert len(table) == 10 and table["recommended"].sum() == 3 and table["kept"].sum() == 3
    assert load_model(out / "model").n_components == 3
    assert pd.read_csv(out / "components.tsv", sep="\t").shape[0] == 3
    assert list(pd.read_csv(out / "sample_scores.tsv", sep="\t").columns) == ["sample_id", "PC1", "PC2", "PC3"]
    cards = pd.read_csv(out / "axis_cards.tsv", sep="\t", comment="#")
    carries = cards[cards["section"] == "carries"]
    assert carries["above_noise"].tolist() == [True, True, True]
    assert "axes above the noise: 3" in run.output
    # the report reads the same record
    from axiscope.report.html import _signal_axes
    assert _signal_axes(manifest) == 3
    # the variance figure draws every candidate, the three criteria and the axes kept
    from axiscope.report.figures import write_figures
    write_figures(out, formats=("svg",), pairs=((1, 2),))
    svg = (out / "figures" / "variance.svg").read_text()
    assert all(f'id="threshold-{i}"' in svg for i in range(3)) and 'id="chosen"' in svg
    assert 'id="variance-bar-9"' in svg and 'id="variance-bar-10"' not in svg


def test_assess_signal_keeps_the_requested_number(tmp_path):
    X = planted(120, 50, [3.0, 2.0], seed=13)
    np.save(tmp_path / "x.npy", X)
    out = tmp_path / "result"
    run = CliRunner().invoke(app, ["fit", str(tmp_path / "x.npy"), "--out", str(out), "--components", "4",
                                   "--assess-signal", "--permutations", "5"])
    assert run.exit_code == 0, run.output
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["signal_axes"]["recommended"] == 2 and manifest["options"]["n_components"] == 4
    cards = pd.read_csv(out / "axis_cards.tsv", sep="\t", comment="#")
    assert cards[cards["section"] == "carries"]["above_noise"].tolist() == [True, True, False, False]


@pytest.mark.parametrize("args, fragment", [
    (["--components", "auto", "--max-components", "80"], "--max-components 80 is more axes"),
    (["--components", "auto", "--permutations", "0"], "--permutations"),
    (["--components", "0"], "--components"),
    (["--max-components", "5"], "--max-components 5 applies to --components auto only"),
])
def test_bad_signal_options_are_one_line_with_exit_code_2(tmp_path, args, fragment, capsys):
    from axiscope.cli import main

    np.save(tmp_path / "x.npy", np.random.default_rng(0).standard_normal((40, 30)))
    out = tmp_path / "result"
    assert main(["fit", str(tmp_path / "x.npy"), "--out", str(out), *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error:") and fragment in err[0], err
    assert not out.exists()
