"""PCA after removing known covariates (``covariates=`` / ``--adjust-for``).

Reference: the explicit computation — the dense standardised matrix residualised on the
covariates with ``numpy.linalg.lstsq`` (LAPACK ``gelsd``), then LAPACK's SVD through
``numpy.linalg.svd`` — in float64, to 1e-6 relative. Invented matrices only where the test
planted what it checks (the batch axis of the demo cohort).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from axiscope.core.adjust import Covariates
from axiscope.core.options import EngineSettings, Resources
from axiscope.core.preprocess import PreprocessSpec
from axiscope.errors import InputError, ModelError, OptionError
from axiscope.fitting.run import fit
from axiscope.io import array_source
from axiscope.model.store import ADJUSTED_MODEL_VERSION, load_model
from axiscope.scoring.score import score

RTOL = 1e-6


def _planted(seed: int, n: int = 150, p: int = 70):
    """Gaussian factors with a decaying spectrum, a 3-level batch shift and a depth trend."""
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 8)) @ (np.linspace(6, 1, 8)[:, None] * rng.standard_normal((8, p)))
    X += rng.standard_normal((n, p))
    batch = rng.choice(["A", "B", "C"], n)
    depth = rng.normal(10.0, 2.0, n)
    X += (batch == "B")[:, None] * rng.normal(0, 3, p) + (batch == "C")[:, None] * rng.normal(0, 2, p)
    X += depth[:, None] * rng.normal(0, 0.5, p) + 50.0
    ids = [f"s{i}" for i in range(n)]
    table = pd.DataFrame({"sample_id": ids, "batch": batch, "depth": depth})
    C = np.column_stack([np.ones(n), batch == "B", batch == "C", depth]).astype(float)
    return X, ids, table, C


def _explicit(X: np.ndarray, C: np.ndarray, columns=None):
    """Residualise the standardised matrix (population SD) on C by lstsq, then LAPACK SVD."""
    Xs = (X - X.mean(axis=0)) / X.std(axis=0)
    if columns is not None:
        Xs = Xs[:, columns]
    coef, *_ = np.linalg.lstsq(C, Xs, rcond=None)
    A = Xs - C @ coef
    U, s, Vt = np.linalg.svd(A, full_matrices=False)
    return A, U, s, Vt


def _compare(result, A, U, s, Vt, k):
    n = A.shape[0]
    model = result.model
    # singular values (LAPACK via numpy.linalg.svd)
    np.testing.assert_allclose(model.singular_values, s[:k], rtol=RTOL)
    # loadings up to sign, and the scores with the same sign
    V = model.components
    signs = np.sign(np.sum(V * Vt[:k].T, axis=0))
    np.testing.assert_allclose(V, Vt[:k].T * signs, atol=RTOL)
    np.testing.assert_allclose(result.scores, U[:, :k] * s[:k] * signs, atol=RTOL * s[0])
    # variance ratios of the adjusted matrix: s²/‖A‖²_F
    np.testing.assert_allclose(model.variance_ratio, s[:k] ** 2 / np.sum(A**2), rtol=RTOL)
    np.testing.assert_allclose(model.total_inertia, np.sum(A**2) / n, rtol=RTOL)
    # squared distances of the samples: rows of the adjusted matrix
    np.testing.assert_allclose(result.sample_sq_dist, np.sum(A**2, axis=1), rtol=RTOL)


@pytest.mark.parametrize("method", ["exact", "randomized"])
@pytest.mark.parametrize("seed", [0, 3])
def test_matches_explicit_residualisation(method, seed):
    X, ids, table, C = _planted(seed)
    k = 5
    # iterations until the Krylov basis spans the whole range, so that the randomized path
    # is exact too and the comparison checks the adjustment alone
    engine = EngineSettings(method=method, power_iterations=8 if method == "randomized" else "auto")
    result = fit(array_source(X, sample_ids=ids), n_components=k, engine=engine,
                 resources=Resources(threads=1), covariates=Covariates(table, ["batch", "depth"]))
    _compare(result, *_explicit(X, C), k)
    passes = result.manifest["passes"]
    plain = fit(array_source(X, sample_ids=ids), n_components=k, engine=EngineSettings(method=method),
                resources=Resources(threads=1))
    assert passes["detail"][0]["name"].startswith("statistics + covariates")
    if method == "exact":  # statistics and the one LAPACK pass, as without covariates
        assert passes["count"] == plain.manifest["passes"]["count"] == 2


def test_matches_explicit_with_feature_filter():
    """top_variable: the sketch takes its own pass over the kept columns (the unfused path)."""
    X, ids, table, C = _planted(1)
    k = 4
    spec = PreprocessSpec(top_variable=40)
    result = fit(array_source(X, sample_ids=ids), n_components=k, preprocess=spec,
                 engine=EngineSettings(method="randomized", power_iterations=8), resources=Resources(threads=2),
                 covariates=Covariates(table, "batch,depth"))
    columns = np.sort(np.argsort(X.var(axis=0))[::-1][:40])
    _compare(result, *_explicit(X, C, columns), k)


def test_manifest_model_and_levels(tmp_path):
    X, ids, table, _ = _planted(2)
    result = fit(array_source(X, sample_ids=ids), n_components=3, resources=Resources(threads=1),
                 covariates=Covariates(table, ["batch", "depth"]))
    record = result.manifest["adjusted_for"]
    assert record == {"columns": ["batch", "depth"], "kinds": ["categorical", "numeric"],
                      "levels": {"batch": ["A", "B", "C"]}, "terms": ["intercept", "batch=B", "batch=C", "depth"],
                      "rank": 4}
    result.write(tmp_path / "fit")
    assert json.loads((tmp_path / "fit" / "manifest.json").read_text())["adjusted_for"]["rank"] == 4
    model = load_model(tmp_path / "fit" / "model")
    assert json.loads((tmp_path / "fit" / "model" / "model.json").read_text())["version"] == ADJUSTED_MODEL_VERSION
    assert model.extras["covariate_coef"].shape == (X.shape[1], 4)
    assert model.covariates.terms == record["terms"]


def test_tampered_adjusted_model_refused(tmp_path):
    """A version-2 description with covariate coefficients is refused, not scored unadjusted."""
    from axiscope.model.store import _description_checksum

    X, ids, table, _ = _planted(2)
    result = fit(array_source(X, sample_ids=ids), n_components=3, resources=Resources(threads=1),
                 covariates=Covariates(table, ["batch"]))
    result.model.save(tmp_path / "m")
    meta_path = tmp_path / "m" / "model.json"
    meta = json.loads(meta_path.read_text())
    meta["version"] = 2
    meta["description_checksum"] = _description_checksum(meta)
    meta_path.write_text(json.dumps(meta))
    with pytest.raises(ModelError, match="covariates adjusted for and the format version"):
        load_model(tmp_path / "m")


def test_scoring_training_samples_reproduces_fit(tmp_path):
    """Training samples scored with their own covariates land on their fitted scores and distances."""
    X, ids, table, _ = _planted(4)
    feature_ids = [f"f{j}" for j in range(X.shape[1])]
    result = fit(array_source(X, sample_ids=ids, feature_ids=feature_ids), n_components=4,
                 resources=Resources(threads=1), covariates=Covariates(table, ["batch", "depth"]))
    result.write(tmp_path / "fit")
    rows = slice(10, 40)
    new = array_source(X[rows], sample_ids=ids[rows], feature_ids=feature_ids)
    scored = score(tmp_path / "fit", new, threads=1, covariates=Covariates(table.iloc[::-1]))
    np.testing.assert_allclose(scored.scores[result.model.axis_names].to_numpy(), result.scores[rows],
                               atol=1e-9 * result.model.singular_values[0])
    q_fit = result.sample_sq_dist[rows] - np.sum(result.scores[rows] ** 2, axis=1)
    np.testing.assert_allclose(scored.diagnostics["q"].to_numpy(), q_fit, rtol=1e-8)
    assert scored.manifest["model"]["adjusted_for"]["columns"] == ["batch", "depth"]


def test_scoring_needs_covariates(tmp_path):
    X, ids, table, _ = _planted(4, n=60, p=20)
    result = fit(array_source(X, sample_ids=ids), n_components=2, resources=Resources(threads=1),
                 covariates=Covariates(table, ["batch"]))
    new = array_source(X[:5], sample_ids=ids[:5])
    with pytest.raises(InputError, match="fitted after adjusting for 'batch'"):
        score(result.model, new, threads=1)
    unseen = table.assign(batch=["Z"] * len(table))
    with pytest.raises(InputError, match="sample 's0' has level 'Z' in column 'batch', never seen"):
        score(result.model, new, threads=1, covariates=Covariates(unseen))
    with pytest.raises(OptionError, match="the model was adjusted for 'batch'"):
        score(result.model, new, threads=1, covariates=Covariates(table, ["depth"]))


def test_settings_that_do_not_combine():
    X, ids, table, _ = _planted(0, n=40, p=10)
    with pytest.raises(OptionError, match="leave center on"):
        fit(array_source(X, sample_ids=ids), n_components=2, preprocess=PreprocessSpec(center=False),
            covariates=Covariates(table, ["batch"]))
    with pytest.raises(OptionError, match="not a Covariates object"):
        fit(array_source(X, sample_ids=ids), n_components=2, covariates=table)
    with pytest.raises(InputError, match="sample 's7' has no value in column 'depth'"):
        fit(array_source(X, sample_ids=ids), n_components=2,
            covariates=Covariates(table.assign(depth=[v if i != 7 else None for i, v in enumerate(table.depth)]),
                                  ["depth"]))


def test_code_columns_are_levels_unless_declared_numeric():
    """Whole numbers with few values are codes (levels); numeric= keeps them numbers."""
    X, ids, table, _ = _planted(0, n=60, p=10)
    table = table.assign(plate=[1 + i % 3 for i in range(60)])
    coded = fit(array_source(X, sample_ids=ids), n_components=2, covariates=Covariates(table, ["plate"]))
    assert coded.manifest["adjusted_for"]["terms"] == ["intercept", "plate=2", "plate=3"]
    numbers = fit(array_source(X, sample_ids=ids), n_components=2,
                  covariates=Covariates(table, ["plate"], numeric=["plate"]))
    assert numbers.manifest["adjusted_for"]["terms"] == ["intercept", "plate"]


def test_planted_batch_axis_disappears_biology_remains():
    """Demo cohort (planted truth): one axis carries the batch genes; adjusting for batch removes it."""
    from axiscope.demo.cohort import simulate_cohort

    cohort = simulate_cohort(300, 800, seed=5)
    src = array_source(cohort.counts.astype(np.float64), sample_ids=cohort.sample_ids, feature_ids=cohort.gene_ids)
    spec = PreprocessSpec(counts_per=1e6, log_transform=True)
    is_b = (cohort.annotations["batch"] == "B").to_numpy(dtype=float)
    state = cohort.annotations["state"].to_numpy()
    batch_genes = np.asarray(cohort.truth["batch_genes"])
    chance = batch_genes.size / cohort.counts.shape[1]  # share of the loadings' weight by chance

    def read(result):
        S, V = result.scores, result.model.components
        r2 = np.array([np.corrcoef(S[:, j], is_b)[0, 1] ** 2 for j in range(S.shape[1])])
        weight = np.sum(V[batch_genes] ** 2, axis=0)
        within = sum(((S[state == s] - S[state == s].mean(axis=0)) ** 2).sum(axis=0) for s in set(state))
        eta2 = 1 - within / ((S - S.mean(axis=0)) ** 2).sum(axis=0)  # η² of the planted states
        return r2, weight, eta2

    r2, weight, _ = read(fit(src, n_components=5, preprocess=spec, resources=Resources(threads=1)))
    batch_axis = int(np.argmax(weight))
    assert r2[batch_axis] > 0.5 and weight[batch_axis] > 10 * chance  # the planted batch axis is there
    adjusted = fit(src, n_components=5, preprocess=spec, resources=Resources(threads=1),
                   covariates=Covariates(cohort.annotations, ["batch"]))
    r2, weight, eta2 = read(adjusted)
    assert np.all(r2 < 1e-20)  # scores orthogonal to the batch indicator (P removes it exactly)
    assert np.all(weight < 2 * chance)  # no axis carries the batch genes
    assert eta2[0] > 0.9 and eta2[1] > 0.9  # the three planted states still span the first two axes


def test_command_line_fit_and_score(tmp_path, capsys):
    """``fit --adjust-for`` then ``score --annotations`` on training samples: the fit's scores back."""
    from axiscope.cli._app import main

    X, ids, table, _ = _planted(5, n=80, p=30)
    np.save(tmp_path / "m.npy", X)
    (tmp_path / "ids.txt").write_text("\n".join(ids) + "\n")
    table.to_csv(tmp_path / "ann.tsv", sep="\t", index=False)
    common = ["--sample-ids", str(tmp_path / "ids.txt"), "-q", "--threads", "1"]
    assert main(["fit", str(tmp_path / "m.npy"), "--out", str(tmp_path / "fit"), "-k", "3", *common,
                 "--annotations", str(tmp_path / "ann.tsv"), "--adjust-for", "batch", "--adjust-for", "depth"]) == 0
    manifest = json.loads((tmp_path / "fit" / "manifest.json").read_text())
    assert manifest["adjusted_for"]["columns"] == ["batch", "depth"]
    assert main(["score", str(tmp_path / "fit"), str(tmp_path / "m.npy"), "--out", str(tmp_path / "score"),
                 *common, "--annotations", str(tmp_path / "ann.tsv")]) == 0
    fitted = pd.read_csv(tmp_path / "fit" / "sample_scores.tsv", sep="\t", comment="#")
    scored = pd.read_csv(tmp_path / "score" / "scores.tsv", sep="\t", comment="#")
    np.testing.assert_allclose(scored[["PC1", "PC2", "PC3"]].to_numpy(), fitted[["PC1", "PC2", "PC3"]].to_numpy(),
                               rtol=1e-6, atol=1e-9)


