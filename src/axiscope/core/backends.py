"""Where the blocks of a pass are computed: threads of this process, or a Dask cluster.

:class:`~axiscope.core.passes.PassRunner` hands each pass to a back-end. The threaded
back-end (the default) lives in ``passes.py``. :class:`ClusterBackend` runs the same tasks
on the workers of a ``dask.distributed`` cluster:

* a block is read on the worker that works on it, from a picklable description
  (:class:`SourceBlocks`: file, dataset, orientation, block bounds, preprocessing); the
  worker opens the file itself once per process and keeps it open. No open file handle,
  lock or closure travels. Sparse blocks stay compressed (:func:`read_sparse_block`). When
  the memory plan has room for the cache, worker ``i mod W`` keeps block ``i`` in memory for
  the later passes, and where the plan would write a scratch file, in a scratch file of its
  own local directory (:class:`WorkerCache`; a block whose worker is gone is read from the
  file again). Blocks with no such description (an in-memory array, parsed text, a sparse
  matrix converted to sample order in this process, a block cache of this process) are read
  here and sent to a worker;
* rows of their own that a pass hands each block (covariates, sketch columns, half labels)
  travel with the block's task, once per pass;
* the arguments of the tasks (the basis ``W``) are sent once per pass to every worker
  (``scatter(broadcast=True)``);
* the part of each block's result that is summed over blocks (the ``features × l`` Gram
  product, or the feature statistics) is added up on the workers by a pairwise tree whose
  shape depends on the number of blocks only, never on timing or on the number of
  workers, and only the total comes back;
* the per-block pieces the caller needs row by row (``samples × l``) come back and are
  folded in block order, as on the threaded back-end; the client keeps ``2·worker threads``
  tasks unfinished, topping them up as soon as any finishes, so that no worker idles behind
  a slow block.

Same seed, same result: every block's products are the same numbers as on the threaded
back-end (BLAS runs single-threaded on both); only the order of the sums over blocks differs
(a pairwise tree instead of a running sum), a rounding difference of order ``ε·log₂(blocks)``
relative. A task lost with its worker is run again by Dask, and the tree then recomputes
the same sums, so a retry changes nothing.

``distributed`` is an optional dependency (``pip install "axiscope[cluster]"``); it is
imported only when a cluster is asked for.
"""

from __future__ import annotations

import contextlib
import logging
import os
import operator
import re
import sys
import threading
import time
import uuid
from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

import dask
import numpy as np

from ..errors import InputError, OptionError, reason

__all__ = ["ClusterBackend", "Reduction", "SourceBlocks", "WorkerCache", "open_backend", "parse_cluster",
           "shared_cluster"]

logger = logging.getLogger(__name__)

#: Least memory counted for a worker's interpreter and libraries (numpy, dask, distributed):
#: measured about 200 MB.
WORKER_LIBRARIES = 256 << 20
#: Times a pass is run when results are lost with workers (see :meth:`ClusterBackend.run`).
PASS_ATTEMPTS = 3
#: Finished block results (pieces waiting for an earlier block) held per task in flight, at most.
PIECES_HELD = 4
#: Seconds to wait for a scheduler address to answer.
CONNECT_TIMEOUT = 20
#: A local cluster's scheduler without its dashboard (``dashboard_address=None``), and its
#: HTTP server (health and metrics routes, opened even without the dashboard, on port 8787
#: unless told otherwise, with a warning when that port is taken) on a free port of the
#: loopback interface: a port of 0 is documented as "a random port" (``LocalCluster``'s
#: ``dashboard_address``) and the scheduler warns only when a port it was given is taken.
QUIET_HTTP = {"dashboard_address": None, "scheduler_kwargs": {"dashboard_address": "127.0.0.1:0"}}


@dataclass(frozen=True)
class Reduction:
    """How the results of a pass's blocks are summed on a cluster.

    Parameters
    ----------
    combine : callable
        ``combine(a, b, *args)``: the summed part of two adjacent runs of blocks (``a``
        before ``b``) as one. A module-level function, so that it pickles by name.
    args : tuple
        Extra arguments of ``combine`` (arrays are sent once per pass).
    split : callable, optional
        ``split(result) -> (piece, summed)``: what of a block's result comes back per block
        and what is summed. Without it the whole result is summed, and ``fold`` is called
        once, with the total, as the result of block 0 at offset 0.
    join : callable, optional
        ``join(piece, total)``: the last block's result rebuilt with the total in place of
        its summed part (``fold`` receives the pieces of the other blocks as they are).
    """

    combine: Callable[..., Any]
    args: tuple = ()
    split: Callable[[Any], tuple[Any, Any]] | None = None
    join: Callable[[Any, Any], Any] | None = None


