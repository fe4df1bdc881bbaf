"""Scoring and the supplementary passes of the explanation on a dask.distributed cluster.

The cluster is the module's LocalCluster of two single-threaded worker processes
(``client`` in conftest.py: 127.0.0.1, no dashboard). References: the threaded run of the
same pass (the same block computations; only the order of the sums over blocks differs,
so agreement to rounding, checked at 1e-10 relative in float64), and the textbook formulas
computed here with numpy: a new sample's scores ``((x − μ)/σ)·V`` and its squared residual
``‖x̃‖² − ‖t‖²`` (Jackson 1991, A User's Guide to Principal Components, §1.7; recalled from
memory), and a supplementary feature's correlation with the scores (``numpy.corrcoef``).
Data: a planted low-rank matrix plus noise, invented here.
"""

from __future__ import annotations

import contextlib
import json
import sys

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("distributed")
cloudpickle = pytest.importorskip("cloudpickle")

from axiscope.core.options import EngineSettings, Resources  # noqa: E402
from axiscope.explain.plan import ExplanationPlan, explain_fit  # noqa: E402
from axiscope.fitting.run import fit  # noqa: E402
from axiscope.io import open_matrix  # noqa: E402
from axiscope.scoring.score import score  # noqa: E402

cloudpickle.register_pickle_by_value(sys.modules[__name__])

N, M, P, K = 600, 600, 40, 3
ENGINE = EngineSettings(method="randomized", seed=5)
BUDGET = "16MB"  # small blocks: several per pass


