"""``axiscope fit``: principal axes of a matrix on disk, with tables and a model."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer

from ..defaults import DEFAULT_TOP_FEATURES
from ..errors import counted
from ._app import app, progress_display, say, setup_logging, user_errors
from ._options import (
    AllowExternalData,
    AllowMissingChunks,
    Checksum,
    ChecksumOpt,
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
    ClusterOpt,
    CompressedAxis,
    CompressedAxisOpt,
    SchedulerOpt,
    SparseNames,
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


FitComponents = Annotated[str, typer.Option(
    "--components", "-k",
    help="Number of principal components (axes), or 'auto': fit --max-components axes, then keep the number "
         "the criteria in signal_axes.tsv recommend (parallel analysis; at least 1).")]
MaxComponents = Annotated[int | None, typer.Option(
    min=1, help="With --components auto: the candidate axes fitted before deciding.",
    show_default="50, or the rank of the matrix when smaller")]
Permutations = Annotated[int, typer.Option(
    min=1, help="Copies of a random subsample with each feature permuted across samples, for the parallel "
                "analysis of --components auto and --assess-signal.")]
AssessSignal = Annotated[bool, typer.Option(
    "--assess-signal", show_default="off",
    help="With a number of --components: also compute how many of them stand above the noise "
         "(signal_axes.tsv; one more pass over the data).")]


def parse_components(value: str) -> int | str:
    """``'auto'`` or a whole number >= 1 (``--components``)."""
    if value == "auto":
        return value
    try:
        number = int(value)
    except ValueError:
        number = 0
    if number < 1:
        raise typer.BadParameter(f"{value!r} is not 'auto' or a whole number >= 1", param_hint="'--components'")
    return number


def parse_power_iterations(value: str) -> int | str:
    if value == "auto":
        return value
    try:
        return int(value)
    except ValueError:
        raise typer.BadParameter(f"{value!r} is not 'auto' or a whole number",
                                 param_hint="'--power-iterations'") from None


def _method(method: str, passes: str) -> str:
    """The engine's method from --method and --passes."""
    if passes == "auto":
        return method
    if passes != "1":
        raise typer.BadParameter(f"{passes!r} is not 'auto' or 1", param_hint="'--passes'")
    if method != "auto":
        raise typer.BadParameter(f"--passes 1 reads the input once, which --method {method} cannot; "
                                 "leave --method out", param_hint="'--passes'")
    return "one-pass"