@dataclass
class PassTraffic:
    """Bytes that crossed between this process and the cluster in one pass."""

    received: int = 0
    sent: int = 0


# ----------------------------------------------------------------------- block descriptions


#: Sources opened by this process from a description: one per file, kept open for the
#: process's life (a worker reads many blocks of the same file over many passes).
_OPENED: dict[tuple, Any] = {}
_OPEN_LOCK = threading.Lock()


#: Sources kept open per process; older ones are closed.
MAX_OPENED = 4


def _open_once(reopen: dict, run: str) -> Any:
    """The matrix described by ``reopen``, opened by this process once per run ``run``.

    A run opens the file afresh (a file rewritten between two runs on a long-lived worker is
    never read through a stale handle); the files of earlier runs are closed.
    """
    key = (run, *sorted((k, str(v)) for k, v in reopen.items()))
    with _OPEN_LOCK:
        source = _OPENED.get(key)
        if source is None:
            from ..io import open_matrix

            source = _OPENED[key] = open_matrix(**reopen)
            while len(_OPENED) > MAX_OPENED:
                _OPENED.pop(next(iter(_OPENED))).close()
    return source


@dataclass
class SourceBlocks:
    """Blocks of active samples of a matrix file, read and transformed: a picklable description.

    Calling it with a block index reads that block (``read_samples``, the active rows, the
    per-sample transforms, the chosen columns). Made in the fitting process around its open
    :class:`~axiscope.io.MatrixSource`; :meth:`for_block` gives the small description of one
    block that a cluster worker receives, and the worker opens the file itself
    (:attr:`MatrixSource.reopen`).

    Parameters
    ----------
    source : MatrixSource
    spans : list of (int, int)
        Sample range of each block in the file.
    masks : list of (ndarray of bool or None)
        Active samples of each block (None: all of them).
    spec : PreprocessSpec
    columns : ndarray of int, optional
        Columns kept, in order.
    store : callable, optional
        ``store(index, block)``, called with each block read (filling a block cache of this
        process); a description with ``store`` is read here only.
    sparse : bool
        The source is sparse: blocks are read as compressed matrices
        (:func:`read_sparse_block`), never densified.
    """

    source: Any
    spans: list
    masks: list
    spec: Any
    columns: np.ndarray | None = None
    store: Callable[[int, np.ndarray], None] | None = None
    run: str = field(default_factory=lambda: uuid.uuid4().hex)
    keep_on_worker: bool = False
    sparse: bool = False
    #: Kept blocks go to a scratch file of each worker (its local directory), not its memory.
    keep_on_disk: bool = False

    @property
    def on_worker(self) -> bool:
        """Whether a worker can read the blocks itself (a file it can open, nothing stored here)."""
        return self.store is None and getattr(self.source, "reopen", None) is not None

    def __call__(self, i: int) -> np.ndarray:
        read = read_sparse_block if self.sparse else read_block
        block = read(self.source, self.spans[i], self.masks[i], self.spec, self.columns)
        if self.store is not None:
            self.store(i, block)
        return block

    def for_block(self, i: int) -> "_OneBlock":
        """The description of block ``i`` alone, for a worker."""
        columns = self.columns
        packed = None
        if columns is not None and columns.size and np.all(np.diff(columns) > 0):
            mask = np.zeros(self.source.shape[1], dtype=bool)
            mask[columns] = True
            packed, columns = np.packbits(mask), None
        keep = (self.run, i, None if self.columns is None else hash(self.columns.tobytes())) \
            if self.keep_on_worker else None
        return _OneBlock(self.source.reopen, self.run, self.spans[i], self.masks[i], self.spec, columns,
                         packed, self.source.shape[1], keep, self.sparse, self.keep_on_disk)


