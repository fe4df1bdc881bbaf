"""``axiscope describe``: describe the axes of an existing fit against sample annotations.

Also declares the annotation options shared with ``axiscope fit``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ..explain.describe import Description, describe
from ..io.output import atomic_directory, check_target
from ._app import app, say, setup_logging, user_errors
from ._options import Overwrite, Quiet

AnnotationsFile = Annotated[Path | None, typer.Option(
    "--annotations", help="Tab-separated sample annotations, matched to the samples by --id-column.")]
IdColumn = Annotated[str, typer.Option("--id-column", help="Annotation column holding the sample ids.")]
Categorical = Annotated[list[str] | None, typer.Option(
    "--categorical", help="Annotation columns to treat as categories (repeatable or comma-separated).")]
Quantitative = Annotated[list[str] | None, typer.Option(
    "--quantitative", help="Annotation columns that must be numeric (repeatable or comma-separated).")]
Technical = Annotated[list[str] | None, typer.Option(
    "--technical", help="Annotation columns describing processing (batch, depth, ...): an axis led by one is flagged.")]
Ignore = Annotated[list[str] | None, typer.Option(
    "--ignore", help="Annotation columns not to analyse, e.g. a true/false supplementary-samples flag "
                     "(repeatable or comma-separated).")]
AllowMissingAnnotations = Annotated[bool, typer.Option(
    "--allow-missing-annotations", help="Drop unmatched annotation rows and samples with a warning instead of failing.")]
Top = Annotated[int, typer.Option("--top", min=1, help="Features listed per side of each axis.")]


def print_axis_summaries(description: Description, quiet: bool, limit: int = 5) -> None:
    """The one-sentence summary of the first axes.

    The batch warnings are not repeated here: the library logs them, and the command's
    logging setup already shows them once on standard error.
    """
    for sentence in description.axes["summary"].head(limit):
        say(f"  {sentence}", quiet)


@app.command("describe")
def describe_command(
    result_dir: Annotated[Path, typer.Argument(help="Output directory of 'axiscope fit'.")],
    annotations: AnnotationsFile = None,
    id_column: IdColumn = "sample_id",
    categorical: Categorical = None,
    quantitative: Quantitative = None,
    technical: Technical = None,
    ignore: Ignore = None,
    allow_missing_annotations: AllowMissingAnnotations = False,
    top: Top = 10,
    out: Annotated[Path | None, typer.Option("--out", "-o", help="Where to write (default: RESULT_DIR/description).")] = None,
    overwrite: Overwrite = False,
    quiet: Quiet = False,
) -> None:
    """Describe each axis of a fit (features, annotations, samples) without refitting."""
    setup_logging(quiet)
    target = out if out is not None else result_dir / "description"
    with user_errors():
        check_target(target, overwrite)
        description = describe(
            result_dir, annotations=annotations, id_column=id_column, categorical=categorical,
            quantitative=quantitative, technical=technical, exclude_columns=ignore,
            allow_missing=allow_missing_annotations, top=top,
        )
        with atomic_directory(target, overwrite=overwrite) as tmp:
            description.write(tmp)
    say(f"described {len(description.axes)} axes", quiet)
    print_axis_summaries(description, quiet)
    say(f"  results in {target}", quiet)
