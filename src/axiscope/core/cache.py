"""Decode once: keep transformed blocks in memory, compressed in memory, or in a scratch file.

Decompressing chunks can cost more than the arithmetic, so the first pass that reads the
source stores the transformed blocks, and later passes read them back: from memory when
they fit the budget; compressed in memory with a fast codec (Blosc LZ4 with byte shuffle)
when the compressed blocks are expected to fit it, any block past the allowance going to
the scratch file; else from an uncompressed scratch file read with positioned reads into
buffers of the process's own (no memory map, so no file pages count towards resident memory),
handed out again once no block or view refers to them (``reuse``).

The scratch file is written and read with direct I/O (``O_DIRECT``: past the page cache)
where the file system allows it, each block at the next free 4 KiB-aligned place. Measured
on this project's benchmark machine for 3.2 GB in 80 MB blocks: through the page cache the
writes took 13.1 s (6.2 s of it kernel time, the kernel finding room for new pages and
writing them back) and the first read back 9.3 s; direct, 3.3 s to write and 4.5 s to read,
0.2 s of processor time each (the disk's own speed, which the block products overlap). Where
direct I/O is refused (``EINVAL``: tmpfs, some network file systems) the file is written and
read through the page cache, in the same layout.
"""

from __future__ import annotations

import errno
import logging
import os
import shutil
import sys
import tempfile
import threading
from pathlib import Path

import numpy as np

from ..errors import ResourceError
from ..io.output import owned_temporary_folder, remove_leftovers
from .workspace import work_array

__all__ = ["BlockCache", "SCRATCH_PREFIX", "scratch_has_room", "remove_scratch_leftovers", "fast_codec"]

#: Scratch folders are named ``axiscope-scratch-<host>-<pid>-<random>``: a later run removes
#: those of processes that have ended (killed before they could clean up).
SCRATCH_PREFIX = "axiscope-scratch-"

logger = logging.getLogger(__name__)