@dataclass
class _OneBlock:
    """One block of :class:`SourceBlocks`, as sent to a worker: file, bounds, rows, transforms."""

    reopen: dict
    run: str
    span: tuple[int, int]
    mask: np.ndarray | None
    spec: Any
    columns: np.ndarray | None
    packed_columns: np.ndarray | None
    n_columns: int
    keep: tuple | None = None
    sparse: bool = False
    on_disk: bool = False

    def __call__(self) -> np.ndarray:
        if self.keep is not None:
            block = _kept(self.keep)
            if block is not None:
                return block
        columns = self.columns
        if self.packed_columns is not None:
            columns = np.flatnonzero(np.unpackbits(self.packed_columns, count=self.n_columns))
        read = read_sparse_block if self.sparse else read_block
        block = read(_open_once(self.reopen, self.run), self.span, self.mask, self.spec, columns)
        if self.keep is not None:
            _keep(self.keep, block, self.on_disk)
        return block


class WorkerCache:
    """The decode-once cache kept by the workers: each keeps the blocks it read.

    In memory, or (``on_disk``) uncompressed in a scratch file of the worker's local
    directory, read back whole on the later passes. Block ``i`` is sent to worker ``i mod W``
    on every pass (another one if that worker is gone: it then reads the block from the file
    again). Blocks of a run stay until the worker reads for another run, or the run ends
    (:meth:`ClusterBackend.forget`).
    """

    columns: np.ndarray | None = None

    def __init__(self, on_disk: bool = False):
        self.on_disk = on_disk


@dataclass(frozen=True)
class _OnDisk:
    """A kept block in a worker's scratch file."""

    path: str
    shape: tuple
    dtype: str

    def load(self) -> np.ndarray | None:
        try:
            return np.fromfile(self.path, dtype=self.dtype).reshape(self.shape)
        except (OSError, ValueError):  # removed or cut short: read from the input again
            return None


#: Blocks kept by this worker process: (run, block, columns) -> read-only array or _OnDisk.
_KEPT: dict[tuple, Any] = {}


def _kept(key: tuple):
    """The block kept under ``key`` by this process (None: not kept, read it)."""
    entry = _KEPT.get(key)
    return entry.load() if isinstance(entry, _OnDisk) else entry


def _keep(key: tuple, block, on_disk: bool) -> None:
    """Keep ``block`` for the later passes of its run; blocks of earlier runs are dropped."""
    run = key[0]
    if on_disk and isinstance(block, np.ndarray):
        folder = _scratch_folder(run)
        path = os.path.join(folder, "block-" + "-".join(str(part) for part in key[1:]) + ".bin")
        partial = f"{path}.{uuid.uuid4().hex[:8]}"
        try:
            os.makedirs(folder, exist_ok=True)
            np.ascontiguousarray(block).tofile(partial)
            os.replace(partial, path)
        except OSError as exc:  # a full or read-only disk: this block is read from the input again
            logger.warning("could not keep a block in %s (%s); it will be read from the input again",
                           folder, reason(exc))
            with contextlib.suppress(OSError):
                os.remove(partial)
            return
        entry = _OnDisk(path, tuple(block.shape), block.dtype.str)
    else:
        _read_only(block)  # shared by later passes: no task may change it
        entry = block
    with _OPEN_LOCK:
        for old in {k[0] for k in _KEPT if k[0] != run}:  # blocks of earlier runs
            _drop(old)
        _KEPT[key] = entry


def _scratch_folder(run: str) -> str:
    """Where this worker keeps blocks of ``run`` on disk: its local directory (else the temporary one)."""
    import tempfile

    try:
        from distributed import get_worker

        base = get_worker().local_directory
    except (ImportError, ValueError):
        base = tempfile.gettempdir()
    return os.path.join(base, f"axiscope-blocks-{run}")


def _drop(run: str) -> int:
    """Forget the blocks kept for ``run`` (removing their scratch files); the caller holds the lock."""
    import shutil

    keys = [k for k in _KEPT if k[0] == run]
    folders = {os.path.dirname(_KEPT[k].path) for k in keys if isinstance(_KEPT[k], _OnDisk)}
    for key in keys:
        del _KEPT[key]
    for folder in folders:
        shutil.rmtree(folder, ignore_errors=True)
    return len(keys)


