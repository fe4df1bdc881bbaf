"""``axiscope inspect``: what a matrix file holds and what fitting it would take."""

from __future__ import annotations

import json
from typing import Annotated

import typer

from ..core.memory import default_memory_limit, format_bytes, parse_memory
from ..core.plan import plan_blocks
from ..io import describe_source, open_matrix
from ._app import app, setup_logging, user_errors
from ._options import (
    Dataset,
    FeatureIds,
    InputPath,
    MemoryLimit,
    SampleIds,
    SamplesIn,
    SamplesInOpt,
)


@app.command("inspect")
def inspect_command(
    input: InputPath,
    components: Annotated[int, typer.Option("--components", "-k", min=1, help="Components planned, for the memory estimate.")] = 10,
    oversample: Annotated[int, typer.Option(min=0)] = 10,
    memory_limit: MemoryLimit = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of text.")] = False,
    dataset: Dataset = None,
    sample_ids: SampleIds = None,
    feature_ids: FeatureIds = None,
    samples_in: SamplesInOpt = SamplesIn.rows,
) -> None:
    """Show shape, dtype, on-disk chunking, size, ids and an estimate of fit memory."""
    setup_logging(False)
    with user_errors():
        budget = default_memory_limit() if memory_limit is None else parse_memory(memory_limit)
        with open_matrix(input, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                         samples_in=samples_in.value) as src:
            info = describe_source(src)
            n, p = src.shape
            plan = plan_blocks(n, p, src.dtype.itemsize, sketch_width=min(components + oversample, n, p),
                               threads=1, budget=budget, sample_chunk=src.sample_chunk)
    info["fit_plan"] = plan.to_dict()
    if as_json:
        typer.echo(json.dumps(info, indent=2, default=str))
        return
    n, p = info["shape"]
    typer.echo(f"{info['path']}  ({info['format']}{', dataset ' + info['dataset'] if info['dataset'] else ''})")
    typer.echo(f"  samples × features: {n} × {p}  (samples in {info['samples_in']})")
    typer.echo(f"  stored as {info['stored_dtype']}, read as {info['dtype']}; chunks on disk: {info['disk_chunks']}")
    typer.echo(f"  size decoded: {format_bytes(info['nbytes'])}; on disk: {format_bytes(info['file_size'])}")
    typer.echo(f"  sample ids: {info['ids_source']['samples']}, e.g. {', '.join(info['first_sample_ids'][:3])}")
    typer.echo(f"  feature ids: {info['ids_source']['features']}, e.g. {', '.join(info['first_feature_ids'][:3])}")
    typer.echo(
        f"  fit with {format_bytes(budget)} budget: blocks of {plan.block_rows} samples, "
        f"transformed blocks kept in {plan.cache} ({format_bytes(plan.cache_bytes)}), "
        f"fixed memory about {format_bytes(plan.fixed_bytes)}"
    )
