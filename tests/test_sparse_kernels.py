"""The block products of sparse input (core/sparse_kernels.py) against SciPy's own.

References: SciPy's sparse matrix products (``scipy.sparse`` CSC ``@`` a dense array) on a
float64 copy of the block, and numpy's dense mean and sum of squares of the same block
made dense. Data: random sparse blocks (uniform positions, 1 + Poisson values, empty rows
and columns included), in float32 and float64, int32 and int64 indices.
"""

from __future__ import annotations

import threading

import h5py
import numpy as np
import pytest
import scipy.sparse as sp

from axiscope.core import sparse_kernels as kernels
from axiscope.core.options import EngineSettings, Resources
from axiscope.core.preprocess import PreprocessSpec
from axiscope.core.plan import plan_fit
from axiscope.fitting.run import fit
from axiscope.io import open_matrix

IMPLEMENTATIONS = ["numba", "scipy"] if kernels.NUMBA_AVAILABLE else ["scipy"]


@pytest.fixture(params=IMPLEMENTATIONS)
def implementation(request, monkeypatch):
    monkeypatch.setenv("AXISCOPE_SPARSE_KERNEL", request.param)
    assert kernels.kernel_name() == request.param
    return request.param


def random_block(rows=300, cols=200, density=0.05, dtype=np.float32, index=np.int32, seed=0):
    rng = np.random.default_rng(seed)
    D = np.where(rng.random((rows, cols)) < density, 1.0 + rng.poisson(3.0, (rows, cols)), 0.0)
    D[5, :] = 0  # an empty row
    D[:, 7] = 0  # an empty column
    M = sp.csc_matrix(D.astype(dtype))
    M.indices = M.indices.astype(index)
    M.indptr = M.indptr.astype(index)
    return M


def relative(a, b):
    return float(np.max(np.abs(a - b)) / np.max(np.abs(b)))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("index", [np.int32, np.int64])
def test_products_match_scipy_in_float64(implementation, dtype, index):
    block = random_block(dtype=dtype, index=index)
    reference = block.astype(np.float64)  # SciPy's product of the same values in float64
    rng = np.random.default_rng(1)
    W = rng.standard_normal((block.shape[1], 7))
    Y = rng.standard_normal((block.shape[0], 7))
    got_y = kernels.times_dense(block, W)
    got_g = kernels.transposed_times(block, Y)
    assert got_y.dtype == np.float64 and got_g.dtype == np.float64 and got_g.flags.c_contiguous
    assert relative(got_y, reference @ W) <= 1e-14
    assert relative(got_g, reference.T @ Y) <= 1e-14


def test_float32_values_accumulate_in_float64(implementation):
    # 1 + 2^-23 is exact in float32; a float32 sum of 2^24 + its copies would lose the tail
    block = sp.csc_matrix(np.array([[2.0**24], [1.0 + 2.0**-23], [1.0 + 2.0**-23]], dtype=np.float32))
    y = kernels.transposed_times(block, np.ones((3, 1)))
    assert y[0, 0] == 2.0**24 + 2.0 + 2.0**-22  # exact in float64, not in float32


def test_statistics_and_row_norms_match_dense_numpy(implementation):
    block = random_block(dtype=np.float32)
    D = block.toarray().astype(np.float64)  # numpy on the dense copy
    mean, m2 = kernels.column_statistics(block)
    assert relative(mean, D.mean(axis=0)) <= 1e-14
    assert relative(m2, ((D - D.mean(axis=0)) ** 2).sum(axis=0)) <= 1e-13
    rng = np.random.default_rng(2)
    d = rng.uniform(0.5, 2.0, D.shape[1])
    d[3] = 0.0  # a dropped feature
    mu = rng.uniform(0.0, 3.0, D.shape[1])
    norms = kernels.centred_row_sq_norms(block, d * d, mu) + float((d * d) @ (mu * mu))
    assert relative(norms, (((D - mu) * d) ** 2).sum(axis=1)) <= 1e-12


def test_the_two_implementations_agree(monkeypatch):
    if not kernels.NUMBA_AVAILABLE:
        pytest.skip("numba is not installed (the 'fast' extra)")
    block = random_block(rows=500, cols=300, dtype=np.float32)
    W = np.random.default_rng(3).standard_normal((300, 5))
    out = {}
    for name in ("numba", "scipy"):
        monkeypatch.setenv("AXISCOPE_SPARSE_KERNEL", name)
        y = kernels.times_dense(block, W)
        out[name] = (y, kernels.transposed_times(block, y))
    assert relative(out["numba"][0], out["scipy"][0]) <= 1e-14
    assert relative(out["numba"][1], out["scipy"][1]) <= 1e-14


