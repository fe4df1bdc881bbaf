"""The memory plan: how the matrix is cut into row blocks and where transformed blocks are kept."""

from __future__ import annotations

import errno
import logging
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from ..errors import OptionError, ResourceError
from ..io.output import owned_temporary_folder
from .cache import SCRATCH_PREFIX, scratch_has_room
from .engine import N_PROBES
from .memory import format_bytes, process_baseline
from .options import EngineSettings, Resources
from .preprocess import PreprocessSpec

if TYPE_CHECKING:  # pragma: no cover
    from ..io import MatrixSource

__all__ = ["BlockPlan", "plan_blocks", "plan_one_pass", "plan_sparse_blocks", "plan_fit", "check_scratch_writable", "decoded_chunk_bytes",
           "compressed_cache_bytes", "WINDOW", "window_block_rows"]

logger = logging.getLogger(__name__)


_MAX_BLOCK_BYTES = 128 * 2**20
#: Block rows are sized as if this many blocks were in flight, whatever the number of
#: threads, so that the partition of the samples (and with it every rounding) does not
#: depend on the threads; more threads than the budget holds run fewer blocks at once.
_REFERENCE_WINDOW = 4
#: Inputs of at least 512 samples are cut into at least this many blocks, so that threads
#: have blocks to share (a constant, not the thread count: see ``_REFERENCE_WINDOW``).
_MIN_BLOCKS = 8


@dataclass
class BlockPlan:
    """How the matrix is cut into row blocks and where transformed blocks are kept.

    ``block_rows`` depends on the shape, the dtype, the sketch width, the budget and the
    on-disk chunking only, never on the number of threads; ``threads`` is how many blocks
    are worked on at once (at most the threads asked for, fewer when the budget holds fewer
    blocks in flight). ``baseline`` is what the process held before the work (counted
    against ``budget`` when the limit is for the whole process, else 0) and ``chunk_bytes``
    the decoded on-disk chunks one read may hold at once.
    """

    block_rows: int
    cache: str  # "memory" | "compressed" | "scratch" | "source"
    budget: int
    fixed_bytes: int
    block_bytes: int
    cache_bytes: int
    max_basis: int
    threads: int = 1
    baseline: int = 0
    chunk_bytes: int = 0
    #: Sparse input: stored values per block (blocks are cut by these, ``block_rows`` at most).
    block_nonzeros: int | None = None
    #: ``cache="compressed"``: compressed bytes the cache may hold in memory (blocks past it
    #: go to the scratch file); ``cache_bytes`` is then the expected compressed size.
    cache_allowance: int = 0
    #: Blocks read ahead of those worked on (:class:`axiscope.core.passes.PassRunner`; 0:
    #: each thread reads its own block).
    read_ahead: int = 0
    #: Threads of the passes that read the block cache (0: ``threads``).
    cached_threads: int = 0

    def to_dict(self) -> dict:
        extra = {} if self.block_nonzeros is None else {"block_nonzeros": self.block_nonzeros}
        if self.cache == "compressed":
            extra["cache_allowance"] = self.cache_allowance
        return {**extra,
            "block_rows": self.block_rows,
            "threads": self.threads,
            "cache": self.cache,
            "memory_limit": self.budget,
            "process_baseline": self.baseline,
            "fixed_bytes": self.fixed_bytes,
            "block_bytes": self.block_bytes,
            "chunk_bytes": self.chunk_bytes,
            "cache_bytes": self.cache_bytes,
            "max_basis": self.max_basis,
        }