def _forget(run: str) -> int:
    """Drop the blocks this process keeps for ``run``; returns how many."""
    with _OPEN_LOCK:
        return _drop(run)


def read_block(source, span, mask, spec, columns) -> np.ndarray:
    """Samples ``span`` of ``source``, active rows only, transformed, with the chosen columns.

    ``spec=None``: the values as stored, unchecked (the task transforms and checks them, as
    the projection of samples onto a model does).
    """
    from .preprocess import transform_block

    a, b = span
    block = source.read_samples(a, b, check_range=spec is not None)
    if mask is not None:
        block = block[mask]
    if spec is None:
        return block if columns is None else np.ascontiguousarray(block[:, columns])
    block = _transformed(transform_block, block, spec, source, span, mask)
    if columns is not None:
        block = np.ascontiguousarray(block[:, columns])
    return block


def read_sparse_block(source, span, mask, spec, columns):
    """:func:`read_block` of a sparse source: a compressed block, never densified.

    The active rows of samples ``span`` as CSR, the per-sample transforms on the stored
    values, the chosen columns, and then the compressed-column layout the statistics and
    products use (:mod:`axiscope.core.sparse_ops`).
    """
    from .sparse_ops import as_columns, transform_sparse

    a, b = span
    block = source.read_sparse(a, b)
    if mask is not None:
        block = block[mask]
    block = _transformed(transform_sparse, block, spec, source, span, mask)
    return as_columns(block if columns is None else block[:, columns])


def _transformed(transform, block, spec, source, span, mask):
    """``transform(block, spec)``; a value that is not a dosage is named by sample and feature."""
    from .preprocess import NotADosage

    try:
        return transform(block, spec)
    except NotADosage as exc:
        rows = np.arange(*span) if mask is None else span[0] + np.flatnonzero(mask)
        sample = source.sample_ids[rows[exc.row]]
        feature = source.feature_ids[exc.column]
        raise InputError(exc.located(f"{source.path.name}: sample {sample!r}, feature {feature!r}")) from None


def _read_only(block) -> None:
    """Make a kept block (dense, or the values of a sparse one) read-only."""
    values = block if isinstance(block, np.ndarray) else getattr(block, "data", None)
    if isinstance(values, np.ndarray):
        values.flags.writeable = False


def block_nbytes(block) -> int:
    """Bytes of a dense or sparse block (values, indices and pointers)."""
    if isinstance(block, np.ndarray):
        return int(block.nbytes)
    return int(sum(getattr(block, name).nbytes for name in ("data", "indices", "indptr") if hasattr(block, name)))


def traffic_bytes(value) -> int:
    """Bytes of a result as it crosses the network: arrays (dense or sparse) inside tuples,
    lists, dicts and dataclasses counted by their buffers; anything else by dask's estimate."""
    import dataclasses

    from dask.sizeof import sizeof

    if isinstance(value, np.ndarray) or hasattr(value, "indptr"):
        return block_nbytes(value)
    if isinstance(value, (tuple, list)):
        return sum(traffic_bytes(v) for v in value)
    if isinstance(value, dict):
        return sum(traffic_bytes(v) for v in value.values())
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return sum(traffic_bytes(getattr(value, f.name)) for f in dataclasses.fields(value))
    return int(sizeof(value))


def block_loader(X, i: int):
    """The loader of block ``i`` of a Dask array made by ``array_from_blocks`` (None otherwise)."""
    try:
        value = X.__dask_graph__()[(X.name, i, 0)]
    except (KeyError, TypeError):
        return None
    if isinstance(value, tuple) and len(value) == 2 and callable(value[0]):
        return value[0]
    func = getattr(value, "func", None)  # dask's Task objects
    return func if isinstance(func, SourceBlocks) else None


# ----------------------------------------------------------------------------- the cluster


def _lost_errors() -> tuple:
    """Exceptions of a result lost with its worker (not of a failing task)."""
    from concurrent.futures import CancelledError

    from distributed.client import FutureCancelledError

    return (FutureCancelledError, CancelledError)


def _limit_blas() -> None:
    """BLAS single-threaded in this worker process (as the threaded back-end runs it)."""
    global _BLAS_LIMITED
    if not _BLAS_LIMITED:
        from threadpoolctl import threadpool_limits

        threadpool_limits(limits=1, user_api="blas")
        _BLAS_LIMITED = True


