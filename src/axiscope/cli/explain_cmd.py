"""``axiscope explain``: axis cards of an existing fit, against sample annotations, without refitting.

Also declares the annotation options shared with ``axiscope fit``. Library modules are
imported inside the command, so that ``import axiscope.cli`` stays light.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from ..defaults import DEFAULT_TOP_FEATURES, SAMPLES_PER_LIST
from ._app import app, say, setup_logging, user_errors
from ._options import FormatOpt, Overwrite, Quiet, TableFormat, Wait

if TYPE_CHECKING:
    from ..explain.cards import AxisCards


AnnotationsFile = Annotated[Path | None, typer.Option(
    "--annotations", help="Tab-separated sample annotations, matched to the samples by --id-column.")]
IdColumn = Annotated[str, typer.Option("--id-column", help="Annotation column holding the sample ids.")]
Categorical = Annotated[list[str] | None, typer.Option(
    "--categorical", help="Annotation columns whose values name groups, even if they are numbers "
                          "(repeatable or comma-separated).")]
Numeric = Annotated[list[str] | None, typer.Option(
    "--numeric", help="Annotation columns whose values are numbers, even whole-number codes "
                      "(repeatable or comma-separated).")]
Technical = Annotated[list[str] | None, typer.Option(
    "--technical", help="Annotation columns describing processing (batch, run, depth, quality): an axis that "
                        "lines up with one more than with any other annotation is flagged.")]
Ignore = Annotated[list[str] | None, typer.Option(
    "--ignore", help="Annotation columns not to analyse (repeatable or comma-separated).")]
AllowMissing = Annotated[bool, typer.Option(
    "--allow-missing-annotations",
    help="Drop annotation rows matching no sample, and leave samples without a row unannotated, with a "
         "warning, instead of failing.")]
Top = Annotated[int, typer.Option("--top", min=1, help="Features listed per side of each axis.")]


def print_axis_readings(cards: "AxisCards", quiet: bool, limit: int = 5) -> None:
    """The one-line reading of the first axes.

    The batch warnings are not repeated here: the library logs them, and the command's
    logging setup already shows them once on standard error.
    """
    for axis in cards.axis_names[:limit]:
        say(f"  {cards.reading(axis)}", quiet)


@app.command("explain")
def explain_command(
    result_dir: Annotated[Path, typer.Argument(help="Output directory of 'axiscope fit'.")],
    annotations: AnnotationsFile = None,
    id_column: IdColumn = "sample_id",
    categorical: Categorical = None,
    numeric: Numeric = None,
    technical: Technical = None,
    ignore: Ignore = None,
    allow_missing: AllowMissing = False,
    top: Top = DEFAULT_TOP_FEATURES,
    samples_per_list: Annotated[int, typer.Option(
        "--samples", min=1, help="Samples listed at each end of an axis and among those it represents poorly.")
    ] = SAMPLES_PER_LIST,
    format: FormatOpt = TableFormat.tsv,
    out: Annotated[Path | None, typer.Option(
        "--out", "-o", help="Where to write (default: RESULT_DIR/explanation).")] = None,
    overwrite: Overwrite = False,
    wait: Wait = False,
    quiet: Quiet = False,
) -> None:
    """Axis cards of a fit: what each axis carries, is built from, lines up with, and its samples."""
    setup_logging(quiet)
    target = out if out is not None else result_dir / "explanation"
    with user_errors():
        from ..explain.cards import explain_axes
        from ..io.output import atomic_directory, check_target

        check_target(target, overwrite, wait=wait)
        cards = explain_axes(
            result_dir, annotations=annotations, id_column=id_column, categorical=categorical, numeric=numeric,
            technical=technical, ignore=ignore, allow_missing=allow_missing, top=top,
            samples_per_list=samples_per_list,
        )
        with atomic_directory(target, overwrite=overwrite) as tmp:
            cards.write(tmp, parquet=format is TableFormat.parquet)
    say(f"explained {len(cards.axis_names)} axes", quiet)
    print_axis_readings(cards, quiet)
    say(f"  axis cards in {target}", quiet)
