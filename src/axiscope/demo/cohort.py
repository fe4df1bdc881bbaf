"""Synthetic RNA-sequencing cohort with planted structure.

The generator builds an invented cohort (the "Larkspur cohort") of tissue samples
whose expression counts carry known, planted effects:

* three tissue states (``"quiescent"``, ``"proliferative"``, ``"stressed"``), each
  raising or lowering its own set of genes; this is the strongest structure;
* two processing batches (``"A"`` and ``"B"``); batch ``B`` shifts a separate set of
  genes;
* an RNA-quality score with a mild degradation-like effect on a third set of genes;
* donor age with a weak effect on a few genes;
* sequencing depth, a per-sample multiplier of all means;
* optionally a few corrupted samples (failed library, contaminated, degraded) that
  do not follow the model of the others.

Counts are drawn from a gamma-Poisson mixture (overdispersed counts): for
sample ``s`` and gene ``g`` with mean ``mu[s, g]`` and gene dispersion ``phi[g]``
(size ``r[g] = 1 / phi[g]``), ``lam ~ Gamma(shape=r, scale=mu / r)`` and
``x ~ Poisson(lam)``, so that ``E[x] = mu`` and ``Var[x] = mu + mu**2 / r``.

All effect sizes are log2 fold changes. Everything is deterministic in ``seed``:
one :func:`numpy.random.default_rng` generator is created and threaded through.
The module is used by the ``axiscope demo`` command and by the tests.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "BATCHES",
    "CORRUPTION_KINDS",
    "STATES",
    "Cohort",
    "simulate_cohort",
    "write_cohort",
]

#: Tissue states and their target proportions.
STATES: tuple[str, ...] = ("quiescent", "proliferative", "stressed")
_STATE_PROPORTIONS: tuple[float, ...] = (0.45, 0.35, 0.20)

#: Processing batches.
BATCHES: tuple[str, ...] = ("A", "B")
# Probability of batch "B" given the state: deliberately not balanced.
_P_BATCH_B: dict[str, float] = {"quiescent": 0.42, "proliferative": 0.55, "stressed": 0.62}

#: Kinds of corrupted samples, assigned in turn to the last ``n_corrupted`` samples.
CORRUPTION_KINDS: tuple[str, ...] = ("failed_library", "contaminated", "degraded")

# Gene-set sizes as fractions of the number of genes (with a floor for tiny panels).
_STATE_GENE_FRACTION = 0.04  # 240 genes per state at 6000 genes
_BATCH_GENE_FRACTION = 0.035  # 210 genes at 6000 genes
_QUALITY_GENE_FRACTION = 0.017  # 102 genes at 6000 genes
_AGE_GENE_FRACTION = 0.006  # 36 genes at 6000 genes

# Effect sizes (log2 fold changes).
_STATE_LFC_RANGE = (1.0, 2.0)  # |log2 FC| of a state gene in its own state
_BATCH_LFC_RANGE = (0.6, 1.0)  # |log2 FC| of a batch gene in batch B
_QUALITY_LFC_RANGE = (0.8, 1.5)  # log2 drop over the full quality range 10 -> 1
_AGE_LFC_RANGE = (0.3, 0.5)  # |log2 FC| per 30 years of age

# Library size: log-normal around 2.5 million reads.
_DEPTH_MEDIAN = 2.5e6
_DEPTH_LOG_SD = 0.3

# Gene baseline means and dispersions.
_BASE_LOG_SD = 1.6  # spread of the log baseline expression across genes
_DISPERSION_MEDIAN = 0.08  # median phi = 1 / r
_DISPERSION_LOG_SD = 0.5


@dataclass
class Cohort:
    """A simulated cohort: counts, identifiers, annotations and the planted truth.

    Attributes
    ----------
    counts : numpy.ndarray
        Counts, shape ``(n_samples, n_genes)``, dtype ``int32``.
    sample_ids : numpy.ndarray
        Sample identifiers ``"smp_00001"``, ``"smp_00002"``, ... (str).
    gene_ids : numpy.ndarray
        Gene identifiers ``"g00001"``, ``"g00002"``, ... (str).
    annotations : pandas.DataFrame
        One row per sample, in the order of ``counts``, with columns ``sample_id``,
        ``state``, ``batch``, ``depth`` (total counts of the sample, int),
        ``rna_quality`` (float in [1, 10], one decimal), ``donor_age`` (int years,
        20-80) and ``corrupted`` (bool).
    truth : dict
        Planted truth, see :func:`simulate_cohort`.
    """

    counts: np.ndarray
    sample_ids: np.ndarray
    gene_ids: np.ndarray
    annotations: pd.DataFrame
    truth: dict[str, Any] = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        """Number of samples (rows)."""
        return int(self.counts.shape[0])

    @property
    def n_genes(self) -> int:
        """Number of genes (columns)."""
        return int(self.counts.shape[1])


def _set_size(fraction: float, n_genes: int, floor: int) -> int:
    """Return the size of a planted gene set for a panel of ``n_genes`` genes."""
    return max(floor, int(round(fraction * n_genes)))


def _signed_uniform(rng: np.random.Generator, low: float, high: float, size: int) -> np.ndarray:
    """Draw magnitudes uniformly in ``[low, high]`` with a random sign."""
    magnitude = rng.uniform(low, high, size=size)
    sign = rng.choice(np.array([-1.0, 1.0]), size=size)
    return magnitude * sign


def _ids(prefix: str, n: int, width: int) -> np.ndarray:
    """Return ``n`` identifiers ``prefix`` + 1-based zero-padded number."""
    return np.array([f"{prefix}{i:0{width}d}" for i in range(1, n + 1)], dtype=str)


def simulate_cohort(
    n_samples: int = 1200,
    n_genes: int = 6000,
    *,
    seed: int = 7,
    n_corrupted: int = 0,
) -> Cohort:
    """Simulate the invented Larkspur RNA-sequencing cohort.

    Parameters
    ----------
    n_samples : int, default 1200
        Total number of samples, including the corrupted ones.
    n_genes : int, default 6000
        Number of genes. At least 100 so that the planted gene sets fit.
    seed : int, default 7
        Seed of the single random generator; equal seeds give equal cohorts.
    n_corrupted : int, default 0
        Number of corrupted samples. They are the last ``n_corrupted`` rows of the
        cohort; their state, batch, quality and age are annotated like the others,
        and ``annotations["corrupted"]`` is True for them. The kinds
        ``"failed_library"``, ``"contaminated"`` and ``"degraded"`` are assigned in
        turn.

    Returns
    -------
    Cohort
        The simulated cohort. ``truth`` holds:

        ``state_genes``
            dict state -> int array of gene indices carrying that state's signal;
        ``state_lfc``
            dict state -> log2 fold changes of those genes in that state;
        ``batch_genes``, ``batch_lfc``
            gene indices shifted in batch ``"B"`` and their log2 fold changes;
        ``quality_genes``, ``quality_lfc``
            gene indices lowered by poor RNA quality and their log2 drop over the
            full range 10 -> 1 (linear in the score);
        ``age_genes``, ``age_lfc``
            gene indices affected by donor age and their log2 change per 30 years
            (centred at 50 years);
        ``null_genes``
            gene indices with no planted effect;
        ``corrupted``
            int array of corrupted sample indices; ``corrupted_kinds`` their kinds;
        ``base_fraction``
            baseline expected fraction of the library per gene (sums to 1);
        ``dispersion``
            gene dispersion ``phi`` (variance ``mu + phi * mu**2``);
        ``mean_scale``
            per-sample factor such that for a null gene of a non-corrupted sample
            the expected count is ``mean_scale[s] * base_fraction[g]``;
        ``target_depth``
            the drawn library size of each sample (the realised total is the
            ``depth`` annotation);
        ``seed``
            the seed.

    Raises
    ------
    ValueError
        If a size is out of range.
    """
    if n_samples < 10:
        raise ValueError(f"n_samples must be at least 10, got {n_samples}")
    if n_genes < 100:
        raise ValueError(f"n_genes must be at least 100, got {n_genes}")
    if not 0 <= n_corrupted < n_samples:
        raise ValueError(f"n_corrupted must be in [0, n_samples), got {n_corrupted}")

    # one generator, drawn from in a fixed order: samples, genes, planted effects, corruption, counts
    rng = np.random.default_rng(seed)
    samples = _draw_samples(rng, n_samples)
    base_fraction, dispersion = _draw_gene_parameters(rng, n_genes)
    genes = _draw_gene_sets(rng, n_genes)
    log2_effect = _planted_effects(samples, genes, n_genes)
    corrupted, kinds, extra_fraction = _corrupt(rng, log2_effect, genes, base_fraction, n_corrupted)
    mu, mean_scale = _expected_counts(base_fraction, log2_effect, samples["target_depth"], extra_fraction)
    del log2_effect
    counts = _draw_counts(rng, mu, dispersion)

    sample_ids = _ids("smp_", n_samples, 5)
    is_corrupted = np.zeros(n_samples, dtype=bool)
    is_corrupted[corrupted] = True
    annotations = pd.DataFrame(
        {
            "sample_id": sample_ids,
            "state": samples["states"],
            "batch": samples["batches"],
            "depth": counts.sum(axis=1, dtype=np.int64),
            "rna_quality": samples["quality"],
            "donor_age": samples["age"].astype(np.int64),
            "corrupted": is_corrupted,
        }
    )
    truth: dict[str, Any] = {
        **{key: genes[key] for key in ("state_genes", "state_lfc", "batch_genes", "batch_lfc", "quality_genes",
                                       "quality_lfc", "age_genes", "age_lfc", "null_genes")},
        "corrupted": corrupted,
        "corrupted_kinds": kinds,
        "base_fraction": base_fraction,
        "dispersion": dispersion,
        "mean_scale": mean_scale,
        "target_depth": samples["target_depth"],
        "seed": seed,
    }
    return Cohort(counts=counts, sample_ids=sample_ids, gene_ids=_ids("g", n_genes, 5),
                  annotations=annotations, truth=truth)


def _draw_samples(rng: np.random.Generator, n_samples: int) -> dict[str, np.ndarray]:
    """Per-sample annotations: state, batch, RNA quality, donor age and target library size."""
    counts_per_state = np.floor(np.asarray(_STATE_PROPORTIONS) * n_samples).astype(int)
    counts_per_state[0] += n_samples - counts_per_state.sum()
    state_index = rng.permutation(np.repeat(np.arange(len(STATES)), counts_per_state))
    p_b = np.array([_P_BATCH_B[s] for s in STATES])[state_index]
    is_b = rng.random(n_samples) < p_b
    # RNA quality: batch B is a little worse on average.
    quality = rng.normal(np.where(is_b, 6.6, 7.5), 1.1)
    quality = np.round(np.clip(quality, 1.0, 10.0), 1)
    age = rng.integers(20, 81, size=n_samples)
    target_depth = _DEPTH_MEDIAN * np.exp(rng.normal(0.0, _DEPTH_LOG_SD, size=n_samples))
    return {
        "state_index": state_index,
        "states": np.asarray(STATES)[state_index],
        "is_b": is_b,
        "batches": np.where(is_b, "B", "A"),
        "quality": quality,
        "age": age,
        "target_depth": target_depth,
    }


def _draw_gene_parameters(rng: np.random.Generator, n_genes: int) -> tuple[np.ndarray, np.ndarray]:
    """Baseline expected fraction of the library per gene (sums to 1) and gene dispersions."""
    log_base = rng.normal(0.0, _BASE_LOG_SD, size=n_genes)
    base_fraction = np.exp(log_base)
    base_fraction /= base_fraction.sum()
    dispersion = _DISPERSION_MEDIAN * np.exp(rng.normal(0.0, _DISPERSION_LOG_SD, size=n_genes))
    return base_fraction, np.clip(dispersion, 0.01, 1.0)


def _draw_gene_sets(rng: np.random.Generator, n_genes: int) -> dict[str, Any]:
    """Disjoint planted gene sets (state, batch, quality, age, null) and their log2 effects."""
    n_state = _set_size(_STATE_GENE_FRACTION, n_genes, 5)
    n_batch = _set_size(_BATCH_GENE_FRACTION, n_genes, 5)
    n_quality = _set_size(_QUALITY_GENE_FRACTION, n_genes, 3)
    n_age = _set_size(_AGE_GENE_FRACTION, n_genes, 2)
    order = rng.permutation(n_genes)
    bounds = np.cumsum([0] + [n_state] * len(STATES) + [n_batch, n_quality, n_age])
    chunks = [np.sort(order[a:b]) for a, b in zip(bounds[:-1], bounds[1:])]
    sets: dict[str, Any] = {
        "state_genes": dict(zip(STATES, chunks[: len(STATES)])),
        "batch_genes": chunks[len(STATES)],
        "quality_genes": chunks[len(STATES) + 1],
        "age_genes": chunks[len(STATES) + 2],
        "null_genes": np.sort(order[bounds[-1]:]),
    }
    sets["state_lfc"] = {s: _signed_uniform(rng, *_STATE_LFC_RANGE, size=n_state) for s in STATES}
    sets["batch_lfc"] = _signed_uniform(rng, *_BATCH_LFC_RANGE, size=n_batch)
    sets["quality_lfc"] = rng.uniform(*_QUALITY_LFC_RANGE, size=n_quality)
    sets["age_lfc"] = _signed_uniform(rng, *_AGE_LFC_RANGE, size=n_age)
    return sets


def _planted_effects(samples: dict, genes: dict, n_genes: int) -> np.ndarray:
    """log2 effects of state, batch, quality and age on every gene, shape (n_samples, n_genes)."""
    n_samples = samples["state_index"].shape[0]
    log2_effect = np.zeros((n_samples, n_genes), dtype=np.float64)
    for k, state in enumerate(STATES):
        rows = np.flatnonzero(samples["state_index"] == k)
        log2_effect[np.ix_(rows, genes["state_genes"][state])] += genes["state_lfc"][state]
    log2_effect[np.ix_(np.flatnonzero(samples["is_b"]), genes["batch_genes"])] += genes["batch_lfc"]
    degradation = (10.0 - samples["quality"]) / 9.0  # 0 at perfect quality, 1 at the worst
    log2_effect[:, genes["quality_genes"]] -= degradation[:, None] * genes["quality_lfc"][None, :]
    log2_effect[:, genes["age_genes"]] += ((samples["age"] - 50.0) / 30.0)[:, None] * genes["age_lfc"][None, :]
    return log2_effect


def _corrupt(rng: np.random.Generator, log2_effect: np.ndarray, genes: dict, base_fraction: np.ndarray,
             n_corrupted: int) -> tuple[np.ndarray, np.ndarray, dict[int, np.ndarray]]:
    """Corrupt the last ``n_corrupted`` samples, kinds in turn.

    Degraded samples get lower log2 effects (``log2_effect`` is changed in place); failed
    and contaminated libraries get an extra share of the library from a foreign profile,
    returned per row.
    """
    n_samples, n_genes = log2_effect.shape
    corrupted = np.arange(n_samples - n_corrupted, n_samples)
    kinds = np.array([CORRUPTION_KINDS[i % len(CORRUPTION_KINDS)] for i in range(n_corrupted)], dtype=str)
    extra_fraction: dict[int, np.ndarray] = {}
    quality_genes = genes["quality_genes"]
    for row, kind in zip(corrupted, kinds):
        if kind == "failed_library":
            # 85% of the reads land on a handful of genes.
            hot = rng.choice(n_genes, size=8, replace=False)
            weights = np.zeros(n_genes)
            weights[hot] = rng.dirichlet(np.ones(hot.size))
            extra_fraction[int(row)] = weights * 0.85
        elif kind == "contaminated":
            # 40% of the library comes from a foreign profile: ~500 random genes
            # strongly up on top of the baseline.
            foreign_genes = rng.choice(n_genes, size=min(500, n_genes // 2), replace=False)
            foreign = base_fraction.copy()
            foreign[foreign_genes] *= 2.0 ** rng.uniform(3.0, 5.0, size=foreign_genes.size)
            foreign /= foreign.sum()
            extra_fraction[int(row)] = foreign * 0.40
        else:  # degraded
            # Quality genes collapse and a broad tenth of the genes drops as well.
            log2_effect[row, quality_genes] -= rng.uniform(3.0, 4.0, size=quality_genes.size)
            broad = rng.choice(n_genes, size=max(1, n_genes // 10), replace=False)
            log2_effect[row, broad] -= rng.uniform(1.5, 2.5, size=broad.size)
    return corrupted, kinds, extra_fraction


def _expected_counts(base_fraction: np.ndarray, log2_effect: np.ndarray, target_depth: np.ndarray,
                     extra_fraction: dict[int, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Expected counts ``mu`` (n_samples, n_genes) and the per-sample mean scale of null genes."""
    fraction = base_fraction[None, :] * np.exp2(log2_effect)
    normaliser = fraction.sum(axis=1)
    mean_scale = target_depth / normaliser
    fraction /= normaliser[:, None]
    for row, extra in extra_fraction.items():
        share = float(extra.sum())
        fraction[row] = (1.0 - share) * fraction[row] + extra
    fraction *= target_depth[:, None]
    return fraction, mean_scale