_BLAS_LIMITED = False


def _run_block(piece, task, split, *args, rows=None):
    """On a worker: read (or receive) a block, run the task on it (with the block's ``rows``
    when the pass has some), split the result."""
    _limit_blas()
    block = piece() if callable(piece) else piece
    result = task(block, *args) if rows is None else task(block, rows, *args)
    return split(result) if split is not None else result


@dataclass
class ClusterBackend:
    """Passes on the workers of a ``dask.distributed`` cluster (see the module's notes).

    Parameters
    ----------
    client : distributed.Client
    address : str
        The scheduler's address, for the record.
    kind : str
        ``"local cluster"`` (started for the run), ``"scheduler"`` (an address) or
        ``"client"`` (a client given or current).
    """

    client: Any
    address: str
    kind: str
    traffic: list = field(default_factory=list)
    cache: str | None = None
    runs: set = field(default_factory=set)

    local = False

    def _addresses(self) -> list[str]:
        """The workers, in a fixed order (where block ``i`` is kept: the ``i mod W``-th)."""
        if not getattr(self, "_workers", None):
            self._workers = sorted(self.client.scheduler_info(n_workers=-1)["workers"])
        return self._workers

    def forget(self) -> None:
        """Drop the blocks the workers keep for this back-end's runs."""
        for run in self.runs:
            try:
                self.client.run(_forget, run)
            except Exception as exc:  # a worker gone: its blocks went with it
                logger.debug("could not clear kept blocks: %s", exc)
        self.runs.clear()

    @property
    def workers(self) -> int:
        return len(self._addresses())

    @property
    def worker_threads(self) -> int:
        if not getattr(self, "_threads", None):
            info = self.client.scheduler_info(n_workers=-1)["workers"]
            self._threads = max(1, sum(int(w.get("nthreads", 1)) for w in info.values()))
        return self._threads

    def cache_mode(self, planned: str) -> str:
        """Where the workers keep the blocks they read, for the plan's cache ``planned``.

        ``"workers"`` (their memory) for a cache in memory, ``"worker scratch"`` (a file in
        each worker's local directory) for a scratch file, ``"source"`` (kept nowhere: read
        from the input on every pass) otherwise.
        """
        return {"memory": "workers", "scratch": "worker scratch"}.get(planned, "source")

    def reads_on_workers(self, source) -> bool:
        """Whether the workers can open ``source`` themselves."""
        return getattr(source, "reopen", None) is not None

    def describe(self) -> dict:
        info = self.client.scheduler_info(n_workers=-1)["workers"]
        return {
            "backend": "dask.distributed",
            "connected_to": self.kind,
            "scheduler": self.address,
            "workers": len(info),
            "worker_threads": sum(int(w.get("nthreads", 1)) for w in info.values()),
            "sums_over_blocks": "pairwise tree on the workers (fixed by the number of blocks)",
            **({} if self.cache is None else {"blocks_kept": {
                "workers": "in the workers' memory, block i on worker i mod W",
                "worker scratch": "in a scratch file in each worker's local directory, block i on worker i mod W",
                "source": "none: the workers read the file on every pass"}[self.cache]}),
        }

    def run(self, name: str, X, task, fold, args: tuple, reduce: Reduction | None, progress,
            rows: np.ndarray | None = None) -> PassTraffic:
        """One pass on the cluster; ``fold`` is called here, in block order (see :class:`Reduction`).

        With ``rows`` (one row per sample of ``X``), block ``i``'s task receives its own
        rows: each block's slice travels with its task, once per pass (never the whole array
        to every worker).

        A task lost with its worker is run again by Dask. When a result was lost that Dask can
        no longer recompute (its inputs already released), the pass is run again from its
        first block, at most :data:`PASS_ATTEMPTS` times; blocks already folded are not
        folded twice, and the fixed tree gives the same sums, so the result is unchanged.
        """
        traffic = PassTraffic()
        folded = [0]
        if progress:
            progress(name, 0, len(X.chunks[0]))
        for attempt in range(1, PASS_ATTEMPTS + 1):
            try:
                self._attempt(name, X, task, fold, args, reduce, progress, traffic, folded, rows)
                break
            except _lost_errors() as exc:
                if attempt == PASS_ATTEMPTS:
                    raise InputError(f"pass {name!r} lost its results on the cluster {attempt} times "
                                     f"({reason(exc)}); check the workers' health and memory") from exc
                logger.warning("pass %r lost results with a worker (%s); running it again", name, reason(exc))
        self.traffic.append(traffic)
        return traffic

    def _attempt(self, name, X, task, fold, args, reduce, progress, traffic, folded, rows=None) -> None:
        from distributed import wait

        client = self.client
        n = len(X.chunks[0])
        blocks = X.to_delayed().ravel()
        starts = [int(v) for v in np.concatenate([[0], np.cumsum(X.chunks[0])])[:-1]]
        token = f"{re.sub(r'[^a-z0-9]+', '-', name.lower())}-{uuid.uuid4().hex[:8]}"
        shared = self._share(args, traffic)
        combine_args = self._share(reduce.args, traffic) if reduce is not None else ()
        split = reduce.split if reduce is not None else None
        whole = reduce is not None and split is None
        tree = _PairwiseTree(client, reduce, combine_args, token) if reduce is not None else None
        window = 2 * self.worker_threads  # tasks submitted and not finished
        held = PIECES_HELD * window  # finished ones waiting for an earlier block, at most
        pending: deque = deque()
        submitted = 0

        def top_up() -> None:
            nonlocal submitted
            while submitted < n and len(pending) < held and sum(not f.done() for f in pending) < window:
                block_rows = None if rows is None else rows[starts[submitted]: starts[submitted] + X.chunks[0][submitted]]
                pending.append(self._submit(X, blocks, submitted, task, split, shared, tree, token, traffic, whole,
                                            block_rows))
                submitted += 1

        try:
            i = 0
            while i < n:
                top_up()
                if not pending[0].done():  # wait for any task, so that the workers never idle behind a slow one
                    with client.as_current():
                        wait([f for f in pending if not f.done()], return_when="FIRST_COMPLETED")
                    continue
                piece = pending.popleft()
                if not (whole or i < folded[0]):  # (else nothing to fetch, or fetched by an earlier attempt)
                    result = piece.result()
                    traffic.received += traffic_bytes(result)
                    if i < n - 1 or tree is None:
                        fold(result, i, starts[i])
                    else:
                        total = tree.total().result()
                        traffic.received += traffic_bytes(total)
                        fold(reduce.join(result, total), i, starts[i])
                    folded[0] = i + 1
                    del result
                elif piece.status == "error":
                    piece.result()  # raises the task's error
                del piece
                i += 1
                if progress:
                    progress(name, i, n)
            if whole:
                total = tree.total().result()
                traffic.received += traffic_bytes(total)
                fold(total, 0, 0)
        except BaseException:
            client.cancel(list(pending))
            if tree is not None:
                tree.cancel()
            raise

    def _share(self, args: tuple, traffic: PassTraffic) -> list:
        """Arrays sent once to every worker (futures, in one exchange); other arguments as they are."""
        arrays = [i for i, value in enumerate(args) if isinstance(value, np.ndarray)]
        shared = list(args)
        if arrays:
            futures = self.client.scatter([args[i] for i in arrays], broadcast=True, hash=False)
            for i, future in zip(arrays, futures):
                shared[i] = future
                traffic.sent += args[i].nbytes * len(self._addresses())
        return shared

    def _submit(self, X, blocks, i, task, split, shared, tree, token, traffic, whole, rows=None):
        """Block ``i``'s task (with its ``rows``, if any); returns the future of what comes back for it."""
        client = self.client
        loader = block_loader(X, i)
        placement = {}
        if isinstance(loader, SourceBlocks) and loader.on_worker:
            piece = loader.for_block(i)
            if loader.keep_on_worker:
                self.runs.add(loader.run)
                addresses = self._addresses()
                placement = {"workers": [addresses[i % len(addresses)]], "allow_other_workers": True}
        else:  # read here (memory, text, a cache of this process) and sent to a worker
            (block,) = dask.compute(blocks[i], scheduler="synchronous")
            traffic.sent += block_nbytes(block)
            piece = client.scatter(block, hash=False)
        own = {}
        if rows is not None:  # this block's rows travel with its task
            own["rows"] = np.ascontiguousarray(rows)
            traffic.sent += own["rows"].nbytes
        future = client.submit(_run_block, piece, task, split, *shared, key=f"{token}-block-{i}", pure=False,
                               **placement, **own)
        if tree is None:
            return future
        if whole:
            tree.push(future)
            return future
        kept = client.submit(operator.getitem, future, 0, key=f"{token}-piece-{i}", pure=False)
        tree.push(future, part=True)  # the tree takes the summed part itself: no task for it
        return kept


