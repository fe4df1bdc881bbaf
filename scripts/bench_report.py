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
  (``--host-resolver-rules``), runs its scripts and dumps the drawn page; reported as the
  browser's wall time minus that of the same command on an empty page (start-up and
  shut-down of the browser taken out).

Each measurement is repeated ``--repeats`` times and the median is reported, with the
machine's load average at the start (the machine is shared: compare rows of one run).

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
    child = subprocess.run([sys.executable, "-c", _BUILD, str(result), str(out)], capture_output=True, text=True)
    if child.returncode:
        raise SystemExit(f"building the report failed:\n{child.stderr}")
    return float(child.stdout.strip().splitlines()[-1]), time.perf_counter() - start


def _browser_wall(page: Path) -> float:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    with tempfile.TemporaryDirectory() as profile:
        start = time.perf_counter()
        child = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                                "--no-first-run", "--disable-background-networking", "--disable-component-update",
                                "--disable-sync", "--host-resolver-rules=MAP * ~NOTFOUND", f"--user-data-dir={profile}",
                                "--enable-logging=stderr", "--v=0", "--virtual-time-budget=60000",
                                "--window-size=1280,1000", "--dump-dom", page.as_uri()],
                               capture_output=True, text=True, timeout=600)
        wall = time.perf_counter() - start
    if "Uncaught" in child.stderr:
        print(f"warning: the browser reported an error for {page}", file=sys.stderr)
    return wall


def _median(values: list[float]) -> float:
    ordered = sorted(values)
    return ordered[len(ordered) // 2]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--samples", type=int, nargs="+", default=[1000, 10000, 100000])
    parser.add_argument("--features", type=int, default=500)
    parser.add_argument("--components", type=int, default=20)
    parser.add_argument("--data-dir", type=Path, default=Path(tempfile.gettempdir()) / "axiscope-bench-report")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--out", type=Path, help="Append the Markdown table to this file.")
    args = parser.parse_args(argv)

    load = os.getloadavg()[0]
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    empty = args.data_dir / "empty.html"
    args.data_dir.mkdir(parents=True, exist_ok=True)
    empty.write_text("<!DOCTYPE html><html><head><title>empty</title></head><body></body></html>")
    baseline = _median([_browser_wall(empty) for _ in range(args.repeats)]) if browser else float("nan")
    rows = []
    for n in args.samples:
        directory = args.data_dir / f"{n}x{args.features}"
        matrix, annotations = make_inputs(directory, n, args.features)
        result = fit_once(directory, matrix, annotations, args.components)
        report = directory / "report.html"
        builds = [build(result, report) for _ in range(args.repeats)]
        inside, wall = _median([b[0] for b in builds]), _median([b[1] for b in builds])
        drawn = (_median([_browser_wall(report) for _ in range(args.repeats)]) - baseline) if browser else None
        size = report.stat().st_size
        rows.append((n, size, inside, wall, drawn))
        print(f"{n} samples: {size / 1e6:.2f} MB, built in {inside:.2f} s ({wall:.2f} s with start-up), "
              f"loaded and drawn in {drawn if drawn is not None else float('nan'):.2f} s", file=sys.stderr)

    import bokeh

    lines = [
        f"Command: `python scripts/bench_report.py --samples {' '.join(map(str, args.samples))} "
        f"--features {args.features} --components {args.components} --repeats {args.repeats}`; machine: "
        f"{os.cpu_count()} cores, {platform.system()} {platform.release()}, Python {platform.python_version()}, "
        f"Bokeh {bokeh.__version__}; load average {load:.1f} at the start; medians of {args.repeats}.",
        "",
        "| samples | features | axes | report size | build (s, inside) | build (s, command wall) "
        "| load and draw in headless Chromium (s) |",
        "|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for n, size, inside, wall, drawn in rows:
        lines.append(f"| {n:,} | {args.features:,} | {args.components} | {size / 1e6:.2f} MB | {inside:.2f} | "
                     f"{wall:.2f} | {'' if drawn is None else f'{drawn:.2f}'} |")
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        with args.out.open("a", encoding="utf-8") as handle:
            handle.write("\n" + text)
    json.dump([dict(zip(("samples", "bytes", "inside_s", "wall_s", "drawn_s"), r)) for r in rows],
              sys.stderr)
    print(file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
