"""The built-in demonstration: an invented cohort, fitted end to end.

The synthetic cohort (see :mod:`axiscope.demo.cohort`) has three invented tissue states, two
processing batches, a sequencing-depth effect and an RNA-quality score. A reference set
of samples is fitted; a later batch of new samples, a few of them deliberately corrupted,
is kept aside for scoring against the saved model.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np

from .cohort import Cohort, simulate_cohort, write_cohort

__all__ = ["make_demo_data", "DEMO_FIT_OPTIONS", "DEMO_TECHNICAL"]

#: Preprocessing of the demo counts: counts per million, then log(1 + x), standardized.
DEMO_FIT_OPTIONS = {"counts_per": 1e6, "log_transform": True, "scale": "unit"}
#: Annotations of the demo that describe how samples were processed, not their biology.
DEMO_TECHNICAL = ["batch", "depth", "rna_quality"]


def _subset(cohort: Cohort, rows: np.ndarray) -> Cohort:
    return replace(
        cohort,
        counts=cohort.counts[rows],
        sample_ids=cohort.sample_ids[rows],
        annotations=cohort.annotations.iloc[rows].reset_index(drop=True),
    )


def make_demo_data(
    directory: Path,
    *,
    n_reference: int = 1200,
    n_new: int = 200,
    n_genes: int = 6000,
    n_corrupted: int = 6,
    seed: int = 7,
) -> dict[str, Path]:
    """Write the reference cohort and a later batch of new samples into ``directory``.

    Returns the paths ``reference``, ``reference_annotations``, ``new``, ``new_annotations``.
    The last ``n_corrupted`` new samples are corrupted (annotation column ``corrupted``).
    """
    cohort = simulate_cohort(n_reference + n_new, n_genes, seed=seed, n_corrupted=n_corrupted)
    reference = _subset(cohort, np.arange(n_reference))
    new = _subset(cohort, np.arange(n_reference, n_reference + n_new))
    ref_paths = write_cohort(reference, directory, name="reference")
    new_paths = write_cohort(new, directory, name="new_batch")
    return {
        "reference": ref_paths["matrix"],
        "reference_annotations": ref_paths["annotations"],
        "new": new_paths["matrix"],
        "new_annotations": new_paths["annotations"],
    }
