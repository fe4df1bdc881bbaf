"""Split-half stability of the axes (``axiscope.decide.stability``, ``fit --stability-repeats``).

Outside references: LAPACK's SVD through ``numpy.linalg.svd`` (``gesdd``) of each half,
preprocessed densely in the test; ``scipy.linalg.subspace_angles`` for the principal angles;
``scipy.optimize.linear_sum_assignment`` is the matcher under test and is not re-used as a
reference. Planted matrices: the truth (rank and strength of the signal) is planted here.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.linalg
from typer.testing import CliRunner

from axiscope import fit
from axiscope.cli import app
from axiscope.core.options import Resources
from axiscope.decide.stability import STABILITY_FILE, axis_stability, stability_values
from axiscope.io import array_source

runner = CliRunner()


def planted(n: int, p: int, strengths, seed: int, dtype=np.float64) -> np.ndarray:
    """``U·diag(strengths)·Vᵀ·√n`` + standard Gaussian noise: axes of variance ``strengths²`` over a
    flat noise floor of variance 1 per feature (planted here)."""
    rng = np.random.default_rng(seed)
    r = len(strengths)
    U = rng.standard_normal((n, r))
    V = np.linalg.qr(rng.standard_normal((p, r)))[0]
    X = (U * np.asarray(strengths)) @ V.T * np.sqrt(p / 4) + rng.standard_normal((n, p)) + 5.0
    return X.astype(dtype)


def half_loadings(X: np.ndarray, rows: np.ndarray, k: int, center: bool = True) -> np.ndarray:
    """LAPACK (numpy.linalg.svd): standardise with the whole set's mean and population SD, take
    the half's rows, re-centre on the half's mean; the leading ``k`` right singular vectors.
    Without centring: divide by the population SD only, and leave the half uncentred."""
    Z = (X - X.mean(axis=0)) / X.std(axis=0) if center else X / X.std(axis=0)
    H = Z[rows] - Z[rows].mean(axis=0) if center else Z[rows]
    return np.linalg.svd(H, full_matrices=False)[2][:k].T


def _fit(X, k, threads=1):
    return fit(array_source(X), n_components=k, resources=Resources(threads=threads))


def test_planted_axes_are_stable_and_axes_beyond_the_rank_are_not():
    X = planted(400, 150, [5.0, 3.5, 2.2], seed=1)
    result = _fit(X, 6)
    stab = axis_stability(array_source(X), result, stability_repeats=3, seed=0)
    values = stab.value
    assert np.all(values[:3] >= 0.9), values
    assert np.all(values[3:] < 0.8), values  # pure noise: halves' directions unrelated
    assert list(stab.stable) == [True] * 3 + [False] * 3
    # the subspace of the three planted axes is stable as a whole; adding noise axes is not
    assert np.all(stab.subspace[:3] >= 0.9) and np.all(stab.subspace[3:] < 0.8)


@pytest.mark.parametrize("center", [True, False])
def test_values_against_lapack_on_each_half_when_the_basis_spans_the_half(center):
    """With few features the Krylov basis of each half reaches the whole space, so the shared
    read must give LAPACK's answer up to rounding (1e-9 on the cosines, float64). A fit
    without centring leaves the halves uncentred too."""
    from axiscope.core.preprocess import PreprocessSpec

    X = planted(120, 24, [3.0, 2.0], seed=2)
    result = fit(array_source(X), n_components=4, preprocess=PreprocessSpec(center=center))
    stab = axis_stability(array_source(X), result, stability_repeats=2, seed=5, oversample=10, max_passes=3)
    pairs = []
    for r in range(stab.repeats):
        a, b = (half_loadings(X, np.flatnonzero(stab.halves[r] == h), 4, center) for h in (0, 1))
        pairs.append((a, b))
        for computed, exact in zip(stab.loadings[r], (a, b)):
            np.testing.assert_allclose(np.abs(np.sum(computed * exact, axis=0)), 1.0, atol=1e-9)
    per_repeat, subspace = stability_values(result.model.components, pairs)
    np.testing.assert_allclose(stab.per_repeat, per_repeat, atol=1e-9)
    np.testing.assert_allclose(stab.subspace_per_repeat, subspace, atol=1e-9)


def test_values_against_lapack_on_each_half_after_few_passes():
    """More features than the basis can span: the planted axes converge in the passes run;
    loadings of each half agree with LAPACK's to a sine of 1e-3 and the stability values to 1e-3
    (tolerances from the stopping rule, SETTLED_SINE = 0.01, which bounds the sine)."""
    X = planted(300, 400, [4.0, 3.0, 2.5], seed=3, dtype=np.float32)
    result = _fit(X, 3)
    stab = axis_stability(array_source(X), result, stability_repeats=2, seed=1, max_passes=6)
    X64 = X.astype(np.float64)
    pairs = [tuple(half_loadings(X64, np.flatnonzero(stab.halves[r] == h), 3) for h in (0, 1))
             for r in range(stab.repeats)]
    for r in range(stab.repeats):
        for computed, exact in zip(stab.loadings[r], pairs[r]):
            sines = np.sqrt(np.maximum(0.0, 1.0 - np.sum(computed * exact, axis=0) ** 2))
            assert np.all(sines < 1e-3), sines
    per_repeat, _ = stability_values(result.model.components, pairs)
    np.testing.assert_allclose(stab.per_repeat, per_repeat, atol=1e-3)


def test_subspace_agreement_is_the_cosine_of_the_largest_principal_angle():
    rng = np.random.default_rng(4)
    A = np.linalg.qr(rng.standard_normal((30, 3)))[0]
    B = np.linalg.qr(A + 0.3 * rng.standard_normal((30, 3)))[0]
    _, subspace = stability_values(A, [(A, B)])
    for j in range(3):  # scipy.linalg.subspace_angles: angles in descending order
        largest = scipy.linalg.subspace_angles(A[:, : j + 1], B[:, : j + 1])[0]
        assert subspace[0, j] == pytest.approx(np.cos(largest), abs=1e-12)


def test_matching_follows_axes_that_swap_between_halves():
    rng = np.random.default_rng(6)
    full = np.linalg.qr(rng.standard_normal((20, 3)))[0]
    swapped = full[:, [1, 0, 2]] * np.array([-1.0, 1.0, 1.0])  # same axes, two swapped, one sign flipped
    per_repeat, _ = stability_values(full, [(full, swapped)])
    np.testing.assert_allclose(per_repeat, 1.0, atol=1e-12)


def test_same_seed_same_values_whatever_the_threads():
    X = planted(256, 80, [3.0, 2.0], seed=7, dtype=np.float32)
    result = _fit(X, 3)
    one = axis_stability(array_source(X), result, stability_repeats=2, seed=3, threads=1)
    two = axis_stability(array_source(X), result, stability_repeats=2, seed=3, threads=2)
    assert np.array_equal(one.per_repeat, two.per_repeat)
    assert np.array_equal(one.subspace_per_repeat, two.subspace_per_repeat)


def _counting(src):
    """``src`` (a MatrixSource) counting the rows it reads in ``src.rows_read``."""
    read = src.read_samples
    src.rows_read = 0

    def read_samples(start, stop, **options):
        src.rows_read += stop - start
        return read(start, stop, **options)

    src.read_samples = read_samples
    return src


def test_one_read_per_pass_whatever_the_repeats():
    """Every pass reads each sample once and advances all 2·repeats halves; noise axes never
    settle, so the iteration runs its maximum of passes."""
    X = planted(200, 60, [3.0], seed=8)
    result = _fit(X, 3)
    for repeats, max_passes in ((1, 2), (4, 3)):
        src = _counting(array_source(X))
        stab = axis_stability(src, result, stability_repeats=repeats, seed=0, max_passes=max_passes)
        assert stab.passes == max_passes
        assert src.rows_read == max_passes * 200
        assert stab.record()["passes"] == max_passes


def test_fit_command_writes_the_table_manifest_and_cards(tmp_path):
    X = planted(160, 50, [3.0, 2.5], seed=9)
    path = tmp_path / "m.npy"
    np.save(path, X)
    out = tmp_path / "res"
    res = runner.invoke(app, ["fit", str(path), "--out", str(out), "-k", "4", "--stability-repeats", "2",
                              "--quiet"])
    assert res.exit_code == 0, res.stderr
    table = (out / STABILITY_FILE).read_text().splitlines()
    assert table[0].split("\t") == ["axis", "stability", "stable", "lowest", "highest", "subspace_agreement",
                                    "angle_bound"]
    record = json.loads((out / "manifest.json").read_text())["stability"]
    assert record["repeats"] == 2 and record["threshold"] == 0.8 and 2 <= record["passes"] <= 4
    assert [a["stable"] for a in record["axes"]] == [True, True, False, False]
    cards = json.loads((out / "axis_cards.json").read_text())
    carries = [r for r in cards["records"] if r["section"] == "carries"]
    assert [r["stable"] for r in carries] == [True, True, False, False]
    assert carries[0]["stability"] == pytest.approx(record["axes"][0]["stability"])
    page = (out / "axis_cards" / "PC4.md").read_text()
    assert "unstable" in page and "Unstable: two random halves" in page
    # a later 'axiscope explain' reads the stability back from the manifest
    assert runner.invoke(app, ["explain", str(out), "--quiet"]).exit_code == 0
    later = json.loads((out / "explanation" / "axis_cards.json").read_text())["records"]
    assert [r["stable"] for r in later if r["section"] == "carries"] == [True, True, False, False]


@pytest.mark.parametrize("args, fragment", [
    (["-k", "20", "--stability-repeats", "2"], "--stability-repeats: halves of 15 samples"),
    (["-k", "2", "--stability-repeats", "2", "--stability-threshold", "1.5"], "--stability-threshold 1.5"),
    (["-k", "2", "--stability-repeats", "-1"], "--stability-repeats"),
])
def test_bad_options_one_line_exit_2_no_output(tmp_path, args, fragment):
    path = tmp_path / "m.npy"
    np.save(path, planted(30, 40, [3.0], seed=10))
    out = tmp_path / "res"
    res = runner.invoke(app, ["fit", str(path), "--out", str(out), "--quiet", *args])
    assert res.exit_code == 2
    assert fragment in res.stderr, res.stderr
    assert "Traceback" not in res.stderr
    assert not out.exists() and not list(tmp_path.glob(".res.tmp-*"))


@pytest.mark.parametrize("options", [{}, {"preprocess": "top_variable"}])
def test_on_the_fit_s_cached_blocks_same_values_and_no_new_read(options):
    """``fit(..., then=...)`` hands over the cached blocks: the stability read from them equals the
    one decoding the input again (float64: to 1e-10) and the input is not read again. One
    feature is constant (dropped by the fit), so the cached blocks carry a column the model lacks."""
    from axiscope.core.preprocess import PreprocessSpec

    X = planted(180, 40, [3.0, 2.0], seed=11)
    X[:, 7] = 2.5
    spec = PreprocessSpec(top_variable=30) if options else PreprocessSpec()
    src = _counting(array_source(X))
    seen = {}

    def then(result, blocks):
        before = src.rows_read
        seen["stability"] = axis_stability(blocks, result, stability_repeats=2, seed=4)
        seen["rows"] = src.rows_read - before

    result = fit(src, n_components=3, preprocess=spec, then=then)
    again = axis_stability(array_source(X), result, stability_repeats=2, seed=4)
    assert seen["rows"] == 0 and seen["stability"].read_from == "memory"
    np.testing.assert_allclose(seen["stability"].per_repeat, again.per_repeat, atol=1e-10)
    np.testing.assert_allclose(seen["stability"].subspace_per_repeat, again.subspace_per_repeat, atol=1e-10)
    assert again.read_from == "input"
