"""Reading ahead, work arrays, decoded rows without a copy, and the scratch file by direct I/O.

What each part must keep: the blocks a pass folds, in order (the blocks the test wrote
itself); the values a read returns (those written to the store, even after an earlier read
changed its own rows in place); the blocks a scratch file gives back (those put into it);
the statistics and sketch of a block against numpy in float64.
"""

from __future__ import annotations

import errno
import threading

import numpy as np
import pytest

from axiscope.core import cache as cache_module
from axiscope.core.cache import BlockCache
from axiscope.core.passes import PassRunner, array_from_blocks
from axiscope.core.plan import plan_blocks
from axiscope.core.preprocess import statistics_and_sketch
from axiscope.core.workspace import keep_work_arrays, work_array
from axiscope.io.chunk_bands import ChunkBands
from axiscope.io.source import orient_block


def _blocks(sizes):
    return array_from_blocks(lambda i: np.full((sizes[i], 2), float(i)), sizes, 2, np.float64,
                             f"pipeline-{len(sizes)}-{id(sizes)}")


@pytest.mark.parametrize("threads, read_ahead", [(1, 1), (1, 2), (2, 2), (2, 4)])
def test_read_ahead_folds_every_block_in_order(threads, read_ahead):
    # reference: the blocks written by the test itself, in order
    sizes = [3, 5, 1, 4, 2, 6, 7]
    seen = []
    PassRunner(threads=threads, read_ahead=read_ahead).run(
        "t", "input", _blocks(sizes), lambda block: block[:, 0].copy(),
        lambda result, index, start: seen.append((index, start, result)))
    assert [s[0] for s in seen] == list(range(len(sizes)))
    assert [s[1] for s in seen] == list(np.cumsum([0] + sizes[:-1]))
    for index, _, values in seen:
        np.testing.assert_array_equal(values, np.full(sizes[index], float(index)))


def test_a_failed_read_stops_the_pass_with_its_error():
    def load(i):
        if i == 2:
            raise OSError("block 2 unreadable")
        return np.zeros((2, 2))

    X = array_from_blocks(load, [2] * 5, 2, np.float64, "pipeline-failing")
    folded = []
    with pytest.raises(OSError, match="block 2 unreadable"):
        PassRunner(threads=1, read_ahead=2).run("t", "input", X, lambda b: b.sum(),
                                                lambda r, i, s: folded.append(i))
    assert folded == [0, 1]


def test_passes_over_the_cache_run_on_their_own_threads():
    seen: set = set()
    lock = threading.Lock()

    def task(block):
        with lock:
            seen.add(threading.current_thread().name)
        return 0

    runner = PassRunner(threads=1, read_ahead=1, cached_threads=2)
    runner.run("from cache", "scratch", _blocks([4] * 12), task, lambda r, i, s: None)
    working = {name for name in seen if not name.startswith("axiscope-read")}
    assert len(working) <= 2 and all(name.startswith("axiscope") for name in working)
    seen.clear()
    runner.run("from input", "input", _blocks([4] * 12), task, lambda r, i, s: None)
    assert len(seen) == 1  # one working thread reads the input


def test_work_arrays_are_reused_only_where_kept():
    kept = []

    def on_a_kept_thread():  # as the pass runner's threads: keep_work_arrays is their initializer
        keep_work_arrays()
        kept.append(work_array("x", (10, 4), np.float32))
        kept.append(work_array("x", (5, 4), np.float32))  # smaller: the same memory
        kept.append(work_array("y", (10, 4), np.float32))  # another name: its own

    thread = threading.Thread(target=on_a_kept_thread)
    thread.start()
    thread.join()
    a, b, c = kept
    assert np.shares_memory(a, b) and not np.shares_memory(a, c)
    assert a.flags.c_contiguous and b.shape == (5, 4) and b.dtype == np.float32
    # elsewhere (this thread keeps none): a fresh array every time
    assert not np.shares_memory(work_array("x", (10, 4), np.float32), work_array("x", (10, 4), np.float32))


def test_owned_blocks_are_not_copied_and_others_are():
    block = np.arange(12, dtype=np.float32).reshape(3, 4)
    assert orient_block(block, "rows", np.dtype(np.float32), owned=True) is block
    assert not np.shares_memory(orient_block(block, "rows", np.dtype(np.float32)), block)
    converted = orient_block(block, "rows", np.dtype(np.float64), owned=True)
    assert converted.dtype == np.float64 and not np.shares_memory(converted, block)
    turned = orient_block(block, "columns", np.dtype(np.float32), owned=True)
    np.testing.assert_array_equal(turned, block.T)
    assert turned.flags.c_contiguous and not np.shares_memory(turned, block)


