"""``axiscope report``: the self-contained, interactive HTML page of a fit, rebuilt from its result folder."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ._app import app, say, setup_logging, user_errors
from ._options import Overwrite, Quiet
from .explain_cmd import IdColumn


@app.command("report")
def report_command(
    result_dir: Annotated[Path, typer.Argument(help="Output directory of 'axiscope fit'.")],
    annotations: Annotated[Path | None, typer.Option(
        "--annotations", help="Tab-separated sample annotations for the map's hover text and colours, matched "
                              "to the samples by --id-column.",
        show_default="the file the axis cards were made with, if it still exists")] = None,
    id_column: IdColumn = "sample_id",
    scores_dir: Annotated[Path | None, typer.Option(
        "--scores-dir", help="Output directory of 'axiscope score' against this fit: adds the scoring "
                             "diagnostics and the new samples on the map.")] = None,
    groups_dir: Annotated[Path | None, typer.Option(
        "--groups", help="Output directory of 'axiscope groups' for this fit: adds the groups and their "
                         "profiles, and colours the map by group.",
        show_default="RESULT_DIR/groups, when it holds groups")] = None,
    out: Annotated[Path | None, typer.Option(
        "--out", "-o", help="Where to write the page (default: RESULT_DIR/report.html).")] = None,
    overwrite: Overwrite = False,
    quiet: Quiet = False,
) -> None:
    """Write report.html: one page about a fit that opens offline, with maps to hover and zoom."""
    setup_logging(quiet)
    with user_errors():
        from ..report.html import build_report

        path = build_report(result_dir, annotations=annotations, id_column=id_column, scores_dir=scores_dir,
                            groups_dir=groups_dir, out=out, overwrite=overwrite)
    say(f"report in {path}", quiet)
