"""``axiscope score``: place new samples on a saved model's axes and flag the ones it does not describe.

The library is imported inside the command, so that listing the commands stays fast.
"""

from __future__ import annotations

import sys
from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from ._app import app, progress_display, say, setup_logging, user_errors
from ._options import (
    AllowExternalData,
    AllowMissingChunks,
    ClusterOpt,
    Dataset,
    FeatureIds,
    FormatOpt,
    MemoryLimit,
    OutDir,
    Overwrite,
    Quiet,
    SampleIds,
    SamplesIn,
    SamplesInOpt,
    SchedulerOpt,
    TableFormat,
    Threads,
    Wait,
)


class FillMissing(str, Enum):
    mean = "mean"


class QLimit(str, Enum):
    jackson_mudholkar = "jackson-mudholkar"
    box = "box"


ModelDir = Annotated[Path, typer.Argument(
    metavar="MODEL", help="The result folder of 'axiscope fit', or its model/ subfolder.")]
NewInput = Annotated[Path, typer.Argument(
    metavar="INPUT", help="Matrix of new samples: .h5/.hdf5, Zarr directory, .npy, .csv/.tsv/.txt (optionally .gz).")]


@app.command("score", short_help="Place new samples on a fit's axes and flag those it does not describe.")
def score_command(
    model: ModelDir,
    source: NewInput,
    out: OutDir,
    fill_missing: Annotated[FillMissing | None, typer.Option(
        help="mean: model features absent from INPUT, and NaN cells, take their training mean.",
        show_default="none: an absent feature is an error")] = None,
    max_missing_fraction: Annotated[float, typer.Option(
        min=0.0, max=1.0, help="Flag samples with a larger fraction of filled features.")] = 0.1,
    confidence: Annotated[float, typer.Option(
        help="Confidence of the T² and Q limits used for flags (between 0.5 and 1; the limits at 0.95 "
             "are also written).")] = 0.99,
    correct_shrinkage: Annotated[bool, typer.Option(
        "--correct-shrinkage", show_default="off",
        help="Undo the shrinkage of projected scores when features far outnumber training samples; T² "
             "then uses the corrected scores (without it T² under-flags in that regime).")] = False,
    adjust_q: Annotated[bool, typer.Option(
        help="Raise the Q limits by the expected excess of new samples' residuals over the training "
             "ones (matters when features far outnumber training samples).")] = True,
    q_method: Annotated[QLimit, typer.Option(
        "--q-limit",
        help="Q limit: Jackson-Mudholkar (theta1 exact, theta2 and theta3 estimated from the variance "
             "and skew of the training residuals; falls back to Box, with a warning, when they do not "
             "allow it) or Box's scaled chi-square.")] = QLimit.jackson_mudholkar,
    format: FormatOpt = TableFormat.tsv,
    dataset: Dataset = None,
    sample_ids: SampleIds = None,
    feature_ids: FeatureIds = None,
    samples_in: SamplesInOpt = SamplesIn.rows,
    allow_external_data: AllowExternalData = False,
    allow_missing_chunks: AllowMissingChunks = False,
    covariates: Annotated[Path | None, typer.Option(
        "--annotations",
        help="Tab-separated annotations of the new samples (matched by --id-column); required when the "
             "model was fitted with --adjust-for: each sample is adjusted with its own values.")] = None,
    id_column: Annotated[str, typer.Option("--id-column", help="Annotation column holding the sample ids.")] = "sample_id",
    reference: Annotated[Path | None, typer.Option(
        metavar="FILE",
        help="The matrix the model is expected to have been fitted on: a warning when the model's recorded "
             "training input (size and hash) is another file.")] = None,
    memory_limit: MemoryLimit = None,
    threads: Threads = None,
    scheduler: SchedulerOpt = None,
    cluster: ClusterOpt = None,
    overwrite: Overwrite = False,
    wait: Wait = False,
    quiet: Quiet = False,
) -> None:
    """Place the samples of INPUT on the axes of MODEL and flag those the model does not describe.

    Writes scores.tsv (the samples' scores), diagnostics.tsv (T², Q, their limits and a
    flag per sample) and manifest.json to --out.
    """
    from ..core.adjust import Covariates
    from ..io.output import atomic_directory, check_target
    from ..scoring.score import score

    setup_logging(quiet)
    with user_errors():
        check_target(out, overwrite, wait=wait)
        with progress_display(quiet) as progress:
            result = score(
                model, source, fill_missing=fill_missing.value if fill_missing else None,
                max_missing_fraction=max_missing_fraction, confidence=confidence,
                correct_shrinkage=correct_shrinkage, adjust_q=adjust_q, q_method=q_method.value,
                memory_limit=memory_limit, threads=threads, progress=progress, dataset=dataset,
                sample_ids=sample_ids, feature_ids=feature_ids, samples_in=samples_in.value,
                allow_external_data=allow_external_data, allow_missing_chunks=allow_missing_chunks,
                covariates=None if covariates is None else Covariates(covariates, id_column=id_column),
                reference=reference, scheduler=scheduler, cluster=cluster,
            )
        with atomic_directory(out, overwrite=overwrite) as tmp:
            result.write(tmp, parquet=format is TableFormat.parquet, command_line=sys.argv)
    print_score_summary(result, out, quiet)


def print_score_summary(result, out: Path, quiet: bool) -> None:
    """A few lines: samples scored, features matched, counts within and flagged, where files are."""
    from ..errors import counted

    m = result.manifest
    c = m["counts"]
    say(
        f"scored {counted(c['samples'], 'sample')} on {counted(m['model']['n_components'], 'axis', 'axes')} "
        f"({counted(c['model_features_matched'], 'model feature')} matched, {c['model_features_filled']} filled, "
        f"{c['extra_features_ignored']} extra ignored; {m['seconds']:.1f} s)",
        quiet,
    )
    flags = c["flags"]
    level = m["options"]["confidence"]
    flagged = c["samples"] - flags["within"]
    parts = ", ".join(f"{name} {flags[name]}" for name in ("t2", "q", "both", "missing") if flags[name])
    say(f"  at {level:g}: {flags['within']} within limits, {flagged} flagged" + (f" ({parts})" if parts else ""), quiet)
    for key, count in c["flagged_at"].items():
        if float(key) != level:
            say(f"  at {key}: {count} flagged", quiet)
    say(f"  Q limit: {result.q_method}; results in {out}", quiet)