@app.command("fit")
def fit_command(
    input: InputPath,
    out: OutDir,
    n_components: FitComponents = "10",
    max_components: MaxComponents = None,
    permutations: Permutations = 20,
    assess_signal: AssessSignal = False,
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
    passes: Annotated[str, typer.Option(
        help="'auto': as many reads of INPUT as the accuracy needs; 1: read it once (statistics and two "
             "random sketches together, for storage read once or billed per read): less accurate, per-sample "
             "distances estimated, no --min-variance/--top-variable/--missing mean.")] = "auto",
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
    sparse_names: SparseNames = "data,indices,indptr,shape",
    compressed_axis: CompressedAxisOpt = CompressedAxis.auto,
    annotations: AnnotationsFile = None,
    id_column: IdColumn = "sample_id",
    categorical: Categorical = None,
    numeric: Numeric = None,
    technical: Technical = None,
    ignore: Ignore = None,
    supplementary_features: Annotated[Path | None, typer.Option(help="Text file with one feature id per line: left out of the axes and reported as supplementary.")] = None,
    supplementary_samples_column: Annotated[str | None, typer.Option(help="true/false annotation column: true rows are left out of the fit and projected afterwards.")] = None,
    allow_missing: AllowMissing = False,
    adjust_for: Annotated[list[str] | None, typer.Option(
        "--adjust-for", metavar="COL[,COL…]",
        help="Annotation columns (from --annotations) regressed out of every feature before the axes are "
             "fitted: numeric columns as they are, categorical ones as indicators of their levels; "
             "an intercept is included. Repeatable or comma-separated.")] = None,
    stability_repeats: Annotated[int, typer.Option(
        min=0, help="Split the samples this many times into two random halves, fit each half and compare "
                    "its axes with the other half's: a stability from 0 to 1 per axis in axis_stability.tsv, "
                    "the manifest and the axis cards (0: not assessed). Every pass over the data serves all "
                    "halves.")] = 0,
    stability_threshold: Annotated[float, typer.Option(
        help="Axes whose split-half stability is below this are flagged unstable.")] = 0.8,
    report: Annotated[bool, typer.Option(
        "--report", help="Also draw the figures (figures/) and write report.html into --out: one "
                         "self-contained page with the maps, the axis cards and the warnings (see 'axiscope "
                         "figures' and 'axiscope report').")] = False,
    checksum: ChecksumOpt = Checksum.sampled,
    checkpoint: Annotated[Path | None, typer.Option(
        metavar="DIR",
        help="Keep the iteration's state in DIR after each completed pass over the data (written atomically), "
             "so that --resume can continue a killed fit; removed once the results are written.")] = None,
    resume: Annotated[bool, typer.Option(
        "--resume", show_default="off",
        help="Continue from the state in --checkpoint when there is one (a state of other inputs or options "
             "is refused); the results are byte for byte those of an uninterrupted fit.")] = False,
    overwrite: Overwrite = False,
    wait: Wait = False,
    quiet: Quiet = False,
) -> None:
    """Fit principal axes to INPUT and write tables, the model, a manifest and the axis cards to --out."""
    from ..core.backends import shared_cluster
    from ..core.options import EngineSettings, InputLayout, Resources
    from ..core.preprocess import PreprocessSpec
    from ..errors import OptionError
    from ..explain.plan import explain_fit, plan_explanation, read_feature_list
    from ..fitting.run import fit
    from ..io import open_matrix
    from ..io.output import atomic_directory, check_target

    setup_logging(quiet)
    components = parse_components(n_components)
    with user_errors():
        check_target(out, overwrite, wait=wait)
        if max_components is not None and components != "auto":
            raise OptionError(f"max_components={max_components} applies to n_components='auto' only; "
                              f"drop it or pass n_components='auto'")
        if stability_repeats:
            from ..decide.stability import check_stability_options

            check_stability_options(stability_repeats, stability_threshold)
        spec = PreprocessSpec(
            center=center, scale=scale.value, log_transform=log_transform, counts_per=counts_per,
            min_variance=min_variance, top_variable=top_variable, missing=missing.value,
        )
        engine = EngineSettings(method=_method(method.value, passes), oversample=oversample, tol=tol, seed=seed,
                                power_iterations=parse_power_iterations(power_iterations))
        resources = Resources(memory_limit=memory_limit, threads=threads, scratch=scratch,
                              scheduler=scheduler, cluster=cluster)
        layout = InputLayout(dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                             samples_in=samples_in.value, allow_external_data=allow_external_data,
                             allow_missing_chunks=allow_missing_chunks, sparse_names=sparse_names,
                             compressed_axis=compressed_axis.value)
        covariates = _covariates(adjust_for, annotations, id_column, categorical, numeric,
                                 supplementary_samples_column, supplementary_features)
        with open_matrix(input, **layout.open_options(), scratch=resources.scratch) as src:
            if stability_repeats and getattr(src, "sparse", False):
                raise OptionError(f"{input}: the split-half stability is not yet computed for sparse matrices; "
                                  "leave stability_repeats out, or store the matrix dense")
            prepared = plan_explanation(
                src, annotations=annotations, id_column=id_column, categorical=categorical, numeric=numeric,
                technical=technical, ignore=ignore,
                supplementary_features=read_feature_list(supplementary_features, src.feature_ids)
                if supplementary_features else None,
                supplementary_samples_column=supplementary_samples_column, allow_missing=allow_missing,
            )
            # one cluster for the whole command (fit, stability, supplementary passes), closed at
            # the end whatever happens
            with progress_display(quiet) as progress, shared_cluster(resources) as resources:
                signal = None
                unattended = dict(checksum=checksum.value, checkpoint=checkpoint, resume=resume)
                assessed = []  # the stability, assessed on the fit's blocks while its cache is open

                def then(result, blocks):
                    assessed.append(fit_stability(blocks, result, stability_repeats, stability_threshold, engine,
                                                  threads=threads, progress=progress))

                if stability_repeats and covariates is not None:
                    raise OptionError("stability_repeats does not yet combine with adjust_for (the halves would "
                                      "be fitted unadjusted); leave one of them out")
                if components == "auto" or assess_signal:
                    from ..decide.signal import fit_with_signal

                    result, signal = fit_with_signal(
                        src, n_components=components, max_components=max_components, permutations=permutations,
                        preprocess=spec, engine=engine, resources=resources, active=prepared.active,
                        exclude_features=prepared.exclude, progress=progress, covariates=covariates, **unattended)
                    if stability_repeats:  # on the axes kept: one more read of the input per pass
                        assessed.append(fit_stability(src, result, stability_repeats, stability_threshold, engine,
                                                      threads=threads, progress=progress, active=prepared.active,
                                                      scheduler=resources.scheduler))
                else:
                    result = fit(src, n_components=components, preprocess=spec, engine=engine,
                                 resources=resources, active=prepared.active,
                                 exclude_features=prepared.exclude, progress=progress, covariates=covariates,
                                 then=then if stability_repeats else None, **unattended)
                stability = assessed[0] if assessed else None
                cards = explain_fit(prepared, result, src, top=top, memory_limit=memory_limit,
                                    threads=threads, progress=progress, scheduler=resources.scheduler,
                                    cluster=resources.cluster)
        with atomic_directory(out, overwrite=overwrite) as tmp:
            result.write(tmp, top=top, parquet=format is TableFormat.parquet, command_line=sys.argv)
            if stability is not None:
                stability.write(tmp, parquet=format is TableFormat.parquet)
            cards.write(tmp, parquet=format is TableFormat.parquet)
            if signal is not None:
                signal.write(tmp, parquet=format is TableFormat.parquet)
            if report:  # the static figures first, so that the page embeds them
                from ..report.figures import write_figures
                from ..report.html import build_report

                write_figures(tmp, annotations=annotations, id_column=id_column)
                build_report(tmp, annotations=annotations, id_column=id_column)
        if checkpoint is not None:  # the results are in place: the saved state is no longer needed
            from ..core.checkpoint import Checkpoint

            Checkpoint(checkpoint, {}).clear()
    print_fit_summary(result, out, quiet)
    print_axis_readings(cards, quiet)
    if report:
        say(f"  figures in {out / 'figures'}; report in {out / 'report.html'}", quiet)


