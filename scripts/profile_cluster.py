"""Threaded and 2-worker-cluster fits of one planted Zarr matrix, with the cache in memory and on scratch.

Usage (once per version of the code to compare, e.g. with ``PYTHONPATH`` pointing at its ``src``)::

    flock /work/bench.lock python scripts/profile_cluster.py --folder /work/tmp/cluster --label now

Writes (once) a 20,000 × 5,000 float32 Zarr matrix (row chunks of 1,000) into ``--folder``, then
for each budget (2 GB: the plan keeps the decoded matrix in memory; 1 GB: it writes a scratch
file) fits it threaded (2 threads) and on a ``LocalCluster`` of 2 single-threaded worker processes,
and prints one JSON line: the plan, the seconds of each fit and of each pass, and where the
cluster's passes read from.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from bench_cluster import planted_zarr  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--folder", required=True)
    parser.add_argument("--label", default="this code")
    parser.add_argument("--samples", type=int, default=20_000)
    parser.add_argument("--features", type=int, default=5_000)
    args = parser.parse_args()
    import distributed

    from axiscope.core.options import EngineSettings, Resources
    from axiscope.fitting.run import fit

    path = os.path.join(args.folder, f"profile-{args.samples}x{args.features}.zarr")
    if not os.path.exists(path):
        planted_zarr(path, args.samples, args.features, 1000)
    engine = EngineSettings(method="randomized", seed=1, power_iterations=3)
    out: dict = {"code": args.label, "load_average_before": os.getloadavg()}
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster, set_as_default=False) as client:
        for limit in ("2GB", "1GB"):
            t0 = time.perf_counter()
            threaded = fit(path, n_components=20, engine=engine, resources=Resources(memory_limit=limit, threads=2))
            t1 = time.perf_counter()
            clustered = fit(path, n_components=20, engine=engine,
                            resources=Resources(memory_limit=limit, threads=2, scheduler=client))
            t2 = time.perf_counter()
            out[limit] = {
                "plan": threaded.manifest["plan"]["cache"], "blocks": threaded.manifest["passes"]["detail"][0]["blocks"],
                "threaded_s": round(t1 - t0, 2), "cluster_s": round(t2 - t1, 2),
                "threaded_passes": [d["seconds"] for d in threaded.manifest["passes"]["detail"]],
                "cluster_passes": [d["seconds"] for d in clustered.manifest["passes"]["detail"]],
                "cluster_read_from": [d["read_from"] for d in clustered.manifest["passes"]["detail"]],
            }
    out["load_average_after"] = os.getloadavg()
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
