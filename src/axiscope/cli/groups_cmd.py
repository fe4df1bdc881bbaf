"""``axiscope groups``: groups of samples on a fit's axes, and what sets each group apart.

The library is imported inside the command, so that listing the commands stays fast.
"""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from ..defaults import DEFAULT_MAX_GROUPS, DEFAULT_TOP_FEATURES, SAMPLES_PER_LIST, WARD_MAX_SAMPLES
from ._app import app, progress_display, say, setup_logging, user_errors
from ._options import (
    Dataset,
    FeatureIds,
    FormatOpt,
    MemoryLimit,
    Overwrite,
    Quiet,
    SampleIds,
    SamplesIn,
    TableFormat,
    Threads,
    Wait,
)
from .explain_cmd import AllowMissing, AnnotationsFile, Categorical, IdColumn, Ignore, Numeric


class GroupMethod(str, Enum):
    auto = "auto"
    ward = "ward"
    k_means = "k-means"


@app.command("groups", short_help="Groups of samples on a fit's axes, and the features and annotations "
                                  "that set each group apart.")
def groups_command(
    result_dir: Annotated[Path, typer.Argument(help="Output directory of 'axiscope fit'.")],
    n_axes: Annotated[int | None, typer.Option(
        "--axes", min=1, help="Group on the scores of the first K axes.",
        show_default="every axis the fit kept")] = None,
    n_groups: Annotated[str, typer.Option(
        "--groups", metavar="auto|N",
        help="Number of groups, or auto: try 2 to --max-groups and keep the largest mean silhouette width.")
    ] = "auto",
    max_groups: Annotated[int, typer.Option(
        "--max-groups", min=2, help="Largest number of groups tried by --groups auto.")] = DEFAULT_MAX_GROUPS,
    method: Annotated[GroupMethod, typer.Option(
        "--method", help=f"ward: Ward's agglomerative clustering; k-means: k-means with k-means++ starts; auto: "
                         f"Ward up to {WARD_MAX_SAMPLES:,} samples, k-means beyond.")] = GroupMethod.auto,
    features: Annotated[bool, typer.Option(
        "--features/--no-features",
        help="Profile the groups by every feature of the matrix (one more pass over it).")] = True,
    matrix: Annotated[Path | None, typer.Option(
        "--matrix", help="The fitted matrix, when it has moved since the fit.",
        show_default="the input recorded by the fit")] = None,
    dataset: Dataset = None,
    sample_ids: SampleIds = None,
    feature_ids: FeatureIds = None,
    samples_in: Annotated[SamplesIn | None, typer.Option(
        help="Whether samples are the file's rows or its columns.", show_default="as recorded by the fit")
    ] = None,
    annotations: AnnotationsFile = None,
    id_column: IdColumn = "sample_id",
    categorical: Categorical = None,
    numeric: Numeric = None,
    ignore: Ignore = None,
    allow_missing: AllowMissing = False,
    top: Annotated[int, typer.Option("--top", min=1, help="Features listed per group and side.")
                   ] = DEFAULT_TOP_FEATURES,
    samples_per_list: Annotated[int, typer.Option(
        "--samples", min=1, help="Most and least typical samples listed per group.")] = SAMPLES_PER_LIST,
    seed: Annotated[int, typer.Option(min=0, help="Seed of k-means and of the silhouette's sample subset.")] = 0,
    memory_limit: MemoryLimit = None,
    threads: Threads = None,
    format: FormatOpt = TableFormat.tsv,
    out: Annotated[Path | None, typer.Option(
        "--out", "-o", help="Where to write (default: RESULT_DIR/groups, where the report looks).")] = None,
    overwrite: Overwrite = False,
    wait: Wait = False,
    quiet: Quiet = False,
) -> None:
    """Groups of samples on a fit's axes, and the features and annotations that set each group apart."""
    setup_logging(quiet)
    target = out if out is not None else result_dir / "groups"
    with user_errors():
        from ..decide.groups import find_groups
        from ..io.output import atomic_directory, check_target

        check_target(target, overwrite, wait=wait)
        with progress_display(quiet) as progress:
            found = find_groups(
                result_dir, n_axes=n_axes, n_groups=n_groups, method=method.value, max_groups=max_groups,
                features=features, matrix=matrix, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                samples_in=samples_in.value if samples_in is not None else None, annotations=annotations,
                id_column=id_column, categorical=categorical, numeric=numeric, ignore=ignore,
                allow_missing=allow_missing, top=top, samples_per_list=samples_per_list, seed=seed,
                memory_limit=memory_limit, threads=threads, progress=progress,
            )
        with atomic_directory(target, overwrite=overwrite) as tmp:
            found.write(tmp, parquet=format is TableFormat.parquet)
    print_group_lines(found, quiet)
    say(f"  groups in {target}", quiet)


def print_group_lines(found, quiet: bool) -> None:
    """How the groups were made, then one line per group."""
    g = found.grouping
    say(f"{g.n_groups} groups of {len(found.sample_ids):,} samples ({g.method} on {len(found.axis_names)} axes; "
        f"number of groups: {g.chosen_by})", quiet)
    for line in found.lines():
        say(f"  {line}", quiet)
