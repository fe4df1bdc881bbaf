"""``axiscope demo``: generate the invented cohort and run the whole job on it."""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from typing import Annotated

import typer

from ._app import app, progress_display, say, setup_logging, user_errors
from ._options import FormatOpt, Overwrite, Quiet, TableFormat, Threads, Wait
from .fit_cmd import print_fit_summary


@app.command("demo")
def demo_command(
    out: Annotated[Path, typer.Option("--out", "-o", help="Folder for the demo data and results.")] = Path("axiscope-demo"),
    n_components: Annotated[int, typer.Option(
        "--components", "-k", min=3, help="Number of principal components (the summary reads the first three).")] = 10,
    seed: Annotated[int, typer.Option(help="Seed of the simulation.")] = 7,
    threads: Threads = None,
    format: FormatOpt = TableFormat.tsv,
    overwrite: Overwrite = False,
    wait: Wait = False,
    quiet: Quiet = False,
) -> None:
    """Simulate a synthetic RNA-sequencing cohort, fit it, explain the axes, group the samples, score a new batch, draw it all."""
    import pandas as pd

    from ..core.adjust import Covariates
    from ..core.options import Resources
    from ..core.preprocess import PreprocessSpec
    from ..demo.adjusted import check_adjustment
    from ..decide.groups import find_groups
    from ..decide.signal import fit_with_signal
    from ..demo.layout import DEMO_FIT_OPTIONS, DEMO_TECHNICAL, make_demo_data
    from ..explain.cards import explain_axes
    from ..fitting.run import fit
    from ..io.output import atomic_directory, check_target
    from ..report.figures import write_figures
    from ..report.html import build_report
    from ..scoring.score import score

    setup_logging(quiet)
    t0 = time.perf_counter()
    with user_errors():
        check_target(out, overwrite, wait=wait)
        with atomic_directory(out, overwrite=overwrite) as tmp:
            data = make_demo_data(tmp / "data", seed=seed)
            say(f"simulated a reference cohort and a new batch in {time.perf_counter() - t0:.1f} s", quiet)
            with progress_display(quiet) as progress:
                assessed = []  # split-half stability, on the fit's cached blocks

                def then(fitted, blocks):
                    assessed.append(demo_stability(blocks, fitted, threads, progress))

                # the criteria of how many axes carry signal, reported beside the fixed number kept
                result, signal = fit_with_signal(data["reference"], n_components=n_components,
                                                 preprocess=PreprocessSpec(**DEMO_FIT_OPTIONS),
                                                 resources=Resources(threads=threads), progress=progress,
                                                 then=then)
                stability = assessed[0]
                cards = explain_axes(result, annotations=data["reference_annotations"],
                                     technical=DEMO_TECHNICAL, ignore=["corrupted"], top=5)
                # the same fit after removing the invented processing batch: its axis goes
                adjusted = fit(data["reference"], n_components=3, preprocess=PreprocessSpec(**DEMO_FIT_OPTIONS),
                               resources=Resources(threads=threads), progress=progress,
                               covariates=Covariates(data["reference_annotations"], ["batch"]))
                # the records say where things are once the folder has its final name
                result.manifest = relocated(result.manifest, tmp, out)
                cards.settings = relocated(cards.settings, tmp, Path(out).resolve())
                parquet = format is TableFormat.parquet
                result.write(tmp / "fit", parquet=parquet, command_line=sys.argv)
                stability.write(tmp / "fit", parquet=parquet)
                signal.write(tmp / "fit", parquet=parquet)
                cards.write(tmp / "fit", parquet=parquet)
                groups = find_groups(tmp / "fit", matrix=data["reference"], annotations=data["reference_annotations"],
                                     ignore=["corrupted"], threads=threads, progress=progress)
                groups.manifest = relocated(groups.manifest, tmp, out)
                groups.write(tmp / "fit" / "groups", parquet=parquet)
                scored = score(tmp / "fit" / "model", data["new"], threads=threads, progress=progress)
                scored.manifest = relocated(scored.manifest, tmp, out)
                scored.write(tmp / "score", parquet=parquet, command_line=sys.argv)
                # pictures: every sample's annotations, reference and new batch together
                annotations = pd.concat([pd.read_csv(data[name], sep="\t", dtype={"sample_id": str})
                                         for name in ("reference_annotations", "new_annotations")])
                write_figures(tmp / "fit", annotations=annotations, diagnostics_dir=tmp / "score")
                build_report(tmp / "fit", annotations=annotations, scores_dir=tmp / "score",
                             out=tmp / "report.html")
                # the fit adjusted for the batch, with its own cards, figures and page
                adjusted.manifest = relocated(adjusted.manifest, tmp, out)
                adjusted.write(tmp / "adjusted", parquet=parquet, command_line=sys.argv)
                adjusted_cards = explain_axes(adjusted, annotations=data["reference_annotations"],
                                              technical=DEMO_TECHNICAL, ignore=["corrupted"], top=5)
                adjusted_cards.settings = relocated(adjusted_cards.settings, tmp, Path(out).resolve())
                adjusted_cards.write(tmp / "adjusted", parquet=parquet)
                write_figures(tmp / "adjusted", annotations=annotations)
                build_report(tmp / "adjusted", annotations=annotations)
            corrupted = pd.read_csv(data["new_annotations"], sep="\t")["corrupted"].to_numpy(dtype=bool)
            batch_check = check_adjustment(result, adjusted, pd.read_csv(
                data["reference_annotations"], sep="\t", dtype={"sample_id": str}), covariate="batch", biology="state")
    print_fit_summary(result, out / "fit", quiet)
    for axis in cards.axis_names[:3]:
        say(f"  {cards.reading(axis)}", quiet)
        genes = cards.built_from[cards.built_from["axis"] == axis]
        up = ", ".join(genes[genes["side"] == "positive"]["feature_id"].head(5))
        down = ", ".join(genes[genes["side"] == "negative"]["feature_id"].head(5))
        say(f"    genes with the largest loadings: + {up}; − {down}", quiet)
    say(batch_check.line(), quiet)
    say(f"  the adjusted fit: {out / 'adjusted'}, its page {out / 'adjusted' / 'report.html'}", quiet)
    say(f"{groups.n_groups} groups of the reference samples ({groups.grouping.method} on "
        f"{len(groups.axis_names)} axes); results in {out / 'fit' / 'groups'}", quiet)
    for line in groups.lines():
        say(f"  {line}", quiet)
    flags = scored.diagnostics["flag"]
    flagged = (flags != "within").to_numpy()
    say(
        f"scored {len(flags)} new samples: {int(flagged.sum())} flagged as not described by the model "
        f"({int((flagged & corrupted).sum())} of the {int(corrupted.sum())} deliberately corrupted ones); "
        f"results in {out / 'score'}",
        quiet,
    )
    say(f"figures in {out / 'fit' / 'figures'}; report in {out / 'report.html'} (opens offline)", quiet)
    say(f"demo data in {out / 'data'}; {time.perf_counter() - t0:.1f} s in all", quiet)


