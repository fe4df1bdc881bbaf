"""Sparse input: axiscope against scikit-learn's sparse PCA paths, side by side in one run.

Writes a planted sparse count matrix (``--samples`` × ``--features`` at ``--density``;
values 1 + Poisson around a rank-5 rate, float32 values, int32 indices) as CSR in HDF5,
then runs, each in a child process of its own with its peak resident memory (``VmHWM``):

* ``axiscope.fit`` on the HDF5 file (``scale="none"``: covariance PCA, the problem
  scikit-learn solves), once per ``--memory-limit`` (the limit counts the whole process;
  by default 800MB, where later passes re-read the file, and 1.6GB, where the transformed
  blocks stay in memory), with the compiled products (numba) and, with
  ``--scipy-kernels``, once more at the last limit with SciPy's kernels
  (``AXISCOPE_SPARSE_KERNEL=scipy``); with ``--cli`` the command line too (tables and cards);
  with ``--before SRC``, the same fits once more with the package found in ``SRC`` (for
  example an earlier commit's ``src`` folder from ``git archive``), for a before/after
  comparison in the same run;
* the compile time of the compiled products on first use (a child with an empty numba
  cache folder) and their load time from that cache (a second child);
* scikit-learn ``PCA(svd_solver="arpack")`` on the same matrix loaded into memory as a
  ``scipy.sparse.csr_matrix`` (its implicitly centred path; load time and memory included);
* scikit-learn ``TruncatedSVD`` on the same matrix in memory, which does NOT centre: it
  solves a different problem, shown for time and memory only.

Accuracy: the largest relative difference of the k singular values of each method to those
of scikit-learn's ARPACK run (tol=0; it works in the file's float32, so agreement is limited
to float32 rounding, about 1e-7).

    python scripts/bench_sparse.py                                     # 100,000 × 30,000 at 2%
    python scripts/bench_sparse.py --samples 20000 --features 10000    # quick

Prints one JSON line per method and a Markdown table.
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

COMPILE = r"""
import json, time
import numpy as np, scipy.sparse as sp
from axiscope.core import sparse_kernels as K
from axiscope.core.sparse_ops import sparse_products, sparse_stats_task
block = sp.random(200, 100, density=0.05, format="csc", dtype=np.float32, random_state=0)
W, z = np.ones((100, 4)), np.zeros(100)
t0 = time.perf_counter()
sparse_stats_task(block, W, True)
sparse_products(block, W, np.zeros(4), z, z, np.ones(100), None, 4, True)
seconds = time.perf_counter() - t0
K.prepare()  # every variant a fit loads (float64 values too), so no fit below compiles
print(json.dumps({"kernel": K.kernel_name(), "first_call_seconds": seconds}))
"""

CHILD = r"""
import json, sys, time
method, path, k, out, limit = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4], sys.argv[5]
import h5py, numpy as np, scipy.sparse as sp, pandas as pd  # imports are not timed, for every method
import sklearn.decomposition
import axiscope, axiscope.fitting.run, axiscope.cli._app, zarr, dask  # (the manifest imports zarr and dask)
def status(key):
    with open("/proc/self/status") as handle:
        return next(int(l.split()[1]) * 1024 for l in handle if l.startswith(key + ":"))
result = {"baseline": status("VmRSS")}
t0 = time.perf_counter()
if method == "axiscope-cli":
    from axiscope.cli._app import main
    code = main(["fit", path, "--out", out, "-k", str(k), "--scale", "none", "--memory-limit", limit,
                 "--threads", "2", "--quiet", "--overwrite"])
    assert code == 0, code
    result["s"] = pd.read_csv(out + "/components.tsv", sep="\t").singular_value.tolist()
    manifest = json.load(open(out + "/manifest.json"))
    result["passes"] = manifest["passes"]["count"]
    result["fit_seconds"] = manifest["seconds"]
    result["plan"] = manifest["plan"]
    result["estimated_max_sv_error"] = manifest["accuracy"]["max_singular_value_error"]
