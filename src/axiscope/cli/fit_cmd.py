"""``axiscope fit``: principal axes of a matrix on disk, with tables and a model."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from ..defaults import DEFAULT_TOP_FEATURES
from ._app import app, progress_display, say, setup_logging, user_errors
from ._options import (
    AllowExternalData,
    AllowMissingChunks,
    Dataset,
    FeatureIds,
    FormatOpt,
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
    Wait,
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

# Options shared with ``axiscope inspect``, which predicts the block plan of a fit.
Components = Annotated[int, typer.Option("--components", "-k", min=1, help="Number of principal components (axes).")]
Oversample = Annotated[int, typer.Option(min=0, help="Extra dimensions of each Krylov block beyond the components.")]
CountsPer = Annotated[float | None, typer.Option(
    "--counts-per", metavar="T",
    help="Scale each sample so that its values sum to T (1e6: counts per million), before --log.")]
LogTransform = Annotated[bool, typer.Option(
    "--log", help="Replace each value x by log(1 + x), after --counts-per.")]
TopVariable = Annotated[int | None, typer.Option(min=2, help="Keep the N features of largest variance.")]
Scratch = Annotated[Path | None, typer.Option(
    help="Folder for the scratch file when blocks do not fit in memory (made if missing; default: the temporary folder).")]
SchedulerOpt = Annotated[str | None, typer.Option(
    "--scheduler", metavar="ADDRESS",
    help="Run the passes on a running Dask cluster: its scheduler's address (tcp://host:8786). "
         "Every worker must see INPUT at the same path. Needs pip install \"axiscope[cluster]\".")]
ClusterOpt = Annotated[str | None, typer.Option(
    "--cluster", metavar="local[:N]",
    help="Run the passes on N worker processes of this machine started for the run (default N: the "
         "number of cores), each with an equal share of --memory-limit. Needs "
         "pip install \"axiscope[cluster]\".")]


def parse_power_iterations(value: str) -> int | str:
    if value == "auto":
        return value
    try:
        return int(value)
    except ValueError:
        raise typer.BadParameter(f"{value!r} is not 'auto' or a whole number",
                                 param_hint="'--power-iterations'") from None


@app.command("fit")
def fit_command(
    input: InputPath,
    out: OutDir,
    n_components: Components = 10,
    scale: Annotated[Scale, typer.Option(
        help="unit: each feature divided by its population SD (standardized PCA); none: covariance PCA; "
             "allele-frequency: genotype dosages 0/1/2 divided by sqrt(2q(1-q)), q = mean/2.")] = Scale.unit,
    center: Annotated[bool, typer.Option(help="Centre each feature on its mean.")] = True,
    log_transform: LogTransform = False,
    counts_per: CountsPer = None,
    min_variance: Annotated[float | None, typer.Option(help="Drop features with a smaller variance (after the transforms).")] = None,
    top_variable: TopVariable = None,
    missing: Annotated[Missing, typer.Option(help="NaN/Inf cells: an error, or imputed with the feature mean.")] = Missing.error,
    oversample: Oversample = 10,
    power_iterations: Annotated[str, typer.Option(help="'auto' (until the singular values settle to --tol) or a number from 0 to 100.")] = "auto",
    tol: Annotated[float, typer.Option(help="Requested relative accuracy of the singular values; 'auto' iterations stop there.")] = 1e-6,
    method: Annotated[Method, typer.Option(help="auto, randomized, or exact (LAPACK, small inputs).")] = Method.auto,
    seed: Annotated[int, typer.Option(min=0, help="Seed of the random test matrices.")] = 0,
    memory_limit: MemoryLimit = None,
    threads: Threads = None,
    scratch: Scratch = None,
    scheduler: SchedulerOpt = None,
    cluster: ClusterOpt = None,
    top: Annotated[int, typer.Option(min=1, help="Features listed per side of each axis in top_features.tsv.")] = DEFAULT_TOP_FEATURES,
    format: FormatOpt = TableFormat.tsv,
    dataset: Dataset = None,
    sample_ids: SampleIds = None,
    feature_ids: FeatureIds = None,
    samples_in: SamplesInOpt = SamplesIn.rows,
    allow_external_data: AllowExternalData = False,
    allow_missing_chunks: AllowMissingChunks = False,
    annotations: AnnotationsFile = None,
    id_column: IdColumn = "sample_id",
    categorical: Categorical = None,
    numeric: Numeric = None,
    technical: Technical = None,
    ignore: Ignore = None,
    supplementary_features: Annotated[Path | None, typer.Option(help="Text file with one feature id per line: left out of the axes and reported as supplementary.")] = None,
    supplementary_samples_column: Annotated[str | None, typer.Option(help="true/false annotation column: true rows are left out of the fit and projected afterwards.")] = None,
    allow_missing: AllowMissing = False,
    report: Annotated[bool, typer.Option(
        "--report", help="Also draw the figures (figures/) and write report.html into --out: one "
                         "self-contained page with the maps, the axis cards and the warnings (see 'axiscope "
                         "figures' and 'axiscope report').")] = False,
    overwrite: Overwrite = False,
    wait: Wait = False,
    quiet: Quiet = False,
) -> None:
    """Fit principal axes to INPUT and write tables, the model, a manifest and the axis cards to --out."""
    from ..core.options import EngineSettings, InputLayout, Resources
    from ..core.preprocess import PreprocessSpec
    from ..explain.plan import explain_fit, plan_explanation, read_feature_list
    from ..fitting.run import fit
    from ..io import open_matrix
    from ..io.output import atomic_directory, check_target

    setup_logging(quiet)
    with user_errors():
        check_target(out, overwrite, wait=wait)
        spec = PreprocessSpec(
            center=center, scale=scale.value, log_transform=log_transform, counts_per=counts_per,
            min_variance=min_variance, top_variable=top_variable, missing=missing.value,
        )
        engine = EngineSettings(method=method.value, oversample=oversample, tol=tol, seed=seed,
                                power_iterations=parse_power_iterations(power_iterations))
        resources = Resources(memory_limit=memory_limit, threads=threads, scratch=scratch,
                              scheduler=scheduler, cluster=cluster)
        layout = InputLayout(dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                             samples_in=samples_in.value, allow_external_data=allow_external_data,
                             allow_missing_chunks=allow_missing_chunks)
        with open_matrix(input, **layout.open_options(), scratch=resources.scratch) as src:
            prepared = plan_explanation(
                src, annotations=annotations, id_column=id_column, categorical=categorical, numeric=numeric,
                technical=technical, ignore=ignore,
                supplementary_features=read_feature_list(supplementary_features, src.feature_ids)
                if supplementary_features else None,
                supplementary_samples_column=supplementary_samples_column, allow_missing=allow_missing,
            )
            with progress_display(quiet) as progress:
                result = fit(src, n_components=n_components, preprocess=spec, engine=engine,
                             resources=resources, active=prepared.active,
                             exclude_features=prepared.exclude, progress=progress)
                cards = explain_fit(prepared, result, src, top=top, memory_limit=memory_limit,
                                    threads=threads, progress=progress)
        with atomic_directory(out, overwrite=overwrite) as tmp:
            result.write(tmp, top=top, parquet=format is TableFormat.parquet, command_line=sys.argv)
            cards.write(tmp, parquet=format is TableFormat.parquet)
            if report:  # the static figures first, so that the page embeds them
                from ..report.figures import write_figures
                from ..report.html import build_report

                write_figures(tmp, annotations=annotations, id_column=id_column)
                build_report(tmp, annotations=annotations, id_column=id_column)
    print_fit_summary(result, out, quiet)
    print_axis_readings(cards, quiet)
    if report:
        say(f"  figures in {out / 'figures'}; report in {out / 'report.html'}", quiet)


def print_fit_summary(result, out: Path, quiet: bool) -> None:
    """A few lines: shape, passes, accuracy, variance of the first axes, where files are."""
    m = result.manifest
    say(
        f"fitted {result.model.n_components} components to {m['n_active_samples']} samples × "
        f"{m['n_features_kept']} features ({m['options']['method']}, {m['passes']['count']} passes "
        f"over the data, {m['seconds']:.1f} s)",
        quiet,
    )
    for line in accuracy_lines(m["accuracy"]):
        say(f"  {line}", quiet)
    if m["n_missing_imputed"]:
        say(f"  {m['n_missing_imputed']} missing cells imputed with the feature mean", quiet)
    table = result.components_table().head(5)
    parts = [f"{a} {100 * r:.1f}%" for a, r in zip(table.axis, table.variance_ratio)]
    say("  variance ratio: " + ", ".join(parts), quiet)
    say(f"  results in {out}", quiet)


#: A loading vector whose estimated angle to the exact one has a sine above this is not
#: reported as determined on its own (common practice, no source: 0.1 is about 6 degrees).
LOOSE_VECTOR = 0.1
#: Below this relative gap to a neighbour's variance the estimates are said to be loose
#: (they exceed the error by up to about 3/gap; see axiscope.core.engine.ritz_accuracy).
CLOSE_GAP = 0.01
#: Axes whose loading accuracy is listed in the summary (all of them are in the manifest).
MAX_AXES_LISTED = 10


def accuracy_lines(accuracy: dict) -> list[str]:
    """Plain statements of the fit's accuracy from the manifest's ``accuracy`` record.

    The singular values against the requested tolerance, then the loading vectors,
    naming the axes that miss the tolerance or are not separated from a neighbour.
    """
    axes = accuracy["axes"]
    tol = accuracy["requested_tol"]
    how = "estimated from the Ritz residuals" if accuracy["estimated_from"] == "ritz residuals" \
        else "LAPACK's error bounds"
    met = [a for a in axes if a["below_tol"]]
    missed = [a for a in axes if not a["below_tol"]]
    if not missed:
        values = (f"accuracy: every singular value is within {_worst(axes, 'singular_value_error')} of the "
                  f"exact one (relative, {how}), below the requested {tol:.0e}")
    else:
        values = "accuracy: singular values "
        if met:
            values += (f"of {_span(met)} within {_worst(met, 'singular_value_error')} (relative, {how}), "
                       f"below the requested {tol:.0e}; of {_span(missed)} ")
        else:
            values += f"(relative, {how}) "
        values += f"within {_worst(missed, 'singular_value_error')} only, above the requested {tol:.0e}"
        close = [a for a in missed if a["relative_gap"] is not None and a["relative_gap"] < CLOSE_GAP]
        if close:
            values += (f" (a bound, loose where variances lie within {CLOSE_GAP:.0%} of each other, as for "
                       f"{_span(close)})")
        values += "; more --power-iterations or --method exact tighten it"
    shown = axes[:MAX_AXES_LISTED]
    loadings = "loadings, sine of the angle to the exact vector: " + ", ".join(
        f"{a['axis']} {a['loading_error']:.0e}" if a["loading_error"] <= LOOSE_VECTOR else f"{a['axis']} —"
        for a in shown) + (", …" if len(axes) > len(shown) else "")
    loose = [a for a in axes if a["loading_error"] > LOOSE_VECTOR]
    if loose:
        verb = "is" if len(loose) == 1 else "are"
        loadings += (f" (—: {_span(loose)} {verb} not separated from a neighbour of nearly equal variance; "
                     "only the space such axes span together is determined)")
    return [values, loadings]


def _worst(axes: list[dict], key: str) -> str:
    return f"{max(a[key] for a in axes):.1e}"


def _span(axes: list[dict]) -> str:
    """``PC1``, ``PC1 and PC2``, ``PC1–PC7`` (consecutive) or ``PC2, PC5 and PC9``."""
    names = [a["axis"] for a in axes]
    numbers = [int(name[2:]) for name in names]
    if len(names) > 2 and numbers == list(range(numbers[0], numbers[0] + len(numbers))):
        return f"{names[0]}–{names[-1]}"
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]