def _draw_counts(rng: np.random.Generator, mu: np.ndarray, dispersion: np.ndarray) -> np.ndarray:
    """Gamma-Poisson counts of mean ``mu`` and variance ``mu + dispersion·mu²`` (int32)."""
    size_r = 1.0 / dispersion
    lam = rng.gamma(shape=np.broadcast_to(size_r, mu.shape), scale=mu / size_r[None, :])
    return rng.poisson(lam).astype(np.int32)


def write_cohort(cohort: Cohort, directory: Path, *, name: str = "cohort") -> dict[str, Path]:
    """Write a cohort as a Zarr v3 store and an annotation table.

    Parameters
    ----------
    cohort : Cohort
        The cohort to write.
    directory : pathlib.Path
        Output directory; created if missing.
    name : str, default "cohort"
        Base name of the outputs.

    Returns
    -------
    dict of str to pathlib.Path
        ``{"matrix": <directory>/<name>.zarr, "annotations":
        <directory>/<name>_annotations.tsv}``.

    Notes
    -----
    The Zarr store is a v3 group with the arrays ``matrix`` (samples x genes,
    ``int32``, chunks of about 200 x 2000), ``sample_ids`` and ``feature_ids``
    (1-D variable-length string arrays). An existing store of the same name is
    overwritten. The annotation table is tab-separated with a header row and the
    columns of ``cohort.annotations``.
    """
    import zarr  # imported here so that simulating does not require zarr

    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    matrix_path = directory / f"{name}.zarr"
    annotations_path = directory / f"{name}_annotations.tsv"

    counts = np.ascontiguousarray(cohort.counts, dtype=np.int32)
    n_samples, n_genes = counts.shape
    group = zarr.open_group(str(matrix_path), mode="w", zarr_format=3)
    matrix = group.create_array(
        "matrix",
        shape=counts.shape,
        dtype=np.int32,
        chunks=(max(1, min(200, n_samples)), max(1, min(2000, n_genes))),
    )
    matrix[...] = counts
    for key, values in (("sample_ids", cohort.sample_ids), ("feature_ids", cohort.gene_ids)):
        values = np.array([str(v) for v in np.asarray(values).ravel()], dtype=np.dtypes.StringDType())
        array = group.create_array(key, shape=values.shape, dtype=str, chunks=(max(1, values.size),))
        array[...] = values

    cohort.annotations.to_csv(annotations_path, sep="\t", index=False)
    return {"matrix": matrix_path, "annotations": annotations_path}
