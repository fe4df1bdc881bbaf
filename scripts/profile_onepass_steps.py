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
    parser.add_argument("--timeline", action="store_true",
                        help="also sample every thread's CPU time (/proc/self/task) and print the cores busy per "
                             "0.25 s, by kind of thread, with the fit's phases")
    args = parser.parse_args()
    if args.timeline:
        return timeline(sorted(glob.glob(args.path))[0], args.memory_limit, args.components)
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


def _thread_times() -> dict[int, tuple[str, float]]:
    """``{tid: (Python thread name, CPU seconds)}`` of every thread of this process, from ``/proc/self/task``."""
    import os

    tick = os.sysconf("SC_CLK_TCK")
    names = {t.native_id: t.name for t in threading.enumerate()}
    out = {}
    for tid in os.listdir("/proc/self/task"):
        try:
            with open(f"/proc/self/task/{tid}/stat") as handle:
                stat = handle.read()
        except OSError:
            continue
        name = names.get(int(tid), "not a Python thread")
        fields = stat[stat.rindex(")") + 2 :].split()
        out[int(tid)] = (name, (int(fields[11]) + int(fields[12])) / tick)
    return out


def _kind(name: str, main: str) -> str:
    if name.startswith("axiscope-read"):
        return "reading threads"
    if name.startswith("axiscope"):
        return "working threads"
    if name == main:
        return "calling thread"
    return "other threads"  # the decoder's own, Dask's lookup


def timeline(path: str, memory_limit: str, k: int, step: float = 0.25) -> int:
    """One fit with every thread's CPU sampled every ``step`` seconds: the cores busy per step,
    by kind of thread (reading, working, calling, others: the decoder's own threads), and
    when the pass started and ended, so that idle time at the start, during the pass and
    after it can be seen."""
    import axiscope.core.onepass as onepass
    from axiscope import EngineSettings, PreprocessSpec, Resources, fit
    from axiscope.core.passes import PassRunner

    marks: list[tuple[float, str]] = []
    t0 = time.perf_counter()
    run = PassRunner.run

    def marked_run(self, name, *a, **kw):
        marks.append((time.perf_counter() - t0, "pass starts"))
        try:
            return run(self, name, *a, **kw)
        finally:
            marks.append((time.perf_counter() - t0, "pass ends"))

    PassRunner.run = marked_run
    main = threading.main_thread().name
    samples: list[tuple[float, dict]] = []
    done = threading.Event()

    def sample():
        while not done.is_set():
            samples.append((time.perf_counter() - t0, _thread_times()))
            done.wait(step)

    sampler = threading.Thread(target=sample, name="sampler", daemon=True)
    sampler.start()
    result = fit(path, n_components=k, preprocess=PreprocessSpec(scale="none"),
                 engine=EngineSettings(method="one-pass", seed=0), resources=Resources(memory_limit=memory_limit))
    marks.append((time.perf_counter() - t0, "fit returns"))
    done.set()
    sampler.join()
    samples.append((time.perf_counter() - t0, _thread_times()))
    plan = result.manifest["plan"]
    print(f"axiscope from {onepass.__file__}; blocks of {plan['block_rows']} rows, {plan['threads']} threads, "
          f"read ahead {plan.get('read_ahead', '-')}")
    kinds = ["reading threads", "working threads", "calling thread", "other threads"]
    print("    t s  cores busy: " + " | ".join(kinds) + " | total")
    totals = defaultdict(float)
    for (ta, a), (tb, b) in zip(samples[:-1], samples[1:]):
        busy = defaultdict(float)
        for tid, (name, cpu) in b.items():
            if tid == threading.get_native_id():
                continue  # the sampler
            busy[_kind(name, main)] += cpu - a.get(tid, (name, 0.0))[1]
        for kind in kinds:
            totals[kind] += busy[kind]
        events = ", ".join(label for t, label in marks if ta < t <= tb)
        print(f"  {tb:5.2f}  " + " ".join(f"{busy[kind] / (tb - ta):5.2f}" for kind in kinds)
              + f"  {sum(busy.values()) / (tb - ta):5.2f}  {events}")
    print("CPU s by kind: " + ", ".join(f"{kind} {totals[kind]:.2f}" for kind in kinds))
    print("marks: " + ", ".join(f"{label} {t:.2f} s" for t, label in marks))
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