class _PairwiseTree:
    """Sums futures on the workers in a fixed pairwise order (a binary counter over blocks).

    Block ``i`` is pushed as a leaf; two partial sums of equal height are combined as soon
    as both exist. The tree therefore depends on the number of blocks only: the same sums
    in the same order, whatever the timing, the number of workers, or a retried task.
    """

    def __init__(self, client, reduce: Reduction, combine_args, token: str):
        self.client, self.reduce, self.args, self.token = client, reduce, list(combine_args), token
        #: (height, future, whether the future is a block's (piece, part) of which to sum the part)
        self.stack: list[tuple[int, Any, bool]] = []
        self.count = 0
        self.made: list = []

    def _combine(self, left, right):
        self.count += 1
        future = self.client.submit(_sum_pair, self.reduce.combine, left[1], left[2], right[1], right[2], *self.args,
                                    key=f"{self.token}-sum-{self.count}", pure=False)
        self.made.append(future)
        return future

    def push(self, future, part: bool = False) -> None:
        """Block ``i``'s result (``part``: a ``(piece, summed)`` pair, of which the second is summed)."""
        height, entry = 0, (0, future, part)
        while self.stack and self.stack[-1][0] == height:
            left = self.stack.pop()
            entry = (height + 1, self._combine(left, entry), False)
            height += 1
        self.stack.append(entry)

    def total(self):
        entry = self.stack.pop()
        if entry[2] and not self.stack:  # a single block: its summed part alone
            entry = (entry[0], self.client.submit(operator.getitem, entry[1], 1, key=f"{self.token}-part",
                                                  pure=False), False)
            self.made.append(entry[1])
        while self.stack:
            left = self.stack.pop()
            entry = (entry[0], self._combine(left, entry), False)
        self.stack.append((np.inf, entry[1], False))
        self.made = []
        return entry[1]

    def cancel(self) -> None:
        self.client.cancel([f for _, f, _ in self.stack] + self.made)


