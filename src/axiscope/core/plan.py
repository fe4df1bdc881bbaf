"""The memory plan: how the matrix is cut into row blocks and where transformed blocks are kept."""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from ..errors import OptionError
from .cache import scratch_has_room
from .engine import N_PROBES
from .memory import format_bytes
from .options import EngineSettings, Resources
from .preprocess import PreprocessSpec

if TYPE_CHECKING:  # pragma: no cover
    from ..io import MatrixSource

__all__ = ["BlockPlan", "plan_blocks", "plan_fit"]

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
    blocks in flight).
    """

    block_rows: int
    cache: str  # "memory" | "scratch" | "source"
    budget: int
    fixed_bytes: int
    block_bytes: int
    cache_bytes: int
    max_basis: int
    threads: int = 1

    def to_dict(self) -> dict:
        return {
            "block_rows": self.block_rows,
            "threads": self.threads,
            "cache": self.cache,
            "memory_limit": self.budget,
            "fixed_bytes": self.fixed_bytes,
            "block_bytes": self.block_bytes,
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
) -> BlockPlan:
    """Choose block rows, Krylov basis width and cache location to stay within ``budget``.

    Memory held: the Krylov basis and its image, ``(n + p)·max_basis`` float64 (at most a
    quarter of the budget, between ``2·l`` and ``8·l`` columns); vectors of per-feature
    statistics; a window of two blocks per thread, each with one work array of its size and
    a ``p × l`` partial product; and the cache when it is kept in memory. When the cache
    does not fit and ``reread_cheap`` (an uncompressed input needing no per-sample
    transform), later passes re-read the input instead of writing a scratch copy of it.

    The block rows do not depend on ``threads``: they are sized for a window of
    ``_REFERENCE_WINDOW`` blocks (two threads' worth), or for two blocks when the budget is
    smaller than that, so that any thread count cuts the samples the same way and gives the
    same numbers to the last bit. The plan's ``threads`` is then the number of threads
    whose window of blocks fits the budget (at least one).
    """
    cache_features = n_features if cache_features is None else cache_features
    l = sketch_width
    width = l + N_PROBES
    per_column = 8 * (n_samples + 2 * n_features)
    max_basis = int(min(8 * l, max(2 * l, (budget // 4) // per_column)))
    fixed = per_column * (max_basis + 2 * width) + 8 * 12 * n_features
    row_bytes = 2 * n_features * itemsize + 8 * width
    partial = 8 * n_features * width
    free = budget - fixed
    rows = window = 0
    for window in (_REFERENCE_WINDOW, 2):  # two threads' worth, else one thread's
        rows = int((free // window - partial) // row_bytes)
        if rows >= 1:
            break
    if rows < 1:
        need = fixed + 2 * (partial + row_bytes)
        raise OptionError(
            f"memory_limit={format_bytes(budget).replace(' ', '')} is too small for {n_samples} samples × "
            f"{n_features} features with {l} sketch columns (needs at least "
            f"{format_bytes(need)}); raise memory_limit, or lower n_components"
        )
    rows = int(min(rows, _MAX_BLOCK_BYTES // max(1, n_features * itemsize)))
    rows = max(1, min(rows, n_samples))
    if n_samples >= 512:  # enough blocks to keep threads busy
        rows = min(rows, -(-n_samples // _MIN_BLOCKS))
    if sample_chunk and sample_chunk < n_samples:
        # whole on-disk chunks per block, so no chunk is decoded twice
        if rows >= sample_chunk:
            rows = (rows // sample_chunk) * sample_chunk
        elif window * (partial + sample_chunk * row_bytes) <= free:
            rows = sample_chunk
    in_flight = partial + rows * row_bytes
    cache_bytes = n_samples * cache_features * itemsize
    if fixed + 2 * threads * in_flight + cache_bytes <= budget:
        cache = "memory"
    elif reread_cheap:  # the input is an uncompressed file: reading it again is as cheap as a scratch copy
        cache = "source"
    elif scratch_has_room(scratch, cache_bytes):
        cache = "scratch"
    else:
        logger.warning(
            "no room for a %s scratch file in %s; every pass will re-read and decode the input",
            format_bytes(cache_bytes), scratch or "the temporary directory",
        )
        cache = "source"
    held = cache_bytes if cache == "memory" else 0
    fitting = max(1, int((budget - fixed - held) // (2 * in_flight)))
    return BlockPlan(rows, cache, budget, fixed, rows * n_features * itemsize, cache_bytes, max_basis,
                     min(threads, fitting))


def plan_fit(
    source: "MatrixSource",
    *,
    n_components: int,
    preprocess: PreprocessSpec,
    engine: EngineSettings,
    resources: Resources,
) -> BlockPlan:
    """The block plan that :func:`axiscope.fit` uses for ``source`` with these options.

    ``axiscope inspect`` calls this too, so what it predicts is what the fit then does.
    The plan depends on the file (shape, dtype, on-disk sample chunk, whether reading it
    again is as cheap as a scratch copy), on the sketch width ``n_components + oversample``,
    on the threads and the memory budget, on the scratch folder's free space, and on the
    preprocessing (``top_variable`` shrinks the cache; per-sample transforms make
    re-reading the input dearer than a scratch copy).
    """
    n, p = source.shape
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
    )
