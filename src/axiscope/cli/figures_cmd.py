"""``axiscope figures``: the static figures of a fit (and of a scoring run) as PNG and SVG.

The library is imported inside the command, so that ``import axiscope.cli`` stays light.
"""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from ._app import app, fail, say, setup_logging, user_errors
from ._options import Overwrite, Quiet, Wait
from .explain_cmd import AnnotationsFile, IdColumn


class FigureFormat(str, Enum):
    png = "png"
    svg = "svg"
    both = "both"


def parse_pairs(values: list[str] | None) -> tuple[tuple[int, int], ...] | None:
    """``["1,2", "1,3"]`` → ``((1, 2), (1, 3))``; None when no pair is given."""
    if not values:
        return None
    pairs = []
    for value in values:
        parts = [p.strip() for p in value.split(",")]
        if len(parts) != 2 or not all(p.isdigit() for p in parts):
            raise fail(f"--pairs {value}: give two axis numbers separated by a comma, such as --pairs 1,2")
        pairs.append((int(parts[0]), int(parts[1])))
    return tuple(pairs)


@app.command("figures")
def figures_command(
    result_dir: Annotated[Path, typer.Argument(help="Output directory of 'axiscope fit'.")],
    annotations: AnnotationsFile = None,
    id_column: IdColumn = "sample_id",
    color_by: Annotated[str | None, typer.Option(
        "--color-by", help="Annotation column colouring the sample maps.",
        show_default="the annotation that explains most of the first axis drawn")] = None,
    pairs: Annotated[list[str] | None, typer.Option(
        "--pairs", metavar="A,B", help="Pair of axes for the sample, quality and feature maps, e.g. 1,2 (repeatable).",
        show_default="1,2 1,3 2,3")] = None,
    diagnostics_dir: Annotated[Path | None, typer.Option(
        "--scores-dir", help="Output directory of 'axiscope score' against this fit: its samples go on the "
                             "maps, flagged ones ringed, and T² against Q is drawn.")] = None,
    out: Annotated[Path | None, typer.Option(
        "--out", "-o", help="Folder for the figures (written atomically).",
        show_default="RESULT_DIR/figures")] = None,
    formats: Annotated[FigureFormat, typer.Option(
        "--format", help="png (150 dpi), svg, or both.")] = FigureFormat.both,
    overwrite: Overwrite = False,
    wait: Wait = False,
    quiet: Quiet = False,
) -> None:
    """Figures of a fit: variance per axis, sample and feature maps, contributions, scoring diagnostics."""
    setup_logging(quiet)
    chosen_pairs = parse_pairs(pairs)
    target = out if out is not None else result_dir / "figures"
    with user_errors():
        from ..io.output import atomic_directory, check_target
        from ..report.figures import DEFAULT_PAIRS, FIGURE_FORMATS, write_figures

        check_target(target, overwrite, wait=wait)
        with atomic_directory(target, overwrite=overwrite) as tmp:
            written = write_figures(
                result_dir, tmp, annotations=annotations, id_column=id_column, color_by=color_by,
                pairs=chosen_pairs or DEFAULT_PAIRS, diagnostics_dir=diagnostics_dir,
                formats=FIGURE_FORMATS if formats is FigureFormat.both else (formats.value,),
            )
    stems = sorted({path.stem for path in written})
    say(f"{len(stems)} figures ({len(written)} files) in {target}", quiet)