def _sum_pair(combine, left, left_part: bool, right, right_part: bool, *args):
    """On a worker: ``combine`` of two partial sums, taking the summed part of a block's pair."""
    return combine(left[1] if left_part else left, right[1] if right_part else right, *args)


# ------------------------------------------------------------------------ choosing a back-end


def parse_cluster(value: str) -> int | None:
    """Workers of ``"local"`` (None: one per core) or ``"local:N"``; an error for anything else."""
    match = re.fullmatch(r"local(?::(\d+))?", value.strip()) if isinstance(value, str) else None
    if match is None or (match.group(1) is not None and int(match.group(1)) < 1):
        raise OptionError(f"cluster={value!r} is not a local cluster; write it as local or local:N "
                          "(N worker processes on this machine), or pass scheduler for another cluster")
    return int(match.group(1)) if match.group(1) else None


def _distributed():
    try:
        import distributed
    except ImportError:
        raise OptionError("running on a Dask cluster needs the 'distributed' package; install it with "
                          "pip install \"axiscope[cluster]\"") from None
    return distributed


def _current_client():
    """The current ``distributed`` client, if the caller made one (never imports it)."""
    if "distributed" not in sys.modules:
        return None
    from distributed import default_client

    try:
        return default_client()
    except ValueError:
        return None