def _planted(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    V = np.linalg.qr(np.random.default_rng(99).standard_normal((P, K)))[0]  # the same axes for every call
    latent = rng.standard_normal((n, K)) * [30.0, 20.0, 10.0]
    return latent @ V.T + rng.standard_normal((n, P)) + 4.0


def _close(a, b, rtol=1e-10):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    scale = np.max(np.abs(a))
    assert np.max(np.abs(a - b)) <= rtol * scale, np.max(np.abs(a - b)) / scale


def test_score_on_the_cluster_equals_the_threaded_score(client, write_matrix):
    train = write_matrix(_planted(N, 0), "h5", chunks=(100, P))
    model = fit(train, n_components=K, engine=ENGINE, resources=Resources(memory_limit=BUDGET, threads=2)).model
    new = _planted(M, 1)
    order = np.arange(P)[::-1]  # the new file lists the features in another order: matched by id
    path = write_matrix(new[:, order], "zarr3", chunks=(50, P),
                        feature_ids=np.asarray(model.feature_ids)[order])
    threaded = score(model, path, memory_limit=BUDGET, threads=2)
    # against the scheduler's address, as given on the command line
    clustered = score(model, path, memory_limit=BUDGET, threads=2, scheduler=client.scheduler.address)
    assert threaded.manifest["passes"][0]["blocks"] >= 4
    columns = list(model.axis_names)
    _close(threaded.scores[columns].to_numpy(), clustered.scores[columns].to_numpy())
    for column in ("t2", "q"):
        _close(threaded.diagnostics[column].to_numpy(), clustered.diagnostics[column].to_numpy())
    assert list(threaded.diagnostics["flag"]) == list(clustered.diagnostics["flag"])
    assert list(threaded.diagnostics["sample_id"]) == list(clustered.diagnostics["sample_id"])
    # the textbook projection of the stored model, computed here
    Z = (new - model.mean) / model.scale
    t = Z @ model.components
    np.testing.assert_allclose(clustered.scores[columns].to_numpy(), t, rtol=1e-9, atol=1e-9 * np.abs(t).max())
    q = np.einsum("ij,ij->i", Z, Z) - np.einsum("ij,ij->i", t, t)
    np.testing.assert_allclose(clustered.diagnostics["q"].to_numpy(), q, rtol=1e-8)
    record = clustered.manifest["execution"]
    assert record["backend"] == "dask.distributed" and record["workers"] == 2
    assert record["connected_to"] == "scheduler" and record["scheduler"] == client.scheduler.address
    assert threaded.manifest["execution"] == {"backend": "threaded", "threads": 2}
    # only the scores, squared norms and fill counts come back (M × (K + 2) floats plus
    # pickling overhead), never the blocks (M × P)
    (detail,) = clustered.manifest["passes"]
    assert 0 < detail["bytes_to_client"] < 8 * M * (K + 2) + 20_000 < 8 * M * P
    # the workers read the blocks themselves: sent to them are the model's arrays, once per
    # worker (five p-vectors and V, p × k), not the blocks
    assert 0 < detail["bytes_from_client"] <= 2 * 8 * P * (6 + K) < 8 * M * P


def test_supplementary_passes_on_the_cluster_equal_the_threaded_ones(client, write_matrix, monkeypatch):
    from axiscope.explain import supplementary

    # blocks of 100 rows: a budget small enough for that is below the smallest one allowed
    monkeypatch.setattr(supplementary, "_block_rows", lambda *args, **kwargs: 100)
    X = _planted(N, 2)
    X[:, 7] = 0.5 * X[:, 0] + np.random.default_rng(3).standard_normal(N)  # a supplementary feature
    path = write_matrix(X, "h5", chunks=(100, P))
    active = np.ones(N, dtype=bool)
    active[::5] = False  # supplementary samples
    exclude = np.zeros(P, dtype=bool)
    exclude[[3, 7, 20]] = True  # supplementary features
    plan = ExplanationPlan(active, exclude, None)
    result = fit(path, n_components=K, engine=ENGINE, active=active, exclude_features=exclude,
                 resources=Resources(memory_limit=BUDGET, threads=2))
    cards = {}
    for name in ("threaded", "cluster"):
        # the cluster run uses the current client, without being told
        with open_matrix(path) as src, (client.as_current() if name == "cluster" else contextlib.nullcontext()):
            cards[name] = explain_fit(plan, result, src, memory_limit=BUDGET, threads=2)
            feature_ids = np.asarray(src.feature_ids)
        record = result.manifest["explanation"]
        assert [p["name"] for p in record["passes"]] == ["projection", "supplementary features"]
        assert record["execution"]["backend"] == ("threaded" if name == "threaded" else "dask.distributed")
    # the supplementary features' sums come back once, added up on the workers: 3 features ×
    # (K + 2) floats plus pickling overhead, never the blocks
    blocks, sums = record["passes"][1]["blocks"], record["passes"][1]["bytes_to_client"]
    assert blocks >= 4 and 8 * 3 * (K + 2) <= sums < 8 * 3 * (K + 2) + 20_000 < 8 * N * P
    # sent: each block's rows of the scores (n × k in all) and the shift, never the blocks
    n = int(active.sum())
    assert 8 * n * K <= record["passes"][1]["bytes_from_client"] <= 8 * n * K + 2 * 8 * 3
    a, b = (cards[name].feature_statistics for name in ("threaded", "cluster"))
    sup = np.flatnonzero(a.supplementary)
    assert len(sup) == 3 and list(a.feature_ids[sup]) == list(b.feature_ids[sup])
    for field in ("correlation", "loading", "sq_cosine"):
        _close(getattr(a, field)[sup], getattr(b, field)[sup])
    table_a, table_b = (cards[name].supplementary_scores for name in ("threaded", "cluster"))
    assert list(table_a["sample_id"]) == list(table_b["sample_id"])
    numeric = table_a.select_dtypes("number").columns
    _close(table_a[numeric].to_numpy(), table_b[numeric].to_numpy())
    # reference: the correlation of the supplementary feature with the scores (numpy.corrcoef)
    j = sup[list(b.feature_ids[sup]).index(feature_ids[7])]
    reference = np.corrcoef(X[active, 7], result.scores.T)[0, 1:]
    np.testing.assert_allclose(b.correlation[j], reference, rtol=1e-9)


def test_cli_score_on_a_local_cluster(write_matrix, tmp_path):
    from typer.testing import CliRunner

    from axiscope.cli import app

    train = write_matrix(_planted(N, 4), "h5", chunks=(100, P))
    fit(train, n_components=K, engine=ENGINE, resources=Resources(memory_limit=BUDGET)).write(tmp_path / "fit")
    new = write_matrix(_planted(M, 5), "h5", chunks=(100, P))
    runner = CliRunner()
    common = ["score", str(tmp_path / "fit"), str(new), "--memory-limit", BUDGET, "--quiet"]
    done = runner.invoke(app, [*common, "--out", str(tmp_path / "threaded")])
    assert done.exit_code == 0, done.output
    done = runner.invoke(app, [*common, "--out", str(tmp_path / "cluster"), "--cluster", "local:2"])
    assert done.exit_code == 0, done.output
    manifest = json.loads((tmp_path / "cluster" / "manifest.json").read_text())
    assert manifest["execution"]["connected_to"] == "local cluster" and manifest["execution"]["workers"] == 2
    assert "bytes_to_client" in manifest["passes"][0]
    a = pd.read_csv(tmp_path / "threaded" / "diagnostics.tsv", sep="\t", comment="#")
    b = pd.read_csv(tmp_path / "cluster" / "diagnostics.tsv", sep="\t", comment="#")
    assert list(a["sample_id"]) == list(b["sample_id"]) and list(a["flag"]) == list(b["flag"])
    # the table holds 8 significant digits: equal to within one unit of the 8th
    numeric = a.select_dtypes("number").columns
    np.testing.assert_allclose(a[numeric].to_numpy(), b[numeric].to_numpy(), rtol=2e-7, atol=1e-12)
    # a bad value is one line naming the option, before anything is written
    done = runner.invoke(app, [*common, "--out", str(tmp_path / "bad"), "--cluster", "remote:2"])
    assert done.exit_code == 2 and "--cluster 'remote:2' is not a local cluster" in done.output
    assert not (tmp_path / "bad").exists()


def test_cli_fit_places_supplementary_features_on_the_scheduler(client, write_matrix, tmp_path):
    from typer.testing import CliRunner

    from axiscope.cli import app

    X = _planted(N, 6)
    path = write_matrix(X, "h5", chunks=(100, P))
    with open_matrix(path) as src:
        listed = [str(src.feature_ids[j]) for j in (5, 30)]
    (tmp_path / "sup.txt").write_text("\n".join(listed) + "\n")
    runner = CliRunner()
    common = ["fit", str(path), "-k", str(K), "--method", "randomized", "--seed", "5", "--memory-limit", BUDGET,
              "--supplementary-features", str(tmp_path / "sup.txt"), "--quiet"]
    done = runner.invoke(app, [*common, "--out", str(tmp_path / "threaded")])
    assert done.exit_code == 0, done.output
    done = runner.invoke(app, [*common, "--out", str(tmp_path / "cluster"), "--scheduler", client.scheduler.address])
    assert done.exit_code == 0, done.output
    manifest = json.loads((tmp_path / "cluster" / "manifest.json").read_text())
    record = manifest["explanation"]
    assert record["execution"]["connected_to"] == "scheduler"
    assert [p["name"] for p in record["passes"]] == ["supplementary features"]
    a, b = (pd.read_csv(tmp_path / name / "feature_statistics.tsv", sep="\t", comment="#")
            for name in ("threaded", "cluster"))
    a, b = a[a["supplementary"]], b[b["supplementary"]]
    assert sorted(a["feature_id"]) == sorted(listed) and list(a["feature_id"]) == list(b["feature_id"])
    numeric = [c for c in a.columns if c.startswith(("loading", "correlation", "sq_cosine"))]
    # the table holds 8 significant digits: equal to within one unit of the 8th
    np.testing.assert_allclose(a[numeric].to_numpy(), b[numeric].to_numpy(), rtol=2e-7, atol=1e-12)
