"""Working precision of the one-pass block task (:func:`axiscope.core.onepass._task`).

A float32 block is shifted by the mean of a few of its rows, both sketch products and the
column sums (a row of ones in the sample-side product) are taken in float32, the squares
summed 256 rows at a time in float32, and everything is added over blocks in float64.
References: numpy's float64 mean and variance of the same float32 values (no rounding of
the data beyond float32's own); numpy.linalg.svd (LAPACK) of the dense standardised matrix
for a planted exact low rank, where the two-sketch approximation is exact (Tropp,
Yurtsever, Udell & Cevher 2017, SIAM J. Matrix Anal. Appl. 38(4)) and only rounding
remains. Tolerances: float32's epsilon is 1.2e-7; a sum of 256 float32 terms is within
256·eps ≈ 3e-5 of its float64 value in the worst case (the classical bound for recursive
summation, Higham, *Accuracy and Stability of Numerical Algorithms*, ch. 4; recalled from
memory), so 1e-5 relative on the variances holds with a margin for these data whose
squares are all positive and similar (errors cancel in the typical case, ~1e-7).
"""

from __future__ import annotations

import numpy as np
import pytest

import axiscope.core.onepass as onepass
from axiscope.core.options import EngineSettings, Resources
from axiscope.core.passes import array_from_blocks
from axiscope.core.preprocess import FeatureStatistics
from axiscope.errors import InputError
from axiscope.fitting.run import fit
from axiscope.io import array_source

ONE_PASS = EngineSettings(method="one-pass", seed=5)


def _standardised(X: np.ndarray) -> np.ndarray:
    X = X.astype(np.float64)
    return (X - X.mean(axis=0)) / X.std(axis=0)


def _low_rank32(n: int, p: int, r: int, seed: int) -> np.ndarray:
    """Exact rank ``r`` (before the float32 rounding), means near 1000, scales over 4 decades."""
    rng = np.random.default_rng(seed)
    X = (rng.standard_normal((n, r)) * np.linspace(5, 3, r)) @ rng.standard_normal((r, p))
    return (X * np.exp(rng.uniform(-4.6, 4.6, p)) + rng.uniform(500, 1500, p)).astype(np.float32)


def test_float32_statistics_match_float64_sums_of_the_same_values():
    """Source: numpy's float64 mean and variance of the float32 input; 700 rows in blocks of
    (at most) 200, so the statistics are merged over blocks as well."""
    X = _low_rank32(700, 90, 3, seed=2)
    X += np.random.default_rng(3).standard_normal(X.shape).astype(np.float32)  # full rank: every feature varies
    result = fit(array_source(X), n_components=3, engine=ONE_PASS, resources=Resources(memory_limit="40MB"))
    X64 = X.astype(np.float64)
    stats = result.statistics
    assert result.manifest["passes"]["detail"][0]["blocks"] > 1
    np.testing.assert_allclose(stats.mean, X64.mean(axis=0), rtol=0, atol=1e-6 * X64.std(axis=0).max())
    np.testing.assert_allclose(stats.variance, X64.var(axis=0), rtol=1e-5)
    precision = result.manifest["one_pass"]["working_precision"]
    assert precision["block_products"] == "float32" and precision["sums_over_blocks"] == "float64"


def test_float64_input_keeps_float64_products():
    X = _low_rank32(200, 40, 2, seed=4).astype(np.float64)
    result = fit(array_source(X), n_components=2, engine=ONE_PASS)
    precision = result.manifest["one_pass"]["working_precision"]
    assert set(precision.values()) == {"float64"}


def test_rows_sorted_by_a_large_offset_stay_exact():
    """Half of each block's rows shifted by 40 standard deviations (samples sorted by batch),
    so the shift taken from a few rows is far from a block's mean: still LAPACK's singular
    values to float32 rounding (source: numpy.linalg.svd of the standardised matrix)."""
    X = _low_rank32(400, 60, 2, seed=6).astype(np.float64)
    offset = 40 * X.std(axis=0)
    X[::2] += offset  # every other row: a rank-one change of the centred matrix's row space
    X = np.vstack([X[::2], X[1::2]]).astype(np.float32)  # sorted: the shifted half first
    _, s, _ = np.linalg.svd(_standardised(X), full_matrices=False)
    fac = fit(array_source(X), n_components=3, engine=ONE_PASS).factorization
    np.testing.assert_allclose(fac.singular_values, s[:3], rtol=1e-4)


@pytest.mark.parametrize("value", [np.nan, np.inf])
def test_non_finite_value_in_the_shift_rows_is_named(value):
    """A NaN or infinite value in one of the rows the shift is taken from is reported at its
    own cell (the shift ignores it), not as a whole column of bad values."""
    X = _low_rank32(64, 12, 2, seed=8)
    X[2, 7] = value  # (rows 0, 2, 4, … give the shift of a 64-row block)
    ids = [f"s{i}" for i in range(64)]
    with pytest.raises(InputError, match="sample 's2', feature 'feature_000008' is NaN or infinite"):
        fit(array_source(X, sample_ids=ids), n_components=2, engine=ONE_PASS)


def test_float32_sums_that_overflow_are_redone_in_float64():
    """Finite float32 values up to 1.5e37 whose float32 squares pass float32's largest number
    (3.4e38): the block is done again in float64, and the result is that of the same matrix
    divided by 1e34 (source: numpy.linalg.svd of the standardised matrix; the one-pass
    fit of a low-rank matrix is exact, so only float32 rounding of the values remains)."""
    X = _low_rank32(300, 30, 2, seed=9)
    X = (X.astype(np.float64) * 1e34).astype(np.float32)
    assert np.isfinite(X).all() and not np.isfinite(np.einsum("ij,ij->j", X, X)).all()  # float32 overflows
    _, s, _ = np.linalg.svd(_standardised(X), full_matrices=False)

    def finish(block_stats):
        stats = FeatureStatistics.from_block_stats(block_stats)
        return stats.mean, 1.0 / np.sqrt(stats.variance)

    blocks = array_from_blocks(lambda i: X[150 * i: 150 * (i + 1)].copy(), [150, 150], 30, X.dtype, "big")
    result = onepass.one_pass_factorization(blocks, n_components=2, oversample=5, rng=np.random.default_rng(0),
                                            finish=finish)
    np.testing.assert_allclose(result.factorization.singular_values, s[:2], rtol=1e-4)
    assert result.working_precision["block_products"] == "float64"


def test_float32_same_bytes_whatever_the_threads():
    X = _low_rank32(900, 50, 3, seed=10)
    X += np.random.default_rng(1).standard_normal(X.shape).astype(np.float32)
    runs = [fit(array_source(X), n_components=3, engine=ONE_PASS, resources=Resources(threads=t, memory_limit="40MB"))
            for t in (1, 2)]
    assert runs[0].manifest["passes"]["detail"][0]["blocks"] > 2
    for name in ("scores", "components"):
        assert getattr(runs[0].factorization, name).tobytes() == getattr(runs[1].factorization, name).tobytes()
    assert runs[0].statistics.variance.tobytes() == runs[1].statistics.variance.tobytes()
