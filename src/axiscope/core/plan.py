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


@dataclass
class BlockPlan:
    """How the matrix is cut into row blocks and where transformed blocks are kept."""

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
    statistics; a window of ``2·threads`` blocks, each with one work array of its size and a
    ``p × l`` partial product; and the cache when it is kept in memory. When the cache
    does not fit and ``reread_cheap`` (an uncompressed input needing no per-sample
    transform), later passes re-read the input instead of writing a scratch copy of it.
    """
    cache_features = n_features if cache_features is None else cache_features
    l = sketch_width
    width = l + N_PROBES
    per_column = 8 * (n_samples + 2 * n_features)
    max_basis = int(min(8 * l, max(2 * l, (budget // 4) // per_column)))
    fixed = per_column * (max_basis + 2 * width) + 8 * 12 * n_features
    window = 2 * threads
    row_bytes = 2 * n_features * itemsize + 8 * width
    partial = 8 * n_features * width
    room = budget - fixed - window * partial
    if room < window * row_bytes:
        need = fixed + window * (partial + row_bytes)
        raise OptionError(
            f"memory_limit={format_bytes(budget).replace(' ', '')} is too small for {n_samples} samples × "
            f"{n_features} features with {l} sketch columns (needs at least "
            f"{format_bytes(need)} with {threads} threads); raise memory_limit, or lower n_components or threads"
        )
    rows = int(min(room // (window * row_bytes), _MAX_BLOCK_BYTES // max(1, n_features * itemsize)))
    rows = max(1, min(rows, n_samples))
    if n_samples >= 512:  # enough blocks to keep every thread busy
        rows = min(rows, -(-n_samples // (2 * threads)))
    if sample_chunk and sample_chunk < n_samples:
        # whole on-disk chunks per block, so no chunk is decoded twice
        if rows >= sample_chunk:
            rows = (rows // sample_chunk) * sample_chunk
        elif window * sample_chunk * row_bytes <= room:
            rows = sample_chunk
    cache_bytes = n_samples * cache_features * itemsize
    if fixed + window * (partial + rows * row_bytes) + cache_bytes <= budget:
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
    return BlockPlan(rows, cache, budget, fixed, rows * n_features * itemsize, cache_bytes, max_basis, threads)


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
