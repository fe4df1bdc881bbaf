"""Tests of the synthetic cohort generator."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import zarr
from scipy import stats

from axiscope.demo.cohort import (
    BATCHES,
    CORRUPTION_KINDS,
    STATES,
    Cohort,
    simulate_cohort,
    write_cohort,
)

N_SAMPLES = 300
N_GENES = 800


@pytest.fixture(scope="module")
def cohort() -> Cohort:
    return simulate_cohort(N_SAMPLES, N_GENES, seed=11)


@pytest.fixture(scope="module")
def corrupted_cohort() -> Cohort:
    return simulate_cohort(N_SAMPLES, N_GENES, seed=11, n_corrupted=3)


def test_deterministic_in_seed() -> None:
    first = simulate_cohort(120, 300, seed=3, n_corrupted=2)
    second = simulate_cohort(120, 300, seed=3, n_corrupted=2)
    other = simulate_cohort(120, 300, seed=4, n_corrupted=2)
    np.testing.assert_array_equal(first.counts, second.counts)
    pd.testing.assert_frame_equal(first.annotations, second.annotations)
    for key in ("batch_genes", "quality_genes", "age_genes", "corrupted"):
        np.testing.assert_array_equal(first.truth[key], second.truth[key])
    for state in STATES:
        np.testing.assert_array_equal(first.truth["state_genes"][state], second.truth["state_genes"][state])
    assert not np.array_equal(first.counts, other.counts)


def test_shapes_dtypes_and_ids(cohort: Cohort) -> None:
    assert cohort.counts.shape == (N_SAMPLES, N_GENES)
    assert cohort.counts.dtype == np.int32
    assert cohort.counts.min() >= 0
    assert cohort.sample_ids.shape == (N_SAMPLES,)
    assert cohort.gene_ids.shape == (N_GENES,)
    assert len(set(cohort.sample_ids.tolist())) == N_SAMPLES
    assert len(set(cohort.gene_ids.tolist())) == N_GENES
    assert cohort.sample_ids[0] == "smp_00001"
    assert cohort.gene_ids[0] == "g00001"
    assert cohort.n_samples == N_SAMPLES and cohort.n_genes == N_GENES


def test_annotations(cohort: Cohort) -> None:
    ann = cohort.annotations
    assert list(ann.columns) == ["sample_id", "state", "batch", "depth", "rna_quality", "donor_age", "corrupted"]
    assert len(ann) == N_SAMPLES
    np.testing.assert_array_equal(ann["sample_id"].to_numpy(dtype=str), cohort.sample_ids)

    state_counts = ann["state"].value_counts()
    assert set(state_counts.index) == set(STATES)
    assert state_counts["quiescent"] > state_counts["proliferative"] > state_counts["stressed"]
    assert state_counts["quiescent"] == pytest.approx(0.45 * N_SAMPLES, abs=2)
    assert state_counts["stressed"] == pytest.approx(0.20 * N_SAMPLES, abs=2)

    batch_counts = ann["batch"].value_counts()
    assert set(batch_counts.index) == set(BATCHES)
    assert 0.35 * N_SAMPLES < batch_counts["B"] < 0.65 * N_SAMPLES

    np.testing.assert_array_equal(ann["depth"].to_numpy(), cohort.counts.sum(axis=1))
    assert 1e6 < ann["depth"].median() < 5e6
    quality = ann["rna_quality"].to_numpy()
    assert quality.min() >= 1.0 and quality.max() <= 10.0
    np.testing.assert_allclose(quality, np.round(quality, 1))
    age = ann["donor_age"].to_numpy()
    assert age.min() >= 20 and age.max() <= 80
    assert not ann["corrupted"].any()
    # Batch B has slightly worse RNA quality on average.
    assert quality[ann["batch"] == "B"].mean() < quality[ann["batch"] == "A"].mean()


def test_truth_gene_sets_disjoint(cohort: Cohort) -> None:
    truth = cohort.truth
    sets = [*truth["state_genes"].values(), truth["batch_genes"], truth["quality_genes"], truth["age_genes"]]
    assert all(len(s) > 0 for s in sets)
    union = np.concatenate(sets)
    assert len(np.unique(union)) == len(union)
    assert len(union) + len(truth["null_genes"]) == N_GENES
    assert truth["corrupted"].size == 0


def test_gamma_poisson_overdispersion(cohort: Cohort) -> None:
    """Null genes follow the gamma-Poisson mixture: Var = mu + mu**2 / r (textbook formula)."""
    truth = cohort.truth
    genes = truth["null_genes"]
    mu = truth["mean_scale"][:, None] * truth["base_fraction"][None, genes]
    moderate = (mu.mean(axis=0) > 20) & (mu.mean(axis=0) < 2000)
    genes, mu = genes[moderate], mu[:, moderate]
    assert genes.size >= 20
    x = cohort.counts[:, genes].astype(np.float64)
    phi = truth["dispersion"][genes]

    # The planted means are recovered.
    np.testing.assert_allclose(x.mean(axis=0) / mu.mean(axis=0), 1.0, atol=0.15)

    squared = ((x - mu) ** 2).sum(axis=0)
    poisson_ratio = squared / mu.sum(axis=0)
    nb_ratio = squared / (mu + phi * mu**2).sum(axis=0)
    # Overdispersed: clearly more variable than Poisson ...
    assert np.median(poisson_ratio) > 2.0
    # ... and in line with mu + mu^2 / r.
    assert 0.8 < np.median(nb_ratio) < 1.2

    # Depth-free check on one planted gene: variance of the depth-normalised count
    # exceeds its mean.
    gene = int(np.argmax(mu.mean(axis=0)))
    scaled = x[:, gene] * (mu[:, gene].mean() / mu[:, gene])
    assert scaled.var() > scaled.mean()


def test_batch_genes_differ_between_batches(cohort: Cohort) -> None:
    """Welch t-test (scipy.stats.ttest_ind with equal_var=False) on log-normalised counts."""
    counts = cohort.counts.astype(np.float64)
    logx = np.log1p(counts / counts.sum(axis=1, keepdims=True) * 1e6)
    is_b = cohort.annotations["batch"].to_numpy() == "B"
    t_stat, _ = stats.ttest_ind(logx[is_b], logx[~is_b], axis=0, equal_var=False)
    t_abs = np.abs(np.nan_to_num(t_stat))
    batch_t = t_abs[cohort.truth["batch_genes"]]
    null_t = t_abs[cohort.truth["null_genes"]]
    assert np.median(batch_t) > 4.0
    assert np.median(batch_t) > 4 * np.median(null_t)
    # The planted direction is recovered for most batch genes.
    signs = np.sign(np.nan_to_num(t_stat[cohort.truth["batch_genes"]]))
    assert np.mean(signs == np.sign(cohort.truth["batch_lfc"])) > 0.9


def test_state_genes_follow_their_state(cohort: Cohort) -> None:
    counts = cohort.counts.astype(np.float64)
    logx = np.log2(counts / counts.sum(axis=1, keepdims=True) * 1e6 + 1.0)
    states = cohort.annotations["state"].to_numpy()
    for state in STATES:
        genes = cohort.truth["state_genes"][state]
        diff = logx[states == state][:, genes].mean(axis=0) - logx[states != state][:, genes].mean(axis=0)
        assert np.corrcoef(diff, cohort.truth["state_lfc"][state])[0, 1] > 0.8


def test_write_cohort_round_trip(cohort: Cohort, tmp_path: Path) -> None:
    paths = write_cohort(cohort, tmp_path / "out", name="larkspur")
    assert paths["matrix"] == tmp_path / "out" / "larkspur.zarr"
    assert paths["annotations"] == tmp_path / "out" / "larkspur_annotations.tsv"

    group = zarr.open_group(str(paths["matrix"]), mode="r")
    assert group.metadata.zarr_format == 3
    matrix = group["matrix"]
    assert matrix.shape == (N_SAMPLES, N_GENES)
    assert matrix.dtype == np.int32
    assert matrix.chunks == (200, 800)
    np.testing.assert_array_equal(matrix[...], cohort.counts)
    assert group["sample_ids"][...].tolist() == cohort.sample_ids.tolist()
    assert group["feature_ids"][...].tolist() == cohort.gene_ids.tolist()

    table = pd.read_csv(paths["annotations"], sep="\t")
    assert list(table.columns) == list(cohort.annotations.columns)
    np.testing.assert_array_equal(table["sample_id"].to_numpy(dtype=str), cohort.sample_ids)
    np.testing.assert_array_equal(table["state"].to_numpy(dtype=str), cohort.annotations["state"].to_numpy(dtype=str))
    np.testing.assert_array_equal(table["depth"].to_numpy(), cohort.annotations["depth"].to_numpy())
    np.testing.assert_allclose(table["rna_quality"].to_numpy(), cohort.annotations["rna_quality"].to_numpy())
    np.testing.assert_array_equal(table["corrupted"].to_numpy(dtype=bool), cohort.annotations["corrupted"].to_numpy())


def test_write_cohort_overwrites(cohort: Cohort, tmp_path: Path) -> None:
    small = simulate_cohort(20, 120, seed=1)
    write_cohort(cohort, tmp_path)
    paths = write_cohort(small, tmp_path)
    group = zarr.open_group(str(paths["matrix"]), mode="r")
    np.testing.assert_array_equal(group["matrix"][...], small.counts)


def test_corrupted_samples(corrupted_cohort: Cohort, cohort: Cohort) -> None:
    ann = corrupted_cohort.annotations
    truth = corrupted_cohort.truth
    np.testing.assert_array_equal(truth["corrupted"], [N_SAMPLES - 3, N_SAMPLES - 2, N_SAMPLES - 1])
    assert list(truth["corrupted_kinds"]) == list(CORRUPTION_KINDS)
    np.testing.assert_array_equal(np.flatnonzero(ann["corrupted"].to_numpy()), truth["corrupted"])
    tail = ann.iloc[-3:]
    assert tail["state"].isin(STATES).all() and tail["batch"].isin(BATCHES).all()
    assert corrupted_cohort.counts.shape == (N_SAMPLES, N_GENES)

    counts = corrupted_cohort.counts.astype(np.float64)
    frac = counts / counts.sum(axis=1, keepdims=True)
    top_share = np.sort(frac, axis=1)[:, -10:].sum(axis=1)
    failed, contaminated, degraded = truth["corrupted"]
    # The failed library has most reads in a handful of genes, far more than any other.
    assert top_share[failed] > 0.7
    assert top_share[failed] > np.max(top_share[:-3]) + 0.2

    # Every corrupted sample is far from the clean samples in log-normalised space.
    logx = np.log1p(frac * 1e6)
    clean = logx[:-3]
    centre = np.median(clean, axis=0)
    dist = np.sqrt(((logx - centre) ** 2).sum(axis=1))
    assert np.all(dist[-3:] > np.max(dist[:-3]))

    # The degraded sample lost its quality genes.
    q = truth["quality_genes"]
    assert logx[degraded, q].mean() < np.median(clean[:, q].mean(axis=1)) - 1.5