#: Random splits of the demo's samples into halves for the split-half stability of its axes.
DEMO_STABILITY_REPEATS = 3


def demo_stability(blocks, result, threads, progress):
    """Split-half stability of the demo fit's axes, recorded in its manifest (the cards show it)."""
    from ..decide.stability import axis_stability

    stability = axis_stability(blocks, result, stability_repeats=DEMO_STABILITY_REPEATS, threads=threads,
                               progress=progress)
    result.manifest["stability"] = stability.record()
    return stability


def relocated(record, old: Path, new: Path):
    """``record`` (a manifest: nested dicts, lists, strings) with paths under ``old`` moved under ``new``.

    Paths are compared as absolute paths; a relocated path is written the way ``new`` is.
    """
    if isinstance(record, dict):
        return {key: relocated(value, old, new) for key, value in record.items()}
    if isinstance(record, list):
        return [relocated(value, old, new) for value in record]
    if isinstance(record, str) and record:
        base, path = os.path.abspath(old), os.path.abspath(record)
        if path == base or path.startswith(base + os.sep):
            return str(Path(new) / os.path.relpath(path, base))
    return record


@app.command("simulate")
def simulate_command(
    out: Annotated[Path, typer.Option("--out", "-o", help="Folder for the simulated files.")],
    seed: Annotated[int, typer.Option(help="Seed of the simulation.")] = 7,
    overwrite: Overwrite = False,
    quiet: Quiet = False,
) -> None:
    """Write the demo's invented cohort: reference.zarr, new_batch.zarr and annotation tables."""
    from ..demo.layout import make_demo_data
    from ..io.output import atomic_directory

    setup_logging(quiet)
    with user_errors():
        with atomic_directory(out, overwrite=overwrite) as tmp:
            paths = make_demo_data(tmp, seed=seed)
    for name, path in paths.items():
        say(f"{name}: {out / path.name}", quiet)
