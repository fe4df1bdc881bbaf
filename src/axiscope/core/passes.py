"""Streaming passes over blocks of samples, on Dask.

A pass applies a task to every block of a row-chunked Dask array and folds the results,
in block order, into an accumulator. Only the blocks being worked on and results waiting
for an earlier block are held, and the fold order (hence the rounding) does not depend on
the number of threads. Where the blocks are computed is the back-end's business: threads
of this process (here), or a ``dask.distributed`` cluster (:mod:`axiscope.core.backends`).
"""

from __future__ import annotations

import logging
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import dask
import dask.array as da
import dask.local
import numpy as np

from .workspace import keep_work_arrays

__all__ = ["PassRecord", "PassRunner", "array_from_blocks", "blas_threads"]

logger = logging.getLogger(__name__)

Progress = Callable[[str, int, int], None]

#: ``source`` of the passes that read a block cache of this process (:mod:`axiscope.core.cache`).
CACHED = ("memory", "compressed", "scratch")


#: Dask's synchronous scheduler, passed as the function itself: by its name ("synchronous")
#: dask first looks for a ``distributed`` client and so imports dask.distributed when it is
#: installed, 0.2–0.35 s of pure-Python import on the first block of a threaded fit while the
#: other block threads wait on the import lock (measured with stack dumps of a one-pass fit).
SYNCHRONOUS = dask.local.get_sync

@dataclass
class PassRecord:
    """One pass over the data: what it did and how long it took."""

    name: str
    source: str
    seconds: float
    n_blocks: int
    #: Bytes received from / sent to a cluster's workers (None on the threaded back-end).
    bytes_to_client: int | None = None
    bytes_from_client: int | None = None

    def to_dict(self) -> dict:
        """The record as the manifests write it (bytes only for passes run on a cluster)."""
        return {"name": self.name, "read_from": self.source, "seconds": round(self.seconds, 3),
                "blocks": self.n_blocks,
                **({} if self.bytes_to_client is None else
                   {"bytes_to_client": self.bytes_to_client, "bytes_from_client": self.bytes_from_client})}


def _log_pass(number: int, record: PassRecord) -> None:
    """A progress note per pass (shown with ``--verbose``; a JSON line with ``--log-format json``)."""
    logger.info("pass %d (%s) read from %s: %d blocks in %.2f s", number, record.name, record.source,
                record.n_blocks, record.seconds,
                extra={"stage": record.name, "pass_number": number, "seconds": round(record.seconds, 3),
                       "read_from": record.source, "blocks": record.n_blocks})


