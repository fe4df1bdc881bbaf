"""``axiscope demo``: generate the invented cohort and run the whole job on it."""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Annotated

import typer

from ..demo import DEMO_FIT_OPTIONS, make_demo_data
from ..fit import fit
from ..preprocess import PreprocessSpec
from ..writers import atomic_directory, check_target
from ._app import app, progress_display, say, setup_logging, user_errors
from ._options import Overwrite, Quiet, Threads
from .fit_cmd import print_fit_summary


@app.command("demo")
def demo_command(
    out: Annotated[Path, typer.Option("--out", "-o", help="Folder for the demo data and results.")] = Path("axiscope-demo"),
    components: Annotated[int, typer.Option("--components", "-k", min=2)] = 10,
    seed: Annotated[int, typer.Option(help="Seed of the simulation.")] = 7,
    threads: Threads = None,
    overwrite: Overwrite = False,
    quiet: Quiet = False,
) -> None:
    """Simulate a synthetic RNA-sequencing cohort, fit it, and show what the axes mean."""
    setup_logging(quiet)
    t0 = time.perf_counter()
    with user_errors():
        check_target(out, overwrite)
        with atomic_directory(out, overwrite=overwrite) as tmp:
            data = make_demo_data(tmp / "data", seed=seed)
            say(f"simulated a reference cohort and a new batch in {time.perf_counter() - t0:.1f} s", quiet)
            with progress_display(quiet) as progress:
                result = fit(data["reference"], n_components=components,
                             preprocess=PreprocessSpec(**DEMO_FIT_OPTIONS), threads=threads,
                             progress=progress)
            result.write(tmp / "fit", command_line=sys.argv)
    print_fit_summary(result, out / "fit", quiet)
    top = result.top_features(5)
    for axis in ("PC1", "PC2"):
        pos = top[(top.axis == axis) & (top.direction == "positive")].feature_id.tolist()
        neg = top[(top.axis == axis) & (top.direction == "negative")].feature_id.tolist()
        say(f"  {axis}: top positive genes {', '.join(pos)}; top negative {', '.join(neg)}", quiet)
    say(f"  demo data in {out / 'data'}", quiet)


@app.command("simulate")
def simulate_command(
    out: Annotated[Path, typer.Option("--out", "-o", help="Folder for the simulated files.")],
    seed: Annotated[int, typer.Option(help="Seed of the simulation.")] = 7,
    overwrite: Overwrite = False,
    quiet: Quiet = False,
) -> None:
    """Write the demo's invented cohort: reference.zarr, new_batch.zarr and annotation tables."""
    setup_logging(quiet)
    with user_errors():
        with atomic_directory(out, overwrite=overwrite) as tmp:
            paths = make_demo_data(tmp, seed=seed)
    for name, path in paths.items():
        say(f"{name}: {out / path.name}", quiet)
