"""Peak resident memory of ``axiscope fit`` on a Zarr input with large chunks, against --memory-limit.

``--memory-limit`` is a limit for the whole process; this script checks that the kernel's
high-water mark of resident memory (``VmHWM`` in ``/proc/<pid>/status``) stays within the
limit plus 10%. It writes a float32 Zarr array of ``--samples`` × ``--features`` in chunks of
``--chunk-samples`` × all features, then runs the command line in a child process.

    python scripts/check_peak_rss.py                       # 4,000 × 20,000 in 160 MB chunks, 1GB
    python scripts/check_peak_rss.py --samples 3000 --features 16000 --chunk-samples 1500 --limit 512MB

Measured (2 cores, shared): 545 MB peak under 1GB (baseline 203 MB); 424 MB under 512MB for
the second (the test in tests/test_memory.py; 630 MB before the limit counted the whole
process). With 160 MB chunks a 512MB limit is refused before any work (exit code 3): reading
one chunk needs about 320 MB on top of the ~210 MB the process holds.

Prints one JSON line: limit, peak, ratio, the plan of the fit and the wall time. Exit code 1
when the peak exceeds the limit by more than 10%.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

#: Runs the command line and reports its own peak resident memory afterwards.
CHILD = r"""
import sys
from axiscope.cli._app import main
code = main(sys.argv[2:])
with open("/proc/self/status") as handle:
    peak = next(int(line.split()[1]) * 1024 for line in handle if line.startswith("VmHWM:"))
with open(sys.argv[1], "w") as handle:
    handle.write(str(peak))
sys.exit(code)
"""


def write_input(path: Path, n: int, p: int, chunk: int, seed: int = 0) -> None:
    """A planted rank-5 float32 matrix plus noise, written one chunk band at a time."""
    import numpy as np
    import zarr

    rng = np.random.default_rng(seed)
    V = rng.standard_normal((5, p)).astype(np.float32)
    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    array = group.create_array("X", shape=(n, p), chunks=(chunk, p), dtype="float32")
    for start in range(0, n, chunk):
        rows = min(chunk, n - start)
        U = rng.standard_normal((rows, 5)).astype(np.float32) * np.float32(3.0)
        array[start:start + rows] = U @ V + rng.standard_normal((rows, p), dtype=np.float32)


def peak_rss(path: Path, limit: str, workdir: Path, threads: int = 2) -> dict:
    """Run ``axiscope fit`` on ``path`` under ``limit``; its peak RSS, plan and wall time."""
    report = workdir / "peak.txt"
    out = workdir / "out"
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-c", CHILD, str(report), "fit", str(path), "--out", str(out), "--memory-limit", limit,
         "--threads", str(threads), "--scratch", str(workdir / "scratch"), "-k", "5", "-q", "--overwrite"],
        capture_output=True, text=True, env=env, check=False)
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"axiscope fit failed ({proc.returncode}): {proc.stderr.strip()}")
    manifest = json.loads((out / "manifest.json").read_text())
    return {"peak": int(report.read_text()), "plan": manifest["plan"], "seconds": round(seconds, 1)}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=4000)
    parser.add_argument("--features", type=int, default=20000)
    parser.add_argument("--chunk-samples", type=int, default=2000)
    parser.add_argument("--limit", default="1GB")
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args()
    from axiscope.core.memory import parse_memory

    with tempfile.TemporaryDirectory() as tmp:
        workdir = Path(tmp)
        path = workdir / "input.zarr"
        write_input(path, args.samples, args.features, args.chunk_samples)
        result = peak_rss(path, args.limit, workdir, args.threads)
    limit = parse_memory(args.limit)
    result.update(limit=limit, ratio=round(result["peak"] / limit, 3))
    print(json.dumps(result))
    return 0 if result["peak"] <= 1.1 * limit else 1


if __name__ == "__main__":
    sys.exit(main())
