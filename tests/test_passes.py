"""Streaming passes on the threaded back-end (the cluster back-end: tests/test_cluster.py)."""

from __future__ import annotations

import numpy as np

from axiscope.core.passes import PassRunner, array_from_blocks


def test_blocks_are_folded_in_order_with_their_offsets():
    # reference: the blocks written by the test itself, in order
    sizes = [3, 5, 1, 4, 2, 6]
    X = array_from_blocks(lambda i: np.full((sizes[i], 2), float(i)), sizes, 2, np.float64, "order-test")
    seen = []
    PassRunner(threads=2).run("t", "s", X, lambda block: block[:, 0].copy(),
                              lambda result, index, start: seen.append((index, start, result)))
    assert [s[0] for s in seen] == list(range(len(sizes)))
    assert [s[1] for s in seen] == list(np.cumsum([0] + sizes[:-1]))
    for index, _, values in seen:
        np.testing.assert_array_equal(values, np.full(sizes[index], float(index)))