def test_products_are_byte_identical_on_concurrent_threads(implementation):
    blocks = [random_block(rows=400, cols=250, seed=s) for s in range(4)]
    W = np.random.default_rng(4).standard_normal((250, 6))
    alone = [kernels.transposed_times(b, kernels.times_dense(b, W)).tobytes() for b in blocks]
    together: list = [None] * 8

    def work(i):
        b = blocks[i % 4]
        together[i] = kernels.transposed_times(b, kernels.times_dense(b, W)).tobytes()

    threads = [threading.Thread(target=work, args=(i,)) for i in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert together == alone + alone


def write_csr_h5(path, X):
    with h5py.File(path, "w") as handle:
        g = handle.create_group("counts")
        g.create_dataset("data", data=X.data.astype(np.float32))
        g.create_dataset("indices", data=X.indices.astype(np.int32))
        g.create_dataset("indptr", data=X.indptr.astype(np.int64))
        g.attrs["shape"] = list(X.shape)
        g.attrs["format"] = "csr"
    return path


def test_fit_is_byte_identical_whatever_the_threads(tmp_path, implementation):
    X = random_block(rows=3000, cols=400, density=0.03, seed=5).tocsr()
    path = write_csr_h5(tmp_path / "m.h5", X)
    runs = []
    for threads in (1, 2):
        res = fit(str(path), n_components=4, preprocess=PreprocessSpec(scale="none"),
                  engine=EngineSettings(method="randomized"),
                  resources=Resources(memory_limit="2GB", threads=threads))
        assert res.manifest["plan"]["cache"] == "memory"
        runs.append((res.factorization.singular_values.tobytes(), res.factorization.components.tobytes(),
                     res.scores.tobytes()))
    assert runs[0] == runs[1]


def test_float32_file_is_cached_at_8_bytes_per_stored_value(tmp_path):
    X = random_block(rows=2000, cols=300, density=0.05, seed=6).tocsr()
    path = write_csr_h5(tmp_path / "m.h5", X)
    with open_matrix(path) as src:
        assert src.stored_bytes == 8
        block = src.read_sparse(0, 100)
        assert block.dtype == np.float32
        plan = plan_fit(src, n_components=3, preprocess=PreprocessSpec(), engine=EngineSettings(),
                        resources=Resources(memory_limit="2GB"))
        blocks = -(-X.nnz // plan.block_nonzeros)
        assert plan.cache == "memory"
        assert 8 * X.nnz <= plan.cache_bytes <= 8 * X.nnz + 4 * 301 * max(8, blocks, -(-2000 // plan.block_rows))
        # a per-sample transform rewrites the values in float64: 12 bytes
        plan_log = plan_fit(src, n_components=3, preprocess=PreprocessSpec(log_transform=True),
                            engine=EngineSettings(), resources=Resources(memory_limit="2GB"))
        assert plan_log.cache_bytes >= 12 * X.nnz


def needs_numba():
    if not kernels.NUMBA_AVAILABLE:
        pytest.skip("numba is not installed (the 'fast' extra)")


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_tiled_blocks_give_the_sums_of_the_column_loops_byte_for_byte(monkeypatch, dtype):
    """Row tiles change where the work rows sit in cache, not the order of any sum: the tiled
    loops equal the plain CSC loops bit for bit, whatever the tile height (empty tiles too)."""
    needs_numba()
    monkeypatch.setenv("AXISCOPE_SPARSE_KERNEL", "numba")
    block = random_block(rows=700, cols=150, density=0.04, dtype=dtype, seed=7)
    D = block.toarray()
    D[200:260] = 0  # an empty tile at height 50
    csc = sp.csc_matrix(D)
    rng = np.random.default_rng(8)
    W = rng.standard_normal((150, 9))
    shift, offset = rng.standard_normal(9), rng.standard_normal(9) * 1e-3
    dd, mu = rng.uniform(0.5, 2.0, 150), rng.uniform(0.0, 3.0, 150)
    y_ref = kernels.times_dense(csc, W)
    y_ref -= shift
    y_ref -= offset
    g_ref = kernels.transposed_times(csc, y_ref[:, :5])
    stats_ref = kernels.column_statistics(csc)
    norms_ref = kernels.centred_row_sq_norms(csc, dd, mu)
    for height in (1, 50, 64, 700, None):
        t = kernels.tiled(csc.tocsr(), height)
        assert isinstance(t, kernels.TiledBlock) and t.indices.dtype == np.uint16 and t.dtype == dtype
        assert (t.tocsr() != csc.tocsr()).nnz == 0  # the same matrix
        y, g = kernels.block_products(t, W, shift, offset, 5)
        assert y.tobytes() == y_ref.tobytes() and g.tobytes() == g_ref.tobytes()
        mean, m2 = kernels.column_statistics(t)
        assert mean.tobytes() == stats_ref[0].tobytes() and m2.tobytes() == stats_ref[1].tobytes()
        assert kernels.centred_row_sq_norms(t, dd, mu).tobytes() == norms_ref.tobytes()
        assert kernels.transposed_times(t, y).tobytes() == kernels.transposed_times(csc, y).tobytes()


def test_tiles_grow_where_a_block_is_very_sparse():
    """Pointers cost at most 2 bytes per stored value: tiles hold at least 4·features values."""
    assert kernels.tile_rows_for(12_500, 30_000, 7_500_000) == kernels.TILE_ROWS  # 2% density: 2,048 rows
    assert kernels.tile_rows_for(100_000, 30_000, 300_000) == 40_000  # 0.01%: 4·30,000 values per tile
    assert kernels.tile_rows_for(10**6, 10**6, 10**6) == 2**16  # capped by uint16 row numbers


def test_a_bad_index_is_found_when_the_block_is_read(tmp_path):
    """A CSR file read by samples is not read once more at opening only to check its indices: the
    slice a pass reads is checked before any product, with the message of the check at opening."""
    from axiscope.errors import InputError

    X = random_block(rows=300, cols=40, density=0.1, seed=9).tocsr()
    path = write_csr_h5(tmp_path / "m.h5", X)
    bad = int(X.indptr[250]) + 1
    with h5py.File(path, "r+") as handle:
        handle["counts/indices"][bad] = 40
    with open_matrix(path) as src:
        src.read_sparse(0, 200)  # rows before the bad entry read fine
        with pytest.raises(InputError, match=f"'indices' entry {bad} is 40, outside the 40 columns"):
            src.read_sparse(200, 300)
