#!/usr/bin/env python
"""Benchmark the split-half stability of the axes against one fit, side by side in one run.

The script writes a planted float32 matrix (``rank`` axes of decreasing strength over
Gaussian noise, shifted away from zero) as an uncompressed ``.npy`` file in ``--data-dir``
(generated block by block, cached), then times in this one process, one after the other:

* ``fit``: ``axiscope.fit(path, n_components=k)`` (standardized PCA, randomized, defaults);
* ``fit + stability``: the same fit with ``then=`` running
  :func:`axiscope.decide.stability.axis_stability` (``repeats`` splits) on the fit's cached
  blocks; the stability's own wall time and passes are taken from its record;
* ``stability, input read again``: ``axis_stability(open_matrix(path), result)`` after the fit
  (every pass decodes the input again);
* ``halves fitted one by one`` (unless ``--no-halves``): ``2·repeats`` separate fits, one per
  half (``active=`` the half's samples), the cost without shared reads.

Ratios are to the wall time of the plain fit in the same run. The report (Markdown) is
printed and, with ``--out FILE``, appended to FILE.

Example::

    python scripts/bench_stability.py --size 20000x20000 --repeats 3 --out BENCHMARKS.md
"""

from __future__ import annotations

import argparse
import datetime as _dt
import os
import platform
import shlex
import subprocess
import sys
import time
from pathlib import Path

import numpy as np


def make_matrix(path: Path, n: int, p: int, rank: int, seed: int = 0, block: int = 2000) -> Path:
    """Planted rank-``rank`` signal (axis strengths 3, 2.5, 2, … times the noise per feature)
    plus standard Gaussian noise, float32, written as ``.npy`` block by block."""
    if path.is_file():
        return path
    rng = np.random.default_rng(seed)
    V = np.linalg.qr(rng.standard_normal((p, rank)))[0].astype(np.float32)
    strengths = (3.0 - 0.5 * np.arange(rank)) * np.sqrt(p / 4)
    tmp = path.with_suffix(".tmp.npy")
    out = np.lib.format.open_memmap(tmp, mode="w+", dtype=np.float32, shape=(n, p))
    for a in range(0, n, block):
        b = min(n, a + block)
        U = rng.standard_normal((b - a, rank)).astype(np.float32)
        out[a:b] = (U * strengths.astype(np.float32)) @ V.T + rng.standard_normal((b - a, p), dtype=np.float32) + 10
    out.flush()
    del out
    tmp.rename(path)
    return path


def run(path: Path, k: int, repeats: int, threads: int | None, halves: bool) -> list[dict]:
    from axiscope import fit
    from axiscope.core.options import Resources
    from axiscope.decide.stability import axis_stability
    from axiscope.io import open_matrix

    resources = Resources(threads=threads)
    rows = []
    t0 = time.perf_counter()
    plain = fit(path, n_components=k, resources=resources)
    fit_wall = time.perf_counter() - t0
    rows.append({"run": "fit", "wall": fit_wall, "passes": plain.manifest["passes"]["count"],
                 "notes": f"plan cache: {plain.manifest['plan']['cache']}"})
    _done(rows[-1])

    held = {}

    def then(result, blocks):
        held["stability"] = axis_stability(blocks, result, stability_repeats=repeats, threads=threads)

    t0 = time.perf_counter()
    with_stability = fit(path, n_components=k, resources=resources, then=then)
    both_wall = time.perf_counter() - t0
    stab = held["stability"]
    values = ", ".join(f"{v:.2f}" for v in stab.value)
    rows.append({"run": "fit + stability (then=)", "wall": both_wall,
                 "passes": with_stability.manifest["passes"]["count"] + stab.passes,
                 "notes": f"of which stability {stab.seconds:.1f} s, {stab.passes} passes from {stab.read_from}"})
    rows.append({"run": f"stability alone ({repeats} splits, fit's cache)", "wall": stab.seconds,
                 "passes": stab.passes, "notes": f"per axis: {values}"})
    _done(rows[-2])
    _done(rows[-1])

    with open_matrix(path) as src:
        again = axis_stability(src, plain, stability_repeats=repeats, threads=threads)
    rows.append({"run": "stability, input read again", "wall": again.seconds, "passes": again.passes,
                 "notes": f"read from {again.read_from}; same values: "
                          f"{np.allclose(again.per_repeat, stab.per_repeat, atol=1e-4)}"})
    _done(rows[-1])

    if halves:
        n = plain.model.n_samples
        rng = np.random.default_rng(0)
        t0 = time.perf_counter()
        passes = 0
        for _ in range(repeats):
            labels = np.ones(n, dtype=bool)
            labels[rng.permutation(n)[: n // 2]] = False
            for mask in (labels, ~labels):
                half = fit(path, n_components=k, resources=resources, active=mask)
                passes += half.manifest["passes"]["count"]
                print(f"half fitted: {half.manifest['seconds']:.1f} s", file=sys.stderr, flush=True)
        rows.append({"run": f"{2 * repeats} halves fitted one by one", "wall": time.perf_counter() - t0,
                     "passes": passes, "notes": "no shared reads; each half fit decodes and caches its own blocks"})
    for row in rows:
        row["ratio"] = row["wall"] / fit_wall
    return rows


def _done(row: dict) -> None:
    """Each measurement as soon as it is taken (standard error), so that a stopped run keeps them."""
    print(f"{row['run']}: {row['wall']:.1f} s, {row['passes']} passes; {row['notes']}", file=sys.stderr, flush=True)


def report(rows: list[dict], args, n: int, p: int) -> str:
    def cmd(c):
        return subprocess.run(c, capture_output=True, text=True, shell=True).stdout.strip()

    memory = cmd("free -g | awk '/Mem:/ {print $2}'")
    lines = [
        f"## Split-half stability: {n:,} × {p:,} float32, {args.repeats} splits, k = {args.components}",
        "",
        f"Command: `python {' '.join(shlex.quote(a) for a in sys.argv)}`; date {_dt.date.today()}; machine: "
        f"{cmd('nproc')} cores, {memory} GB memory, {platform.platform()}, "
        f"Python {platform.python_version()}; load average at the end {os.getloadavg()[0]:.1f} "
        "(the machine was shared with other jobs).",
        "",
        "| run | wall s | ratio to one fit | passes | notes |",
        "|---|---:|---:|---:|---|",
    ]
    lines += [f"| {r['run']} | {r['wall']:.1f} | {r['ratio']:.2f} | {r['passes']} | {r['notes']} |" for r in rows]
    return "\n".join(lines) + "\n"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--size", default="20000x20000", help="samples x features")
    parser.add_argument("--rank", type=int, default=5, help="planted axes")
    parser.add_argument("--components", type=int, default=10, help="axes fitted")
    parser.add_argument("--repeats", type=int, default=3, help="random splits into halves")
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--data-dir", type=Path, default=Path("bench-data"))
    parser.add_argument("--no-halves", action="store_true", help="skip fitting the halves one by one")
    parser.add_argument("--out", type=Path, default=None, help="append the report to this file")
    args = parser.parse_args()
    n, p = (int(v) for v in args.size.lower().split("x"))
    args.data_dir.mkdir(parents=True, exist_ok=True)
    path = make_matrix(args.data_dir / f"stability_{n}x{p}_r{args.rank}.npy", n, p, args.rank)
    text = report(run(path, args.components, args.repeats, args.threads, not args.no_halves), args, n, p)
    print(text)
    if args.out:
        with open(args.out, "a", encoding="utf-8") as handle:
            handle.write("\n" + text)


if __name__ == "__main__":
    main()