class BlockCache:
    """Row blocks of an ``n × p`` matrix stored once and read back many times.

    Parameters
    ----------
    mode : {"memory", "compressed", "scratch"}
    n_rows, n_cols : int
    dtype : numpy.dtype
    scratch_dir : path, optional
        Parent of the temporary scratch directory (``mode="scratch"``, and ``"compressed"``
        once its allowance is used up).
    allowance : int, optional
        ``mode="compressed"``: compressed bytes held in memory at most; blocks that would
        pass it are written uncompressed to the scratch file instead (made when first needed).
    reuse : int, optional
        Read buffers of the scratch file handed out again (at most this many kept; 0: a
        fresh buffer per read). A kept buffer is handed out again only once nothing refers
        to it any more: no block read into it and no view of one (numpy's views refer to the
        array owning the memory). Count them in the memory plan as blocks in flight.

    Attributes
    ----------
    held_bytes : int
        Bytes of blocks held in memory (compressed ones at their compressed size).
    spilled_bytes : int
        Bytes of blocks written to the scratch file.
    """

    def __init__(self, mode: str, n_rows: int, n_cols: int, dtype, scratch_dir: Path | None = None,
                 allowance: int | None = None, reuse: int = 0):
        self.mode = mode
        self.shape = (n_rows, n_cols)
        self.dtype = np.dtype(dtype)
        self.row_bytes = n_cols * self.dtype.itemsize
        self._blocks: dict[int, np.ndarray] = {}
        self._lock = threading.Lock()
        self._dir: str | None = None
        self._fd: int | None = None
        self._parent = Path(scratch_dir) if scratch_dir is not None else Path(tempfile.gettempdir())
        self.allowance = allowance
        self.held_bytes = 0
        self.spilled_bytes = 0
        self._codec = fast_codec() if mode == "compressed" else None
        #: first row of each block in the scratch file → (byte offset, rows)
        self._where: dict[int, tuple[int, int]] = {}
        self._end = 0  # first free (aligned) byte of the scratch file
        self._direct = False  # the file is read and written with O_DIRECT
        self._reuse = int(reuse)
        self._kept: list[np.ndarray] = []  # read buffers handed out again (see _read_buffer)
        self._largest = 0  # aligned bytes of the largest block in the scratch file
        if mode == "scratch":
            self._open_scratch()

    def _open_scratch(self) -> None:
        """Make the scratch folder and file (once)."""
        with self._lock:
            if self._fd is not None:
                return
            try:
                self._dir = str(owned_temporary_folder(self._parent, SCRATCH_PREFIX))
                path = os.path.join(self._dir, "blocks.bin")
                self._fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_TRUNC, 0o600)
                self._direct = _open_direct(self._fd, path)
            except OSError as exc:
                self._close_scratch()
                raise scratch_error(self._parent, exc, self.nbytes) from exc
            self.path = Path(path)

    @property
    def nbytes(self) -> int:
        return self.shape[0] * self.row_bytes

    def put(self, start: int, block: np.ndarray) -> None:
        """Store rows ``start .. start + len(block)``."""
        block = np.ascontiguousarray(block, dtype=self.dtype)
        if self.mode == "memory":
            with self._lock:
                self._blocks[start] = block
                self.held_bytes += block.nbytes
            return
        if self.mode == "compressed":
            packed = self._codec.encode(block)
            with self._lock:
                fits = self.allowance is None or self.held_bytes + len(packed) <= self.allowance
                if fits:
                    self._blocks[start] = packed
                    self.held_bytes += len(packed)
            if fits:
                return
            del packed
            self._open_scratch()
            with self._lock:
                self.spilled_bytes += block.nbytes
        nbytes = block.nbytes
        with self._lock:  # the block's place: the next free aligned bytes
            offset = self._end
            self._end += _aligned(nbytes)
            self._largest = max(self._largest, _aligned(nbytes))
            self._where[start] = (offset, block.shape[0])
        try:
            if self._direct:
                staged = _aligned_buffer(_aligned(nbytes), reuse="scratch staging")
                staged[:nbytes] = memoryview(block).cast("B")
                self._direct = _write(self._fd, memoryview(staged), offset, direct=True, path=self.path)
            else:
                _write(self._fd, memoryview(block).cast("B"), offset, direct=False, path=self.path)
        except OSError as exc:
            raise scratch_error(self.path, exc, self.nbytes) from exc

    def get(self, start: int, stop: int) -> np.ndarray:
        """Rows ``start .. stop`` as an array of the caller's own (blocks are read back as they
        were put; a scratch read buffer is handed out again only once nothing refers to it)."""
        if self.mode == "memory":
            return self._blocks[start]
        packed = self._blocks.get(start) if self.mode == "compressed" else None
        if packed is not None:
            out = np.empty((stop - start, self.shape[1]), dtype=self.dtype)
            self._codec.decode(packed, out=out)
            return out
        offset, rows = self._where[start]
        if rows != stop - start:
            raise ValueError(f"rows {start}:{stop} were not put as one block ({rows} rows from {start})")
        nbytes = rows * self.row_bytes
        buffer = self._read_buffer(_aligned(nbytes))  # the whole aligned extent: direct reads need it
        view, position = memoryview(buffer), offset
        while view.nbytes:
            got = os.preadv(self._fd, [view], position)
            if got == 0:
                if position >= offset + nbytes:
                    break  # the last block's aligned tail lies past the file's end
                raise OSError(f"scratch file {self.path} ended early at byte {position}")
            view, position = view[got:], position + got
        return buffer[:nbytes].view(self.dtype).reshape(rows, self.shape[1])

    def _read_buffer(self, nbytes: int) -> np.ndarray:
        """An aligned buffer of ``nbytes`` for one read: a kept one nothing refers to any more,
        else a fresh one (kept while fewer than ``reuse`` are).

        A fresh buffer of a block's size is mapped anew and its pages fault on first touch:
        measured on this project's benchmark machine for 97 MB, 30 ms (19 ms of it kernel time)
        to allocate and fill, against 12 ms into a buffer written before. Whether a kept buffer
        is free is told by its reference count: the list holds one reference and the call one;
        every block read into it and every view of such a block holds one more.
        """
        with self._lock:
            for raw in self._kept:
                if sys.getrefcount(raw) <= 3 and raw.nbytes >= nbytes + ALIGN:  # the list, `raw`, the call
                    return _aligned_view(raw, nbytes)
            if len(self._kept) >= self._reuse:
                return _aligned_view(np.empty(nbytes + ALIGN, dtype=np.uint8), nbytes)
            # kept: sized for the largest block, so that blocks of a few rows more fit it too
            raw = np.empty(max(nbytes, self._largest) + ALIGN, dtype=np.uint8)
            self._kept.append(raw)
            return _aligned_view(raw, nbytes)

    def close(self) -> None:
        """Free the blocks and remove the scratch directory."""
        self._blocks.clear()
        self._kept.clear()
        self._close_scratch()

    def _close_scratch(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        if self._dir is not None:
            shutil.rmtree(self._dir, ignore_errors=True)
            self._dir = None

    def __enter__(self) -> "BlockCache":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


#: Alignment of direct I/O: offsets, lengths and buffer addresses (the page size; 512 is the
#: least most devices need).
ALIGN = 4096


def _aligned(nbytes: int) -> int:
    """``nbytes`` rounded up to a multiple of :data:`ALIGN`."""
    return -(-int(nbytes) // ALIGN) * ALIGN


def _aligned_buffer(nbytes: int, reuse: str | None = None) -> np.ndarray:
    """A uint8 array of ``nbytes`` whose address is a multiple of :data:`ALIGN`: fresh, or with
    ``reuse`` the calling thread's work array of that name (:mod:`axiscope.core.workspace`)."""
    raw = np.empty(nbytes + ALIGN, dtype=np.uint8) if reuse is None else work_array(reuse, (nbytes + ALIGN,), np.uint8)
    return _aligned_view(raw, nbytes)


def _aligned_view(raw: np.ndarray, nbytes: int) -> np.ndarray:
    """The first ``nbytes`` of ``raw`` (``nbytes + ALIGN`` bytes at least) from an aligned address."""
    skip = (-raw.ctypes.data) % ALIGN
    return raw[skip : skip + nbytes]


def _open_direct(fd: int, path: str) -> bool:
    """Switch ``fd`` to direct I/O (``O_DIRECT``) when the platform and file system allow it."""
    flag = getattr(os, "O_DIRECT", 0)
    if not flag:
        return False
    try:
        import fcntl

        fcntl.fcntl(fd, fcntl.F_SETFL, fcntl.fcntl(fd, fcntl.F_GETFL) | flag)
    except OSError:
        return False
    return True


def _write(fd: int, view: memoryview, offset: int, *, direct: bool, path) -> bool:
    """Write ``view`` at ``offset``; returns whether the file stays in direct I/O.

    A direct write the file system refuses (``EINVAL``) switches the file to ordinary writes
    (through the page cache) and is done again that way.
    """
    try:
        while view.nbytes:
            written = os.pwrite(fd, view, offset)
            view, offset = view[written:], offset + written
    except OSError as exc:
        if not (direct and exc.errno == errno.EINVAL):
            raise
        import fcntl

        fcntl.fcntl(fd, fcntl.F_SETFL, fcntl.fcntl(fd, fcntl.F_GETFL) & ~os.O_DIRECT)
        logger.info("%s: direct I/O refused; the scratch file goes through the page cache", path)
        _write(fd, view, offset, direct=False, path=path)
        return False
    return direct


def fast_codec():
    """The codec of compressed blocks: Blosc with LZ4 and byte shuffle (numcodecs).

    Byte shuffle groups the bytes of equal rank of the values (sign and exponent bytes
    together), the part of floating-point data that compresses; LZ4 decodes at about
    1 GB/s per core. Measured on float32 Gaussian noise plus a low-rank signal: ratio 1.12
    (zstd level 1: 1.15 at 0.6 GB/s; no shuffle: 1.00).
    """
    from numcodecs import Blosc

    return Blosc(cname="lz4", clevel=5, shuffle=Blosc.SHUFFLE)


def scratch_has_room(scratch_dir: Path | None, nbytes: int) -> bool:
    """Whether the scratch location has ``nbytes`` free, with 5% to spare.

    A folder that does not exist yet is judged by the nearest folder above it that does
    (the fit makes the folder when it needs it).
    """
    where = Path(scratch_dir) if scratch_dir is not None else Path(tempfile.gettempdir())
    while not where.exists() and where.parent != where:
        where = where.parent
    try:
        return shutil.disk_usage(where).free >= nbytes * 1.05
    except OSError:
        return False


def remove_scratch_leftovers(scratch_dir: Path | None) -> list[Path]:
    """Remove scratch folders of ended processes from the scratch location (logged as warnings)."""
    where = Path(scratch_dir) if scratch_dir is not None else Path(tempfile.gettempdir())
    return remove_leftovers(where, SCRATCH_PREFIX, "scratch folder")


def scratch_error(where: Path, exc: OSError, nbytes: int) -> Exception:
    """The error to raise for an ``OSError`` while making or writing scratch at ``where``.

    No space or no inodes left (both ``ENOSPC``) or a full quota is a
    :class:`~axiscope.errors.ResourceError` (exit code 3); anything else (read-only, no
    permission) an :class:`~axiscope.errors.OptionError` naming the folder.
    """
    from ..errors import OptionError

    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return ResourceError(
            f"{where}: no space left for the scratch file ({exc.strerror}; it needs "
            f"{nbytes / 1e6:.1f} MB); free space there, or choose another folder with "
            "scratch=..., or raise memory_limit so that blocks stay in memory")
    return OptionError(f"{where}: the scratch file cannot be written ({exc.strerror}); choose a writable "
                       "folder with scratch=..., or raise memory_limit so that blocks stay in memory")
