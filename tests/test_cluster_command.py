"""One command, one cluster: every step of ``fit`` runs on the cluster the fit ran on.

``fit --components auto --stability-repeats R`` computes the split-half stability after the
number of axes is decided, on a fresh read of the input; with a cluster it must run there
too, with the same numbers as the threaded run (the same block products; only the order of
the sums over blocks differs, a pairwise tree instead of a running sum, so agreement to
rounding, checked at 1e-10 as in tests/test_cluster.py). ``fit --cluster local:N`` starts
one LocalCluster for the fit, the stability and the supplementary passes, and closes it at
the end, also after an interrupt. The local cluster's scheduler binds its HTTP server to a
free port, silently, when port 8787 is taken. Data: a planted low-rank matrix plus noise,
invented here; the reference for the singular values is LAPACK (``numpy.linalg.svd``).
"""

from __future__ import annotations

import json
import socket
import sys
import warnings

import numpy as np
import pandas as pd
import pytest

distributed = pytest.importorskip("distributed")
cloudpickle = pytest.importorskip("cloudpickle")

from axiscope.core.options import EngineSettings, Resources  # noqa: E402
from axiscope.decide.signal import fit_with_signal  # noqa: E402
from axiscope.decide.stability import axis_stability  # noqa: E402
from axiscope.io import open_matrix  # noqa: E402

cloudpickle.register_pickle_by_value(sys.modules[__name__])

N, P, K = 600, 40, 3
ENGINE = EngineSettings(method="randomized", seed=3)
BUDGET = "16MB"  # small blocks: several per pass


