#!/usr/bin/env python
"""Benchmark ``axiscope score``: new samples scored against a saved model, out of core.

The script builds (and caches in ``--data-dir``) a planted low-rank + noise float32 matrix
of new samples in a Zarr store, written block by block, plus a smaller training store
from the same distribution, and fits and saves a model on the training store. It then
runs, each in a process of its own and measured from outside (wall time around the child;
peak resident memory from the child's own ``wait4`` resource usage):

* ``floor``: one streaming read of the new-sample store in row blocks (threads as for
  scoring), timed inside the process;
* ``score``: :func:`axiscope.scoring.score` on the store (one streaming pass: features
  matched by id, preprocessing replayed, scores, T² and Q), then writing ``scores.tsv``,
  ``diagnostics.tsv`` and ``manifest.json`` (timed separately).

It reports throughput (samples/s and decoded GB/s), the ratio of the scoring time to the
streaming read (target ≤ 1.3) and the peak RSS next to the memory budget. The report is
printed and, with ``--out FILE``, appended to FILE (e.g. BENCHMARKS.md).

Examples
--------
Small smoke run (seconds)::

    python scripts/bench_score.py --new 2000 --features 3000 --train 500 --data-dir /tmp/bench-score-small

Full size of the issue (100,000 new samples × 20,000 features; about 8 GB of disk)::

    python scripts/bench_score.py --out BENCHMARKS.md

Notes
-----
The parent imports only the standard library so that the children's ``ru_maxrss`` (which
on Linux starts from the parent's resident size at exec) is their own.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import resource
import shlex
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SCRIPT = Path(__file__).resolve()
BLOCK_BYTES = 64 * 2**20


def _fmt_bytes(n: float | None) -> str:
    if n is None:
        return ""
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.2f} {unit}"
    return f"{n:.0f} B"


def _spans(n: int, rows: int) -> list[tuple[int, int]]:
    return [(a, min(n, a + rows)) for a in range(0, n, rows)]


# ------------------------------------------------------------------------------ workers


def worker_generate(job: dict) -> dict:
    """Write the training and new-sample stores (same planted distribution), with ids."""
    import numpy as np
    import zarr

    p, r = job["p"], job["rank"]
    rng = np.random.default_rng(job["seed"])
    V, _ = np.linalg.qr(rng.standard_normal((p, r)))
    d = job["decay"] ** np.arange(r)
    d *= np.sqrt(p / np.sum(d**2))  # planted signal of unit variance per entry
    W = d[:, None] * V.T
    mu = rng.uniform(0.0, 5.0, size=p)
    feature_ids = np.array([f"gene{j:06d}" for j in range(p)])
    for name, n, seed in (("train", job["n_train"], 1), ("new", job["n_new"], 2)):
        group = zarr.open_group(job[name], mode="w")
        arr = group.create_array("X", shape=(n, p), dtype="float32", chunks=(max(1, min(n, 2**22 // p)), p))
        rows = max(arr.chunks[0], (BLOCK_BYTES // (4 * p)) // arr.chunks[0] * arr.chunks[0])
        for a, b in _spans(n, rows):
            g = np.random.default_rng([job["seed"], seed, a])
            block = g.standard_normal((b - a, r)) @ W + mu + job["noise"] * g.standard_normal((b - a, p))
            arr[a:b] = block.astype(np.float32)
            print(f"  {name}: rows {b}/{n}", file=sys.stderr, flush=True)
        ids = group.create_array("feature_ids", shape=(p,), dtype=str)
        ids[:] = feature_ids
        s_ids = group.create_array("sample_ids", shape=(n,), dtype=str)
        s_ids[:] = np.array([f"{name}{i:07d}" for i in range(n)])
    return {"chunks": list(arr.chunks)}


def worker_model(job: dict) -> dict:
    from axiscope import InputLayout, Resources, fit

    t0 = time.perf_counter()
    result = fit(job["train"], n_components=job["k"],
                 resources=Resources(memory_limit=job["memory_limit"], threads=job["threads"]),
                 layout=InputLayout(dataset="X"))
    result.model.save(Path(job["model"]))
    return {"seconds": time.perf_counter() - t0}


def worker_floor(job: dict) -> dict:
    """One streaming read of the store in row blocks, ``threads`` at a time."""
    from concurrent.futures import ThreadPoolExecutor

    import zarr

    arr = zarr.open_group(job["new"], mode="r")["X"]
    n, p = arr.shape
    rows = max(arr.chunks[0], (BLOCK_BYTES // (4 * p)) // arr.chunks[0] * arr.chunks[0])
    threads = job["threads"] or os.cpu_count() or 1
    t0 = time.perf_counter()
    with ThreadPoolExecutor(max_workers=threads) as pool:
        list(pool.map(lambda s: float(arr[s[0]:s[1]][0, 0]), _spans(n, rows)))
    return {"seconds": time.perf_counter() - t0, "block_rows": rows}


def worker_score(job: dict) -> dict:
    from axiscope.scoring.score import score

    t0 = time.perf_counter()
    result = score(job["model"], job["new"], dataset="X", memory_limit=job["memory_limit"], threads=job["threads"])
    seconds = time.perf_counter() - t0
    with tempfile.TemporaryDirectory(dir=job["workdir"]) as out:
        t1 = time.perf_counter()
        result.write(Path(out))
        write_seconds = time.perf_counter() - t1
    passes = result.manifest["passes"]
    return {"seconds": seconds, "write_seconds": write_seconds, "passes": len(passes),
            "flags": result.manifest["counts"]["flags"], "q_method": result.q_method}


WORKERS = {"generate": worker_generate, "model": worker_model, "floor": worker_floor, "score": worker_score}


def _worker_main(name: str, job_path: str) -> int:
    job = json.loads(Path(job_path).read_text())
    if job.get("threads"):
        from threadpoolctl import threadpool_limits

        threadpool_limits(limits=1, user_api="blas")  # the blocks run on their own threads
    result = WORKERS[name](job)
    Path(job["result"]).write_text(json.dumps(result))
    return 0


# ------------------------------------------------------------------------------- parent


def run_child(name: str, job: dict, workdir: Path) -> tuple[dict, float, int]:
    """Run a worker in a fresh interpreter; return its result, wall seconds and peak RSS."""
    job = dict(job, result=str(workdir / f"{name}-result.json"), workdir=str(workdir))
    job_path = workdir / f"{name}-job.json"
    job_path.write_text(json.dumps(job))
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, str(SCRIPT), "--worker", name, "--job", str(job_path)],
                            stderr=subprocess.PIPE, text=True)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    err = proc.stderr.read() if proc.stderr else ""
    code = os.waitstatus_to_exitcode(status)
    if code != 0:
        raise SystemExit(f"worker {name} failed (exit {code}):\n{err[-2000:]}")
    return json.loads(Path(job["result"]).read_text()), wall, usage.ru_maxrss * 1024


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--new", type=int, default=100_000, help="new samples to score (default 100000)")
    ap.add_argument("--features", type=int, default=20_000, help="features (default 20000)")
    ap.add_argument("--train", type=int, default=5_000, help="training samples of the model (default 5000)")
    ap.add_argument("--components", "-k", type=int, default=20, help="model components (default 20)")
    ap.add_argument("--rank", type=int, default=30, help="planted rank (default 30)")
    ap.add_argument("--decay", type=float, default=0.9, help="planted spectrum decay (default 0.9)")
    ap.add_argument("--noise", type=float, default=1.0, help="noise SD per entry (default 1)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--memory-limit", default="1GB", help="memory budget of fit and score (default 1GB)")
    ap.add_argument("--threads", type=int, default=None, help="threads (default: all cores)")
    ap.add_argument("--data-dir", default="bench-data", help="where the stores and the model are cached")
    ap.add_argument("--out", default=None, help="append the Markdown report to this file")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--job", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        return _worker_main(args.worker, args.job)

    n, p = args.new, args.features
    data = Path(args.data_dir) / f"score-{args.train}-{n}x{p}-r{args.rank}-s{args.seed}"
    data.mkdir(parents=True, exist_ok=True)
    paths = {"train": str(data / "train.zarr"), "new": str(data / "new.zarr"), "model": str(data / f"model-k{args.components}")}
    common = {"threads": args.threads, "memory_limit": args.memory_limit, **paths}
    with tempfile.TemporaryDirectory(prefix="bench-score-") as tmp:
        workdir = Path(tmp)
        if not (data / "complete").exists():
            print(f"generating {args.train} + {n} samples × {p} features in {data} ...", file=sys.stderr)
            run_child("generate", dict(common, p=p, n_train=args.train, n_new=n, rank=args.rank,
                                       decay=args.decay, noise=args.noise, seed=args.seed), workdir)
            (data / "complete").write_text("ok\n")
        if not (Path(paths["model"]) / "model.json").exists():
            print("fitting the model ...", file=sys.stderr)
            run_child("model", dict(common, k=args.components), workdir)
        print("one streaming read ...", file=sys.stderr)
        floor, floor_wall, floor_rss = run_child("floor", common, workdir)
        print("scoring ...", file=sys.stderr)
        scored, score_wall, score_rss = run_child("score", common, workdir)

    decoded = n * p * 4
    ratio = scored["seconds"] / floor["seconds"]
    lines = [
        f"## axiscope score benchmark — {_dt.datetime.now().astimezone().isoformat(timespec='seconds')}",
        "",
        f"Command: `{shlex.join(['python', os.path.relpath(SCRIPT)] + argv)}`",
        "",
        f"Machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
        f"{platform.system()} {platform.release()}, Python {platform.python_version()}; "
        f"--threads {args.threads or 'default (all cores)'}; memory limit {args.memory_limit}.",
        "",
        f"Data: {n:,} new samples × {p:,} features, float32 Zarr (`{paths['new']}`, decoded "
        f"{_fmt_bytes(decoded)}); model: {args.components} components fitted on {args.train:,} samples "
        f"of the same planted distribution (rank {args.rank}).",
        "",
        "| run | wall s (process) | inside s | samples/s | GB/s (decoded) | peak RSS | notes |",
        "|---|---:|---:|---:|---:|---:|---|",
        f"| one streaming read | {floor_wall:.2f} | {floor['seconds']:.2f} | {n / floor['seconds']:,.0f} | "
        f"{decoded / floor['seconds'] / 1e9:.2f} | {_fmt_bytes(floor_rss)} | row blocks of {floor['block_rows']} |",
        f"| axiscope score | {score_wall:.2f} | {scored['seconds']:.2f} | {n / scored['seconds']:,.0f} | "
        f"{decoded / scored['seconds'] / 1e9:.2f} | {_fmt_bytes(score_rss)} | {scored['passes']} pass; writing "
        f"the tables took {scored['write_seconds']:.2f} s more; flags {scored['flags']}; Q limit {scored['q_method']} |",
        "",
        f"Scoring / streaming read (inside times): **{ratio:.2f}×** (target ≤ 1.3). Peak RSS of scoring "
        f"{_fmt_bytes(score_rss)} with a memory limit of {args.memory_limit} (RSS includes the interpreter "
        "and libraries).",
        "",
    ]
    report = "\n".join(lines)
    print(report)
    if args.out:
        with open(args.out, "a", encoding="utf-8") as fh:
            fh.write(report + "\n")
    print(f"parent peak RSS {_fmt_bytes(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
