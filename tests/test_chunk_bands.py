"""Each on-disk chunk is decoded once per pass that reads the source, whatever its shape.

The store's chunk reads are counted where Zarr fetches them (``LocalStore.get``), so the
count is Zarr's own, not one kept by axiscope. Expected values: a pass that reads the
source fetches every chunk once (common practice, no source: the aim stated in the issue).
"""

from __future__ import annotations

import dataclasses
import threading
from collections import Counter

import numpy as np
import pytest

zarr = pytest.importorskip("zarr")

from axiscope import EngineSettings, PreprocessSpec, Resources, fit  # noqa: E402
from axiscope.fitting import run as run_module  # noqa: E402
from axiscope.io.chunk_bands import ChunkBands  # noqa: E402

N, P, BLOCK_ROWS = 600, 30, 70


def _planted(seed: int = 3) -> np.ndarray:
    """Rank 3 with a clear gap plus small noise (float64), so the fit's values are LAPACK's."""
    rng = np.random.default_rng(seed)
    scores = rng.standard_normal((N, 3)) * np.array([30.0, 20.0, 10.0])
    loadings = np.linalg.qr(rng.standard_normal((P, 3)))[0].T
    return scores @ loadings + 0.01 * rng.standard_normal((N, P)) + rng.uniform(0, 5, P)


@pytest.fixture
def chunk_reads(monkeypatch):
    """Counts of every chunk key Zarr fetched from a local store."""
    from zarr.storage import LocalStore

    counts: Counter = Counter()
    lock = threading.Lock()
    original = LocalStore.get

    async def counting(self, key, *args, **kwargs):
        if key.startswith("c/"):  # chunk keys of format 3 ("c/i/j"); metadata is zarr.json
            with lock:
                counts[key] += 1
        return await original(self, key, *args, **kwargs)

    monkeypatch.setattr(LocalStore, "get", counting)
    return counts


def _force_plan(monkeypatch, cache: str) -> None:
    """The fit's plan, with blocks of ``BLOCK_ROWS`` rows and the given cache kind."""
    original = run_module.plan_fit

    def forced(*args, **kwargs):
        return dataclasses.replace(original(*args, **kwargs), block_rows=BLOCK_ROWS, cache=cache)

    monkeypatch.setattr(run_module, "plan_fit", forced)


@pytest.mark.parametrize("chunks", [(200, P), (50, P), (200, 10), (130, 7)],
                         ids=["whole-rows-larger", "smaller-than-blocks", "split-features", "uneven"])
@pytest.mark.parametrize("cache", ["memory", "source"])
def test_each_chunk_decoded_once_per_pass(tmp_path, monkeypatch, chunk_reads, chunks, cache):
    X = _planted()
    path = tmp_path / "m.zarr"
    z = zarr.create_array(store=str(path), shape=X.shape, dtype="float64", chunks=chunks)
    z[:] = X
    _force_plan(monkeypatch, cache)
    res = fit(path, n_components=3, preprocess=PreprocessSpec(scale="none"),
              engine=EngineSettings(method="randomized"), resources=Resources(threads=2))
    assert res.manifest["plan"]["block_rows"] == BLOCK_ROWS
    reading = [d for d in res.manifest["passes"]["detail"] if d["read_from"] in ("input", "source")]
    expected = len(reading) if cache == "source" else 1
    n_chunks = -(-N // chunks[0]) * -(-P // chunks[1])
    assert len(chunk_reads) == n_chunks
    assert set(chunk_reads.values()) == {expected}, (reading, chunk_reads)
    # and the numbers are the matrix's: singular values of the centred matrix by LAPACK
    s = np.linalg.svd(X - X.mean(axis=0), compute_uv=False)[:3]
    np.testing.assert_allclose(res.model.singular_values, s, rtol=1e-9)


def test_bands_serve_any_ranges_as_slicing_does():
    """Arbitrary ranges, from threads, give numpy's slices; each band is decoded once."""
    data = np.arange(103 * 4, dtype=np.float64).reshape(103, 4)
    calls: list[tuple[int, int]] = []
    bands = ChunkBands(20, 103, keep=2)

    def decode(a, b):
        calls.append((a, b))
        return data[a:b].copy()

    edges = [0, 7, 20, 33, 40, 41, 60, 85, 103]  # partial bands, whole bands, a read across bands
    for a, b in zip(edges[:-1], edges[1:]):
        np.testing.assert_array_equal(bands.read(a, b, decode), data[a:b])
    assert bands.decoded == 6  # bands 0..5 (20 rows each, the last 3), each once
    assert sorted(calls) == [(0, 20), (20, 40), (40, 60), (60, 80), (80, 100), (100, 103)]
    assert not bands._held  # every band served whole: none is kept

    columns = ChunkBands(20, 103, axis=1)
    got = columns.read(5, 47, lambda a, b: data.T[:, a:b])
    np.testing.assert_array_equal(got, data.T[:, 5:47])
