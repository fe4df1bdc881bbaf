"""Streaming passes over blocks of samples, on Dask.

A pass applies a task to every block of a row-chunked Dask array and folds the results,
in block order, into an accumulator. Blocks are computed a window at a time, so at most
a window of blocks and their partial results are held, and the fold order (hence the
rounding) does not depend on the number of threads.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import dask
import dask.array as da
import numpy as np

__all__ = ["PassRecord", "PassRunner", "array_from_blocks", "blas_threads"]

Progress = Callable[[str, int, int], None]


@dataclass
class PassRecord:
    """One pass over the data: what it did and how long it took."""

    name: str
    source: str
    seconds: float
    n_blocks: int


@dataclass
class PassRunner:
    """Runs passes over a row-chunked Dask array and keeps their records.

    Parameters
    ----------
    threads : int
        Blocks computed at once on the threaded scheduler (ignored when a distributed
        client is the default scheduler).
    progress : callable or None
        Called as ``progress(pass_name, blocks_done, n_blocks)``.
    """

    threads: int = 1
    progress: Progress | None = None
    records: list[PassRecord] = field(default_factory=list)

    @property
    def n_passes(self) -> int:
        return len(self.records)

    def run(
        self,
        name: str,
        source: str,
        X: da.Array,
        task: Callable[..., Any],
        fold: Callable[[Any, int, int], None],
        *args: Any,
    ) -> None:
        """Compute ``task(block, *args)`` for every row block and call ``fold(result, index, start)``.

        ``fold`` is called in block order.
        """
        t0 = time.perf_counter()
        blocks = X.to_delayed().ravel()
        starts = np.concatenate([[0], np.cumsum(X.chunks[0])])[:-1]
        n = len(blocks)
        window = max(1, 2 * self.threads)
        if self.progress:
            self.progress(name, 0, n)
        for lo in range(0, n, window):
            hi = min(n, lo + window)
            work = [dask.delayed(task)(blocks[i], *args) for i in range(lo, hi)]
            results = dask.compute(*work, **_scheduler_options(self.threads))
            for offset, result in enumerate(results):
                fold(result, lo + offset, int(starts[lo + offset]))
            if self.progress:
                self.progress(name, hi, n)
        self.records.append(PassRecord(name, source, time.perf_counter() - t0, n))


def _scheduler_options(threads: int) -> dict:
    """Threaded scheduler unless a distributed client has been made the default."""
    if dask.config.get("scheduler", None) not in (None, "threads", "threading"):
        return {}
    try:  # a distributed client registers itself as the default scheduler
        from distributed import default_client  # type: ignore[import-not-found]

        default_client()
        return {}
    except (ImportError, ValueError):
        return {"scheduler": "threads", "num_workers": threads}


def array_from_blocks(
    load: Callable[[int], np.ndarray],
    n_rows_per_block: list[int],
    n_cols: int,
    dtype: np.dtype,
    name: str,
) -> da.Array:
    """A lazy Dask array, chunked along rows, whose ``i``-th row block is ``load(i)``."""
    parts = [
        da.from_delayed(
            dask.delayed(load, pure=True)(i, dask_key_name=f"{name}-{i}"),
            shape=(rows, n_cols),
            dtype=dtype,
            meta=np.empty((0, 0), dtype=dtype),
        )
        for i, rows in enumerate(n_rows_per_block)
    ]
    return da.concatenate(parts, axis=0)


def blas_threads(threads: int):
    """Limit BLAS to one thread while blocks run on ``threads`` Dask threads.

    Parallelism comes from processing blocks at once; a multi-threaded BLAS called from the
    Dask worker threads oversubscribes the cores and leaves later calls on the main thread
    contending with idle BLAS workers (measured: a 20,000 × 30 projection 250× slower).
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")
