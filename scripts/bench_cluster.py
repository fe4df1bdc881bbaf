"""Fit one planted Zarr matrix threaded and on a local Dask cluster, side by side in one run.

Usage::

    python scripts/bench_cluster.py --samples 40000 --features 20000 --workers 2 --memory-limit 2GB

Writes a float32 Zarr matrix (row chunks) into a temporary folder, then fits it
(``method="randomized"``, fixed seed) with the threaded back-end and with
``cluster="local:N"``, each timed, and prints per-pass seconds, the bytes the client received
per pass against the floor ``8·(n·m + n + p·l)`` (the ``samples × m`` block products and row
norms, one ``features × l`` total), and the largest relative difference between the two
results. The cluster's start-up is timed separately from its fit.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time

import numpy as np


def planted_zarr(path: str, n: int, p: int, chunk_rows: int, seed: int = 0) -> None:
    """A rank-20 signal plus unit noise, float32, written chunk by chunk."""
    import zarr

    rng = np.random.default_rng(seed)
    V = np.linalg.qr(rng.standard_normal((p, 20)))[0].astype(np.float32)
    strength = np.geomspace(60, 6, 20).astype(np.float32)
    z = zarr.create_array(path, shape=(n, p), chunks=(chunk_rows, p), dtype="float32", zarr_format=3)
    for start in range(0, n, chunk_rows):
        rows = min(chunk_rows, n - start)
        U = rng.standard_normal((rows, 20)).astype(np.float32)
        z[start:start + rows] = (U * strength) @ V.T + rng.standard_normal((rows, p), dtype=np.float32)


def one_fit(path: str, args, **resources) -> tuple[float, object]:
    from axiscope.core.options import EngineSettings, Resources
    from axiscope.fitting.run import fit

    t0 = time.perf_counter()
    result = fit(path, n_components=args.components,
                 engine=EngineSettings(method="randomized", seed=1, power_iterations=args.power_iterations),
                 resources=Resources(memory_limit=args.memory_limit, **resources))
    return time.perf_counter() - t0, result


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--samples", type=int, default=40_000)
    parser.add_argument("--features", type=int, default=20_000)
    parser.add_argument("--components", type=int, default=20)
    parser.add_argument("--power-iterations", type=int, default=4)
    parser.add_argument("--chunk-rows", type=int, default=1000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--memory-limit", default="2GB")
    parser.add_argument("--folder", default=None, help="where the matrix is written (default: a temporary folder)")
    args = parser.parse_args()

    folder = tempfile.mkdtemp(prefix="bench-cluster-", dir=args.folder)
    path = os.path.join(folder, "matrix.zarr")
    try:
        t0 = time.perf_counter()
        planted_zarr(path, args.samples, args.features, args.chunk_rows)
        print(f"wrote {args.samples} × {args.features} float32 in {time.perf_counter() - t0:.1f} s", file=sys.stderr)
        threaded_s, threaded = one_fit(path, args, threads=args.workers)

        import distributed

        t0 = time.perf_counter()
        with distributed.LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                                      host="127.0.0.1", dashboard_address=None) as cluster, \
                distributed.Client(cluster, set_as_default=False) as client:
            startup_s = time.perf_counter() - t0
            cluster_s, clustered = one_fit(path, args, scheduler=client)
        report(args, threaded_s, threaded, startup_s, cluster_s, clustered)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


def report(args, threaded_s, threaded, startup_s, cluster_s, clustered) -> None:
    n, p = args.samples, args.features
    l = args.components + 10
    rel = lambda a, b: float(np.max(np.abs(a - b)) / np.max(np.abs(a)))  # noqa: E731
    rows = []
    for t, c in zip(threaded.manifest["passes"]["detail"], clustered.manifest["passes"]["detail"]):
        m = l + (10 if c["name"] == "iteration 1" else 0)
        floor = 8 * (n * m + n + p * l)
        rows.append({"pass": c["name"], "threaded_from": t["read_from"], "cluster_from": c["read_from"],
                     "threaded_s": t["seconds"], "cluster_s": c["seconds"],
                     "bytes_to_client": c["bytes_to_client"], "floor_bytes": floor,
                     "ratio_to_floor": round(c["bytes_to_client"] / floor, 3),
                     "bytes_from_client": c["bytes_from_client"]})
    summary = {
        "shape": [n, p], "components": args.components, "l": l, "workers": args.workers,
        "memory_limit": args.memory_limit, "nproc": os.cpu_count(), "load_average_after": os.getloadavg(),
        "plan": {k: threaded.manifest["plan"][k] for k in ("cache", "block_rows")},
        "blocks": threaded.manifest["passes"]["detail"][0]["blocks"],
        "cluster_execution": clustered.manifest["execution"],
        "threaded_fit_s": round(threaded_s, 2), "cluster_startup_s": round(startup_s, 2),
        "cluster_fit_s": round(cluster_s, 2), "cluster_over_threaded": round(cluster_s / threaded_s, 2),
        "median_pass_ratio": float(np.median([r["cluster_s"] / r["threaded_s"] for r in rows[1:]])) if len(rows) > 1 else None,
        "max_rel_diff": {
            "singular_values": rel(threaded.model.singular_values, clustered.model.singular_values),
            "loadings": rel(threaded.model.components, clustered.model.components),
            "scores": rel(threaded.scores, clustered.scores),
        },
        "passes": rows,
    }
    print(json.dumps(summary, indent=1))


if __name__ == "__main__":
    sys.exit(main())