def _covariates(adjust_for, annotations, id_column, categorical, numeric, supplementary_samples_column,
                supplementary_features):
    """The ``Covariates`` of ``--adjust-for`` (None without it), checked against the other options."""
    if not adjust_for:
        return None
    from ..core.adjust import Covariates
    from ..errors import OptionError

    if annotations is None:
        raise OptionError("adjust_for names annotation columns; give the table with annotations=FILE")
    for name, value in (("supplementary_samples_column", supplementary_samples_column),
                        ("supplementary_features", supplementary_features)):
        if value:  # supplementary elements would be placed unadjusted: refused until they are adjusted too
            raise OptionError(f"adjust_for does not yet combine with {name}; leave one of them out")
    return Covariates(annotations, adjust_for, id_column=id_column, categorical=categorical or (),
                      numeric=numeric or ())


def fit_stability(blocks, result, repeats: int, threshold: float, engine, *, threads, progress, active=None,
                  scheduler=None):
    """Split-half stability of the fit's axes on its blocks (or its input read again, on
    ``scheduler`` like the fit), recorded in its manifest."""
    from ..decide.stability import axis_stability

    stability = axis_stability(blocks, result, stability_repeats=repeats, stability_threshold=threshold,
                               seed=engine.seed if isinstance(engine.seed, int) else 0, threads=threads,
                               progress=progress, active=active, scheduler=scheduler)
    result.manifest["stability"] = stability.record()
    return stability


