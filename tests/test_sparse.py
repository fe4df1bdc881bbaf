"""Sparse input: CSR/CSC in HDF5 and Zarr, SciPy ``.npz``, scipy.sparse in the estimator.

References: the dense copy of the same matrix fitted through the same command (every
sparse layout must give its numbers to 1e-6 relative in float64), and the textbook dense
computation, ``numpy.linalg.svd`` (LAPACK ``gesdd``) of the standardised dense matrix
(centred by the column mean, divided by the population SD). The data are invented counts
with a planted low-rank structure (Poisson draws around a rank-3 rate matrix, ~90% zeros).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import h5py
import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
import zarr
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.cli._app import main
from axiscope.core.options import EngineSettings
from axiscope.estimator import AxiscopePCA
from axiscope.fitting.run import fit
from axiscope.io import array_source, open_matrix

runner = CliRunner()
K = 3


def planted_counts(n: int = 240, p: int = 90, seed: int = 0) -> sp.csr_matrix:
    """Poisson counts around a planted rank-3 rate matrix; about 90% of the cells are 0."""
    rng = np.random.default_rng(seed)
    U = rng.gamma(1.0, 1.0, (n, 3))
    V = rng.gamma(0.3, 1.0, (3, p)) * np.array([[3.0], [1.5], [0.8]])
    rates = 0.05 * U @ V * 2.0
    counts = rng.poisson(rates).astype(np.float64)
    counts[:, :3] += rng.poisson(0.3, (n, 3))  # no column all zero
    return sp.csr_matrix(counts)


def standardised_svd(D: np.ndarray, *, log: bool = False, cpm: float | None = None):
    """Reference: numpy.linalg.svd of the centred, unit-scaled (population SD) dense matrix."""
    A = np.array(D, dtype=np.float64)
    if cpm is not None:
        A = A * (cpm / A.sum(axis=1, keepdims=True))
    if log:
        A = np.log1p(A)
    A = A[:, A.std(axis=0) > 0]  # constant features are dropped, as axiscope does
    A = (A - A.mean(axis=0)) / A.std(axis=0)
    U, s, Vt = np.linalg.svd(A, full_matrices=False)
    return s, U * s


def write_group(handle, X: sp.spmatrix, fmt: str, *, shape_as: str = "attribute", names=("data", "indices",
                "indptr", "shape"), declare: bool = True) -> None:
    """The three arrays and the shape of ``X`` in CSR or CSC order, in an HDF5 or Zarr group."""
    M = X.tocsr() if fmt == "csr" else X.tocsc()
    arrays = {names[0]: M.data.astype(np.float32), names[1]: M.indices.astype(np.int32),
              names[2]: M.indptr.astype(np.int64)}
    for name, values in arrays.items():
        if isinstance(handle, h5py.Group):
            handle.create_dataset(name, data=values)
        else:
            handle.create_array(name, shape=values.shape, dtype=values.dtype)[:] = values
    if shape_as == "attribute":
        handle.attrs[names[3]] = list(M.shape)
    elif shape_as == "dataset":
        if isinstance(handle, h5py.Group):
            handle.create_dataset(names[3], data=np.array(M.shape))
        else:
            handle.create_array(names[3], shape=(2,), dtype="int64")[:] = np.array(M.shape)
    if declare:
        handle.attrs["format"] = fmt


def write_sparse(path, X, kind: str):
    """``X`` as ``kind``: h5-csr, h5-csc, zarr-csr, npz (CSR) or npz-csc; returns the path."""
    if kind.startswith("h5"):
        path = path / "m.h5"
        with h5py.File(path, "w") as handle:
            write_group(handle.create_group("counts"), X, kind[3:], shape_as="dataset" if kind == "h5-csc"
                        else "attribute")
    elif kind == "zarr-csr":
        path = path / "m.zarr"
        root = zarr.open_group(str(path), mode="w")
        write_group(root.create_group("counts"), X, "csr")
    else:
        path = path / "m.npz"
        sp.save_npz(path, X.tocsc() if kind == "npz-csc" else X.tocsr())
    return path


def write_dense_h5(path, D):
    path = path / "dense.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("X", data=D)
    return path


def fit_cli(path, out, *extra):
    res = runner.invoke(app, ["fit", str(path), "--out", str(out), "-k", str(K), "--quiet", *map(str, extra)])
    assert res.exit_code == 0, res.stderr
    comps = pd.read_csv(out / "components.tsv", sep="\t")
    scores = pd.read_csv(out / "sample_scores.tsv", sep="\t", comment="#")
    return comps.singular_value.to_numpy(), scores, json.loads((out / "manifest.json").read_text())


# --------------------------------------------------------------------- same numbers


@pytest.mark.parametrize("kind", ["h5-csr", "h5-csc", "zarr-csr", "npz", "npz-csc"])
@pytest.mark.parametrize("method", ["exact", "randomized"])
def test_cli_sparse_matches_dense_copy_and_lapack(tmp_path, kind, method):
    X = planted_counts()
    D = X.toarray()
    (tmp_path / "s").mkdir()
    sparse_path = write_sparse(tmp_path / "s", X, kind)
    dense_path = write_dense_h5(tmp_path, D.astype(np.float32).astype(np.float64))
    s_sparse, t_sparse, manifest = fit_cli(sparse_path, tmp_path / "out-s", "--method", method)
    s_dense, t_dense, _ = fit_cli(dense_path, tmp_path / "out-d", "--method", method)
    assert manifest["input"]["storage"].startswith("sparse")
    np.testing.assert_allclose(s_sparse, s_dense, rtol=1e-6)
    cols = [f"PC{j + 1}" for j in range(K)]
    scale = np.abs(t_dense[cols].to_numpy()).max()
    np.testing.assert_allclose(t_sparse[cols].to_numpy(), t_dense[cols].to_numpy(), atol=1e-6 * scale)
    s_ref, _ = standardised_svd(D)  # reference: LAPACK on the dense standardised matrix
    np.testing.assert_allclose(s_sparse, s_ref[:K], rtol=1e-6)


@pytest.mark.parametrize("method", ["exact", "randomized"])
def test_cli_sparse_log_and_counts_per_million_match_dense(tmp_path, method):
    """The transforms act on stored values only (zeros stay zero) and give the dense answer."""
    X = planted_counts(seed=4)
    D = X.toarray()
    sparse_path = write_sparse(tmp_path, X, "h5-csr")
    s, scores, _ = fit_cli(sparse_path, tmp_path / "out", "--log", "--counts-per", "1e6", "--method", method)
    s_ref, T_ref = standardised_svd(D, log=True, cpm=1e6)  # reference: LAPACK on the dense copy
    np.testing.assert_allclose(s, s_ref[:K], rtol=1e-6)
    if method == "randomized":  # vectors converge more slowly than values (tol is on the values)
        return
    cols = [f"PC{j + 1}" for j in range(K)]
    got = scores[cols].to_numpy()
    signs = np.sign(np.sum(got * T_ref[:, :K], axis=0))
    np.testing.assert_allclose(got, T_ref[:, :K] * signs, atol=1e-6 * np.abs(T_ref[:, :K]).max())


def test_sparse_blocks_are_cut_by_stored_values_and_never_densified(monkeypatch):
    """Blocks reach the engine compressed (tiled for the compiled loops, CSC for SciPy's); a tight
    budget cuts many blocks with similar stored counts."""
    import axiscope.core.engine as engine
    from axiscope.core.sparse_kernels import TiledBlock

    X = planted_counts(n=1200, p=90, seed=2)
    seen = []
    original = engine.sparse_products

    def spy(block, *args):
        assert sp.issparse(block) or isinstance(block, TiledBlock)
        seen.append(block.nnz)
        return original(block, *args)

    monkeypatch.setattr(engine, "sparse_products", spy)
    res = fit(array_source(X), n_components=K, engine=EngineSettings(method="randomized", seed=3))
    plan = res.manifest["plan"]
    assert plan["block_nonzeros"] >= 90 and seen
    assert max(seen) <= max(plan["block_nonzeros"], 90)
    s_ref, _ = standardised_svd(X.toarray())  # reference: LAPACK on the dense copy
    np.testing.assert_allclose(res.factorization.singular_values, s_ref[:K], rtol=1e-6)


def test_sparse_sample_squared_distances_match_dense():
    X = planted_counts(seed=5)
    res = fit(array_source(X), n_components=K, engine=EngineSettings(method="randomized", seed=1))
    D = X.toarray()
    D = D[:, D.std(axis=0) > 0]
    A = (D - D.mean(axis=0)) / D.std(axis=0)  # reference: the dense standardised rows
    np.testing.assert_allclose(res.sample_sq_dist, np.einsum("ij,ij->i", A, A), rtol=1e-9)


# --------------------------------------------------------------------- estimator


@pytest.mark.parametrize("kind", [sp.csr_matrix, sp.csr_array, sp.csc_matrix])
def test_estimator_accepts_scipy_sparse(kind):
    X = planted_counts(seed=6)
    D = X.toarray()
    est_s = AxiscopePCA(n_components=K, random_state=0, method="randomized")
    est_d = AxiscopePCA(n_components=K, random_state=0, method="randomized")
    T_s = est_s.fit_transform(kind(X))
    T_d = est_d.fit_transform(D)
    np.testing.assert_allclose(est_s.singular_values_, est_d.singular_values_, rtol=1e-6)
    np.testing.assert_allclose(T_s, T_d, atol=1e-6 * np.abs(T_d).max())
    s_ref, _ = standardised_svd(D)  # reference: LAPACK on the dense standardised matrix
    np.testing.assert_allclose(est_s.singular_values_, s_ref[:K], rtol=1e-6)
    # new sparse samples are scored like their dense copies (densified one block at a time)
    np.testing.assert_allclose(est_s.transform(kind(X[:7])), est_d.transform(D[:7]), atol=1e-6 * np.abs(T_d).max())


# ------------------------------------------------------------------ refusals


def test_missing_mean_is_refused_for_sparse_input():
    from axiscope.core.preprocess import PreprocessSpec
    from axiscope.errors import OptionError

    with pytest.raises(OptionError, match="missing='mean' does not apply to sparse input"):
        fit(array_source(planted_counts()), n_components=K, preprocess=PreprocessSpec(missing="mean"))


def _bad(tmp_path, mutate):
    X = planted_counts(n=20, p=10)
    path = tmp_path / "bad.h5"
    with h5py.File(path, "w") as handle:
        group = handle.create_group("counts")
        write_group(group, X, "csr")
        mutate(group)
    return path


@pytest.mark.parametrize("mutate,fragment", [
    (lambda g: g["indptr"].__setitem__(5, g["indptr"][4] - 1), "'indptr' decreases at entry"),
    (lambda g: g["indices"].__setitem__(3, 10), "'indices' entry 3 is 10, outside the 10 columns"),
    (lambda g: g.attrs.__delitem__("shape"), "no shape (attribute or dataset 'shape')"),
    (lambda g: g["data"].__setitem__(0, np.nan), "sparse input cannot mark values as missing"),
    (lambda g: g.__delitem__("indptr"), "group '/counts' holds part of a sparse matrix but no 'indptr'"),
])
def test_bad_sparse_files_give_one_line_and_exit_2(tmp_path, capsys, mutate, fragment):
    path = _bad(tmp_path, mutate)
    out = tmp_path / "out"
    code = main(["fit", str(path), "--out", str(out), "-k", "2", "--quiet", "--dataset", "counts"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("error:") and "bad.h5" in err[0] and fragment in err[0], err
    assert not out.exists()


def test_custom_names_and_stated_axis(tmp_path):
    X = planted_counts(n=60, p=60, seed=7)  # square: the pointers cannot tell CSR from CSC
    path = tmp_path / "named.h5"
    names = ("v", "i", "p", "dims")
    with h5py.File(path, "w") as handle:
        write_group(handle.create_group("m"), X, "csc", names=names, declare=False)
    with pytest.raises(Exception, match="compressed_axis='rows' or 'columns'"):
        open_matrix(path, dataset="m", sparse_names="v,i,p,dims")
    with open_matrix(path, dataset="m", sparse_names="v,i,p,dims", compressed_axis="columns") as src:
        np.testing.assert_array_equal(src.read_samples(0, 60), X.toarray().astype(np.float32))


# ------------------------------------------------------------------ memory


_RSS_SCRIPT = textwrap.dedent(
    """
    import json, sys
    from axiscope.cli._app import main
    code = main(sys.argv[3:])
    with open("/proc/self/status") as handle:
        peak = next(int(line.split()[1]) * 1024 for line in handle if line.startswith("VmHWM:"))
    with open(sys.argv[1], "w") as handle:
        handle.write(json.dumps({"peak": peak, "code": code}))
    """
)


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="needs Linux /proc for VmHWM")
def test_peak_rss_of_a_large_sparse_fit_stays_under_the_budget(tmp_path):
    """20,000 × 10,000 at 1% (2M stored values; 1.6 GB dense in float64) under --memory-limit 450MB.

    The kernel's high-water mark of the command line's process (``VmHWM``, interpreter and
    libraries included) must stay within the limit, which is below a third of the dense
    size. (40,000 × 20,000 at 1% under 700MB: 425 MB peak, 27 s; kept for scripts/.)
    """
    n, p, per_row = 20_000, 10_000, 100
    rng = np.random.default_rng(0)
    # a sorted k-combination per row: sorted draws from 0..p−k plus 0..k−1
    cols = np.sort(rng.integers(0, p - per_row + 1, (n, per_row)), axis=1) + np.arange(per_row)
    path = tmp_path / "large.h5"
    with h5py.File(path, "w") as handle:
        group = handle.create_group("counts")
        group.create_dataset("data", data=rng.poisson(2.0, n * per_row).astype(np.float32) + 1)
        group.create_dataset("indices", data=cols.reshape(-1).astype(np.int32))
        group.create_dataset("indptr", data=np.arange(0, n * per_row + 1, per_row, dtype=np.int64))
        group.attrs["shape"] = [n, p]
    report = tmp_path / "peak.json"
    limit = 450 * 10**6
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    done = subprocess.run([sys.executable, "-c", _RSS_SCRIPT, str(report), "x", "fit", str(path), "--out",
                           str(tmp_path / "out"), "-k", "5", "--power-iterations", "2", "--memory-limit",
                           "450MB", "--threads", "2", "--quiet"],
                          capture_output=True, text=True, env=env, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    peak = json.loads(report.read_text())["peak"]
    assert peak <= limit, f"peak {peak / 1e6:.0f} MB over the 450 MB limit"
    assert peak < n * p * 8 / 3


def test_features_by_samples_csr_is_read_with_samples_in_columns(tmp_path):
    """A features × samples CSR file is compressed by features: converted once to sample order."""
    X = planted_counts(seed=8)
    path = tmp_path / "t.npz"
    sp.save_npz(path, X.T.tocsr())
    with open_matrix(path, samples_in="columns") as src:
        assert src.held_bytes >= 12 * X.nnz  # the sample-order copy is counted by the plan
        res = fit(src, n_components=K, engine=EngineSettings(method="randomized", seed=2))
    s_ref, _ = standardised_svd(X.toarray())  # reference: LAPACK on the dense standardised matrix
    np.testing.assert_allclose(res.factorization.singular_values, s_ref[:K], rtol=1e-6)


def test_npz_of_another_sparse_format_is_refused(tmp_path):
    from axiscope.errors import InputError

    path = tmp_path / "coo.npz"
    sp.save_npz(path, planted_counts(n=10, p=5).tocoo())
    with pytest.raises(InputError, match="in 'coo' format; save it as CSR or CSC"):
        open_matrix(path)


def test_sparse_values_that_are_not_dosages_are_named():
    """scale='allele-frequency' on a sparse matrix holding 1.5: one InputError naming the cell."""
    import scipy.sparse as sp

    from axiscope.core.preprocess import PreprocessSpec
    from axiscope.errors import InputError
    from axiscope.fitting.run import fit
    from axiscope.io import array_source

    X = sp.random(50, 20, density=0.3, format="csr", random_state=0)
    X.data[:] = 1.5
    with pytest.raises(InputError, match="holds 1.5"):
        fit(array_source(X), n_components=2, preprocess=PreprocessSpec(scale="allele-frequency"))