def test_float32_far_from_zero():
    """float32 data whose means lie 10⁵ SDs from zero: the cross products are taken about each
    block's mean, so nothing cancels. Reference: float64 lstsq + LAPACK SVD of the same values;
    tolerance 1e-5 relative (float32 unit roundoff 6e-8 times the block length; observed 2e-7)."""
    X, ids, table, C = _planted(0, n=400, p=120)
    X32 = (X + 1e5).astype(np.float32)
    A, U, s, Vt = _explicit(X32.astype(np.float64), C)
    result = fit(array_source(X32, sample_ids=ids), n_components=5,
                 engine=EngineSettings(method="randomized", power_iterations=10), resources=Resources(threads=2),
                 covariates=Covariates(table, ["batch", "depth"]))
    np.testing.assert_allclose(result.model.singular_values, s[:5], rtol=1e-5)
    np.testing.assert_allclose(result.sample_sq_dist, np.sum(A**2, axis=1), rtol=1e-5)
    np.testing.assert_allclose(result.model.total_inertia, np.sum(A**2) / A.shape[0], rtol=1e-5)


def test_absent_feature_adds_nothing(tmp_path):
    """With fill_missing, a feature absent from the new file is taken at its fitted value: the
    sample lands where its adjusted row with that feature set to 0 lands (explicit reference)."""
    X, ids, table, C = _planted(6, n=90, p=25)
    feature_ids = [f"f{j}" for j in range(X.shape[1])]
    result = fit(array_source(X, sample_ids=ids, feature_ids=feature_ids), n_components=3,
                 engine=EngineSettings(method="exact"), resources=Resources(threads=1),
                 covariates=Covariates(table, ["batch", "depth"]))
    A, *_ = _explicit(X, C)
    keep = np.arange(X.shape[1]) != 4
    new = array_source(X[:10][:, keep], sample_ids=ids[:10], feature_ids=list(np.asarray(feature_ids)[keep]))
    scored = score(result.model, new, threads=1, fill_missing="mean", covariates=Covariates(table))
    A0 = A[:10].copy()
    A0[:, 4] = 0.0
    np.testing.assert_allclose(scored.scores[result.model.axis_names].to_numpy(), A0 @ result.model.components,
                               atol=1e-9 * result.model.singular_values[0])


@pytest.mark.parametrize("scheduler", [None, "single-threaded"])
def test_each_block_gets_its_own_rows(scheduler):
    """PassRunner.run(rows=...): each task sees exactly the rows of its block, on the pipelined
    path and on the windowed one (any scheduler other than the local threads)."""
    import dask
    import dask.array as da

    from axiscope.core.passes import PassRunner

    X = da.from_array(np.arange(40.0).reshape(20, 2), chunks=(6, 2))
    rows = np.arange(20.0)[:, None] * 2
    seen = {}

    def task(block, block_rows, scale):
        return block[:, 0] / 2, block_rows[:, 0] * scale

    def fold(result, index, start):
        seen[start] = result

    with dask.config.set(scheduler=scheduler):
        PassRunner(threads=2).run("rows", "memory", X, task, fold, 0.5, rows=rows)
    assert sorted(seen) == [0, 6, 12, 18]
    for start, (first_column_half, own_rows) in seen.items():
        np.testing.assert_array_equal(first_column_half, own_rows)  # row i holds 2i, and its row of rows 2i·0.5 = i
