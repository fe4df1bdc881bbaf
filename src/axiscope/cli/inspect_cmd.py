"""``axiscope inspect``: what a matrix file holds and what fitting it would take."""

from __future__ import annotations

import json
from typing import Annotated

import typer

from ._app import app, setup_logging, user_errors
from ._options import (
    AllowExternalData,
    AllowMissingChunks,
    Dataset,
    FeatureIds,
    InputPath,
    MemoryLimit,
    SampleIds,
    SamplesIn,
    CompressedAxis,
    CompressedAxisOpt,
    SparseNames,
    SamplesInOpt,
    Threads,
)
from .fit_cmd import (
    Components,
    CountsPer,
    LogTransform,
    Oversample,
    Scratch,
    TopVariable,
)


@app.command("inspect")
def inspect_command(
    input: InputPath,
    n_components: Components = 10,
    oversample: Oversample = 10,
    memory_limit: MemoryLimit = None,
    threads: Threads = None,
    scratch: Scratch = None,
    counts_per: CountsPer = None,
    log_transform: LogTransform = False,
    top_variable: TopVariable = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of text.")] = False,
    dataset: Dataset = None,
    sample_ids: SampleIds = None,
    feature_ids: FeatureIds = None,
    samples_in: SamplesInOpt = SamplesIn.rows,
    allow_external_data: AllowExternalData = False,
    allow_missing_chunks: AllowMissingChunks = False,
    sparse_names: SparseNames = "data,indices,indptr,shape",
    compressed_axis: CompressedAxisOpt = CompressedAxis.auto,
) -> None:
    """Show shape, dtype, on-disk chunking, size, ids and the block plan 'axiscope fit' would use.

    Give the options you will give 'axiscope fit' that shape its plan (components,
    oversampling, memory limit, threads, scratch folder, per-sample transforms, top
    variable features): the plan shown is then the one the fit uses.
    """
    from ..core.memory import format_bytes
    from ..core.options import EngineSettings, InputLayout, Resources
    from ..core.plan import plan_fit
    from ..core.preprocess import PreprocessSpec
    from ..io import describe_source, open_matrix

    setup_logging(False)
    with user_errors():
        spec = PreprocessSpec(counts_per=counts_per, log_transform=log_transform, top_variable=top_variable)
        engine = EngineSettings(oversample=oversample)
        resources = Resources(memory_limit=memory_limit, threads=threads, scratch=scratch)
        layout = InputLayout(dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                             samples_in=samples_in.value, allow_external_data=allow_external_data,
                             allow_missing_chunks=allow_missing_chunks, sparse_names=sparse_names,
                             compressed_axis=compressed_axis.value)
        with open_matrix(input, **layout.open_options(), scratch=resources.scratch) as src:
            info = describe_source(src)
            plan = plan_fit(src, n_components=n_components, preprocess=spec, engine=engine,
                            resources=resources)
    info["fit_plan"] = plan.to_dict()
    if as_json:
        typer.echo(json.dumps(info, indent=2, default=str))
        return
    n, p = info["shape"]
    typer.echo(f"{info['path']}  ({info['format']}{', dataset ' + info['dataset'] if info['dataset'] else ''})")
    typer.echo(f"  samples × features: {n} × {p}  (samples in {info['samples_in']})")
    typer.echo(f"  stored as {info['stored_dtype']}, read as {info['dtype']}; chunks on disk: {info['disk_chunks']}")
    typer.echo(f"  size decoded: {format_bytes(info['nbytes'])}; on disk: {format_bytes(info['file_size'])}")
    notes = info["notes"]
    if "computed_in" in notes:
        typer.echo(f"  computed in {notes['computed_in']}")
    if "missing_chunks" in notes:
        typer.echo(f"  {notes['missing_chunks']} of {notes['chunks']} chunks absent, read as the fill value "
                   f"{notes['fill_value']!r} (--allow-missing-chunks)")
    typer.echo(f"  sample ids: {info['ids_source']['samples']}, e.g. {', '.join(info['first_sample_ids'][:3])}")
    typer.echo(f"  feature ids: {info['ids_source']['features']}, e.g. {', '.join(info['first_feature_ids'][:3])}")
    if "stored_values" in notes:  # sparse input (io/sparse.py)
        typer.echo(f"  {notes['storage']}: {notes['stored_values']:,} stored values (density "
                   f"{notes['density']:.4g})")
    per_block = (f"up to {plan.block_rows} samples and about {plan.block_nonzeros:,} stored values"
                 if plan.block_nonzeros else f"{plan.block_rows} samples")
    typer.echo(
        f"  fit with a {format_bytes(plan.budget)} budget and {resources.n_threads} threads: blocks of "
        f"{per_block}, transformed blocks kept "
        f"{'compressed in memory (about ' if plan.cache == 'compressed' else 'in ' + plan.cache + ' ('}"
        f"{format_bytes(plan.cache_bytes)}), fixed memory about {format_bytes(plan.fixed_bytes)}"
    )
