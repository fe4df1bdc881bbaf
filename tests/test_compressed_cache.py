"""The compressed block cache: exact round trip, the allowance held, and the plan's choice."""

from __future__ import annotations

import numpy as np
import scipy.linalg

from axiscope import EngineSettings, PreprocessSpec, Resources, fit
from axiscope.core.cache import BlockCache
from axiscope.core.plan import plan_blocks
from axiscope.io import array_source


def _counts(n: int, p: int, seed: int) -> np.ndarray:
    """Poisson counts with a rank-2 mean (float32): small integers, which compress well."""
    rng = np.random.default_rng(seed)
    rate = np.exp(rng.standard_normal((n, 2)) @ rng.standard_normal((2, p)) * 0.5)
    return rng.poisson(rate).astype(np.float32)


def test_compressed_blocks_come_back_bit_for_bit_and_spill_past_the_allowance(tmp_path):
    X = _counts(300, 200, seed=1)
    starts = [0, 100, 200]
    with BlockCache("compressed", 300, 200, np.float32, tmp_path, allowance=10**9) as roomy:
        for s in starts:
            roomy.put(s, X[s:s + 100])
        assert 0 < roomy.held_bytes < X.nbytes and roomy.spilled_bytes == 0
        for s in starts:
            np.testing.assert_array_equal(roomy.get(s, s + 100), X[s:s + 100])
    one_block = roomy.held_bytes // 3 + 1  # room for about one compressed block
    with BlockCache("compressed", 300, 200, np.float32, tmp_path, allowance=one_block) as tight:
        for s in starts:
            tight.put(s, X[s:s + 100])
        assert tight.held_bytes <= one_block
        assert tight.spilled_bytes == 2 * X[:100].nbytes  # two blocks written uncompressed
        assert len(list(tmp_path.iterdir())) == 1  # the scratch folder, made when first needed
        for s in starts:
            np.testing.assert_array_equal(tight.get(s, s + 100), X[s:s + 100])
    assert list(tmp_path.iterdir()) == []


def test_plan_keeps_a_compressed_cache_only_when_it_fits(tmp_path):
    common = dict(sketch_width=15, threads=2, scratch=tmp_path, baseline=0)
    decoded = 4000 * 3000 * 4
    fits = plan_blocks(4000, 3000, 4, budget=40 * 10**6, compressed_bytes=decoded // 8, **common)
    assert fits.cache == "compressed"
    assert fits.cache_bytes == decoded // 8 <= fits.cache_allowance
    assert fits.to_dict()["cache_allowance"] == fits.cache_allowance
    assert plan_blocks(4000, 3000, 4, budget=40 * 10**6, compressed_bytes=decoded // 2, **common).cache == "scratch"
    assert plan_blocks(4000, 3000, 4, budget=40 * 10**6, **common).cache == "scratch"


def test_fit_with_a_compressed_cache_matches_the_in_memory_fit(write_matrix, tmp_path):
    """15 MB of counts in Zarr under a 24 MB budget (too small for the decoded cache beside the work): kept compressed."""
    X = _counts(1500, 2500, seed=2)
    path = write_matrix(X, "zarr3", chunks=(100, 2500))
    scratch = tmp_path / "scratch"
    none = PreprocessSpec(scale="none")
    result = fit(path, n_components=2, preprocess=none, engine=EngineSettings(method="randomized", seed=0, power_iterations=4),
                 resources=Resources(memory_limit="24MB", threads=2, scratch=scratch))
    plan = result.manifest["plan"]
    assert plan["cache"] == "compressed", plan
    assert plan["cache_held_bytes"] <= plan["cache_allowance"]
    detail = result.manifest["passes"]["detail"]
    assert detail[0]["read_from"] == "input"
    assert all(d["read_from"] == "compressed" for d in detail[1:])
    # reference: the in-memory fit of the same array, and LAPACK's eigenvalues of the centred
    # Gram matrix (scipy.linalg.eigh), whose square roots are the singular values
    reference = fit(array_source(X), n_components=2, preprocess=none, engine=EngineSettings(method="randomized", seed=0, power_iterations=4))
    np.testing.assert_allclose(result.model.singular_values, reference.model.singular_values, rtol=1e-6)
    np.testing.assert_allclose(result.scores, reference.scores, atol=1e-6 * np.abs(reference.scores).max())
    Xc = X.astype(np.float64) - X.mean(axis=0, dtype=np.float64)
    n = Xc.shape[0]
    s = np.sqrt(scipy.linalg.eigh(Xc @ Xc.T, eigvals_only=True, subset_by_index=[n - 2, n - 1])[::-1])
    np.testing.assert_allclose(result.model.singular_values, s, rtol=1e-4)
