"""Work arrays handed out again to the blocks of one pass, on the threads that run it.

A block task that needs a block-sized work array (the centred block of the products, the
shifted block of the statistics) used to allocate a fresh one for every block. A fresh
array of tens of megabytes is mapped anew by the allocator and every page of it faults on
first touch: measured on 1,000 × 20,000 float32 blocks, ``block - x`` into a fresh array
67 ms (28 ms of it kernel time) against 27 ms into an array written before. On a thread
that keeps its work arrays (:func:`keep_work_arrays`, the initializer of the pass runner's
threads, :mod:`axiscope.core.passes`), :func:`work_array` returns the calling thread's
array of that name again, grown when a larger one is asked for; elsewhere (a cluster's
workers, direct calls) a fresh array.

A work array is valid until the same thread asks for the same name again: a task must not
return it, or any view of it.
"""

from __future__ import annotations

import math
import threading

import numpy as np

__all__ = ["work_array", "keep_work_arrays"]

_local = threading.local()


def keep_work_arrays() -> None:
    """Keep this thread's work arrays from now on (a pool's thread initializer; they are let go
    with the thread)."""
    _local.arrays = {}


def work_array(name: str, shape: tuple[int, ...], dtype) -> np.ndarray:
    """An uninitialised array of ``shape`` and ``dtype``: this thread's array ``name`` when it
    keeps its work arrays (:func:`keep_work_arrays`), else a fresh one."""
    arrays = getattr(_local, "arrays", None)
    dtype = np.dtype(dtype)
    if arrays is None:
        return np.empty(shape, dtype=dtype)
    nbytes = math.prod(shape) * dtype.itemsize
    held = arrays.get(name)
    if held is None or held.nbytes < nbytes:
        arrays[name] = None  # let go of the smaller one first
        held = arrays[name] = np.empty(max(nbytes, 1), dtype=np.uint8)
    return held[:nbytes].view(dtype).reshape(shape)