@contextlib.contextmanager
def open_backend(resources) -> Iterator[ClusterBackend | None]:
    """The back-end ``resources`` asks for: None (threads of this process) or a cluster.

    ``resources.scheduler``: a ``distributed.Client``, a scheduler address, or a back-end held
    by :func:`shared_cluster` (each use gets a fresh record of its own on the same client);
    ``resources.cluster``: ``"local"`` or ``"local:N"``, a cluster of N worker processes on
    this machine started for the run (and stopped after it), each with one thread and an
    equal share of ``memory_limit``. Neither: the current client if the caller made one,
    otherwise threads.
    """
    scheduler = getattr(resources, "scheduler", None)
    cluster = getattr(resources, "cluster", None)
    if isinstance(scheduler, ClusterBackend):  # a cluster the command already holds (see shared_cluster)
        with _forgetting(ClusterBackend(scheduler.client, scheduler.address, scheduler.kind)) as backend:
            yield backend
        return
    if cluster is not None:
        with _local_cluster(parse_cluster(cluster), resources) as backend:
            yield backend
        return
    if scheduler is None:
        client = _current_client()
        if client is None:
            yield None
            return
        with _forgetting(ClusterBackend(client, _address(client), "client")) as backend:
            yield backend
        return
    if not isinstance(scheduler, str):
        with _forgetting(ClusterBackend(scheduler, _address(scheduler), "client")) as backend:
            yield backend
        return
    distributed = _distributed()
    t0 = time.perf_counter()
    try:
        client = distributed.Client(scheduler, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise OptionError(f"scheduler={scheduler!r} cannot be reached ({reason(exc)}); check the address, "
                          "or start a scheduler with: dask scheduler") from None
    logger.info("connected to the scheduler at %s in %.1f s", scheduler, time.perf_counter() - t0)
    try:
        with _forgetting(ClusterBackend(client, scheduler, "scheduler")) as backend:
            yield backend
    finally:
        client.close()


@contextlib.contextmanager
def shared_cluster(resources) -> Iterator[Any]:
    """``resources`` with the cluster it asks for started (or connected to) once, for several steps.

    A command that runs several steps on a cluster (the fit, then the split-half stability
    and the supplementary passes) starts the ``cluster="local:N"`` it was given, or connects
    to the ``scheduler`` address, here, once; the steps receive the returned resources,
    whose ``scheduler`` is that back-end (:func:`open_backend` hands each step a record of
    its own on the same client). The cluster is closed when the block ends, whether it ends
    normally, by an error or by an interrupt. Resources naming neither (threads, or the
    current client) are returned as they are.
    """
    from dataclasses import replace

    if getattr(resources, "cluster", None) is None and not isinstance(getattr(resources, "scheduler", None), str):
        yield resources
        return
    with open_backend(resources) as backend:
        yield replace(resources, scheduler=backend, cluster=None)


@contextlib.contextmanager
def _local_cluster(n_workers: int | None, resources) -> Iterator[ClusterBackend]:
    distributed = _distributed()
    from .memory import process_baseline, resident_bytes

    n = n_workers or max(1, os.cpu_count() or 1)
    # a worker holds its interpreter and libraries (as much as this process now) plus an
    # equal share of the data's budget
    share = max(0, int(resources.budget) - process_baseline()) // n
    per_worker = max(resident_bytes(), WORKER_LIBRARIES) + share
    logger.info("starting a local cluster of %d worker processes, %d MB each", n, per_worker >> 20)
    with contextlib.ExitStack() as stack:
        # the plan keeps the data within the budget: no spilling or pausing, only the
        # nanny's restart of a worker past 95% of its limit (workers take this configuration)
        quiet_memory = {"distributed.worker.memory.target": False, "distributed.worker.memory.spill": False,
                        "distributed.worker.memory.pause": False}
        try:
            with dask.config.set(quiet_memory):
                cluster = stack.enter_context(distributed.LocalCluster(
                    n_workers=n, threads_per_worker=1, processes=True, memory_limit=per_worker,
                    host="127.0.0.1", silence_logs=logging.ERROR, **QUIET_HTTP))
            client = stack.enter_context(distributed.Client(cluster, set_as_default=False))
        except (OSError, TimeoutError) as exc:
            raise OptionError(f"cluster={'local:%d' % n!r} could not be started ({reason(exc)}); "
                              "run without cluster, or with fewer workers") from None
        yield ClusterBackend(client, cluster.scheduler_address, "local cluster")  # workers end with it


@contextlib.contextmanager
def _forgetting(backend: ClusterBackend) -> Iterator[ClusterBackend]:
    """``backend``, whose workers drop the blocks they kept for it at the end."""
    try:
        yield backend
    finally:
        backend.forget()


def _address(client) -> str:
    try:
        return str(client.scheduler.address)
    except AttributeError:
        return "?"
