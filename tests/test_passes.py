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


def test_a_threaded_pass_does_not_import_dask_distributed():
    """Blocks are computed by Dask's synchronous scheduler given as a function: by its name,
    dask looks for a distributed client first and imports dask.distributed (0.2–0.35 s on the
    first block of every threaded fit). Checked in a fresh interpreter, where nothing else has
    imported it; the check fails with ``scheduler="synchronous"``."""
    import subprocess
    import sys

    code = (
        "import sys, numpy as np\n"
        "from axiscope.core.passes import PassRunner, array_from_blocks\n"
        "X = array_from_blocks(lambda i: np.ones((4, 3)), [4, 4, 4], 3, np.float64, 'import-test')\n"
        "PassRunner(threads=2).run('t', 's', X, lambda b: b.sum(), lambda r, i, s: None)\n"
        "print('distributed' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
