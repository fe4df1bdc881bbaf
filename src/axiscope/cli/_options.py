"""Option declarations shared by several commands (typer and the standard library only)."""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated

import typer


class SamplesIn(str, Enum):
    rows = "rows"
    columns = "columns"


class Scale(str, Enum):
    unit = "unit"
    none = "none"
    allele_frequency = "allele-frequency"


class Missing(str, Enum):
    error = "error"
    mean = "mean"


class Method(str, Enum):
    auto = "auto"
    randomized = "randomized"
    exact = "exact"


class Checksum(str, Enum):
    sampled = "sampled"
    full = "full"


class CompressedAxis(str, Enum):
    auto = "auto"
    rows = "rows"
    columns = "columns"


class TableFormat(str, Enum):
    tsv = "tsv"
    parquet = "parquet"


InputPath = Annotated[Path, typer.Argument(
    help="Matrix file: .h5/.hdf5, Zarr directory (dense, or sparse as data/indices/indptr/shape), .npy, .npz (SciPy sparse), .csv/.tsv/.txt (optionally .gz).")]
OutDir = Annotated[Path, typer.Option("--out", "-o", help="Output directory (written atomically).")]
Dataset = Annotated[str | None, typer.Option(
    help="2-D dataset inside an HDF5 file or Zarr store.", show_default="the only 2-D numeric one")]
SampleIds = Annotated[str | None, typer.Option(
    help="Dataset in the same file, or a one-column text file, with sample ids.",
    show_default="a dataset named sample_ids, else sample_000001, ...")]
FeatureIds = Annotated[str | None, typer.Option(
    help="Dataset in the same file, or a one-column text file, with feature ids.",
    show_default="a dataset named feature_ids, else feature_000001, ...")]
SamplesInOpt = Annotated[SamplesIn, typer.Option(help="Whether samples are the file's rows or its columns.")]
MemoryLimit = Annotated[str | None, typer.Option(
    help="Memory limit for the whole process (interpreter and libraries included), e.g. 512MB or 4GB.",
    show_default="half the RAM")]
Threads = Annotated[int | None, typer.Option(
    min=1, help="Blocks processed at once.", show_default="number of cores")]
# Where the passes run (fit, score): a Dask cluster instead of threads of this process
SchedulerOpt = Annotated[str | None, typer.Option(
    "--scheduler", metavar="ADDRESS",
    help="Run the passes on a running Dask cluster: its scheduler's address (tcp://host:8786). "
         "Every worker must see INPUT at the same path. Needs pip install \"axiscope[cluster]\".")]
ClusterOpt = Annotated[str | None, typer.Option(
    "--cluster", metavar="local[:N]",
    help="Run the passes on N worker processes of this machine started for the run (default N: the "
         "number of cores), each with an equal share of --memory-limit. Needs "
         "pip install \"axiscope[cluster]\".")]
Overwrite = Annotated[bool, typer.Option(help="Replace an existing output directory.")]
Wait = Annotated[bool, typer.Option(
    help="When another run is writing the same --out, wait for it to end instead of stopping at once.")]
Quiet = Annotated[bool, typer.Option("--quiet", "-q", help="No progress bars or summary.", show_default="off")]
#: ``--format``: the writer of the command's tables takes ``parquet=format is TableFormat.parquet``
#: and passes it on to every table it writes.
FormatOpt = Annotated[TableFormat, typer.Option(
    "--format", help="tsv: tab-separated tables; parquet: every table also as a Parquet file of the same name.")]
AllowExternalData = Annotated[bool, typer.Option(
    "--allow-external-data", show_default="off",
    help="HDF5: accept a dataset whose values are kept in other files (external link, external raw "
         "storage, virtual dataset); refused otherwise, since such a file can make a run read other files.")]
SparseNames = Annotated[str, typer.Option(
    help="Sparse matrix in HDF5/Zarr: names of the values, indices and pointer arrays and of the shape "
         "(attribute or dataset) inside the group given by --dataset, comma-separated.")]
CompressedAxisOpt = Annotated[CompressedAxis, typer.Option(
    help="Sparse matrix: whether the pointers run over the stored rows (CSR) or columns (CSC); auto reads "
         "the group's 'format' attribute, else the length of the pointers.")]
AllowMissingChunks = Annotated[bool, typer.Option(
    "--allow-missing-chunks", show_default="off",
    help="Zarr and HDF5: read chunks that were never written as the array's fill value (their number is "
         "reported); otherwise a missing chunk is an error.")]
ChecksumOpt = Annotated[Checksum, typer.Option(
    help="How the input's identity (size, modification time, hash) is recorded in the manifest and the model: "
         "sampled (a fast hash of sampled pieces) or full (a hash of every byte).")]
