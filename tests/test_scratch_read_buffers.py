"""Read buffers of the scratch file handed out again (core/cache.py, ``BlockCache(reuse=)``).

The values checked against are the arrays put (numpy equality); what is checked is that a
buffer is handed out again only once no block or view refers to it, and that it then is.
"""

from __future__ import annotations

import numpy as np

from axiscope.core.cache import BlockCache


def _blocks(rows=(500, 700, 600), cols=9):  # blocks of more than one aligned page
    rng = np.random.default_rng(3)
    return [rng.standard_normal((r, cols)).astype(np.float32) for r in rows]


def _filled(tmp_path, reuse):
    blocks = _blocks()
    starts = np.concatenate([[0], np.cumsum([b.shape[0] for b in blocks])])
    cache = BlockCache("scratch", int(starts[-1]), blocks[0].shape[1], np.float32, tmp_path, reuse=reuse)
    for s, b in zip(starts, blocks):
        cache.put(int(s), b)
    return cache, blocks, [(int(a), int(b)) for a, b in zip(starts[:-1], starts[1:])]


def test_a_block_or_a_view_still_held_keeps_its_buffer(tmp_path):
    cache, blocks, spans = _filled(tmp_path, reuse=1)
    with cache:
        first = cache.get(*spans[0])
        view = first[1:, 2:]  # a view: numpy refers it to the buffer's owner
        del first
        second = cache.get(*spans[1])
        third = cache.get(*spans[2])
        assert not np.shares_memory(view, second) and not np.shares_memory(view, third)
        assert not np.shares_memory(second, third)
        np.testing.assert_array_equal(view, blocks[0][1:, 2:])
        np.testing.assert_array_equal(second, blocks[1])
        np.testing.assert_array_equal(third, blocks[2])


def test_a_buffer_nothing_refers_to_is_handed_out_again(tmp_path):
    cache, blocks, spans = _filled(tmp_path, reuse=1)
    with cache:
        first = cache.get(*spans[0])  # the smallest block: the kept buffer fits the largest
        assert len(cache._kept) == 1 and np.shares_memory(first, cache._kept[0])
        where = first.ctypes.data  # (holding the kept buffer here would keep it in use)
        del first
        again = cache.get(*spans[1])
        assert again.ctypes.data == where and len(cache._kept) == 1
        np.testing.assert_array_equal(again, blocks[1])


def test_without_reuse_every_read_is_fresh(tmp_path):
    cache, blocks, spans = _filled(tmp_path, reuse=0)
    with cache:
        for (a, b), block in zip(spans, blocks):
            np.testing.assert_array_equal(cache.get(a, b), block)
        assert cache._kept == []
