#!/usr/bin/env python
"""Cost of deciding how many axes carry signal, as a ratio to one fit's wall time.

Builds a planted float32 matrix (rank 5 + unit Gaussian noise) as an ``.npy`` file in
``--data-dir`` (row block by row block), then times, in this one process and in this order:

1. ``fit``: ``axiscope.fit(path, n_components=10)``, the plain fit (standardised PCA);
2. ``candidates``: ``axiscope.fit(path, n_components=--max-components)``, what
   ``--components auto`` fits before deciding;
3. ``signal``: :func:`axiscope.decide.signal.assess_signal` on the candidates: one pass to
   read the subsample, then ``1 + --permutations`` spectra of it.

It prints a Markdown table (wall seconds, passes over the data, ratio to ``fit``) with the
machine, the command line and the date; ``--out FILE`` appends it to FILE.

Example::

    python scripts/bench_signal.py --samples 20000 --features 20000 --data-dir /tmp/bench-signal
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


def make_data(path: Path, n: int, p: int, seed: int = 0) -> None:
    if path.is_file():
        return
    rng = np.random.default_rng(seed)
    r = 5
    U = rng.standard_normal((n, r)).astype(np.float32)
    V = (rng.standard_normal((r, p)) * np.array([3.0, 2.5, 2.0, 1.5, 1.0])[:, None]
         * (1 + np.sqrt(p / n)) / np.sqrt(p) * 2).astype(np.float32)
    out = np.lib.format.open_memmap(path.with_suffix(".tmp.npy"), mode="w+", dtype=np.float32, shape=(n, p))
    for a in range(0, n, 1000):
        b = min(n, a + 1000)
        out[a:b] = rng.standard_normal((b - a, p), dtype=np.float32) + U[a:b] @ V
    out.flush()
    del out
    os.replace(path.with_suffix(".tmp.npy"), path)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=20000)
    parser.add_argument("--features", type=int, default=20000)
    parser.add_argument("--max-components", type=int, default=50)
    parser.add_argument("--permutations", type=int, default=20)
    parser.add_argument("--max-samples", type=int, default=None, help="largest subsample (default: the library's)")
    parser.add_argument("--data-dir", type=Path, default=Path("/tmp/axiscope-bench-signal"))
    parser.add_argument("--out", type=Path, default=None)
    args = parser.parse_args(argv)

    from axiscope.decide.signal import assess_signal
    from axiscope.defaults import DEFAULT_SIGNAL_SAMPLES
    from axiscope.fitting.run import fit
    from axiscope.io import open_matrix

    args.data_dir.mkdir(parents=True, exist_ok=True)
    path = args.data_dir / f"planted_{args.samples}x{args.features}.npy"
    make_data(path, args.samples, args.features)
    max_samples = args.max_samples or DEFAULT_SIGNAL_SAMPLES

    rows = []
    t = time.perf_counter()
    plain = fit(path, n_components=10)
    wall_fit = time.perf_counter() - t
    rows.append(("fit, 10 axes", wall_fit, plain.manifest["passes"]["count"], ""))
    t = time.perf_counter()
    candidates = fit(path, n_components=args.max_components)
    wall_cand = time.perf_counter() - t
    rows.append((f"fit, {args.max_components} candidate axes", wall_cand, candidates.manifest["passes"]["count"], ""))
    t = time.perf_counter()
    with open_matrix(path) as src:
        signal = assess_signal(candidates, src, permutations=args.permutations, max_samples=max_samples)
    wall_signal = time.perf_counter() - t
    pa = signal.summary["parallel_analysis"]
    rows.append((f"signal: subsample of {pa['subsample_samples']} samples + {args.permutations} permutations",
                 wall_signal, 1, f"read {pa['seconds_reading']:.1f} s, permutations {pa['seconds_permutations']:.1f} s"))

    mem = subprocess.run(["free", "-g"], capture_output=True, text=True).stdout.splitlines()
    lines = [
        f"\n### {args.samples} × {args.features} float32, rank 5 planted\n",
        f"- command: `{' '.join(shlex.quote(a) for a in [sys.executable, *sys.argv])}`",
        f"- date: {_dt.datetime.now(_dt.timezone.utc).strftime('%Y-%m-%d %H:%M UTC')}; machine: {platform.platform()}, "
        f"nproc {os.cpu_count()}, memory `{mem[1].split()[1] if len(mem) > 1 else '?'}` GB total (free -g); "
        f"load average {os.getloadavg()[0]:.1f} at the end (the machine may be shared: ratios, not seconds, "
        "are the result)",
        f"- recommended: {signal.recommended} axes (planted: 5); counts {signal.summary['counts']}",
        "",
        "| step | wall (s) | passes over the data | ratio to the 10-axis fit | note |",
        "|---|---:|---:|---:|---|",
    ]
    for name, wall, passes, note in rows:
        lines.append(f"| {name} | {wall:.1f} | {passes} | {wall / wall_fit:.2f} | {note} |")
    lines.append(f"| `--components auto` in all (candidates + signal) | {wall_cand + wall_signal:.1f} | "
                 f"{candidates.manifest['passes']['count'] + 1} | {(wall_cand + wall_signal) / wall_fit:.2f} | |")
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out is not None:
        with open(args.out, "a", encoding="utf-8") as handle:
            handle.write(text)


if __name__ == "__main__":
    main()