@dataclass
class PassRunner:
    """Runs passes over a row-chunked Dask array and keeps their records.

    Parameters
    ----------
    threads : int
        Blocks computed at once on the threaded back-end.
    read_ahead, cached_threads : int
        See the attributes.
    progress : callable or None
        Called as ``progress(pass_name, blocks_done, n_blocks)``.
    backend : axiscope.core.backends.ClusterBackend, optional
        Where the blocks are computed; None: ``threads`` threads of this process.
    """

    threads: int = 1
    progress: Progress | None = None
    records: list[PassRecord] = field(default_factory=list)
    backend: Any = None
    #: Blocks read ahead of those worked on, by reading threads of their own (0: each thread
    #: reads the block it works on, and ``2·threads`` blocks are in flight).
    read_ahead: int = 0
    #: Threads of the passes that read a block cache (0: ``threads``); the memory plan can
    #: allow more there, where no decoded chunk bands are held.
    cached_threads: int = 0

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
        rows: np.ndarray | None = None,
        reduce: Any = None,
    ) -> None:
        """Compute ``task(block, *args)`` for every row block and call ``fold(result, index, start)``.

        With ``rows`` (one row per sample of ``X``, e.g. covariates), the task is called as
        ``task(block, rows_of_the_block, *args)``; on a cluster each block's rows travel with
        its task.

        ``fold`` is called on the calling thread, in block order. On the threaded back-end
        each result is folded as soon as the blocks before it are done (no barrier between
        groups of blocks); a block's result is held only until then. ``reduce``
        (:class:`axiscope.core.backends.Reduction`) says which part of the results a cluster
        sums on its workers; the threaded back-end folds every result as it is.
        """
        t0 = time.perf_counter()
        n = len(X.chunks[0])
        if self.backend is not None:
            traffic = self.backend.run(name, X, task, fold, args, reduce, self.progress, rows=rows)
            self.records.append(PassRecord(name, source, time.perf_counter() - t0, n,
                                           traffic.received, traffic.sent))
            _log_pass(self.n_passes, self.records[-1])
            return
        blocks = X.to_delayed().ravel()
        starts = [int(v) for v in np.concatenate([[0], np.cumsum(X.chunks[0])])[:-1]]
        if rows is not None:  # each block travels with its rows of ``rows``
            blocks = [dask.delayed(_with_rows, pure=True)(b, rows[s : s + c])
                      for b, s, c in zip(blocks, starts, X.chunks[0])]
            task = partial(_call_with_rows, task)
        n = len(blocks)
        if self.progress:
            self.progress(name, 0, n)
        self._source = source
        self._run_pipelined(name, blocks, starts, task, fold, args)
        self.records.append(PassRecord(name, source, time.perf_counter() - t0, n))
        _log_pass(self.n_passes, self.records[-1])

    def describe(self) -> dict:
        """Where the passes ran, for the manifest."""
        if self.backend is None:
            extra = {"threads_reading_cache": self.cached_threads} \
                if self.cached_threads and self.cached_threads != self.threads else {}
            return {"backend": "threaded", "threads": self.threads, **extra}
        return self.backend.describe()

    def _run_pipelined(self, name, blocks, starts, task, fold, args) -> None:
        """Blocks in order on a pool of threads, at most ``2·threads`` in flight, folded in order.

        Each block's Dask graph is computed with the synchronous scheduler inside a pool
        thread, so the reading order, the memory held and the fold order are ours to fix.
        With :attr:`read_ahead`, reading threads of their own read ahead
        (:meth:`_run_read_ahead`), and passes over a block cache run on :attr:`cached_threads`.
        """
        threads, read_ahead = self.threads, self.read_ahead
        if self.cached_threads and getattr(self, "_source", None) in CACHED:
            threads = self.cached_threads
            read_ahead = threads if read_ahead else 0
        if read_ahead:
            self._run_read_ahead(name, blocks, starts, task, fold, args, threads, read_ahead)
            return
        n = len(blocks)
        window = 2 * self.threads

        def work(i):
            (block,) = dask.compute(blocks[i], scheduler=SYNCHRONOUS)
            return task(block, *args)

        with ThreadPoolExecutor(max_workers=self.threads, thread_name_prefix="axiscope",
                                initializer=keep_work_arrays) as pool:  # one set of work arrays per thread
            pending: deque = deque()
            submitted = 0
            try:
                for i in range(n):
                    while submitted < n and len(pending) < window:
                        pending.append(pool.submit(work, submitted))
                        submitted += 1
                    result = pending.popleft().result()
                    fold(result, i, starts[i])
                    del result
                    if self.progress:
                        self.progress(name, i + 1, n)
            finally:
                for future in pending:
                    future.cancel()

    def _run_read_ahead(self, name, blocks, starts, task, fold, args, threads: int, read_ahead: int) -> None:
        """Blocks in order, ``threads + read_ahead`` in flight, folded in order; reading overlaps work.

        Each block is read (its Dask graph computed with the synchronous scheduler) on one of
        ``threads`` reading threads and then handed to one of ``threads`` working threads, so
        the next blocks are read and decoded while earlier ones are worked on, even with one
        thread (without it, one thread read and then worked, and decoding the next on-disk
        chunk waited for the products of the block before).
        """
        n = len(blocks)
        window = threads + read_ahead

        def read(i, slot):
            (slot[0],) = dask.compute(blocks[i], scheduler=SYNCHRONOUS)

        def work(loaded, slot):
            loaded.result()  # re-raises the read's error
            block = slot.pop()
            return task(block, *args)  # the block is let go as soon as its task is done

        with ThreadPoolExecutor(max_workers=threads, thread_name_prefix="axiscope-read",
                                initializer=keep_work_arrays) as readers, \
                ThreadPoolExecutor(max_workers=threads, thread_name_prefix="axiscope",
                                   initializer=keep_work_arrays) as pool:  # one set of work arrays per thread
            pending: deque = deque()
            submitted = 0
            try:
                for i in range(n):
                    while submitted < n and len(pending) < window:
                        slot: list = [None]
                        loaded = readers.submit(read, submitted, slot)
                        pending.append((loaded, pool.submit(work, loaded, slot)))
                        submitted += 1
                    result = pending.popleft()[1].result()
                    fold(result, i, starts[i])
                    del result
                    if self.progress:
                        self.progress(name, i + 1, n)
            finally:
                for loaded, future in pending:
                    loaded.cancel()
                    future.cancel()


def _with_rows(block: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return block, rows


def _call_with_rows(task: Callable[..., Any], pair: tuple[np.ndarray, np.ndarray], *args: Any) -> Any:
    return task(pair[0], pair[1], *args)


def array_from_blocks(
    load: Callable[[int], np.ndarray],
    n_rows_per_block: list[int],
    n_cols: int,
    dtype: np.dtype,
    name: str,
) -> da.Array:
    """A lazy Dask array, chunked along rows, whose ``i``-th row block is ``load(i)``.

    One task per block and nothing else in the graph, so a block is released as soon as
    the task using it is done (an array assembled with ``concatenate`` keeps its pieces
    alive until the end of a computation).
    """
    graph = {(name, i, 0): (load, i) for i in range(len(n_rows_per_block))}
    return da.Array(graph, name, chunks=(tuple(n_rows_per_block), (n_cols,)), dtype=dtype,
                    meta=np.empty((0, 0), dtype=dtype))


def blas_threads(threads: int):
    """Limit BLAS to one thread while blocks run on ``threads`` Dask threads.

    Parallelism comes from processing blocks at once; a multi-threaded BLAS called from the
    Dask worker threads oversubscribes the cores and leaves later calls on the main thread
    contending with idle BLAS workers (measured: a 20,000 × 30 projection 250× slower).
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")
