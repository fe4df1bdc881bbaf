"""``axiscope fit``: principal axes of a matrix on disk, with tables and a model."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from ..core.preprocess import PreprocessSpec
from ..fitting.run import fit
from ..io.output import atomic_directory, check_target
from ..io import open_matrix
from ._app import app, progress_display, say, setup_logging, user_errors
from ._options import (
    Dataset,
    FeatureIds,
    InputPath,
    MemoryLimit,
    Method,
    Missing,
    OutDir,
    Overwrite,
    Quiet,
    SampleIds,
    SamplesIn,
    SamplesInOpt,
    Scale,
    TableFormat,
    Threads,
)
from .explain_cmd import (
    AllowMissing,
    AnnotationsFile,
    Categorical,
    IdColumn,
    Ignore,
    Numeric,
    Technical,
    print_axis_readings,
)


def parse_power_iterations(value: str) -> int | str:
    if value == "auto":
        return value
    try:
        return int(value)
    except ValueError:
        raise typer.BadParameter(f"{value!r} is not 'auto' or a whole number") from None


@app.command("fit")
def fit_command(
    input: InputPath,
    out: OutDir,
    components: Annotated[int, typer.Option("--components", "-k", min=1, help="Number of principal components.")] = 10,
    scale: Annotated[Scale, typer.Option(help="unit: standardized PCA (population SD); none: covariance PCA; binomial: genotype dosages.")] = Scale.unit,
    center: Annotated[bool, typer.Option(help="Centre each feature on its mean.")] = True,
    log1p: Annotated[bool, typer.Option("--log1p", help="Apply log(1 + x) after total normalisation.")] = False,
    normalize_total: Annotated[float | None, typer.Option(help="Rescale each sample to this total before log1p (counts per T).")] = None,
    min_variance: Annotated[float | None, typer.Option(help="Drop features with a smaller variance.")] = None,
    top_variable: Annotated[int | None, typer.Option(help="Keep the N most variable features.")] = None,
    missing: Annotated[Missing, typer.Option(help="NaN/Inf cells: an error, or imputed with the feature mean.")] = Missing.error,
    oversample: Annotated[int, typer.Option(min=0, help="Extra sketch dimensions.")] = 10,
    power_iterations: Annotated[str, typer.Option(help="'auto' (until the leading values settle) or a number.")] = "auto",
    method: Annotated[Method, typer.Option(help="auto, randomized, or exact (LAPACK, small inputs).")] = Method.auto,
    seed: Annotated[int, typer.Option(help="Seed of the random test matrices.")] = 0,
    memory_limit: MemoryLimit = None,
    threads: Threads = None,
    scratch: Annotated[Path | None, typer.Option(help="Folder for the scratch file when blocks do not fit in memory.")] = None,
    top: Annotated[int, typer.Option(min=1, help="Features listed per side of each axis in top_features.tsv.")] = 25,
    format: Annotated[TableFormat, typer.Option(help="tsv, or parquet to add Parquet copies of the tables.")] = TableFormat.tsv,
    dataset: Dataset = None,
    sample_ids: SampleIds = None,
    feature_ids: FeatureIds = None,
    samples_in: SamplesInOpt = SamplesIn.rows,
    annotations: AnnotationsFile = None,
    id_column: IdColumn = "sample_id",
    categorical: Categorical = None,
    numeric: Numeric = None,
    technical: Technical = None,
    ignore: Ignore = None,
    supplementary_features: Annotated[Path | None, typer.Option(help="Text file with one feature id per line: left out of the axes and reported as supplementary.")] = None,
    supplementary_samples_column: Annotated[str | None, typer.Option(help="true/false annotation column: true rows are left out of the fit and projected afterwards.")] = None,
    allow_missing: AllowMissing = False,
    overwrite: Overwrite = False,
    quiet: Quiet = False,
) -> None:
    """Fit principal axes to INPUT and write tables, the model, a manifest and the axis cards to --out."""
    setup_logging(quiet)
    with user_errors():
        check_target(out, overwrite)
        spec = PreprocessSpec(
            center=center, scale=scale.value, log1p=log1p, normalize_total=normalize_total,
            min_variance=min_variance, top_variable=top_variable, missing=missing.value,
        )
        with open_matrix(input, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                         samples_in=samples_in.value) as src:
            from ..explain.plan import explain_fit, plan_explanation, read_feature_list

            prepared = plan_explanation(
                src, annotations=annotations, id_column=id_column, categorical=categorical, numeric=numeric,
                technical=technical, ignore=ignore,
                supplementary_features=read_feature_list(supplementary_features, src.feature_ids)
                if supplementary_features else None,
                supplementary_samples_column=supplementary_samples_column, allow_missing=allow_missing,
            )
            with progress_display(quiet) as progress:
                result = fit(
                    src, n_components=components, preprocess=spec, oversample=oversample,
                    power_iterations=parse_power_iterations(power_iterations), method=method.value,
                    seed=seed, memory_limit=memory_limit, threads=threads, scratch=scratch,
                    progress=progress, active=prepared.active, exclude_features=prepared.exclude,
                )
                cards = explain_fit(prepared, result, src, top=top, memory_limit=memory_limit,
                                    threads=threads, progress=progress)
        with atomic_directory(out, overwrite=overwrite) as tmp:
            result.write(tmp, top=top, parquet=format is TableFormat.parquet, command_line=sys.argv)
            cards.write(tmp, parquet=format is TableFormat.parquet)
    print_fit_summary(result, out, quiet)
    print_axis_readings(cards, quiet)


def print_fit_summary(result, out: Path, quiet: bool) -> None:
    """A few lines: shape, passes, accuracy, variance of the first axes, where files are."""
    m = result.manifest
    acc = m["accuracy"]
    say(
        f"fitted {result.model.n_components} components to {m['n_active_samples']} samples × "
        f"{m['n_features_kept']} features ({m['options']['method']}, {m['passes']['count']} passes "
        f"over the data, {m['seconds']:.1f} s)",
        quiet,
    )
    if m["options"]["method"] == "randomized":
        say(
            f"  accuracy: leading singular values settled to a relative change of "
            f"{acc['last_relative_change']:.1e} per pass; what the basis leaves out has spectral "
            f"norm ≤ {acc['residual_norm_bound']:.3g} (Halko et al. 2011, §4.3; σ1 = "
            f"{result.model.singular_values[0]:.3g})",
            quiet,
        )
    if m["n_missing_imputed"]:
        say(f"  {m['n_missing_imputed']} missing cells imputed with the feature mean", quiet)
    table = result.components_table().head(5)
    parts = [f"{a} {100 * r:.1f}%" for a, r in zip(table.axis, table.variance_ratio)]
    say("  variance ratio: " + ", ".join(parts), quiet)
    say(f"  results in {out}", quiet)