def plan_blocks(
    n_samples: int,
    n_features: int,
    itemsize: int,
    *,
    sketch_width: int,
    threads: int,
    budget: int,
    sample_chunk: int | None = None,
    cache_features: int | None = None,
    scratch: Path | None = None,
    reread_cheap: bool = False,
    chunk_bytes: int = 0,
    baseline: int | None = None,
    compressed_bytes: int | None = None,
    cache: str = "auto",
) -> BlockPlan:
    """Choose block rows, Krylov basis width and cache location to stay within ``budget``.

    Memory held: what the process already holds (``baseline``; by default measured now when
    the limit is for the whole process, see :func:`axiscope.core.memory.process_baseline`);
    the Krylov basis and its image, ``(n + p)·max_basis`` float64 (at most a quarter of what
    is left, between ``2·l`` and ``8·l`` columns); vectors of per-feature statistics; per
    thread, two blocks in flight, each with one work array of its size and a ``p × l``
    partial product, and the decoded on-disk chunks of one read (``chunk_bytes``); and the
    cache when it is kept in memory. When the cache does not fit and ``reread_cheap`` (an
    uncompressed input needing no per-sample transform), later passes re-read the input
    instead of writing a scratch copy of it. Otherwise, when ``compressed_bytes`` (the
    expected size of the cache compressed with :func:`axiscope.core.cache.fast_codec`)
    fits what the work leaves, the cache is kept compressed in memory, with the scratch
    file for any block past that allowance. ``cache`` other than ``"auto"`` imposes the kind
    (``"compressed"``, ``"scratch"`` or ``"source"``; for measurements such as
    ``scripts/bench_fit.py``), within the same budget.

    The block rows do not depend on ``threads``: they are sized for two threads' worth of
    blocks (``_REFERENCE_WINDOW``), or one thread's when the budget is smaller than that, so
    that any thread count cuts the samples the same way and gives the same numbers to the
    last bit. The plan's ``threads`` is then the number of threads whose blocks fit the
    budget (at least one).

    Raises
    ------
    ResourceError
        The budget cannot hold even one thread's blocks; the message says how much would.
    OptionError
        The scratch location is needed and cannot be written.
    """
    cache_features = n_features if cache_features is None else cache_features
    baseline = process_baseline() if baseline is None else int(baseline)
    data_budget = budget - baseline
    l = sketch_width
    width = l + N_PROBES
    per_column = 8 * (n_samples + 2 * n_features)
    max_basis = int(min(8 * l, max(2 * l, (max(data_budget, 0) // 4) // per_column)))
    fixed = per_column * (max_basis + 2 * width) + 8 * 12 * n_features
    # per row of a block in flight: the block, a centred copy, and a second work array in
    # the first pass (statistics and the shifted sketch), plus its products
    row_bytes = 3 * n_features * itemsize + 8 * width
    partial = 8 * n_features * width
    free = data_budget - fixed
    rows, window = _block_rows(free, n_samples, n_features, itemsize, partial, row_bytes, chunk_bytes, sample_chunk)
    if rows < 1:
        need = fixed + 2 * (partial + row_bytes) + chunk_bytes
        held = f"the process already holds {format_bytes(baseline)} and " if baseline else ""
        raise ResourceError(
            f"memory_limit={format_bytes(budget).replace(' ', '')} is too small for {n_samples} samples × "
            f"{n_features} features with {l} sketch columns: {held}the work needs at least "
            f"{format_bytes(need)}{' more' if baseline else ''}; raise memory_limit to at least "
            f"{format_bytes(baseline + need).replace(' ', '')}, or lower n_components"
        )
    per_thread = 2 * (partial + rows * row_bytes) + chunk_bytes
    cache_bytes = n_samples * cache_features * itemsize
    imposed, cache = cache, None
    if imposed not in ("auto", "memory", "compressed", "scratch", "source"):
        raise OptionError(f"cache={imposed!r} is not a cache kind; choose auto, memory, compressed, scratch or source")
    if imposed != "auto":
        cache = imposed
        if imposed in ("scratch", "compressed"):
            check_scratch_writable(scratch)
    elif fixed + threads * per_thread + cache_bytes <= data_budget:
        cache = "memory"
    elif reread_cheap:  # the input is an uncompressed file: reading it again is as cheap as a scratch copy
        cache = "source"
    elif compressed_bytes is not None and _smaller_blocks_leave_room(
            free - compressed_bytes, rows, threads, n_samples, n_features, itemsize, partial, row_bytes,
            chunk_bytes, sample_chunk) and scratch_has_room(scratch, cache_bytes):
        # the compressed cache is reserved first, and blocks share what it leaves
        check_scratch_writable(scratch)  # (for blocks past the allowance)
        cache = "compressed"
        rows, window = _block_rows(free - compressed_bytes, n_samples, n_features, itemsize, partial, row_bytes,
                                   chunk_bytes, sample_chunk)
        per_thread = 2 * (partial + rows * row_bytes) + chunk_bytes
    elif scratch_has_room(scratch, cache_bytes):
        check_scratch_writable(scratch)
        cache = "scratch"
    else:
        logger.warning(
            "no room for a %s scratch file in %s; every pass will re-read and decode the input",
            format_bytes(cache_bytes), scratch or "the temporary directory",
        )
        cache = "source"
    allowance = 0
    if cache == "compressed":  # everything the threads' blocks leave
        allowance = max(0, int(data_budget - fixed - threads * per_thread))
        cache_bytes = int(compressed_bytes) if compressed_bytes is not None else cache_bytes
    held = cache_bytes if cache == "memory" else allowance
    fitting = max(1, int((data_budget - fixed - held) // per_thread))
    n_threads = min(threads, fitting)
    return BlockPlan(rows, cache, budget, fixed, rows * n_features * itemsize, cache_bytes, max_basis,
                     n_threads, baseline, chunk_bytes, cache_allowance=allowance,
                     read_ahead=_read_ahead(n_threads, rows, sample_chunk),
                     cached_threads=_cached_threads(threads, n_threads, cache, data_budget - fixed - held,
                                                    partial, rows, n_features, itemsize, width))


def plan_one_pass(
    n_samples: int,
    n_features: int,
    itemsize: int,
    *,
    n_components: int,
    oversample: int,
    threads: int,
    budget: int,
    sample_chunk: int | None = None,
    chunk_bytes: int = 0,
    baseline: int | None = None,
) -> BlockPlan:
    """Block rows and threads of the one-pass fit (:mod:`axiscope.core.onepass`) within ``budget``.

    The one-pass fit keeps no Krylov basis and no cache. Held for the whole pass: the
    ``n × t`` sample sketch ``Y``, the ``(s + q) × p`` feature sketch and its running sum
    (two of them while two are merged), the test matrices ``Ψ`` (``(s + q) × n``) and ``Ω``
    (``p × t``, three copies: drawn, rounded, divided by the scale), all float64, and vectors
    of per-feature statistics. Per thread: the block, its shifted copy (counted although the
    fit centres fresh blocks in place, so that a cluster's copy fits too), its products
    (``(s + q) × p`` in the block's dtype and in float64, its ``t`` and ``s + q`` columns per
    row), the float64 products of one more block done and waiting to be folded, and the
    decoded on-disk chunk band of one read (``chunk_bytes``). The sketch widths ``s`` and
    ``t`` are those of :func:`axiscope.core.onepass.sketch_widths`, ``q`` is its ``ERROR_ROWS``.

    Blocks are sized as if two threads were working (``_REFERENCE_WINDOW // 2``), or one
    when the budget holds only one, whatever ``threads``, so that the partition, and every
    rounding, does not depend on the thread count; whole on-disk chunks per block when the
    rows reach one (smaller blocks share a decoded band: :mod:`axiscope.io.chunk_bands`). ``max_basis`` and ``cache_bytes`` are 0 and ``cache`` is ``"source"``: nothing is read
    again.

    Raises
    ------
    ResourceError
        The budget cannot hold one thread's block of one sample.
    """
    from .onepass import ERROR_ROWS, sketch_widths

    baseline = process_baseline() if baseline is None else int(baseline)
    data_budget = budget - baseline
    s, t = sketch_widths(n_components, oversample, n_samples, n_features)
    left = s + ERROR_ROWS
    fixed = 8 * n_samples * (t + left) + 8 * n_features * (2 * left + 3 * t + 12)
    # products (in the block's dtype, then float64) and statistics of the block worked on and
    # of one done and waiting to be folded (the runner keeps 2·threads blocks in flight)
    partial = n_features * left * (2 * 8 + itemsize) + 2 * 8 * 6 * n_features
    row_bytes = 2 * n_features * itemsize + 8 * (t + left)  # the block, its shifted copy, Ψ_b and Y_b rows
    free = data_budget - fixed
    rows = 0
    for window in (_REFERENCE_WINDOW // 2, 1):
        rows = int(((free - window * chunk_bytes) // window - partial) // row_bytes)
        if rows >= 1:
            break
    if rows < 1:
        need = fixed + partial + row_bytes + chunk_bytes
        held = f"the process already holds {format_bytes(baseline)} and " if baseline else ""
        raise ResourceError(
            f"memory_limit={format_bytes(budget).replace(' ', '')} is too small for a one-pass fit of "
            f"{n_samples} samples × {n_features} features: {held}the work needs at least "
            f"{format_bytes(need)}{' more' if baseline else ''}; raise memory_limit to at least "
            f"{format_bytes(baseline + need).replace(' ', '')}, or lower n_components")
    rows = int(min(rows, _MAX_BLOCK_BYTES // max(1, n_features * itemsize), n_samples))
    if n_samples >= 512:  # enough blocks to keep threads busy
        rows = min(rows, -(-n_samples // _MIN_BLOCKS))
    if sample_chunk and sample_chunk < n_samples and rows >= sample_chunk:
        rows = (rows // sample_chunk) * sample_chunk  # whole on-disk chunks per block
    per_thread = partial + rows * row_bytes + chunk_bytes
    fitting = max(1, int(free // per_thread))
    return BlockPlan(rows, "source", budget, fixed, rows * n_features * itemsize, 0, 0,
                     min(threads, fitting), baseline, chunk_bytes)


def _block_rows(free: int, n_samples: int, n_features: int, itemsize: int, partial: int, row_bytes: int,
                chunk_bytes: int, sample_chunk: int | None) -> tuple[int, int]:
    """Rows per block, and the blocks in flight they were sized for, within ``free`` bytes (rows < 1: none fit)."""
    rows = window = 0
    for window in (_REFERENCE_WINDOW, 2):  # two threads' worth, else one thread's
        rows = int(((free - (window // 2) * chunk_bytes) // window - partial) // row_bytes)
        if rows >= 1 and (window == 2 or 4 * chunk_bytes <= free):
            break  # (large decoded chunks: one thread's worth, for blocks of more rows; measured
            # on 160 MB chunks under 1 GB: one thread with 958-row blocks 52 s, two threads with
            # 132-row blocks 67 s, BENCHMARKS.md)
    if rows < 1:
        return rows, window
    rows = int(min(rows, _MAX_BLOCK_BYTES // max(1, n_features * itemsize)))
    rows = max(1, min(rows, n_samples))
    if n_samples >= 512:  # enough blocks to keep threads busy
        rows = min(rows, -(-n_samples // _MIN_BLOCKS))
    if sample_chunk and sample_chunk < n_samples:
        # whole on-disk chunks per block when they fit (a chunk cut into blocks is decoded
        # once all the same: io/chunk_bands.py)
        if rows >= sample_chunk:
            rows = (rows // sample_chunk) * sample_chunk
        elif window * (partial + sample_chunk * row_bytes) + (window // 2) * chunk_bytes <= free:
            rows = sample_chunk
    return rows, window


def _read_ahead(threads: int, rows: int, sample_chunk: int | None) -> int:
    """Blocks read ahead of the ``threads`` worked on: ``threads`` (the ``2·threads`` blocks in
    flight counted per thread), and up to ``2·threads`` while blocks cut an on-disk chunk band in
    several, so that the next band is decoded while the blocks of the one before are worked on
    (those read ahead from a held band are views of it: :mod:`axiscope.io.chunk_bands`)."""
    per_band = -(-int(sample_chunk) // max(1, rows)) if sample_chunk and rows < sample_chunk else 1
    return max(threads, min(per_band, 2 * threads))


def _cached_threads(asked: int, threads: int, cache: str, free: int, partial: int, rows: int,
                    n_features: int, itemsize: int, width: int) -> int:
    """Threads of the passes that read the block cache, where no decoded chunk band is held.

    Per thread two blocks in flight (one worked on, one read ahead), the worked-on block's
    centred work array (:mod:`axiscope.core.workspace`) and two ``p × l`` partial products with
    the block's ``l`` columns of products per row; at least the threads of the first pass."""
    if cache not in ("memory", "compressed", "scratch"):
        return threads
    per_thread = 2 * (partial + rows * 8 * width) + 3 * rows * n_features * itemsize
    return max(threads, min(asked, int(free // per_thread)))


def _smaller_blocks_leave_room(free: int, rows: int, threads: int, *shape) -> bool:
    """Whether blocks sized within ``free`` (what a reserved cache leaves) are at least a
    quarter of ``rows`` and the threads' blocks fit (common practice, no source: smaller
    blocks cost a little per-block work, far less than decoding the input again)."""
    n_samples, n_features, itemsize, partial, row_bytes, chunk_bytes, sample_chunk = shape
    if free <= 0:
        return False
    smaller, _ = _block_rows(free, *shape)
    if smaller < 1 or 4 * smaller < rows:
        return False
    return 2 * (partial + smaller * row_bytes) + chunk_bytes <= free // max(1, min(threads, 2))


def check_scratch_writable(scratch: Path | None) -> None:
    """Refuse, before any work, a scratch location where no file can be made.

    A folder that does not exist yet is judged by the nearest folder above it that does.
    """
    where = Path(scratch) if scratch is not None else Path(tempfile.gettempdir())
    while not where.exists() and where.parent != where:
        where = where.parent
    name = f"scratch={str(scratch)!r}" if scratch is not None else f"the temporary folder {where}"
    try:
        probe = owned_temporary_folder(where, SCRATCH_PREFIX)
        probe.rmdir()
    except OSError as exc:
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):  # no inodes left (the plan saw bytes free)
            raise ResourceError(f"{name} has no room for a scratch file ({exc.strerror}); free space "
                                "there, choose another folder with scratch=..., or raise memory_limit so "
                                "that blocks stay in memory") from exc
        raise OptionError(f"{name} cannot be written ({exc.strerror}); choose a writable folder "
                          "with scratch=..., or raise memory_limit so that blocks stay in memory") from exc


def decoded_chunk_bytes(source: "MatrixSource") -> int:
    """Bytes of the decoded on-disk chunks that one read of a block may hold at once.

    A read decodes every chunk its rows touch, whole: a band of ``sample_chunk`` samples
    across all features (chunks of one band may be decoded concurrently), whatever the rows
    of the block, and holds the compressed bytes (up to the decoded size for data that do
    not compress) beside the decoded ones: twice the band is counted. Blocks smaller than
    the band are served from the decoded band, held until its last block was read
    (:class:`axiscope.io.chunk_bands.ChunkBands`): one band held and one being decoded per
    thread, within the same count. Measured on Zarr with
    zstd, 2,000 × 20,000 float32 chunks of Gaussian values: reading 224 rows raised the
    resident memory by 311 MB for a 160 MB chunk. Contiguous and in-memory inputs are read
    straight into the block: 0.
    """
    if not source.disk_chunks or not source.sample_chunk:
        return 0
    n, p = source.shape
    return 2 * int(min(source.sample_chunk, n)) * int(p) * int(source.dtype.itemsize)


def plan_fit(
    source: "MatrixSource",
    *,
    n_components: int,
    preprocess: PreprocessSpec,
    engine: EngineSettings,
    resources: Resources,
    cache: str = "auto",
) -> BlockPlan:
    """The block plan that :func:`axiscope.fit` uses for ``source`` with these options.

    ``cache`` imposes the kind of cache of dense input (see :func:`plan_blocks`; the fit
    passes ``"auto"``).

    A dense one-pass fit (``engine.method="one-pass"``) has a plan of its own
    (:func:`plan_one_pass`).

    ``axiscope inspect`` calls this too, so what it predicts is what the fit then does.
    The plan depends on the file (shape, dtype, on-disk sample chunk, whether reading it
    again is as cheap as a scratch copy), on the sketch width ``n_components + oversample``,
    on the threads and the memory budget, on the scratch folder's free space, and on the
    preprocessing (``top_variable`` shrinks the cache; per-sample transforms make
    re-reading the input dearer than a scratch copy).
    """
    n, p = source.shape
    if getattr(source, "sparse", False):
        from .sparse_ops import check_sparse_spec

        check_sparse_spec(preprocess)
        from .sparse_kernels import prepare

        prepare()  # the compiled products are loaded before the process is measured
        return plan_sparse_blocks(
            n, p, int(source.nnz), sketch_width=min(n_components + engine.oversample, n, p),
            threads=resources.n_threads, budget=resources.budget, held_bytes=int(source.held_bytes),
            source_in_memory=source.held_bytes > 0 or source.format == "array",
            stored_bytes=_cached_stored_bytes(source, preprocess))
    if engine.method == "one-pass":  # one read, no Krylov basis, no cache
        return plan_one_pass(n, p, source.dtype.itemsize, n_components=n_components,
                             oversample=engine.oversample, threads=resources.n_threads, budget=resources.budget,
                             sample_chunk=source.sample_chunk, chunk_bytes=decoded_chunk_bytes(source))
    cache_features = min(preprocess.top_variable or p, p)
    transforms = preprocess.log_transform or preprocess.counts_per is not None
    return plan_blocks(
        n, p, source.dtype.itemsize,
        sketch_width=min(n_components + engine.oversample, n, p),
        threads=resources.n_threads,
        budget=resources.budget,
        sample_chunk=source.sample_chunk,
        cache_features=cache_features,
        scratch=resources.scratch,
        reread_cheap=bool(source.plain_reads) and not transforms,
        chunk_bytes=decoded_chunk_bytes(source),
        compressed_bytes=compressed_cache_bytes(source, cache_features),
        cache=cache,
    )


def _cached_stored_bytes(source: "MatrixSource", preprocess: PreprocessSpec) -> int:
    """Bytes per stored value of a cached sparse block: its values (float32 stays float32
    unless a per-sample transform rewrites them in float64) and its int32 indices."""
    stored = int(getattr(source, "stored_bytes", 12))
    if preprocess.log_transform or preprocess.counts_per is not None:
        stored = max(stored, 12)
    return stored


def compressed_cache_bytes(source: "MatrixSource", cache_features: int) -> int | None:
    """Expected size of the cache compressed by the fast codec, from the file's own ratio.

    The bytes on disk of a compressed store, for the features cached, times 2 (a fast
    codec compresses less than the zstd or gzip of a store: measured ratios 1.12 for LZ4
    with byte shuffle against 1.11 for zstd level 0 on float32 noise plus signal, 3.6
    against 6.1 on float32 Poisson counts). None when that is not smaller than the decoded
    cache, or the file is not compressed or its size unknown. Blocks past the plan's
    allowance go to the scratch file, so a wrong guess costs time, not memory.
    """
    size = int(getattr(source, "file_size", 0) or 0)
    if not size or source.plain_reads or size >= source.nbytes:
        return None
    n, p = source.shape
    estimate = int(min(1.0, 2.0 * size / source.nbytes) * n * cache_features * source.dtype.itemsize)
    return estimate if estimate < n * cache_features * source.dtype.itemsize else None


def plan_sparse_blocks(
    n_samples: int,
    n_features: int,
    nonzeros: int,
    *,
    sketch_width: int,
    threads: int,
    budget: int,
    held_bytes: int = 0,
    source_in_memory: bool = False,
    baseline: int | None = None,
    stored_bytes: int = 12,
) -> BlockPlan:
    """Blocks of a sparse matrix cut by stored values, within ``budget``.

    Held: the baseline, what the source holds (``held_bytes``: a sample-order copy of a
    matrix compressed by features, or the arrays of an ``.npz`` file), the Krylov basis and
    per-feature vectors as for dense input, and per block in flight
    ``BYTES_PER_STORED`` bytes per stored value, three float64 work rows of the sketch width
    per sample and a ``p × l`` partial product. Half of a block's share goes to stored
    values, half to rows; at least 8 blocks when there are 512 samples or more. A single
    sample may exceed the block's stored values (it is a block alone) if the budget holds
    a whole dense row of work. Transformed blocks stay in memory, by columns (``stored_bytes``
    per stored value: 8 for float32 values with int32 indices, 12 for float64; plus each
    block's column pointers, ``4·(features + 1)``) when that leaves room for one thread's smallest blocks, and
    the blocks share what is left; otherwise, and when the source is already in memory,
    later passes read the source again (no scratch file for sparse input).

    Raises
    ------
    ResourceError
        The budget cannot hold one block of one sample.
    """
    from .sparse_ops import BYTES_PER_STORED

    baseline = process_baseline() if baseline is None else int(baseline)
    data_budget = budget - baseline - held_bytes
    l = sketch_width
    width = l + N_PROBES
    per_column = 8 * (n_samples + 2 * n_features)
    max_basis = int(min(8 * l, max(2 * l, (max(data_budget, 0) // 4) // per_column)))
    fixed = per_column * (max_basis + 2 * width) + 8 * 12 * n_features
    partial = 8 * n_features * (width + 6)
    row_bytes = 3 * 8 * width
    smallest = 2 * (partial + BYTES_PER_STORED * n_features + row_bytes)  # one thread, one-sample blocks
    free = data_budget - fixed
    cache_bytes = stored_bytes * nonzeros + 4 * (n_features + 1) * _MIN_BLOCKS
    # the cache first, when it leaves room for one thread's smallest blocks; blocks share the rest
    cache = "memory" if not source_in_memory and free - cache_bytes >= 2 * smallest else "source"
    if cache == "memory":
        free -= cache_bytes
    window = _REFERENCE_WINDOW
    share = free // window - partial
    if share < BYTES_PER_STORED * n_features + row_bytes:
        window = 2
        share = free // window - partial
    if share < BYTES_PER_STORED * n_features + row_bytes:
        need = fixed + smallest
        held = f"the process already holds {format_bytes(baseline + held_bytes)} and " if baseline + held_bytes else ""
        raise ResourceError(
            f"memory_limit={format_bytes(budget).replace(' ', '')} is too small for the sparse {n_samples} samples × "
            f"{n_features} features with {l} sketch columns: {held}the work needs at least {format_bytes(need)}"
            f"{' more' if held else ''}; raise memory_limit to at least "
            f"{format_bytes(baseline + held_bytes + need).replace(' ', '')}, or lower n_components")
    block_nonzeros = int(max(n_features, min(share // 2 // BYTES_PER_STORED, _MAX_BLOCK_BYTES // BYTES_PER_STORED)))
    rows = int(max(1, min(n_samples, share // 2 // row_bytes)))
    if n_samples >= 512:  # enough blocks to keep threads busy
        block_nonzeros = min(block_nonzeros, max(n_features, -(-nonzeros // _MIN_BLOCKS)))
        rows = min(rows, -(-n_samples // _MIN_BLOCKS))
    if cache == "memory":  # the column pointers of every block, now that their number is known
        cache_bytes = stored_bytes * nonzeros + 4 * (n_features + 1) * max(
            _MIN_BLOCKS, -(-nonzeros // block_nonzeros), -(-n_samples // rows))
    per_thread = 2 * (partial + BYTES_PER_STORED * block_nonzeros + rows * row_bytes)
    fitting = max(1, int(free // per_thread))
    return BlockPlan(rows, cache, budget, fixed, BYTES_PER_STORED * block_nonzeros + rows * row_bytes,
                     cache_bytes, max_basis, min(threads, fitting), baseline, 0, block_nonzeros)


#: Blocks in flight assumed by :func:`window_block_rows`, whatever the number of threads, so
#: that the partition into blocks, and so the rounding of every sum, does not depend on it.
WINDOW = 4


def window_block_rows(source: "MatrixSource", *, budget: int, held: int, limit: int, accumulators: int,
                      results: int, row_bytes: int, what: str) -> int:
    """Rows per block of a streaming pass that keeps ``accumulators`` bytes while a window of
    ``WINDOW`` blocks of ``row_bytes`` per row is in flight, and ``results`` bytes after it.

    Blocks are whole multiples of the on-disk sample chunk when they span one or more; the
    bands of decoded chunks the reads hold (:class:`axiscope.io.chunk_bands.ChunkBands`;
    :func:`decoded_chunk_bytes`) are counted with the accumulators. ``what`` names the work in the error raised when the budget cannot hold it.
    """
    # the decoded chunk bands of the reads: two (a block's band and the next one's), whatever the
    # threads, so that the blocks, hence the sums, are the same for any thread count
    accumulators += decoded_chunk_bytes(source)
    needed = max(accumulators + WINDOW * row_bytes, accumulators + results)
    if needed > budget:
        raise OptionError(f"memory_limit={format_bytes(limit)} is too small for {what} (needs at least "
                          f"{format_bytes(needed + held)}); raise memory_limit")
    n_all = source.shape[0]
    block_rows = int(max(1, min((budget - accumulators) // (WINDOW * row_bytes), n_all)))
    if source.sample_chunk and block_rows >= source.sample_chunk:
        block_rows = (block_rows // source.sample_chunk) * source.sample_chunk
    return block_rows
