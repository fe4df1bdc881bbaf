#!/usr/bin/env python
"""Cost of adjusting for covariates: passes and wall time, as a ratio to the unadjusted fit.

Builds a planted float32 matrix on disk (an uncompressed, contiguous HDF5 dataset written
block by block: low rank + noise, a three-level batch shift and a depth trend) and an
annotation table (``batch``, ``depth``). Then runs, alternately and each in a process of its
own, ``axiscope.fit(path, n_components=k)`` without and with
``covariates=Covariates(table, ["batch", "depth"])`` (randomized method, default settings
otherwise), ``--repeats`` times each. Reported per variant: median wall time of the fit
(the manifest's ``seconds``), passes over the data, power iterations; and the ratios
adjusted / unadjusted of the medians. The machine may be shared: compare within one run.

Example::

    python scripts/bench_adjust.py --size 10000x10000 --repeats 3 --data-dir /tmp/bench_adjust
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import statistics
import subprocess
import sys
from pathlib import Path

CHILD = r"""
import json, sys, time
from axiscope import Resources
from axiscope.core.adjust import Covariates
from axiscope.core.options import EngineSettings
from axiscope.fitting.run import fit
path, table, k, threads, adjusted = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), sys.argv[5] == "1"
t0 = time.perf_counter()
result = fit(path, n_components=k, engine=EngineSettings(method="randomized"), resources=Resources(threads=threads),
             covariates=Covariates(table, ["batch", "depth"]) if adjusted else None)
m = result.manifest
detail = m["passes"]["detail"]
print(json.dumps({"seconds": m["seconds"], "outside": time.perf_counter() - t0, "passes": m["passes"]["count"],
                  "statistics": detail[0]["seconds"], "later": sum(d["seconds"] for d in detail[1:]),
                  "iterations": m["accuracy"]["power_iterations_run"],
                  "s1": float(result.model.singular_values[0]), "ratio1": float(result.model.variance_ratio[0])}))
"""

MAKE = r"""
import sys
import h5py, numpy as np
n, p, path, table = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3], sys.argv[4]
rng = np.random.default_rng(0)
r = 20
basis = (rng.standard_normal((r, p)) * np.linspace(8, 1, r)[:, None]).astype(np.float32)
shift_b, shift_c = rng.normal(0, 3, p).astype(np.float32), rng.normal(0, 2, p).astype(np.float32)
trend = rng.normal(0, 0.5, p).astype(np.float32)
batch = rng.choice(["A", "B", "C"], n)
depth = rng.normal(10.0, 2.0, n)
with h5py.File(path, "w") as f:
    d = f.create_dataset("X", (n, p), dtype="float32")
    for a in range(0, n, 2000):
        b = min(n, a + 2000)
        block = rng.standard_normal((b - a, r)).astype(np.float32) @ basis
        block += rng.standard_normal((b - a, p)).astype(np.float32)
        block += (batch[a:b] == "B")[:, None] * shift_b + (batch[a:b] == "C")[:, None] * shift_c
        block += depth[a:b, None].astype(np.float32) * trend
        d[a:b] = block
with open(table, "w") as fh:
    fh.write("sample_id\tbatch\tdepth\n")
    for i in range(n):
        fh.write(f"sample_{i + 1:0{max(6, len(str(n)))}d}\t{batch[i]}\t{depth[i]:.6f}\n")
"""


def run(args: list[str]) -> str:
    return subprocess.run([sys.executable, "-c", *args], check=True, capture_output=True, text=True).stdout


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", default="10000x10000", help="samples x features")
    parser.add_argument("--components", type=int, default=10)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--data-dir", type=Path, default=Path("/tmp/bench_adjust"))
    parser.add_argument("--out", type=Path, help="append the report to this file")
    args = parser.parse_args()
    n, p = (int(v) for v in args.size.lower().split("x"))
    args.data_dir.mkdir(parents=True, exist_ok=True)
    path = args.data_dir / f"planted_{n}x{p}.h5"
    table = args.data_dir / f"annotations_{n}.tsv"
    if not path.is_file() or not table.is_file():
        run([MAKE, str(n), str(p), str(path), str(table)])
    results: dict[str, list[dict]] = {"unadjusted": [], "adjusted": []}
    for _ in range(args.repeats):  # alternate, so that load changes hit both alike
        for name, flag in (("unadjusted", "0"), ("adjusted", "1")):
            out = run([CHILD, str(path), str(table), str(args.components), str(args.threads), flag])
            results[name].append(json.loads(out.strip().splitlines()[-1]))
    keys = ("seconds", "passes", "iterations", "statistics", "later")
    med = {name: {key: statistics.median(r[key] for r in runs) for key in keys} for name, runs in results.items()}
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    lines = [
        f"Command: `python scripts/bench_adjust.py --size {args.size} --components {args.components} "
        f"--repeats {args.repeats} --threads {args.threads}`; {_dt.date.today().isoformat()}; "
        f"{platform.machine()}, {os.cpu_count()} cores, {mem:.0f} GB memory (shared with other jobs).",
        "",
        "| fit | median wall (s) | statistics pass (s) | later passes (s) | passes | power iterations | all walls (s) |",
        "|---|---|---|---|---|---|---|",
    ]
    for name, runs in results.items():
        walls = ", ".join(f"{r['seconds']:.1f}" for r in runs)
        lines.append(f"| {name} | {med[name]['seconds']:.1f} | {med[name]['statistics']:.1f} | "
                     f"{med[name]['later']:.1f} | {med[name]['passes']:g} | {med[name]['iterations']:g} | {walls} |")
    wall = med["adjusted"]["seconds"] / med["unadjusted"]["seconds"]
    passes = med["adjusted"]["passes"] / med["unadjusted"]["passes"]
    per_pass = wall / passes
    stats_ratio = med["adjusted"]["statistics"] / med["unadjusted"]["statistics"]
    later_ratio = med["adjusted"]["later"] / med["unadjusted"]["later"]
    pairs = sorted(a["seconds"] / u["seconds"] for u, a in zip(results["unadjusted"], results["adjusted"]))
    lines += ["", f"Adjusted / unadjusted (medians): wall {wall:.2f}×, passes {passes:.2f}×, wall per pass "
                  f"{per_pass:.2f}×; statistics pass {stats_ratio:.2f}×, later passes {later_ratio:.2f}×.",
              f"Ratio within each back-to-back pair (unadjusted then adjusted): median {statistics.median(pairs):.2f}× "
              f"(all: {', '.join(f'{r:.2f}' for r in pairs)})."]
    report = "\n".join(lines)
    print(report)
    if args.out:
        with open(args.out, "a") as fh:
            fh.write("\n" + report + "\n")


if __name__ == "__main__":
    main()
