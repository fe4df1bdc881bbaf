"""Where the one-pass fit's time goes: thread CPU time of each step of its block task.

Usage (the Zarr matrix of ``scripts/bench_onepass.py``; one fit per call)::

    flock /work/bench.lock python scripts/profile_onepass_steps.py \\
        '/work/tmp/onepass2/planted-40000x20000-*/matrix.zarr' 1GB

Fits the matrix once (``method="one-pass"``, centred, no scaling, ``seed=0``) with the steps
wrapped in timers and prints, summed over the blocks: the thread CPU and wall time of the
block reads (``MatrixSource.read_samples``: decoding, the chunk band, the copy), of the
statistics (``onepass._shift``, the shift from a few rows, and ``onepass._sum_squares``),
of the whole block task (``onepass._task``) and of the folding of each block's results
(``onepass._ShiftedSums.fold``, on the calling thread); the task less the statistics is
the shift's subtraction and the two products; what the process spent outside the reads,
tasks and folds (the small factorisations after the pass, the rest of the fit, threads
waiting) is the rest of its CPU time. With ``--read-only``, the same pass with a block task
that does nothing: what the fit's reading alone costs. Thread CPU times add up over threads, so they exceed
the wall time when two threads work at once.
"""

from __future__ import annotations

import argparse
import glob
import threading
import time
from collections import defaultdict


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("path", help="the matrix (a glob pattern is expanded; the first match is used)")
    parser.add_argument("memory_limit", help="e.g. 1GB")
    parser.add_argument("--components", "-k", type=int, default=20)
    parser.add_argument("--read-only", action="store_true",
                        help="only the fit's reading: the same reader, blocks and threads, a task that does nothing")
    args = parser.parse_args()
    if args.read_only:
        return read_only(sorted(glob.glob(args.path))[0], args.memory_limit, args.components)

    import axiscope.core.onepass as onepass
    from axiscope import EngineSettings, PreprocessSpec, Resources, fit
    from axiscope.io.source import MatrixSource

    spent: dict[str, float] = defaultdict(float)
    lock = threading.Lock()

    def timed(name, function):
        def wrapper(*a, **k):
            cpu, wall = time.thread_time(), time.perf_counter()
            result = function(*a, **k)
            with lock:
                spent[name] += time.thread_time() - cpu
                spent[name + " (wall)"] += time.perf_counter() - wall
            return result
        return wrapper

    def wrap(owner, attr, name):  # (only what this version of the code has: earlier ones differ)
        if hasattr(owner, attr):
            setattr(owner, attr, timed(name, getattr(owner, attr)))

    wrap(onepass, "_shift", "statistics: shift")
    wrap(onepass, "_sum_squares", "statistics: sums of squares")
    wrap(onepass, "_shifted", "statistics: shifted copy (earlier code)")
    wrap(onepass, "_task", "whole block task")
    if hasattr(onepass, "_ShiftedSums"):
        wrap(onepass._ShiftedSums, "fold", "folding")
    MatrixSource.read_samples = timed("block reads", MatrixSource.read_samples)
    path = sorted(glob.glob(args.path))[0]
    wall, cpu = time.perf_counter(), time.process_time()
    result = fit(path, n_components=args.components, preprocess=PreprocessSpec(scale="none"),
                 engine=EngineSettings(method="one-pass", seed=0), resources=Resources(memory_limit=args.memory_limit))
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    plan = result.manifest["plan"]
    print(f"axiscope from {onepass.__file__}")
    print(f"fit wall {wall:.2f} s, process CPU {cpu:.2f} s, blocks of {plan['block_rows']} rows, "
          f"{plan['threads']} threads, passes {result.manifest['passes']['detail']}")
    for name, seconds in spent.items():
        print(f"  {name:34s} {seconds:7.2f} s")
    statistics = sum(seconds for name, seconds in spent.items() if name.startswith("statistics") and "(wall)" not in name)
    print(f"  {'subtraction + products (task − statistics)':34s} {spent['whole block task'] - statistics:7.2f} s CPU")
    outside = cpu - spent["whole block task"] - spent["block reads"] - spent["folding"]
    print(f"  {'outside reads, tasks and folds':34s} {outside:7.2f} s CPU")
    return 0


def read_only(path: str, memory_limit: str, k: int) -> int:
    """The one-pass fit's pass with its block task replaced by one that does nothing: what the
    fit's reading costs (decoding, the chunk bands, the copy, the value check), to set beside
    ``bench_onepass.py``'s floor."""
    import numpy as np

    import axiscope.fitting.run as run
    from axiscope.core.options import EngineSettings, Resources
    from axiscope.core.passes import PassRunner
    from axiscope.core.plan import plan_fit
    from axiscope.core.preprocess import PreprocessSpec
    from axiscope.io import open_matrix

    src = open_matrix(path)
    spec = PreprocessSpec(scale="none")
    plan = plan_fit(src, n_components=k, preprocess=spec, engine=EngineSettings(method="one-pass"),
                    resources=Resources(memory_limit=memory_limit))
    reader = run._Reader(src, spec, np.ones(src.shape[0], dtype=bool), plan.block_rows)
    runner = PassRunner(threads=plan.threads)
    wall, cpu = time.perf_counter(), time.process_time()
    runner.run("read only", "input", reader.array("read"), lambda block: block.shape[0], lambda *a: None)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    print(f"the fit's reading alone: wall {wall:.2f} s, process CPU {cpu:.2f} s, blocks of {plan.block_rows} rows, "
          f"{plan.threads} threads")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
