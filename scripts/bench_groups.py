"""Wall time and peak memory of ``axiscope groups`` beside the fit it follows, on a planted matrix.

Writes an invented float32 ``.npy`` matrix (samples × features) with three planted groups, each
raising its own block of features, runs ``axiscope fit`` on it and then ``axiscope groups`` with
and without the feature profiles, each in a process of its own (``/usr/bin/time -v`` for the peak
resident memory), and prints one Markdown table row per command, with the ratio to the fit's wall.
Checks that the groups recover the planted ones (adjusted Rand index, scikit-learn).

Usage: ``python scripts/bench_groups.py --samples 10000 --features 20000``
"""

from __future__ import annotations

import argparse
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np


def planted(n: int, p: int, path: Path, seed: int = 0) -> np.ndarray:
    """Gaussian noise plus, for group g, +1.5 on features [g·50, g·50 + 50); written block by block."""
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, 3, n)
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(n, p))
    for lo in range(0, n, 1000):
        hi = min(n, lo + 1000)
        block = rng.standard_normal((hi - lo, p), dtype=np.float32)
        for g in range(3):
            block[np.ix_(truth[lo:hi] == g, np.arange(g * 50, g * 50 + 50))] += 1.5
        out[lo:hi] = block
    out.flush()
    del out
    return truth


def timed(argv: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MB) of a command."""
    t0 = time.perf_counter()
    run = subprocess.run(["/usr/bin/time", "-v", *argv], capture_output=True, text=True)
    wall = time.perf_counter() - t0
    if run.returncode != 0:
        sys.exit(f"{' '.join(argv)} failed:\n{run.stderr[-2000:]}")
    peak = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", run.stderr)[1]) / 1024
    return wall, peak


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=10000)
    parser.add_argument("--features", type=int, default=20000)
    parser.add_argument("--components", type=int, default=10)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--folder", type=Path, default=Path("bench-data/groups"))
    args = parser.parse_args()
    folder = args.folder
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    matrix = folder / "x.npy"
    truth = planted(args.samples, args.features, matrix)
    exe = [str(Path(sys.executable).parent / "axiscope")]
    common = ["-q", "--threads", str(args.threads)]
    rows = []
    fit_wall, fit_peak = timed([*exe, "fit", str(matrix), "--out", str(folder / "fit"), "-k", str(args.components),
                                *common])
    rows.append(("fit", fit_wall, fit_peak))
    wall, peak = timed([*exe, "groups", str(folder / "fit"), "--out", str(folder / "groups"), *common])
    rows.append(("groups (features profiled: one pass)", wall, peak))
    wall, peak = timed([*exe, "groups", str(folder / "fit"), "--out", str(folder / "plain"), "--no-features",
                        *common])
    rows.append(("groups --no-features", wall, peak))
    wall, peak = timed([*exe, "groups", str(folder / "fit"), "--out", str(folder / "limited"), "--memory-limit",
                        "1GB", *common])
    rows.append(("groups --memory-limit 1GB", wall, peak))
    wall, peak = timed([*exe, "groups", str(folder / "fit"), "--out", str(folder / "kmeans"), "--memory-limit",
                        "1GB", "--method", "k-means", *common])
    rows.append(("groups --memory-limit 1GB --method k-means", wall, peak))
    import pandas as pd
    from sklearn.metrics import adjusted_rand_score

    found = pd.read_csv(folder / "groups" / "assignments.tsv", sep="\t")["group"].to_numpy()
    print(f"{args.samples:,} × {args.features:,} float32, {args.components} axes; adjusted Rand index against "
          f"the planted groups: {adjusted_rand_score(truth, found):.3f}")
    print("| command | wall (s) | ratio to the fit | peak RSS (MB) |\n|---|---:|---:|---:|")
    for name, wall, peak in rows:
        print(f"| {name} | {wall:.1f} | {wall / fit_wall:.2f} | {peak:.0f} |")


if __name__ == "__main__":
    main()