elif method.startswith("axiscope-api"):
    from axiscope import EngineSettings, PreprocessSpec, Resources, fit
    from axiscope.core.memory import count_whole_process
    with count_whole_process():
        res = fit(path, n_components=k, preprocess=PreprocessSpec(scale="none"),
                  resources=Resources(memory_limit=limit, threads=2))
    result["s"] = res.factorization.singular_values.tolist()
    result["passes"] = res.manifest["passes"]["count"]
    result["plan_cache"] = res.manifest["plan"]["cache"]
    result["cache_bytes"] = res.manifest["plan"]["cache_bytes"]
    from axiscope.core.sparse_kernels import kernel_name
    result["kernel"] = kernel_name()
    result["pass_seconds"] = [p["seconds"] for p in res.manifest["passes"]["detail"]]
    result["estimated_max_sv_error"] = res.manifest["accuracy"]["max_singular_value_error"]
else:
    with h5py.File(path, "r") as h:
        g = h["counts"]
        X = sp.csr_matrix((g["data"][:], g["indices"][:], g["indptr"][:]), shape=tuple(g.attrs["shape"]))
    result["load_seconds"] = time.perf_counter() - t0
    if method == "sklearn-pca-arpack":
        est = sklearn.decomposition.PCA(n_components=k, svd_solver="arpack", random_state=0).fit(X)
    else:
        est = sklearn.decomposition.TruncatedSVD(n_components=k, random_state=0).fit(X)
    result["s"] = sorted(est.singular_values_.tolist(), reverse=True)