def test_rows_served_again_are_decoded_again():
    """A read changing its rows of a band in place never reaches another read of those rows."""
    stored = np.arange(40, dtype=np.float32).reshape(10, 4)  # the store: one band of 10 samples
    bands = ChunkBands(10, 10, keep=2)

    def decode(a, b):
        return stored[a:b].copy()

    first = bands.read(0, 4, decode)
    first *= -1  # the reader's rows are its own (e.g. a transform in place)
    again = bands.read(0, 4, decode)  # the band is still held (samples 4..9 not served yet)
    np.testing.assert_array_equal(again, stored[0:4])
    np.testing.assert_array_equal(bands.read(4, 10, decode), stored[4:10])
    assert bands.decoded == 2


@pytest.mark.parametrize("direct", [True, False])
def test_scratch_blocks_come_back_as_put_in_any_order(tmp_path, monkeypatch, direct):
    if not direct:
        monkeypatch.setattr(cache_module, "_open_direct", lambda fd, path: False)
    rng = np.random.default_rng(5)
    X = rng.standard_normal((103, 37)).astype(np.float32)  # rows of 148 bytes: no block is aligned
    spans = [(0, 17), (17, 50), (50, 51), (51, 103)]
    with BlockCache("scratch", 103, 37, np.float32, tmp_path) as cache:
        for a, b in reversed(spans):
            cache.put(a, X[a:b])
        for a, b in spans:
            np.testing.assert_array_equal(cache.get(a, b), X[a:b])
        with pytest.raises(ValueError):
            cache.get(17, 40)  # not a block that was put


def test_a_refused_direct_write_goes_through_the_page_cache(tmp_path, monkeypatch):
    monkeypatch.setattr(cache_module, "_open_direct", lambda fd, path: True)  # claims direct I/O
    original = cache_module.os.pwrite
    refused = []

    def pwrite(fd, data, offset):
        if not refused:
            refused.append(offset)
            raise OSError(errno.EINVAL, "Invalid argument")
        return original(fd, data, offset)

    monkeypatch.setattr(cache_module.os, "pwrite", pwrite)
    X = np.arange(60, dtype=np.float64).reshape(6, 10)
    with BlockCache("scratch", 6, 10, np.float64, tmp_path) as cache:
        cache.put(0, X[:4])
        cache.put(4, X[4:])
        assert refused and not cache._direct
        np.testing.assert_array_equal(cache.get(0, 4), X[:4])
        np.testing.assert_array_equal(cache.get(4, 6), X[4:])


def test_a_full_disk_while_writing_scratch_is_still_a_resource_error(tmp_path, monkeypatch):
    from axiscope.errors import ResourceError

    def pwrite(fd, data, offset):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(cache_module.os, "pwrite", pwrite)
    with BlockCache("scratch", 6, 10, np.float64, tmp_path) as cache, pytest.raises(ResourceError):
        cache.put(0, np.zeros((6, 10)))


@pytest.mark.parametrize("centre", [True, False])
def test_statistics_and_sketch_against_float64(centre):
    # reference: numpy in float64 on the same float32 values; the products are float32
    # arithmetic (unit roundoff 6e-8) over 30-term and 200-term sums, hence rtol 1e-5
    rng = np.random.default_rng(11)
    block = (rng.standard_normal((200, 30)) * 2 + 50).astype(np.float32)
    omega = rng.standard_normal((30, 6)).astype(np.float32)
    stats, sketch = statistics_and_sketch(block, omega, centre=centre)
    x = block.astype(np.float64)
    mean = x.mean(axis=0)
    np.testing.assert_allclose(stats.mean, mean, rtol=1e-12)
    # the squares of the shifted values are float32 (unit roundoff 6e-8 each): rtol 1e-6
    np.testing.assert_allclose(stats.m2, ((x - mean) ** 2).sum(axis=0), rtol=1e-6)
    c = x - mean if centre else x
    expected = c.T @ (c @ omega.astype(np.float64))
    np.testing.assert_allclose(sketch, expected, rtol=1e-5, atol=1e-5 * np.abs(expected).max())


def test_whole_row_chunks_read_ahead_and_more_threads_over_the_cache():
    """40,000 × 20,000 float32 in chunks of 2,000 whole rows under 1 GB (the benchmark's case)."""
    plan = plan_blocks(40000, 20000, 4, sketch_width=30, threads=2, budget=10**9, sample_chunk=2000,
                       chunk_bytes=2 * 2000 * 20000 * 4, baseline=0, cache="scratch")
    assert plan.threads == 1 and plan.block_rows < 2000
    assert plan.read_ahead == 2  # the next band decodes while the blocks of this one are worked on
    assert plan.cached_threads == 2
    assert plan.fixed_bytes + plan.cached_threads * (
        2 * 8 * 20000 * 40 + 3 * plan.block_rows * 20000 * 4) <= 10**9
