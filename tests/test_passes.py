"""Streaming passes: the local pipeline and the windowed path used with a cluster agree."""

from __future__ import annotations

import numpy as np

from axiscope.core import passes
from axiscope.core.options import EngineSettings, Resources
from axiscope.core.passes import PassRunner, array_from_blocks
from axiscope.fitting.run import fit
from axiscope.io import array_source


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


def test_windowed_path_for_a_cluster_gives_the_same_fit(monkeypatch):
    # The path taken when a distributed client is the default scheduler computes windows of
    # blocks with dask.compute; the fit must not depend on which path ran (the local path's
    # result is the reference; both fold in block order, so they agree to the last bit).
    X = np.random.default_rng(5).standard_normal((600, 80))
    local = fit(array_source(X), n_components=4, engine=EngineSettings(method="randomized"),
                resources=Resources(memory_limit="20MB", threads=2))
    monkeypatch.setattr(passes, "_local_scheduler", lambda: False)
    windowed = fit(array_source(X), n_components=4, engine=EngineSettings(method="randomized"),
                   resources=Resources(memory_limit="20MB", threads=2))
    assert local.manifest["passes"]["detail"][0]["blocks"] > 2
    np.testing.assert_array_equal(local.model.singular_values, windowed.model.singular_values)
    np.testing.assert_array_equal(local.scores, windowed.scores)
