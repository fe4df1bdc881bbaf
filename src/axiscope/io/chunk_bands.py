"""Decode each band of on-disk chunks once per pass, whatever the blocks read from it.

A read of samples ``start:stop`` from a chunked store decodes every chunk those samples
touch, whole. When blocks are smaller than the on-disk chunk along the samples (a chunk of
2,000 rows read as blocks of 700), each block read would decode the same chunks again.
:class:`ChunkBands` keeps the decoded *band* (one chunk length of samples across all
features) while its blocks are read, and lets go of it once every one of its samples has
been served; a read that covers whole bands decodes them directly and keeps nothing.

Memory: at most ``keep`` decoded bands are held at once (the least recently used is let go
first; a band let go early is decoded again when asked for, so the answer never changes,
only the work). The memory plan counts the decoded band of one read per thread
(:func:`axiscope.core.plan.decoded_chunk_bytes`).
"""

from __future__ import annotations

import os
import threading
from collections import OrderedDict
from collections.abc import Callable

import numpy as np

__all__ = ["ChunkBands", "chunk_bands"]


class _Band:
    """One decoded band: its array (file orientation), and which of its samples were served."""

    __slots__ = ("lock", "data", "served")

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.data: np.ndarray | None = None
        self.served: np.ndarray | None = None  # bool, one per sample of the band


class ChunkBands:
    """Serve sample ranges of a store chunked along the samples, decoding each band once.

    Parameters
    ----------
    band : int
        On-disk chunk length along the samples.
    n_samples : int
    axis : int
        Axis of the samples in the arrays ``decode`` returns (0: samples are rows of the
        file, 1: columns).
    keep : int, default=2
        Decoded bands held at most at once.

    Attributes
    ----------
    decoded : int
        Bands decoded so far (whole bands read directly included): what a test counts.
    """

    def __init__(self, band: int, n_samples: int, *, axis: int = 0, keep: int = 2) -> None:
        self.band = int(band)
        self.n = int(n_samples)
        self.axis = int(axis)
        self.keep = max(1, int(keep))
        self.decoded = 0
        self._lock = threading.Lock()
        self._held: OrderedDict[int, _Band] = OrderedDict()

    def __getstate__(self) -> dict:  # locks and decoded bands stay in this process
        return {"band": self.band, "n": self.n, "axis": self.axis, "keep": self.keep}

    def __setstate__(self, state: dict) -> None:
        self.__init__(state["band"], state["n"], axis=state["axis"], keep=state["keep"])

    def read(self, start: int, stop: int, decode: Callable[[int, int], np.ndarray]) -> np.ndarray:
        """Samples ``start:stop`` in file orientation; ``decode(a, b)`` reads samples ``a:b`` from the store.

        The result is the caller's own: a fresh array, or a view of rows of a decoded band
        that no other read was given from that decoding (a read asking again for samples
        already served decodes the band again), so the caller may change it in place.
        """
        pieces = []
        for a, b, whole in self._pieces(start, stop):
            if whole:
                with self._lock:
                    self.decoded += -(-(b - a) // self.band)
                pieces.append(decode(a, b))
            else:
                pieces.append(self._from_band(a, b, decode))
        return pieces[0] if len(pieces) == 1 else np.concatenate(pieces, axis=self.axis)

    def _pieces(self, start: int, stop: int) -> list[tuple[int, int, bool]]:
        """``(a, b, whole)``: the part of ``start:stop`` in each band, runs of whole bands merged."""
        out: list[tuple[int, int, bool]] = []
        a = start
        while a < stop:
            c0 = (a // self.band) * self.band
            c1 = min(self.n, c0 + self.band)
            b = min(stop, c1)
            whole = a == c0 and b == c1
            if whole and out and out[-1][2]:
                out[-1] = (out[-1][0], b, True)
            else:
                out.append((a, b, whole))
            a = b
        return out

    def _from_band(self, a: int, b: int, decode: Callable[[int, int], np.ndarray]) -> np.ndarray:
        """Samples ``a:b`` of one band, decoding the band if no read holds it."""
        c = a // self.band
        c0, c1 = c * self.band, min(self.n, (c + 1) * self.band)
        with self._lock:
            held = self._held.get(c)
            if held is None:
                held = self._held[c] = _Band()
                while len(self._held) > self.keep:
                    self._held.popitem(last=False)
            else:
                self._held.move_to_end(c)
        with held.lock:  # other bands decode meanwhile; readers of this one wait for it
            # decoded again when some of these samples were served already (their rows were
            # handed out, and may have been changed in place by the read they went to)
            if held.data is None or held.served[a - c0 : b - c0].any():
                held.data = decode(c0, c1)
                held.served = np.zeros(c1 - c0, dtype=bool)
                with self._lock:
                    self.decoded += 1
            data = held.data
            held.served[a - c0 : b - c0] = True
            done = bool(held.served.all())
            if done:  # every sample of the band was served: let it go
                held.data = held.served = None
        if done:
            with self._lock:
                if self._held.get(c) is held:
                    del self._held[c]
        index = [slice(None), slice(None)]
        index[self.axis] = slice(a - c0, b - c0)
        return data[tuple(index)]

    def clear(self) -> None:
        """Let go of every held band."""
        with self._lock:
            self._held.clear()


def chunk_bands(backend, samples_in: str) -> ChunkBands | None:
    """The :class:`ChunkBands` of a chunked back-end for one orientation (made on first use).

    None when the store is not chunked. ``backend`` has ``disk_chunks``, ``file_shape`` and
    a ``_bands`` dict.
    """
    if not backend.disk_chunks:
        return None
    axis = 0 if samples_in == "rows" else 1
    bands = backend._bands.get(samples_in)
    if bands is None:  # as many bands held as reads may run at once (threads: at most the cores)
        bands = backend._bands.setdefault(samples_in, ChunkBands(
            backend.disk_chunks[axis], backend.file_shape[axis], axis=axis, keep=max(2, os.cpu_count() or 1)))
    return bands