def _planted(seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    U = np.linalg.qr(rng.standard_normal((N, K)))[0]
    V = np.linalg.qr(rng.standard_normal((P, K)))[0]
    return 40.0 * (U * [8.0, 6.0, 4.0]) @ V.T + rng.standard_normal((N, P)) + 5.0


def _ids(n: int) -> list[str]:
    return [f"s{i}" for i in range(n)]


def _close(a, b, rtol=1e-10):
    scale = np.max(np.abs(a))
    assert np.max(np.abs(a - b)) <= rtol * scale, np.max(np.abs(a - b)) / scale


def _stability_values(record: dict) -> np.ndarray:
    return np.array([[a["stability"], a["subspace_agreement"], a["angle_bound"]] for a in record["axes"]])


def test_stability_after_auto_components_runs_on_the_cluster(client, write_matrix):
    # the Python API: the number of axes decided on the cluster, then the stability of the
    # axes kept computed from a fresh read of the input, on the same cluster (the current
    # client, without being told) and on threads
    X = _planted(1)
    path = write_matrix(X, "h5", chunks=(100, P))
    options = dict(n_components="auto", max_components=6, permutations=4, engine=ENGINE)
    runs = {}
    for name in ("threaded", "cluster"):
        extra = {"scheduler": client} if name == "cluster" else {}
        result, signal = fit_with_signal(path, **options, resources=Resources(memory_limit=BUDGET, threads=2, **extra))
        with open_matrix(path) as src:
            if name == "cluster":
                with client.as_current():
                    runs[name] = result, axis_stability(src, result, stability_repeats=2, seed=4, threads=2)
            else:
                runs[name] = result, axis_stability(src, result, stability_repeats=2, seed=4, threads=2)
        if name == "cluster":  # the scheduler's address, as --scheduler gives it
            with open_matrix(path) as src:
                by_address = axis_stability(src, result, stability_repeats=2, seed=4, threads=2,
                                            scheduler=client.scheduler.address)
    (fit_a, threaded), (fit_b, clustered) = runs["threaded"], runs["cluster"]
    assert by_address.execution["connected_to"] == "scheduler"
    np.testing.assert_allclose(by_address.per_repeat, threaded.per_repeat, rtol=0, atol=1e-10)
    assert fit_a.model.n_components == fit_b.model.n_components == K  # the planted rank
    Z = (X - X.mean(axis=0)) / X.std(axis=0)  # LAPACK reference (population SD, the documented convention)
    np.testing.assert_allclose(fit_b.model.singular_values, np.linalg.svd(Z, compute_uv=False)[:K], rtol=1e-8)
    assert threaded.execution == {"backend": "threaded", "threads": 2}
    assert clustered.execution["backend"] == "dask.distributed" and clustered.execution["workers"] == 2
    assert clustered.read_from == "input" and clustered.passes == threaded.passes >= 2
    np.testing.assert_allclose(clustered.per_repeat, threaded.per_repeat, rtol=0, atol=1e-10)
    np.testing.assert_allclose(clustered.subspace_per_repeat, threaded.subspace_per_repeat, rtol=0, atol=1e-10)
    np.testing.assert_allclose(clustered.angle_bound, threaded.angle_bound, rtol=1e-8, atol=1e-12)


@pytest.fixture
def port_8787_taken():
    """Port 8787 of the loopback interface held by this test (or already taken by another program)."""
    holder = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        holder.bind(("127.0.0.1", 8787))
        holder.listen(1)
    except OSError:  # taken already: the condition the test needs holds anyway
        pass
    yield
    holder.close()


def _fit_inputs(tmp_path, write_matrix):
    """A matrix with ids, an annotation table (a group and held-out samples) and a list of supplementary features."""
    X = _planted(2)
    group = np.where(np.arange(N) % 3 == 0, "a", "b")
    X[group == "a", :5] += 2.0
    path = write_matrix(X, "h5", chunks=(100, P), sample_ids=_ids(N))
    holdout = np.zeros(N, dtype=bool)
    holdout[::10] = True
    pd.DataFrame({"sample_id": _ids(N), "group": group, "holdout": np.where(holdout, "true", "false")}) \
        .to_csv(tmp_path / "ann.tsv", sep="\t", index=False)
    with open_matrix(path) as src:
        listed = [str(src.feature_ids[j]) for j in (4, 30)]
    (tmp_path / "sup.txt").write_text("\n".join(listed) + "\n")
    return path, ["--annotations", str(tmp_path / "ann.tsv"), "--supplementary-samples-column", "holdout",
                  "--supplementary-features", str(tmp_path / "sup.txt")]


def _counting_local_clusters(monkeypatch) -> list:
    """Every LocalCluster started from now on, in a list."""
    started = []

    class Counted(distributed.LocalCluster):
        def __init__(self, *args, **kwargs):
            started.append(self)
            super().__init__(*args, **kwargs)
            http = self.scheduler.http_server
            self.http_address = (http.address, http.port)  # where its scheduler's HTTP server listens

    monkeypatch.setattr(distributed, "LocalCluster", Counted)
    return started


def test_cli_fit_starts_one_local_cluster_for_every_step(write_matrix, tmp_path, monkeypatch, port_8787_taken):
    from typer.testing import CliRunner

    from axiscope.cli import app

    path, extras = _fit_inputs(tmp_path, write_matrix)
    runner = CliRunner()
    common = ["fit", str(path), "--components", "auto", "--max-components", "6", "--permutations", "4",
              "--stability-repeats", "2", "--method", "randomized", "--seed", "3", "--memory-limit", BUDGET,
              *extras, "--quiet"]
    done = runner.invoke(app, [*common, "--out", str(tmp_path / "threaded")])
    assert done.exit_code == 0, done.output
    started = _counting_local_clusters(monkeypatch)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        done = runner.invoke(app, [*common, "--out", str(tmp_path / "cluster"), "--cluster", "local:2"])
    assert done.exit_code == 0, done.output
    # one cluster for the fit, the stability and the supplementary passes, closed at the end
    assert len(started) == 1 and started[0].status.name == "closed"
    # its scheduler's HTTP server went to a free port without a word (the dashboard is off)
    assert not [w for w in caught if "already in use" in str(w.message)], [str(w.message) for w in caught]
    a, b = (json.loads((tmp_path / name / "manifest.json").read_text()) for name in ("threaded", "cluster"))
    assert a["signal_axes"]["kept"] == b["signal_axes"]["kept"] == K
    for record in (b["execution"], b["stability"]["execution"], b["explanation"]["execution"]):
        assert record["backend"] == "dask.distributed" and record["connected_to"] == "local cluster"
        assert record["workers"] == 2
    assert a["stability"]["execution"]["backend"] == "threaded"
    assert [p["name"] for p in b["explanation"]["passes"]] == ["projection", "supplementary features"]
    assert b["stability"]["passes"] == a["stability"]["passes"] >= 2
    np.testing.assert_allclose(_stability_values(b["stability"]), _stability_values(a["stability"]),
                               rtol=1e-8, atol=1e-10)
    assert started[0].http_address[0] == "127.0.0.1" and started[0].http_address[1] != 8787
    # the fit itself: the model's arrays agree to rounding, the tables to their printed digits
    for name in ("components.npy", "singular_values.npy", "extra_training_sq_dist.npy"):
        _close(np.load(tmp_path / "threaded" / "model" / name), np.load(tmp_path / "cluster" / "model" / name))
    for table in ("sample_scores.tsv", "supplementary_sample_scores.tsv"):
        x, y = (pd.read_csv(tmp_path / name / table, sep="\t", comment="#") for name in ("threaded", "cluster"))
        assert list(x.columns) == list(y.columns) and list(x["sample_id"]) == list(y["sample_id"])
        numeric = x.select_dtypes("number").columns
        # the tables hold 8 significant digits: equal to within one unit of the 8th
        np.testing.assert_allclose(x[numeric].to_numpy(), y[numeric].to_numpy(), rtol=2e-7, atol=1e-12)


def test_cli_fit_closes_its_local_cluster_when_interrupted(write_matrix, tmp_path, monkeypatch):
    from typer.testing import CliRunner

    from axiscope.cli import app
    from axiscope.explain import plan

    path, extras = _fit_inputs(tmp_path, write_matrix)

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt  # Ctrl-C during the supplementary passes

    monkeypatch.setattr(plan, "explain_fit", interrupted)
    started = _counting_local_clusters(monkeypatch)
    done = CliRunner().invoke(app, ["fit", str(path), "-k", str(K), "--memory-limit", BUDGET, *extras, "--quiet",
                                    "--out", str(tmp_path / "o"), "--cluster", "local:1"])
    assert done.exit_code == 130, done.output
    assert len(started) == 1 and started[0].status.name == "closed"
    assert not (tmp_path / "o").exists()
