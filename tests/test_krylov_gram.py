"""The Krylov basis's bookkeeping between passes, against plain numpy/LAPACK.

The Gram matrix ``BᵀB`` of the Rayleigh–Ritz step is extended by the new columns only and
carried through restarts as ``WᵀGW``; the restarted basis is written into a column-major
buffer that the next pass fills in place. References: the full products ``BᵀB`` and
``A @ W`` computed by numpy (BLAS), and the singular values of the basis's image by
``numpy.linalg.svd`` (LAPACK gesdd). The bounds are a few hundred units of float64 rounding (2.2e-16) of the largest entry.
Matrices are invented Gaussian noise.
"""

from __future__ import annotations

import numpy as np
from axiscope.core.engine import _KrylovBasis, _gram_extended, _grown, _restarted

ROUNDING = 1e-13  # relative to the largest entry; float64 sums of 500 terms, common practice, no source


def test_gram_extended_equals_full_product():
    rng = np.random.default_rng(0)
    B, Y = rng.standard_normal((500, 12)), rng.standard_normal((500, 5))
    G = _gram_extended(B.T @ B, B, Y)
    full = np.hstack([B, Y])
    assert np.array_equal(G, G.T)  # exactly symmetric, as eigh assumes
    assert np.max(np.abs(G - full.T @ full)) <= ROUNDING * np.max(np.abs(G))


def test_restarted_basis_is_the_product_and_grows_in_place():
    rng = np.random.default_rng(1)
    A = np.asfortranarray(rng.standard_normal((400, 10)))
    W = rng.standard_normal((10, 7))
    R = _restarted(A, W, 10)
    assert R.flags.f_contiguous
    assert np.max(np.abs(R - A @ W)) <= ROUNDING * np.max(np.abs(R))
    grown = _grown(R, rng.standard_normal((400, 3)), 10)
    assert np.shares_memory(grown, R) and grown.shape == (400, 10)  # filled in place, no copy
    assert np.array_equal(grown[:, :7], R)


def test_ritz_values_through_extension_and_restart_match_lapack():
    rng = np.random.default_rng(2)
    n, p, l, width = 300, 60, 4, 12
    X = rng.standard_normal((n, p)) * np.linspace(3.0, 0.1, p)
    basis = _KrylovBasis.empty(n, p, width)
    Q = np.linalg.qr(rng.standard_normal((p, l)))[0]
    for _ in range(5):  # three extensions fill the basis, then two restarts
        basis.extend(Q, X @ Q, X.T @ (X @ Q))
        s, W = basis.ritz()
        expected = np.linalg.svd(basis.B, compute_uv=False)
        assert np.max(np.abs(s[:l] - expected[:l]) / expected[:l]) <= 1e-12
        Z = basis.AK[:, -l:]
        Z = Z - basis.K @ (basis.K.T @ Z)
        Z = Z - basis.K @ (basis.K.T @ Z)
        Q = np.linalg.qr(Z)[0]
        basis.restart_if_full(W, l)
    # after the restarts the carried Gram matrix is still BᵀB of the basis held
    assert np.max(np.abs(basis.G - basis.B.T @ basis.B)) <= ROUNDING * np.max(np.abs(basis.G))


def _restarting_fit(X, **extra):
    import dask.array as da

    from axiscope.core.engine import randomized_factorization

    mean, d = X.mean(axis=0), 1.0 / X.std(axis=0)
    return randomized_factorization(da.from_array(X, chunks=(100, X.shape[1])), mean, d, n_components=4,
                                    oversample=4, max_basis=24, power_iterations=10,
                                    rng=np.random.default_rng(3), **extra)


def test_a_restarting_fit_matches_lapack_and_resumes_byte_identically():
    rng = np.random.default_rng(4)
    X = rng.standard_normal((300, 80)) * np.geomspace(4.0, 0.5, 80)  # small width: the basis restarts
    states = []
    full = _restarting_fit(X, on_pass=lambda state: states.append(
        {key: (dict(value) if isinstance(value, dict) else np.array(value)) for key, value in state.items()}))
    Z = (X - X.mean(axis=0)) / X.std(axis=0)
    s = np.linalg.svd(Z, compute_uv=False)  # reference: LAPACK gesdd via numpy.linalg.svd
    assert np.max(np.abs(full.singular_values - s[:4]) / s[:4]) <= 1e-4  # SV_RTOL of tests/test_engine.py
    late = states[-1]  # saved after restarts (width 24 = 3 blocks of 8, restarted from pass 3 on)
    assert "G" in late and late["K"].shape[1] == 24 - 8
    resumed = _restarting_fit(X, resume_from=late)
    assert np.array_equal(resumed.singular_values, full.singular_values)
    assert np.array_equal(resumed.components, full.components)
    assert np.array_equal(resumed.scores, full.scores)