def print_fit_summary(result, out: Path, quiet: bool) -> None:
    """A few lines: shape, passes, accuracy, variance of the first axes, where files are."""
    m = result.manifest
    say(
        f"fitted {result.model.n_components} components to {m['n_active_samples']} samples × "
        f"{m['n_features_kept']} features ({m['options']['method']}, "
        f"{counted(m['passes']['count'], 'pass', 'passes')} over the data, {m['seconds']:.1f} s)",
        quiet,
    )
    for line in accuracy_lines(m["accuracy"]):
        say(f"  {line}", quiet)
    if m.get("adjusted_for"):
        terms = m["adjusted_for"]["terms"]
        say(f"  adjusted for {', '.join(m['adjusted_for']['columns'])} ({len(terms)} terms with the intercept, "
            "regressed out of every feature)", quiet)
    if "stability" in m:
        say(f"  {stability_line(m['stability'])}", quiet)
    if m["n_missing_imputed"]:
        say(f"  {m['n_missing_imputed']} missing cells imputed with the feature mean", quiet)
    table = result.components_table().head(5)
    parts = [f"{a} {100 * r:.1f}%" for a, r in zip(table.axis, table.variance_ratio)]
    say("  variance ratio: " + ", ".join(parts), quiet)
    signal = m.get("signal_axes")
    if isinstance(signal, dict) and "recommended" in signal:
        kept = f"; kept {signal['kept']}" if signal.get("mode") == "auto" else ""
        say(f"  axes above the noise: {signal['recommended']}{kept} — {signal['reason']} "
            f"(every criterion in {signal['table']})", quiet)
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
    source = accuracy["estimated_from"]
    how = {"ritz residuals": "estimated from the Ritz residuals",
           "sketch error estimate": "bounded by the error a separate sketch estimates"}.get(source, "LAPACK's error bounds")
    one_pass = source == "sketch error estimate"
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
        values += ("; this is a one-pass fit: the default --passes auto tightens it" if one_pass
                   else "; more --power-iterations or --method exact tighten it")
    shown = axes[:MAX_AXES_LISTED]
    loadings = "loadings, sine of the angle to the exact vector: " + ", ".join(
        f"{a['axis']} {a['loading_error']:.0e}" if a["loading_error"] <= LOOSE_VECTOR else f"{a['axis']} —"
        for a in shown) + (", …" if len(axes) > len(shown) else "")
    loose = [a for a in axes if a["loading_error"] > LOOSE_VECTOR]
    if loose and one_pass:
        loadings += f" (—: the one-pass bound on {_span(loose)} is above {LOOSE_VECTOR:g})"
    elif loose:
        verb = "is" if len(loose) == 1 else "are"
        loadings += (f" (—: {_span(loose)} {verb} not separated from a neighbour of nearly equal variance; "
                     "only the space such axes span together is determined)")
    return [values, loadings]


def stability_line(record: dict) -> str:
    """One line from the manifest's ``"stability"`` record: the values, and the unstable axes."""
    axes = record["axes"]
    values = ", ".join(f"{a['axis']} {a['stability']:.2f}" for a in axes[:MAX_AXES_LISTED])
    unstable = [a for a in axes if not a["stable"]]
    line = (f"split-half stability ({record['repeats']} splits, {record['passes']} passes): {values}"
            + (", …" if len(axes) > MAX_AXES_LISTED else ""))
    if unstable:
        line += f"; unstable (below {record['threshold']:g}): {_span(unstable)}"
    return line


def _worst(axes: list[dict], key: str) -> str:
    return f"{max(a[key] for a in axes):.1e}"


def _span(axes: list[dict]) -> str:
    """``PC1``, ``PC1 and PC2``, ``PC1–PC7`` (consecutive) or ``PC2, PC5 and PC9``."""
    names = [a["axis"] for a in axes]
    numbers = [int(name[2:]) for name in names]
    if len(names) > 2 and numbers == list(range(numbers[0], numbers[0] + len(numbers))):
        return f"{names[0]}–{names[-1]}"
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]