result["seconds"] = time.perf_counter() - t0
result["peak"] = status("VmHWM")
print(json.dumps(result))
"""

def write_matrix(path: Path, n: int, p: int, density: float, seed: int = 0) -> int:
    """Planted sparse counts as CSR in HDF5, written a band of rows at a time; returns nnz."""
    import h5py
    import numpy as np

    rng = np.random.default_rng(seed)
    per_row = max(1, int(round(density * p)))
    U = rng.gamma(1.0, 1.0, (n, 5)).astype(np.float32)
    V = (rng.gamma(0.5, 1.0, (5, p)) * np.linspace(3, 0.5, 5)[:, None]).astype(np.float32)
    nnz = n * per_row
    with h5py.File(path, "w") as handle:
        g = handle.create_group("counts")
        data = g.create_dataset("data", shape=(nnz,), dtype="float32")
        indices = g.create_dataset("indices", shape=(nnz,), dtype="int32")
        g.create_dataset("indptr", data=np.arange(0, nnz + 1, per_row, dtype=np.int64))
        g.attrs["shape"] = [n, p]
        g.attrs["format"] = "csr"
        band = 5000
        for r0 in range(0, n, band):
            r1 = min(n, r0 + band)
            cols = np.sort(rng.integers(0, p - per_row + 1, (r1 - r0, per_row)), axis=1) + np.arange(per_row)
            rates = \
                (U[r0:r1, :, None] * V[:, cols].transpose(1, 0, 2)).sum(axis=1)
            values = 1.0 + rng.poisson(rates).astype(np.float32)
            data[r0 * per_row:r1 * per_row] = values.reshape(-1)
            indices[r0 * per_row:r1 * per_row] = cols.reshape(-1).astype(np.int32)
    return nnz


def run(method: str, path: Path, k: int, out: Path, limit: str, **extra_env: str) -> dict:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="2", OMP_NUM_THREADS="2", **extra_env)
    done = subprocess.run([sys.executable, "-c", CHILD, method, str(path), str(k), str(out), limit],
                          capture_output=True, text=True, env=env, check=False)
    if done.returncode != 0:
        raise SystemExit(f"{method} failed:\n{done.stderr[-2000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=100_000)
    parser.add_argument("--features", type=int, default=30_000)
    parser.add_argument("--density", type=float, default=0.02)
    parser.add_argument("-k", type=int, default=10)
    parser.add_argument("--memory-limit", nargs="+", default=["800MB", "1.6GB"],
                        help="axiscope runs, one per limit (the whole process; the smaller re-reads the file "
                             "each pass, the larger keeps the transformed blocks in memory)")
    parser.add_argument("--reuse", action="store_true", help="use the matrix already in --folder")
    parser.add_argument("--scipy-kernels", action="store_true",
                        help="also fit at the last --memory-limit with SciPy's kernels instead of the compiled ones")
    parser.add_argument("--cli", action="store_true", help="also time the command line (tables, cards)")
    parser.add_argument("--before", type=Path, default=None,
                        help="a src folder of another version of axiscope: its fits run too, at every --memory-limit")
    parser.add_argument("--folder", type=Path, default=None)
    args = parser.parse_args()
    import numpy as np

    folder = Path(args.folder or tempfile.mkdtemp(prefix="bench-sparse-"))
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "sparse.h5"
    t0 = time.perf_counter()
    if args.reuse and path.exists():  # written by an earlier run with the same sizes
        import h5py

        with h5py.File(path, "r") as handle:
            nnz = int(handle["counts/data"].shape[0])
    else:
        nnz = write_matrix(path, args.samples, args.features, args.density)
    print(json.dumps({"written": str(path), "nnz": nnz, "seconds": round(time.perf_counter() - t0, 1),
                      "dense_float64_bytes": args.samples * args.features * 8}), flush=True)
    cache_dir = folder / "numba-cache"  # empty: the first child compiles, the second loads
    subprocess.run(["rm", "-rf", str(cache_dir)], check=True)
    for label in ("compile", "load from cache"):
        done = subprocess.run([sys.executable, "-c", COMPILE], capture_output=True, text=True, check=True,
                              env=dict(os.environ, NUMBA_CACHE_DIR=str(cache_dir)))
        print(json.dumps({"kernels": label, **json.loads(done.stdout.strip().splitlines()[-1])}), flush=True)
    if args.before is not None:  # its compiled loops loaded from a warm cache too, as for the version under test
        subprocess.run([sys.executable, "-c", COMPILE], capture_output=True, text=True, check=True,
                       env=dict(os.environ, NUMBA_CACHE_DIR=str(folder / "numba-cache-before"),
                                PYTHONPATH=str(args.before.resolve())))
    results = {}
    runs = []
    if args.before is not None:  # the earlier version first, with a numba cache of its own
        runs += [(f"axiscope-api {limit} before", limit,
                  {"PYTHONPATH": str(args.before.resolve()), "NUMBA_CACHE_DIR": str(folder / "numba-cache-before")})
                 for limit in args.memory_limit]
    runs += [(f"axiscope-api {limit}", limit, {}) for limit in args.memory_limit]
    if args.scipy_kernels:
        runs.append((f"axiscope-api {args.memory_limit[-1]} scipy-kernels", args.memory_limit[-1],
                     {"AXISCOPE_SPARSE_KERNEL": "scipy"}))
    if args.cli:
        runs.append(("axiscope-cli", args.memory_limit[0], {}))
    runs += [("sklearn-pca-arpack", "", {}), ("sklearn-truncated-svd", "", {})]
    for method, limit, env in runs:
        env = {"NUMBA_CACHE_DIR": str(cache_dir), **env}
        results[method] = run(method.split(" ")[0], path, args.k, folder / "axiscope-out", limit, **env)
        print(json.dumps({"method": method, **results[method]}), flush=True)
    ref = np.array(results["sklearn-pca-arpack"]["s"])
    base = results["sklearn-pca-arpack"]
    print(f"\n{args.samples:,} × {args.features:,}, density {args.density}, {nnz:,} stored values, k = {args.k}\n")
    print("| method | wall (s) | peak RSS (MB) | peak − baseline (MB) | wall / sklearn PCA | RSS / sklearn PCA "
          "| (peak − baseline) / sklearn's | passes | first pass (s) | median later pass (s) "
          "| max rel. diff. of s to sklearn PCA |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    base_data = base["peak"] - base["baseline"]
    for method, r in results.items():
        s = np.array(r["s"])
        diff = float(np.max(np.abs(s - ref) / ref))
        data = r["peak"] - r["baseline"]
        passes = r.get("pass_seconds") or []
        first = f"{passes[0]:.2f}" if passes else "—"
        later = f"{float(np.median(passes[1:])):.2f}" if len(passes) > 1 else "—"
        print(f"| {method} | {r['seconds']:.1f} | {r['peak'] / 1e6:.0f} | {data / 1e6:.0f} | "
              f"{r['seconds'] / base['seconds']:.2f} | {r['peak'] / base['peak']:.2f} | {data / base_data:.2f} | "
              f"{r.get('passes', '—')} | {first} | {later} | {diff:.1e} |")


if __name__ == "__main__":
    main()
