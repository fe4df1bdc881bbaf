"""The one-pass fit's own memory plan (:func:`axiscope.core.plan.plan_one_pass`).

References: the in-memory one-pass fit of the same matrix with a budget that holds it in
one block (the same test matrices, so the same result to rounding); singular values
planted through LAPACK's QR (numpy.linalg.qr); the kernel's
resident-memory high-water mark of the process (``VmHWM`` in ``/proc/self/status``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from axiscope.core.options import EngineSettings, Resources
from axiscope.core.preprocess import PreprocessSpec
from axiscope.core.plan import plan_blocks, plan_one_pass
from axiscope.errors import ResourceError
from axiscope.fitting.run import fit


def test_one_pass_plan_holds_what_the_multipass_plan_does_not_need():
    """40,000 × 20,000 float32 in 1,250-row chunks (200 MB counted per decoded band) under
    1 GB: the multi-pass plan (Krylov basis, three block-sized arrays per row) gives one
    thread; the one-pass plan gives whole-chunk blocks on two threads, and the arrays it
    counts fit the budget."""
    shape = dict(sample_chunk=1250, chunk_bytes=2 * 1250 * 20000 * 4, baseline=0)
    multi = plan_blocks(40000, 20000, 4, sketch_width=30, threads=2, budget=10**9, cache="source", **shape)
    one = plan_one_pass(40000, 20000, 4, n_components=20, oversample=10, threads=2, budget=10**9, **shape)
    assert multi.threads == 1
    assert (one.block_rows, one.threads, one.cache, one.max_basis) == (1250, 2, "source", 0)
    # s = 41, t = 83, q = 20 (onepass.sketch_widths): Y, Ψ, the feature sketches, Ω
    assert one.fixed_bytes == 8 * 40000 * (83 + 61) + 8 * 20000 * (2 * 61 + 3 * 83 + 12)
    per_thread = 20000 * 61 * 20 + 2 * 8 * 6 * 20000 + 1250 * (2 * 20000 * 4 + 8 * 144) + one.chunk_bytes
    assert one.fixed_bytes + one.threads * per_thread <= 10**9


def test_one_pass_plan_refuses_a_budget_too_small_in_one_line():
    with pytest.raises(ResourceError, match="one-pass fit .* raise memory_limit to at least"):
        plan_one_pass(40000, 20000, 4, n_components=20, oversample=10, threads=2, budget=100 * 10**6,
                      baseline=0)


RSS_PROBE = str(Path(__file__).with_name("rss_probe.py"))  # one fit's peak RSS, in a process of its own


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="needs Linux /proc for VmHWM")
def test_one_pass_peak_rss_within_the_limit_and_same_result(tmp_path):
    """128 MB float32 HDF5 (chunks of 250 rows) under a 40 MB budget: the one-pass fit's peak
    RSS grows by less than the budget plus 40 MB of interpreter, thread and HDF5 overhead (as
    tests/test_memory.py allows), and its singular values are those of the same fit with a
    budget that holds every block in memory at once, to rounding (the test matrices do not
    depend on the blocks), and within 1e-2 of the singular values planted in this rank-5
    matrix (the SVD of ``Q1·diag(σ)·Q2ᵀ`` with orthonormal ``Q1``, ``Q2`` is that product;
    centred, not scaled)."""
    import h5py

    n, p, r = 8000, 4000, 5
    rng = np.random.default_rng(0)
    # centred matrix Q1·diag(σ)·Q2ᵀ with orthonormal Q1 (columns orthogonal to 1) and Q2: its
    # singular values are σ exactly; plus feature means near 100
    first = rng.standard_normal((n, r))
    Q1 = np.linalg.qr(first - first.mean(axis=0))[0]
    Q2 = np.linalg.qr(rng.standard_normal((p, r)))[0]
    planted = np.array([900.0, 700.0, 500.0, 300.0, 200.0])
    X = ((Q1 * planted) @ Q2.T + 100 + rng.standard_normal(p)).astype(np.float32)
    path = tmp_path / "x.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("X", data=X, chunks=(250, p))
    limit = 40 * 10**6
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    out = subprocess.run([sys.executable, RSS_PROBE, str(path), str(limit), "one-pass", "none"], capture_output=True,
                         text=True, env=env, timeout=120, check=False)
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout.strip().splitlines()[-1])
    assert report["plan"]["max_basis"] == 0 and report["plan"]["chunk_bytes"] == 2 * 250 * p * 4
    assert report["delta"] < limit + 40 * 10**6, f"peak grew by {report['delta'] / 1e6:.0f} MB ({report})"
    whole = fit(path, n_components=r, engine=EngineSettings(method="one-pass", seed=3),
                preprocess=PreprocessSpec(scale="none"),
                resources=Resources(memory_limit="4GB", threads=1))
    assert whole.manifest["plan"]["block_rows"] > report["plan"]["block_rows"]
    np.testing.assert_allclose(report["singular_values"], whole.factorization.singular_values, rtol=1e-6)
    np.testing.assert_allclose(report["singular_values"], planted, rtol=1e-2)
