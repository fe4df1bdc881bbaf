"""The fit on a dask.distributed cluster: same numbers as the threaded fit, little traffic.

A LocalCluster of two single-threaded worker processes is started inside the tests (on
127.0.0.1, no dashboard). References: the threaded fit of the same file (the same block
products; only the order of the sums over blocks differs, a pairwise tree instead of a
running sum, so agreement to rounding, checked at 1e-10 relative in float64) and LAPACK
through ``numpy.linalg.svd`` for the singular values. Data: a planted low-rank matrix plus
noise, invented here.
"""

from __future__ import annotations

import os
import sys

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")
cloudpickle = pytest.importorskip("cloudpickle")

from axiscope.core import backends  # noqa: E402
from axiscope.core.options import EngineSettings, Resources  # noqa: E402
from axiscope.core.preprocess import PreprocessSpec  # noqa: E402
from axiscope.errors import OptionError  # noqa: E402
from axiscope.fitting.run import fit  # noqa: E402

# the worker-side helpers below are sent by value (the workers cannot import this module)
cloudpickle.register_pickle_by_value(sys.modules[__name__])

N, P, K = 900, 60, 4
ENGINE = EngineSettings(method="randomized", seed=3)
BUDGET = "16MB"  # small blocks: several per pass


def _planted(seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    U = np.linalg.qr(rng.standard_normal((N, K)))[0]
    V = np.linalg.qr(rng.standard_normal((P, K)))[0]
    return 40.0 * (U * [8.0, 6.0, 4.0, 3.0]) @ V.T + rng.standard_normal((N, P)) + 5.0


def _close(a, b, rtol=1e-10):
    scale = np.max(np.abs(a))
    assert np.max(np.abs(a - b)) <= rtol * scale, np.max(np.abs(a - b)) / scale


def _compare(threaded, clustered):
    _close(threaded.model.singular_values, clustered.model.singular_values)
    _close(threaded.model.components, clustered.model.components)
    _close(threaded.scores, clustered.scores)


@pytest.mark.parametrize("fmt, selected", [("h5", False), ("zarr3", True)])
def test_fit_on_the_cluster_equals_the_threaded_fit(client, write_matrix, fmt, selected):
    # selected: some samples left out and a feature filter (the workers read a subset of
    # rows and columns, and the sketch takes its own pass)
    X = _planted()
    path = write_matrix(X, fmt, chunks=(100, P))
    active = np.ones(N, dtype=bool)
    spec = None
    if selected:
        active[::7] = False
        spec = PreprocessSpec(top_variable=P - 10)
    options = dict(n_components=K, engine=ENGINE, preprocess=spec, active=active)
    threaded = fit(path, **options, resources=Resources(memory_limit=BUDGET, threads=2))
    clustered = fit(path, **options, resources=Resources(memory_limit=BUDGET, threads=2, scheduler=client))
    assert threaded.manifest["passes"]["detail"][0]["blocks"] >= 6
    _compare(threaded, clustered)
    # LAPACK reference on the standardized matrix (population SD, the documented convention)
    kept = X[active][:, clustered.preprocessing.kept]
    Z = (kept - kept.mean(axis=0)) / kept.std(axis=0)
    np.testing.assert_allclose(clustered.model.singular_values, np.linalg.svd(Z, compute_uv=False)[:K], rtol=1e-8)
    record = clustered.manifest["execution"]
    assert record["backend"] == "dask.distributed" and record["workers"] == 2
    # client traffic per Krylov pass: Y (n × m) and row norms per block, and one p × l total
    # (plus pickling overhead); never the blocks (n × p)
    for detail in clustered.manifest["passes"]["detail"]:
        assert detail["read_from"] in ("input", "workers")  # never a cache of this process
        assert 0 < detail["bytes_to_client"] < 8 * (N * (K + 10 + 10 + 1) + P * (K + 10)) + 20_000
    assert threaded.manifest["execution"] == {"backend": "threaded", "threads": 2}


def _local_directories(dask_worker=None) -> list[str]:
    """On a worker: what its local directory holds (the scratch folders of kept blocks)."""
    return sorted(os.listdir(dask_worker.local_directory))


def test_blocks_planned_on_scratch_are_kept_in_each_worker_s_scratch_file(client, write_matrix):
    # a compressed input whose decoded copy does not fit the budget: the plan puts the cache
    # in a scratch file, and on the cluster each worker keeps the blocks it decoded in a file
    # of its local directory (read back on the later passes), removed when the fit ends
    rng = np.random.default_rng(10)
    n, p = 2000, 400
    X = (rng.standard_normal((n, 6)) * [30, 20, 12, 8, 5, 4]) @ rng.standard_normal((6, p)) \
        + rng.standard_normal((n, p))
    path = write_matrix(X, "zarr3", chunks=(200, p))
    threaded = fit(path, n_components=K, engine=ENGINE, resources=Resources(memory_limit=BUDGET, threads=2))
    assert threaded.manifest["plan"]["cache"] == "scratch"
    clustered = fit(path, n_components=K, engine=ENGINE,
                    resources=Resources(memory_limit=BUDGET, threads=2, scheduler=client))
    assert clustered.manifest["execution"]["blocks_kept"].startswith("in a scratch file")
    later = [d["read_from"] for d in clustered.manifest["passes"]["detail"][1:]]
    assert later and set(later) == {"worker scratch"}
    _compare(threaded, clustered)
    for listing in client.run(_local_directories).values():
        assert not [name for name in listing if name.startswith("axiscope-blocks-")]


def _ids(n: int) -> list[str]:
    return [f"s{i}" for i in range(n)]


def test_covariate_adjusted_fit_on_the_cluster_equals_the_threaded_fit(client, write_matrix):
    # the statistics pass hands each block its rows of the centred covariates: they travel
    # with the block's task, and the cross products are summed in the workers' tree
    import pandas as pd

    from axiscope.core.adjust import Covariates

    rng = np.random.default_rng(6)
    X = _planted(6)
    batch = rng.choice(["A", "B", "C"], N)
    depth = rng.normal(10.0, 2.0, N)
    X += (batch == "B")[:, None] * rng.normal(0, 3, P) + depth[:, None] * rng.normal(0, 0.5, P)
    path = write_matrix(X, "h5", chunks=(100, P), sample_ids=_ids(N))
    table = pd.DataFrame({"sample_id": _ids(N), "batch": batch, "depth": depth})
    options = dict(n_components=K, engine=ENGINE, covariates=Covariates(table, ["batch", "depth"]))
    threaded = fit(path, **options, resources=Resources(memory_limit=BUDGET, threads=2))
    clustered = fit(path, **options, resources=Resources(memory_limit=BUDGET, threads=2, scheduler=client))
    first = clustered.manifest["passes"]["detail"][0]
    assert first["name"].startswith("statistics + covariates") and first["blocks"] >= 6
    _compare(threaded, clustered)
    _close(threaded.sample_sq_dist, clustered.sample_sq_dist)
    _close(threaded.model.extras["covariate_coef"], clustered.model.extras["covariate_coef"])
    # sent: each block's covariate rows once (N × 3 float64 in all) and Ω to both workers;
    # received: only the merged statistics, sketch and cross products (never per block)
    assert first["bytes_from_client"] < 8 * (N * 3 + 2 * P * (K + 10)) + 20_000
    assert first["bytes_to_client"] < 8 * (P * (K + 10) + P * 3 + 4 * P) + 20_000


def test_one_pass_fit_on_the_cluster_equals_the_threaded_fit(client, write_matrix):
    # the one pass hands each block its columns of Ψ; Ψ·X is merged in the workers' tree,
    # X·Ω and the block means come back per block
    from axiscope.core.onepass import ERROR_ROWS, sketch_widths

    X = _planted(7)
    path = write_matrix(X, "zarr3", chunks=(100, P))
    engine = EngineSettings(method="one-pass", seed=3)
    threaded = fit(path, n_components=K, engine=engine, resources=Resources(memory_limit=BUDGET, threads=2))
    clustered = fit(path, n_components=K, engine=engine,
                    resources=Resources(memory_limit=BUDGET, threads=2, scheduler=client))
    assert clustered.manifest["passes"]["count"] == 1
    detail = clustered.manifest["passes"]["detail"][0]
    assert detail["blocks"] >= 6 and detail["read_from"] == "input"
    _compare(threaded, clustered)
    _close(threaded.sample_sq_dist, clustered.sample_sq_dist)
    assert threaded.manifest["one_pass"]["estimated_relative_error"] == pytest.approx(
        clustered.manifest["one_pass"]["estimated_relative_error"], rel=1e-10)
    s, t = sketch_widths(K, ENGINE.oversample, N, P)
    blocks = detail["blocks"]
    # sent: Ψ's columns once (N × (s + q)), Ω to both workers; received: N × t, a mean per
    # block, one merged (s + q) × P and the statistics
    assert detail["bytes_from_client"] < 8 * (N * (s + ERROR_ROWS) + 2 * P * t) + 20_000
    assert detail["bytes_to_client"] < 8 * (N * t + blocks * P + (s + ERROR_ROWS) * P + 4 * P) + 2_000 * blocks


def _sparse_counts(seed: int = 8):
    """Poisson counts around a planted rank-3 rate matrix, about 90% zeros (as tests/test_sparse.py)."""
    import scipy.sparse as sp

    rng = np.random.default_rng(seed)
    rates = 0.1 * rng.gamma(1.0, 1.0, (N, 3)) @ (rng.gamma(0.3, 1.0, (3, P)) * np.array([[3.0], [1.5], [0.8]]))
    counts = rng.poisson(rates).astype(np.float64)
    counts[:, :3] += rng.poisson(0.3, (N, 3))  # no column all zero
    counts[np.arange(N), rng.integers(0, P, N)] += 1.0  # no sample all zero
    return sp.csr_matrix(counts)


def _write_sparse(path, X, order: str):
    """The data, indices and indptr of ``X`` in CSR or CSC order and its shape, in an HDF5 or Zarr group."""
    M = X.tocsr() if order == "csr" else X.tocsc()
    arrays = {"data": M.data.astype(np.float32), "indices": M.indices.astype(np.int32),
              "indptr": M.indptr.astype(np.int64)}
    if path.suffix == ".h5":
        import h5py

        with h5py.File(path, "w") as handle:
            group = handle.create_group("counts")
            for name, values in arrays.items():
                group.create_dataset(name, data=values)
            group.attrs.update({"shape": list(M.shape), "format": order})
    else:
        import zarr

        group = zarr.open_group(str(path), mode="w").create_group("counts")
        for name, values in arrays.items():
            group.create_array(name, shape=values.shape, dtype=values.dtype)[:] = values
        group.attrs.update({"shape": list(M.shape), "format": order})
    return path


@pytest.mark.parametrize("name, order", [("m.h5", "csr"), ("m.zarr", "csc")])
def test_sparse_fit_on_the_cluster_equals_the_threaded_fit(client, tmp_path, name, order):
    # CSR: the workers open the group and read their own ranges of samples, kept compressed;
    # CSC (converted to sample order once, in this process): the blocks are read here and
    # sent, compressed, to the workers
    X = _sparse_counts()
    path = _write_sparse(tmp_path / name, X, order)
    spec = PreprocessSpec(counts_per=1e4, log_transform=True)
    options = dict(n_components=3, engine=ENGINE, preprocess=spec)
    threaded = fit(path, **options, resources=Resources(memory_limit=BUDGET, threads=2))
    clustered = fit(path, **options, resources=Resources(memory_limit=BUDGET, threads=2, scheduler=client))
    assert clustered.manifest["input"]["storage"].startswith("sparse")
    assert threaded.manifest["passes"]["detail"][0]["blocks"] >= 3
    _compare(threaded, clustered)
    _close(threaded.sample_sq_dist, clustered.sample_sq_dist)
    # LAPACK reference on the dense copy, transformed and standardised (population SD)
    D = X.toarray()
    D = np.log1p(D * (1e4 / D.sum(axis=1, keepdims=True)))
    Z = (D - D.mean(axis=0)) / D.std(axis=0)
    np.testing.assert_allclose(clustered.model.singular_values, np.linalg.svd(Z, compute_uv=False)[:3], rtol=1e-8)
    sent = sum(d["bytes_from_client"] for d in clustered.manifest["passes"]["detail"])
    if order == "csr":  # the blocks never travel: Ω and the bases only
        assert sent < 8 * 2 * P * 40 * len(clustered.manifest["passes"]["detail"]) + 20_000
    else:  # each block sent on each pass, compressed (12 bytes a stored value, plus pointers)
        assert sent >= 12 * X.nnz


def test_split_half_stability_on_the_cluster_equals_the_threaded_one(client, write_matrix):
    # the stability's passes read the fit's blocks where the fit left them (kept by the
    # workers), each block receives its rows of the half labels, the halves' products are
    # summed on the workers
    from axiscope.decide.stability import axis_stability

    X = _planted(9)
    path = write_matrix(X, "h5", chunks=(100, P))
    found = {}

    def then(result, blocks):
        found[blocks.backend is None] = axis_stability(blocks, result, stability_repeats=2, seed=4)

    for extra in ({}, {"scheduler": client}):
        fit(path, n_components=K, engine=ENGINE, then=then,
            resources=Resources(memory_limit=BUDGET, threads=2, **extra))
    threaded, clustered = found[True], found[False]
    assert clustered.read_from == "workers" and clustered.passes == threaded.passes >= 2
    np.testing.assert_allclose(clustered.per_repeat, threaded.per_repeat, rtol=0, atol=1e-10)
    np.testing.assert_allclose(clustered.subspace_per_repeat, threaded.subspace_per_repeat, rtol=0, atol=1e-10)
    for pair_a, pair_b in zip(threaded.loadings, clustered.loadings):
        for a, b in zip(pair_a, pair_b):  # each half's vectors, up to the sign eigh picks
            _close(a, b * np.sign(np.sum(a * b, axis=0)))


def test_in_memory_input_under_the_current_client(client):
    # the estimator's in-memory array cannot be opened by a worker: its blocks are sent from
    # here, and the fit uses the current client without being told
    from axiscope.estimator import AxiscopePCA

    X = _planted(1)
    reference = AxiscopePCA(n_components=K, method="randomized", random_state=3, memory_limit=BUDGET).fit(X)
    with client.as_current():
        model = AxiscopePCA(n_components=K, method="randomized", random_state=3, memory_limit=BUDGET).fit(X)
        scores = model.transform(X[:50])
    _close(reference.singular_values_, model.singular_values_)
    _close(reference.components_, model.components_)
    _close(reference.transform(X[:50]), scores)


def _kill_once_installer(marker: str, after: int):
    """Make this worker process exit (as if killed) at its ``after``-th block task, once per marker."""
    import axiscope.core.backends as b

    original = b._run_block
    count = {"n": 0}

    def run_or_die(*args, **kwargs):
        count["n"] += 1
        if count["n"] == after:
            try:
                os.close(os.open(marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
            except FileExistsError:
                pass
            else:
                os._exit(1)
        return original(*args, **kwargs)

    b._run_block = run_or_die


def test_a_worker_killed_mid_pass_changes_nothing(client, write_matrix, tmp_path):
    X = _planted(2)
    path = write_matrix(X, "h5", chunks=(100, P))
    resources = Resources(memory_limit=BUDGET, threads=2, scheduler=client)
    before = fit(path, n_components=K, engine=ENGINE, resources=resources)
    marker = tmp_path / "killed"
    client.run(_kill_once_installer, str(marker), 8)  # a worker dies in the second pass
    after = fit(path, n_components=K, engine=ENGINE, resources=resources)
    assert marker.exists()  # a worker did die
    # the lost tasks ran again (Dask's retry; the blocks the dead worker kept are read from
    # the file again) and the fixed tree summed the same numbers
    np.testing.assert_array_equal(before.model.singular_values, after.model.singular_values)
    np.testing.assert_array_equal(before.scores, after.scores)
    client.wait_for_workers(2, timeout=60)  # the restarted worker is back (the cluster is shared by later tests)


def test_bad_cluster_options_are_one_line_errors(monkeypatch, write_matrix, tmp_path):
    from typer.testing import CliRunner

    from axiscope.cli import app

    with pytest.raises(OptionError, match="local or local:N"):
        Resources(cluster="remote:3")
    with pytest.raises(OptionError, match="not both"):
        Resources(cluster="local:2", scheduler="tcp://127.0.0.1:1")
    path = write_matrix(_planted(4), "h5")
    runner = CliRunner()
    monkeypatch.setattr(backends, "CONNECT_TIMEOUT", 2)
    done = runner.invoke(app, ["fit", str(path), "--out", str(tmp_path / "o"), "--scheduler", "tcp://127.0.0.1:9"])
    assert done.exit_code == 2
    assert "--scheduler 'tcp://127.0.0.1:9' cannot be reached" in done.output
    assert not (tmp_path / "o").exists()
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if it were not installed
    done = runner.invoke(app, ["fit", str(path), "--out", str(tmp_path / "o"), "--cluster", "local:2"])
    assert done.exit_code == 2
    assert 'pip install "axiscope[cluster]"' in done.output


@pytest.mark.parametrize("method", ["randomized", "one-pass"])
def test_a_bad_cell_is_named_as_on_the_threaded_fit(client, write_matrix, method):
    # the statistics pass's tree carries the first bad cell's row from the start of its run
    # of blocks (the one pass: each block's piece carries it); the message must name the
    # same sample and feature as the threaded fit's
    from axiscope.errors import InputError

    X = _planted(5)
    X[555, 7] = np.nan
    path = write_matrix(X, "h5", chunks=(100, P))
    engine = EngineSettings(method=method, seed=3)
    messages = []
    for extra in ({}, {"scheduler": client}):
        with pytest.raises(InputError) as caught:
            fit(path, n_components=K, engine=engine, resources=Resources(memory_limit=BUDGET, threads=2, **extra))
        messages.append(str(caught.value))
    assert messages[0] == messages[1]
    assert "sample_000556" in messages[1] and "is NaN or infinite" in messages[1]


def test_fit_against_a_scheduler_started_by_hand(write_matrix, tmp_path):
    """`dask scheduler` and `dask worker` started as their own processes, as on a multi-node
    cluster; the fit is given the scheduler's address as a string (the README's commands)."""
    import json
    import subprocess
    import time

    dask_cli = [sys.executable, "-m", "distributed.cli.dask_scheduler"]
    worker_cli = [sys.executable, "-m", "distributed.cli.dask_worker"]
    info = tmp_path / "scheduler.json"
    scheduler = subprocess.Popen([*dask_cli, "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                                  "--dashboard-address", "127.0.0.1:0", "--scheduler-file", str(info)],
                                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    # started at once: the worker waits for the scheduler's file, and meanwhile the threaded fit runs
    worker = subprocess.Popen([*worker_cli, "--scheduler-file", str(info), "--nworkers", "1", "--nthreads", "1",
                               "--no-dashboard", "--local-directory", str(tmp_path / "worker")],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        X = _planted(seed=4)
        path = write_matrix(X, "h5", chunks=(100, P))
        threaded = fit(path, n_components=K, engine=ENGINE, resources=Resources(memory_limit=BUDGET, threads=2))
        for _ in range(600):
            if info.exists() and info.stat().st_size:
                break
            time.sleep(0.1)
        address = json.loads(info.read_text())["address"]
        with distributed.Client(address, timeout=60) as probe:
            probe.wait_for_workers(1, timeout=60)
        remote = fit(path, n_components=K, engine=ENGINE,
                     resources=Resources(memory_limit=BUDGET, threads=2, scheduler=address))
        assert remote.manifest["execution"]["backend"] == "dask.distributed"
        assert remote.manifest["execution"]["scheduler"] == address
        _compare(threaded, remote)
    finally:
        for process in (worker, scheduler):
            if process is not None:
                process.terminate()
                process.wait(timeout=30)
