#!/usr/bin/env python
"""Benchmark the HTML report: its size, the time to build it, and the time a browser takes to draw it.

For each number of samples the script builds (and caches in ``--data-dir``) an invented
float32 matrix with a planted structure (three tissue groups and a batch shift on blocks
of features, plus Gaussian noise), its annotation table, and fits it once with
``axiscope fit --annotations ... --technical batch`` (k axes). Then, each in a process of
its own:

* ``build``: ``axiscope.report.html.build_report`` on the result directory, timed inside
  the process (``inside``) and from outside (``wall``: interpreter start-up and imports
  included);
* ``draw``: headless Chromium loads the report from disk with no network
  (``--host-resolver-rules``) and the chart library logs when its document is idle; that
  time (from the page's start) is reported, with the wall time of the browser process.

The report is printed as a Markdown table and, with ``--out FILE``, appended to FILE.

Example
-------
The table in BENCHMARKS.md::

    python scripts/bench_report.py --samples 1000 10000 100000 --features 500 --components 20
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

TISSUES = ("quiescent", "proliferative", "stressed")


def make_inputs(directory: Path, n: int, p: int, seed: int = 0) -> tuple[Path, Path]:
    """An invented n × p float32 matrix (.npy, ids beside it) and its annotation table."""
    import numpy as np
    import pandas as pd

    directory.mkdir(parents=True, exist_ok=True)
    matrix, annotations = directory / "x.npy", directory / "annotations.tsv"
    if matrix.exists() and annotations.exists():
        return matrix, annotations
    rng = np.random.default_rng(seed)
    tissue = rng.integers(0, len(TISSUES), n)
    batch = rng.integers(0, 2, n)
    X = rng.standard_normal((n, p), dtype=np.float32)
    block = max(p // 10, 1)
    for t in range(len(TISSUES)):
        X[:, t * block:(t + 1) * block] += 4.0 * (tissue == t)[:, None]
    X[:, 3 * block:4 * block] += 2.0 * batch[:, None]
    ids = np.array([f"smp_{i:06d}" for i in range(n)])
    np.save(matrix, X)
    (directory / "ids.txt").write_text("\n".join(ids) + "\n")
    pd.DataFrame({"sample_id": ids, "tissue": np.array(TISSUES)[tissue], "batch": np.array(["A", "B"])[batch],
                  "age": rng.integers(20, 80, n)}).to_csv(annotations, sep="\t", index=False)
    return matrix, annotations


def fit_once(directory: Path, matrix: Path, annotations: Path, k: int) -> Path:
    result = directory / "result"
    if (result / "axis_cards.json").exists():
        return result
    command = str(Path(sys.executable).parent / "axiscope")
    subprocess.run([command, "fit", str(matrix), "--sample-ids",
                    str(directory / "ids.txt"), "-k", str(k), "--out", str(result), "--annotations",
                    str(annotations), "--technical", "batch", "--overwrite", "--quiet"], check=True)
    return result


_BUILD = """
import sys, time
from axiscope.report.html import build_report
start = time.perf_counter()
build_report(sys.argv[1], out=sys.argv[2])
print(time.perf_counter() - start)
"""


def build(result: Path, out: Path) -> tuple[float, float]:
    start = time.perf_counter()
    child = subprocess.run([sys.executable, "-c", _BUILD, str(result), str(out)], check=True,
                           capture_output=True, text=True)
    return float(child.stdout.strip().splitlines()[-1]), time.perf_counter() - start


def draw(report: Path) -> tuple[float | None, float]:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        return None, float("nan")
    with tempfile.TemporaryDirectory() as profile:
        start = time.perf_counter()
        child = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                                "--no-first-run", "--disable-background-networking", "--disable-component-update",
                                "--disable-sync", "--host-resolver-rules=MAP * ~NOTFOUND", f"--user-data-dir={profile}",
                                "--enable-logging=stderr", "--v=0", "--virtual-time-budget=60000",
                                "--window-size=1280,1000", "--dump-dom", report.as_uri()],
                               capture_output=True, text=True, timeout=600)
        wall = time.perf_counter() - start
    idle = re.search(r"document idle at (\d+) ms", child.stderr)
    if "Uncaught" in child.stderr:
        print(f"warning: the browser reported an error for {report}", file=sys.stderr)
    return (int(idle.group(1)) / 1000 if idle else None), wall


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--samples", type=int, nargs="+", default=[1000, 10000, 100000])
    parser.add_argument("--features", type=int, default=500)
    parser.add_argument("--components", type=int, default=20)
    parser.add_argument("--data-dir", type=Path, default=Path(tempfile.gettempdir()) / "axiscope-bench-report")
    parser.add_argument("--out", type=Path, help="Append the Markdown table to this file.")
    args = parser.parse_args(argv)

    rows = []
    for n in args.samples:
        directory = args.data_dir / f"{n}x{args.features}"
        matrix, annotations = make_inputs(directory, n, args.features)
        result = fit_once(directory, matrix, annotations, args.components)
        report = directory / "report.html"
        inside, wall = build(result, report)
        idle, browser_wall = draw(report)
        size = report.stat().st_size
        rows.append((n, size, inside, wall, idle, browser_wall))
        print(f"{n} samples: {size / 1e6:.2f} MB, built in {inside:.2f} s ({wall:.2f} s with start-up), "
              f"drawn in {idle if idle is not None else float('nan'):.2f} s", file=sys.stderr)

    import bokeh

    lines = [
        f"Command: `python scripts/bench_report.py --samples {' '.join(map(str, args.samples))} "
        f"--features {args.features} --components {args.components}`; machine: {os.cpu_count()} cores, "
        f"{platform.system()} {platform.release()}, Python {platform.python_version()}, Bokeh {bokeh.__version__}.",
        "",
        "| samples | features | axes | report size | build, inside (s) | build, wall (s) | drawn by the browser (s) "
        "| browser process, wall (s) |",
        "|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for n, size, inside, wall, idle, browser_wall in rows:
        lines.append(f"| {n:,} | {args.features:,} | {args.components} | {size / 1e6:.2f} MB | {inside:.2f} | "
                     f"{wall:.2f} | {'' if idle is None else f'{idle:.2f}'} | {browser_wall:.1f} |")
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        with args.out.open("a", encoding="utf-8") as handle:
            handle.write("\n" + text)
    json.dump([dict(zip(("samples", "bytes", "inside_s", "wall_s", "drawn_s", "browser_wall_s"), r)) for r in rows],
              sys.stderr)
    print(file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
