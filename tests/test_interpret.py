"""Contributions, squared cosines, correlations and supplementary elements.

References: textbook PCA algebra (common practice, no source) for the identities;
numpy.corrcoef / scipy.stats.pearsonr and LAPACK through numpy for direct computations.
Data: invented random matrices with planted structure.
"""

from __future__ import annotations

import time
import tracemalloc

import h5py
import numpy as np
import pytest
from scipy import stats as sps

from axiscope import EngineSettings, PreprocessSpec, fit, open_matrix
from axiscope.errors import InputError, OptionError
from axiscope.explain.supplementary import supplementary_feature_statistics
from axiscope.io import array_source
from axiscope.model.project import project
from axiscope.model.statistics import (
    FeatureAxisStatistics,
    feature_statistics,
    read_feature_statistics,
    sample_statistics,
)

#: The genotype-dosage scaling, whatever its option name (the only scale besides unit and none).


def _planted(n, p, seed=0, rank=3):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, rank)) @ (3 * rng.standard_normal((rank, p))) + rng.standard_normal((n, p))
    return X + rng.uniform(1, 5, p)


def _counts(n, p, seed=0):
    rng = np.random.default_rng(seed)
    mu = np.exp(rng.normal(2, 1, p)) * np.exp(rng.normal(0, 0.5, (n, 1)))
    mu[: n // 2, : p // 5] *= 4
    return rng.poisson(mu).astype(np.float32)


def _transformed(X, spec):
    """The per-sample transforms of the fit, computed directly (reference: their definition)."""
    Y = np.asarray(X, dtype=np.float64).copy()
    if spec.counts_per is not None:
        Y = Y * (spec.counts_per / Y.sum(axis=1, keepdims=True))
    if spec.log_transform:
        Y = np.log1p(Y)
    return Y


def test_identities_exact_full_rank():
    # identities of textbook PCA algebra (common practice, no source); n < p so that the
    # n − 1 axes of an exact fit span the whole centred space
    X = _planted(9, 25, seed=1)
    r = fit(array_source(X), n_components=8, engine=EngineSettings(method="exact"))
    names = r.axis_names
    q = sample_statistics(r.sample_ids, r.scores, r.sample_sq_dist, names, singular_values=r.model.singular_values)
    np.testing.assert_allclose(q[[f"contribution_pct_{a}" for a in names]].sum(axis=0), 100.0, rtol=1e-10)
    np.testing.assert_allclose(q["represented_share"], 1.0, rtol=1e-8)
    assert not q["supplementary"].any()
    fs = feature_statistics(r.model)
    np.testing.assert_allclose(fs.contribution.sum(axis=0), 100.0, rtol=1e-10)
    np.testing.assert_allclose(fs.sq_cosine.sum(axis=1), 1.0, rtol=1e-8)
    # unit scaling: correlation = loading × sqrt(variance of the axis)
    np.testing.assert_allclose(fs.correlation, r.model.components * np.sqrt(r.model.variance), atol=1e-12)


@pytest.mark.parametrize(
    "spec",
    [
        PreprocessSpec(),
        PreprocessSpec(scale="none"),
        PreprocessSpec(scale="none", center=False),
        PreprocessSpec(counts_per=1e4, log_transform=True),
        PreprocessSpec(scale="allele-frequency"),
    ],
    ids=["unit", "none", "uncentred", "log-cpm", "allele-frequency"],
)
def test_closed_form_correlations_match_direct_computation(spec):
    rng = np.random.default_rng(3)
    if spec.scale == "allele-frequency":
        freq = rng.uniform(0.1, 0.9, 40)
        X = rng.binomial(2, freq, (60, 40)).astype(np.float64)
        X[:30, :8] = rng.binomial(2, 0.95, (30, 8))
    elif spec.log_transform:
        X = _counts(60, 40).astype(np.float64)
    else:
        X = _planted(60, 40, seed=3)
    r = fit(array_source(X), n_components=4, preprocess=spec, engine=EngineSettings(method="exact"))
    fs = feature_statistics(r.model)
    Y = _transformed(X, spec)[:, r.preprocessing.kept]
    for j in range(Y.shape[1]):
        for a in range(4):
            ref = sps.pearsonr(Y[:, j], r.scores[:, a]).statistic  # reference: scipy.stats.pearsonr
            assert fs.correlation[j, a] == pytest.approx(ref, abs=1e-8)
    # squared cosine: (x̃ᵀu_a)² / ‖x̃‖² with x̃ the preprocessed column (definition)
    Xt = (Y - r.model.mean) / r.model.scale
    U = r.scores / r.model.singular_values
    sq_cos = (Xt.T @ U) ** 2 / (Xt**2).sum(axis=0)[:, None]
    np.testing.assert_allclose(fs.sq_cosine, sq_cos, atol=1e-9)
    top = r.top_features(3)
    assert {"correlation", "contribution_pct"} <= set(top.columns)
    row = top.iloc[0]
    j = list(r.model.feature_ids).index(row.feature_id)
    assert row.correlation == pytest.approx(fs.correlation[j, 0])
    assert row.contribution_pct == pytest.approx(100 * r.model.components[j, 0] ** 2)


@pytest.mark.parametrize("spec", [PreprocessSpec(), PreprocessSpec(counts_per=1e4, log_transform=True),
                                  PreprocessSpec(scale="none", center=False)],
                         ids=["unit", "log-cpm", "uncentred"])
def test_streaming_statistics_of_active_features_reproduce_the_closed_form(spec):
    # the same quantities by two routes: the model (closed form) and a pass over the data
    X = _counts(50, 30, seed=5)
    r = fit(array_source(X), n_components=3, preprocess=spec, engine=EngineSettings(method="exact"))
    src = array_source(X)
    s = supplementary_feature_statistics(src, r.scores, r.model.singular_values,
                                         columns=r.preprocessing.kept, spec=spec, memory_limit="64MB", threads=1)
    fs = feature_statistics(r.model)
    np.testing.assert_allclose(s.correlation, fs.correlation, atol=1e-6)
    np.testing.assert_allclose(s.sq_cosine, fs.sq_cosine, atol=1e-6)
    np.testing.assert_allclose(s.loading, fs.loading, atol=1e-6)
    assert np.isnan(s.contribution).all() and s.supplementary.all()
    # outside reference, by definition with numpy on the preprocessed columns (centred or
    # not): loading in the units of the active ones x̃ᵀF / s², squared cosine (x̃ᵀu)² / ‖x̃‖²
    Y = _transformed(X, spec)[:, r.preprocessing.kept]
    Xt = (Y - r.model.mean) / r.model.scale
    s2 = r.model.singular_values**2
    U = r.scores / r.model.singular_values
    # (atol 1e-6: the float32 counts are transformed in float32 by the pass, in float64 here)
    np.testing.assert_allclose(s.loading, (Xt.T @ r.scores) / s2, atol=1e-6)
    np.testing.assert_allclose(s.sq_cosine, (Xt.T @ U) ** 2 / (Xt**2).sum(axis=0)[:, None], atol=1e-6)
    if not spec.center:  # the uncentred case really is uncentred: x̃ has a non-zero mean
        assert np.abs(Xt.mean(axis=0)).max() > 0.1


def test_supplementary_features_and_dropped_reason():
    X = _planted(80, 30, seed=7)
    exclude = np.zeros(30, dtype=bool)
    exclude[[2, 11, 29]] = True
    r = fit(array_source(X), n_components=3, exclude_features=exclude, engine=EngineSettings(method="exact"))
    assert not set(r.model.feature_ids) & set(np.asarray(r.input_feature_ids)[exclude])
    src = array_source(X)
    s = supplementary_feature_statistics(src, r.scores, r.model.singular_values, columns=exclude, threads=1)
    for row, j in enumerate(np.flatnonzero(exclude)):
        ref = np.corrcoef(X[:, j], r.scores.T)[0, 1:]  # reference: numpy.corrcoef
        np.testing.assert_allclose(s.correlation[row], ref, atol=1e-10)
    dropped = r.dropped_features()
    assert (dropped.reason == "supplementary").sum() == 3
    assert list(r.dropped_features().reason) == ["supplementary"] * 3


def test_supplementary_features_with_missing_values_use_the_mean():
    rng = np.random.default_rng(9)
    X = _planted(70, 12, seed=9)
    Z = rng.standard_normal((70, 4))
    Z[rng.random((70, 4)) < 0.1] = np.nan
    r = fit(array_source(X), n_components=2, engine=EngineSettings(method="exact"))
    spec = PreprocessSpec(missing="mean")
    s = supplementary_feature_statistics(array_source(Z), r.scores, r.model.singular_values, spec=spec, threads=1)
    filled = np.where(np.isnan(Z), np.nanmean(Z, axis=0), Z)
    for j in range(4):
        ref = np.corrcoef(filled[:, j], r.scores.T)[0, 1:]  # reference: numpy.corrcoef on mean-imputed data
        np.testing.assert_allclose(s.correlation[j], ref, atol=1e-10)
    with pytest.raises(InputError, match="NaN or infinite"):
        supplementary_feature_statistics(array_source(Z), r.scores, r.model.singular_values, threads=1)


def test_supplementary_samples_reproduce_active_scores_and_leave_axes_unchanged():
    X = _planted(90, 20, seed=11)
    active = np.ones(90, dtype=bool)
    active[::7] = False
    r = fit(array_source(X), n_components=3, active=active, engine=EngineSettings(method="exact"))
    # projecting training rows as if supplementary gives back their active scores
    back = project(r.model, array_source(X), rows=active, threads=1)
    np.testing.assert_allclose(back.scores, r.scores, atol=1e-8)
    np.testing.assert_allclose(back.squared_norms, r.sample_sq_dist, rtol=1e-8)
    # supplementary rows do not change the axes: same as a fit on the active rows alone
    alone = fit(array_source(X[active]), n_components=3, engine=EngineSettings(method="exact"))
    np.testing.assert_allclose(np.abs(r.model.components), np.abs(alone.model.components), atol=1e-10)
    np.testing.assert_allclose(r.model.singular_values, alone.model.singular_values, rtol=1e-12)
    sup = project(r.model, array_source(X), rows=~active, threads=1)
    q = sample_statistics(sup.sample_ids, sup.scores, sup.squared_norms, r.axis_names, supplementary=True)
    assert ((q.represented_share > 0) & (q.represented_share <= 1 + 1e-12)).all()
    assert q["supplementary"].all() and q.filter(like="contribution_pct_").isna().all().all()


def test_feature_statistics_for_a_million_features_stay_under_budget(tmp_path):
    # Out of core: 40 samples × 1,000,000 features (160 MB as float32 on disk, 320 MB as
    # float64). The per-feature statistics are computed in one pass over row blocks (each
    # block's sums, p × (k + 2), are held until added up); the memory budget passed
    # (360 MiB: the plan counts four blocks' sums in flight and two decoded chunk bands,
    # whatever the threads) must hold the traced peak, and the peak must hold no whole copy
    # of the float32 data (see below).
    n, p, k = 40, 1_000_000, 2
    rng = np.random.default_rng(0)
    latent = rng.standard_normal((n, k))
    path = tmp_path / "wide.h5"
    with h5py.File(path, "w") as fh:
        d = fh.create_dataset("matrix", shape=(n, p), dtype="float32", chunks=(8, 65536))
        w = rng.standard_normal((k, 1000)).astype(np.float32)
        for lo in range(0, p, 250_000):
            noise = rng.standard_normal((n, 250_000), dtype=np.float32)
            noise[:, :1000] += (latent @ w).astype(np.float32)
            d[:, lo : lo + 250_000] = noise
    scores = latent * np.array([30.0, 20.0])
    s_values = np.sqrt((scores**2).sum(axis=0))
    budget = 360 * 2**20
    t0 = time.perf_counter()
    with open_matrix(path) as src:
        tracemalloc.start()
        stats = supplementary_feature_statistics(src, scores, s_values, memory_limit=budget, threads=1)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        check = src.read_samples(0, n)[:, [0, 500, 999_999]].astype(np.float64)
    assert peak < budget, f"peak {peak / 2**20:.0f} MB over the {budget / 2**20:.0f} MB budget"
    # no whole copy: the reader holds one decoded band of chunks (8 samples × all features,
    # io/chunk_bands.py) while blocks of fewer samples are served from it, the sums of the
    # blocks in flight are held until added up; a whole float32 copy would come on top
    band = 8 * p * 4
    assert peak < n * p * 4 + band, f"peak {peak / 2**20:.0f} MB: as much as the whole float32 matrix"
    for col, j in enumerate([0, 500, 999_999]):
        ref = np.corrcoef(check[:, col], scores.T)[0, 1:]  # reference: numpy.corrcoef
        np.testing.assert_allclose(stats.correlation[j], ref, atol=1e-6)
    path_out = stats.write(tmp_path)  # above 200,000 features: Zarr with ids
    assert path_out.suffix == ".zarr"
    back = read_feature_statistics(tmp_path)
    assert back.feature_ids[999_999] == stats.feature_ids[999_999]
    np.testing.assert_array_equal(back.correlation[:5], stats.correlation[:5])
    assert time.perf_counter() - t0 < 60


def test_feature_statistics_io_errors_are_typed(tmp_path):
    X = _planted(30, 8, seed=13)
    r = fit(array_source(X), n_components=2, engine=EngineSettings(method="exact"))
    fs = feature_statistics(r.model)
    fs.write(tmp_path)
    with pytest.raises(OptionError, match="number of active samples"):
        read_feature_statistics(tmp_path)
    back = read_feature_statistics(tmp_path, n_samples=r.model.n_samples)
    # the p-values read back equal those of the original (t-test on n − 2 df)
    np.testing.assert_allclose(back.p_values(), fs.p_values(), rtol=1e-6)
    path = tmp_path / "feature_statistics.tsv"
    path.write_text("feature_id\tsupplementary\tloading_PC1\nf0\tfalse\n1\t2\t3\t4\t5\n")
    with pytest.raises(InputError, match="feature_statistics.tsv.*restore the file"):
        read_feature_statistics(tmp_path, n_samples=30)
    other = FeatureAxisStatistics(fs.feature_ids, fs.supplementary, fs.loading, fs.correlation,
                                  fs.contribution, fs.sq_cosine, 31, fs.axis_names)
    with pytest.raises(OptionError, match="cannot be combined"):
        fs.concat(other)


WEIRD_IDS = ["plain", "pipe|id", "tab\tid", "new\nline", "carriage\rreturn", 'say "hi"', "<script>alert(1)</script>",
             "#hash", " padded ", "comma,id"]


def test_feature_statistics_table_keeps_weird_ids_whole(tmp_path):
    # the ids come back exactly through pandas (reference: pandas.read_csv) and Python's csv
    # module (reference: csv.reader), whatever they hold; the Parquet copy too (pyarrow)
    import csv

    import pandas as pd

    X = _planted(40, len(WEIRD_IDS), seed=17)
    r = fit(array_source(X, feature_ids=WEIRD_IDS), n_components=2, engine=EngineSettings(method="exact"))
    fs = feature_statistics(r.model)
    path = fs.write(tmp_path, parquet=True)
    back = read_feature_statistics(tmp_path, n_samples=r.model.n_samples)
    assert list(back.feature_ids) == list(fs.feature_ids)
    np.testing.assert_allclose(back.correlation, fs.correlation, rtol=1e-7)
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle, delimiter="\t"))
    assert [row[0] for row in rows[1:]] == list(fs.feature_ids)
    assert {len(row) for row in rows} == {len(rows[0])}
    assert rows[0][:2] == ["feature_id", "supplementary"] and "contribution_pct_PC1" in rows[0]
    parquet = pd.read_parquet(path.with_suffix(".parquet"))
    assert list(parquet.feature_id) == list(fs.feature_ids)
