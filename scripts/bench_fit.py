#!/usr/bin/env python
"""Benchmark axiscope's out-of-core PCA against general-purpose tools.

The script builds a planted low-rank + noise float32 matrix on disk (a Zarr store with
zarr's default codec and an uncompressed, contiguous HDF5 dataset holding the same
values), generated block by block and cached in ``--data-dir``. It then runs, each in a
process of its own, and measures from outside (wall time around the child process, peak
resident memory from the child's own ``wait4`` resource usage):

* ``axiscope``: ``axiscope.fit(path, preprocess=PreprocessSpec(scale="none"),
  engine=EngineSettings(method="randomized"))``
  (centred covariance PCA) on the Zarr store and on the HDF5 file;
* ``sklearn``: ``sklearn.decomposition.PCA(svd_solver="randomized", random_state=0)`` on the
  matrix loaded from Zarr (the load is part of its time);
* ``incremental``: ``sklearn.decomposition.IncrementalPCA`` with ``partial_fit`` over row
  blocks read from Zarr (by default only at the smallest size: it is slow);
* ``dask``: ``dask.array.linalg.svd_compressed(A - A.mean(axis=0), k, n_power_iter=2, seed=0)``
  on ``dask.array.from_zarr``, threaded scheduler;
* ``floor``: one streaming read of the Zarr store and of the HDF5 file in row blocks, and one
  block-product pass ``A·Ω`` (Ω of shape features × 30) from each.

Accuracy is measured against an exact reference of the *whole* centred matrix: the Gram
matrix ``G = Σ_b A_bᵀA_b − n·μμᵀ`` accumulated in float64 over row blocks, whose top
eigenpairs LAPACK computes (``scipy.linalg.eigh`` with ``subset_by_index``); singular values
are ``sqrt(λ)``. The reference is cached beside the data. For every method the table gives
the largest relative error of σ1..σk and the largest principal-angle sine between its
k-dimensional right singular subspace and the reference one (``scipy.linalg.subspace_angles``).

The report (machine, command line, date, one Markdown table per size and chunk layout) is
printed and, with ``--out FILE``, appended to FILE.

Chunk layouts and caches: ``--zarr-chunks 2000x20000,auto`` measures several Zarr chunk
layouts of the same values one after the other (the values are drawn in 500-row units, so
the HDF5 copy and the exact reference are shared); ``--axiscope-runs auto,source,compressed-all``
runs axiscope once per entry with that block cache imposed on its plan (optionally
``KIND@TOL`` for another tolerance), and the notes give the first and later passes' times,
the compressed cache's size and the number of chunk files Zarr fetched.

Examples
--------
Small smoke run (seconds)::

    python scripts/bench_fit.py --sizes 2000x3000 --data-dir /tmp/benchsmall

The later passes' cache on two chunk layouts, side by side (about 30 minutes with the
reference)::

    python scripts/bench_fit.py --sizes 40000x20000 --zarr-chunks 2000x20000,auto --inputs zarr \
        --axiscope-runs auto,source,compressed-all,auto@1e-4 --methods axiscope,floor,dask

Full benchmark (roughly 40 minutes on 2 cores, half of it for the exact references, which
are cached; about 9 GB of disk for the data)::

    python scripts/bench_fit.py --sizes 10000x20000,40000x20000 --out BENCHMARKS.md

Notes
-----
Peak RSS comes from ``os.wait4`` on the child. On Linux a child's ``ru_maxrss`` starts from
the parent's resident size at ``exec`` time, so the parent process of this script imports
only the standard library and leaves all numerical work (data generation, reference,
evaluation) to child processes; its own peak RSS is printed under the table so that the
reader can check it is far below every figure in the table.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import resource
import shlex
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path

ALL_METHODS = ("axiscope", "sklearn", "incremental", "dask", "floor")
DEFAULT_SIZES = "10000x20000,40000x20000"
LARGE_SIZE = "80000x20000"
#: Ω width for the block-product floor (the issue measured A·Ω with 30 columns).
FLOOR_WIDTH = 30
#: Target bytes of a row block read by the floors, the generator and the reference.
BLOCK_BYTES = 64 * 2**20
#: Rows drawn from one seeded generator: the values do not depend on the Zarr chunks, so
#: every chunk layout of one matrix shares its HDF5 copy and its exact reference.
GEN_ROWS = 500
#: Kinds of block cache a run may impose on axiscope (``--axiscope-runs``): those of
#: ``axiscope.core.plan.plan_blocks``, and ``compressed-all``, the compressed cache with no
#: allowance (to measure its size and speed even where it does not fit the budget).
CACHE_KINDS = ("auto", "memory", "compressed", "compressed-all", "scratch", "source")
SCRIPT = Path(__file__).resolve()


# ----------------------------------------------------------------------------- helpers


def _parse_size(text: str) -> tuple[int, int]:
    try:
        a, b = text.lower().replace("×", "x").split("x")
        n, p = int(a.replace("_", "").replace(",", "")), int(b.replace("_", "").replace(",", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"size {text!r} is not ROWSxCOLUMNS (e.g. 10000x20000)") from None
    if n < 2 or p < 2:
        raise argparse.ArgumentTypeError(f"size {text!r}: both sides must be at least 2")
    return n, p


def _parse_chunks(text: str) -> tuple[int, int] | None:
    if text == "auto":
        return None
    return _parse_size(text)


def _fmt_bytes(n: float | None) -> str:
    if n is None:
        return ""
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.2f} {unit}" if unit == "GB" else f"{n / size:.0f} {unit}"
    return f"{n:.0f} B"


def _fmt_float(x: float | None, spec: str = ".1e") -> str:
    return "" if x is None else format(x, spec)


def _block_rows(n_features: int, itemsize: int, align: int = 1, target: int = BLOCK_BYTES) -> int:
    rows = max(1, target // max(1, n_features * itemsize))
    if align > 1:
        rows = max(align, (rows // align) * align)
    return rows


def _spans(n: int, rows: int) -> list[tuple[int, int]]:
    return [(a, min(n, a + rows)) for a in range(0, n, rows)]


def _limit_threads(threads: int | None) -> None:
    """Cap the BLAS/OpenMP pools of a worker when ``--threads`` was given."""
    if threads:
        from threadpoolctl import threadpool_limits

        threadpool_limits(limits=threads)


# ------------------------------------------------------------------------------ workers
# Each worker runs in a fresh interpreter: ``bench_fit.py --worker NAME --job FILE``.
# It reads its parameters from the JSON job file and writes a JSON result to job["result"].


def _save_factors(job: dict, s, V) -> None:
    import numpy as np

    if job.get("factors"):
        np.savez(job["factors"], s=np.asarray(s, dtype=np.float64), V=np.asarray(V, dtype=np.float64))


def worker_generate(job: dict) -> dict:
    """Write the planted matrix block by block to Zarr and HDF5 (same values in both)."""
    import h5py
    import numpy as np
    import zarr

    n, p, r = job["n"], job["p"], job["rank"]
    rng = np.random.default_rng(job["seed"])
    V, _ = np.linalg.qr(rng.standard_normal((p, r)))  # orthonormal planted loadings
    d = job["decay"] ** np.arange(r)
    # scale so that the planted signal has unit variance per entry, like the noise at --noise 1
    d *= np.sqrt(p / np.sum(d**2))
    mu = rng.uniform(0.0, 5.0, size=p)  # feature offsets: centring matters
    W = (d[:, None] * V.T).astype(np.float64)  # r × p
    chunks = tuple(job["chunks"]) if job["chunks"] else "auto"
    zpath, hpath = Path(job["zarr"]), Path(job["hdf5"])
    z = zarr.create_array(store=str(zpath), shape=(n, p), dtype="float32", chunks=chunks,
                          overwrite=True)
    rows = _block_rows(p, 4, align=z.chunks[0])

    def planted_rows(a: int, b: int) -> np.ndarray:
        out = np.empty((b - a, p), dtype=np.float32)
        for u0 in range(a - a % GEN_ROWS, b, GEN_ROWS):  # whole generator units, cut to a:b
            u1 = min(n, u0 + GEN_ROWS)
            g = np.random.default_rng([job["seed"], u0])
            unit = g.standard_normal((u1 - u0, r)) @ W
            unit += mu
            unit += job["noise"] * g.standard_normal((u1 - u0, p))
            lo, hi = max(a, u0), min(b, u1)
            out[lo - a:hi - a] = unit[lo - u0:hi - u0]
        return out

    h5 = h5py.File(hpath, "w") if job["write_hdf5"] else None
    try:
        ds = h5.create_dataset("matrix", shape=(n, p), dtype="float32") if h5 else None  # contiguous, no filter
        for a, b in _spans(n, rows):
            block32 = planted_rows(a, b)
            z[a:b] = block32
            if ds is not None:
                ds[a:b] = block32
            print(f"  generated rows {b}/{n}", file=sys.stderr, flush=True)
    finally:
        if h5 is not None:
            h5.close()
    return {"zarr_chunks": list(z.chunks), "compressors": [repr(c) for c in z.compressors],
            "planted_singular_values_approx": (np.sqrt(n) * d).tolist()}


def worker_reference(job: dict) -> dict:
    """Exact top eigenpairs of the centred Gram matrix, accumulated in float64."""
    import h5py
    import numpy as np
    import scipy.linalg
    from scipy.linalg.blas import dsyr, dsyrk

    t0 = time.perf_counter()
    m = job["m"]
    with h5py.File(job["hdf5"], "r") as h5:
        ds = h5["matrix"]
        n, p = ds.shape
        G = np.zeros((p, p), dtype=np.float64, order="F")
        colsum = np.zeros(p, dtype=np.float64)
        rows = _block_rows(p, 8)
        buf = np.empty((rows, p), dtype=np.float32)
        for a, b in _spans(n, rows):
            ds.read_direct(buf, np.s_[a:b], np.s_[0:b - a])
            B = buf[: b - a].astype(np.float64)
            colsum += B.sum(axis=0)
            # upper triangle of G += BᵀB, in place (B.T is Fortran-contiguous: no copy)
            G = dsyrk(1.0, B.T, beta=1.0, c=G, trans=0, lower=0, overwrite_c=1)
            print(f"  reference Gram rows {b}/{n}", file=sys.stderr, flush=True)
    mu = colsum / n
    G = dsyr(-float(n), mu, a=G, lower=0, overwrite_a=1)  # G − n·μμᵀ (upper triangle)
    t_gram = time.perf_counter() - t0
    w, vecs = scipy.linalg.eigh(G, lower=False, subset_by_index=[p - m, p - 1],
                                overwrite_a=True, check_finite=False, driver="evr")
    order = np.argsort(w)[::-1]
    w, vecs = w[order], vecs[:, order]
    np.savez(job["out"], s=np.sqrt(np.maximum(w, 0.0)), V=vecs)
    return {"seconds_gram": t_gram, "seconds_total": time.perf_counter() - t0}


def _impose_cache(kind: str) -> None:
    """Make the fit's plan keep the cache ``kind`` (within the same budget; see CACHE_KINDS)."""
    import dataclasses

    from axiscope.fitting import run as run_module

    planned = run_module.plan_fit

    def imposed(*args, **kwargs):
        plan = planned(*args, cache="compressed" if kind == "compressed-all" else kind, **kwargs)
        if kind == "compressed-all":
            plan = dataclasses.replace(plan, cache_allowance=2**62)
        return plan

    run_module.plan_fit = imposed


def _count_chunk_fetches() -> dict:
    """Count the chunk files Zarr fetches from a local store (its own reads, keys ``c/…``)."""
    import threading

    from zarr.storage import LocalStore

    counts = {"fetches": 0, "keys": set()}
    lock = threading.Lock()
    original = LocalStore.get

    async def counting(self, key, *args, **kwargs):
        if key.startswith("c/"):
            with lock:
                counts["fetches"] += 1
                counts["keys"].add(key)
        return await original(self, key, *args, **kwargs)

    LocalStore.get = counting
    return counts


def _resident_bytes() -> int | None:
    """This process's resident memory now (VmRSS), or None where /proc is missing."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def worker_axiscope(job: dict) -> dict:
    _limit_threads(job.get("threads"))
    from axiscope import EngineSettings, PreprocessSpec, Resources, fit

    if job.get("cache", "auto") != "auto":
        _impose_cache(job["cache"])
    fetched = _count_chunk_fetches() if job.get("format") == "zarr" else None
    rss_before = _resident_bytes()  # interpreter and libraries: not part of the fit's budget from Python
    t0 = time.perf_counter()
    res = fit(job["path"], n_components=job["k"], preprocess=PreprocessSpec(scale="none"),
              engine=EngineSettings(method="randomized", tol=job.get("tol", 1e-6)),
              resources=Resources(memory_limit=job["memory_limit"], threads=job.get("threads"),
                                  scratch=job.get("scratch")))
    seconds = time.perf_counter() - t0
    man = res.manifest
    if res.model.components.shape[0] != res.input_feature_ids.shape[0]:
        raise SystemExit("axiscope dropped features; the comparison needs all of them")
    _save_factors(job, res.model.singular_values, res.model.components)
    acc = man.get("accuracy", {})
    detail = man["passes"]["detail"]
    plan = man["plan"]
    return {
        "seconds": seconds,
        "passes": man["passes"]["count"],
        "cache": plan["cache"],
        "block_rows": plan["block_rows"],
        "threads": plan["threads"],
        "power_iterations": acc.get("power_iterations_run"),
        "pass_seconds": [(d["name"], d["read_from"], d["seconds"]) for d in detail],
        "first_pass_seconds": detail[0]["seconds"],
        "later_pass_seconds": sum(d["seconds"] for d in detail[1:]),
        "source_passes": sum(d["read_from"] in ("input", "source") for d in detail),
        "cache_held_bytes": plan.get("cache_held_bytes"),
        "cache_spilled_bytes": plan.get("cache_spilled_bytes"),
        "decoded_bytes": res.model.n_samples * res.input_feature_ids.shape[0] * 4,
        "rss_before": rss_before,
        "chunk_fetches": fetched["fetches"] if fetched else None,
        "chunks_fetched": len(fetched["keys"]) if fetched else None,
    }


def worker_sklearn(job: dict) -> dict:
    _limit_threads(job.get("threads"))
    import zarr
    from sklearn.decomposition import PCA

    t0 = time.perf_counter()
    X = zarr.open_array(job["path"], mode="r")[:]
    t_load = time.perf_counter() - t0
    pca = PCA(n_components=job["k"], svd_solver="randomized", random_state=0).fit(X)
    seconds = time.perf_counter() - t0
    _save_factors(job, pca.singular_values_, pca.components_.T)
    return {"seconds": seconds, "seconds_load": t_load, "passes": 1,
            "power_iterations": pca.iterated_power if pca.iterated_power != "auto" else "auto"}


def worker_incremental(job: dict) -> dict:
    _limit_threads(job.get("threads"))
    import zarr
    from sklearn.decomposition import IncrementalPCA

    t0 = time.perf_counter()
    z = zarr.open_array(job["path"], mode="r")
    n, p = z.shape
    rows = job.get("block_rows") or _block_rows(p, 4, align=z.chunks[0], target=1000 * p * 4)
    rows = max(rows, job["k"])
    ipca = IncrementalPCA(n_components=job["k"])
    spans = _spans(n, rows)
    if len(spans) > 1 and spans[-1][1] - spans[-1][0] < job["k"]:  # partial_fit needs ≥ k rows
        spans[-2] = (spans[-2][0], n)
        spans.pop()
    for a, b in spans:
        ipca.partial_fit(z[a:b])
    seconds = time.perf_counter() - t0
    _save_factors(job, ipca.singular_values_, ipca.components_.T)
    return {"seconds": seconds, "passes": 1, "block_rows": rows}


def worker_dask(job: dict) -> dict:
    _limit_threads(job.get("threads"))
    import dask
    import dask.array as da
    from dask.callbacks import Callback

    q = job["power_iter"]
    t0 = time.perf_counter()
    A = da.from_zarr(job["path"])
    u, s, v = da.linalg.svd_compressed(A - A.mean(axis=0), k=job["k"], n_power_iter=q, seed=0)
    reads = {"tasks": 0}

    class _CountReads(Callback):
        # counts executed chunk-loading tasks of the from_zarr layer: reads of the store
        def _posttask(self, key, result, dsk, state, id):
            name = key[0] if isinstance(key, tuple) else key
            if str(name).startswith(A.name):
                reads["tasks"] += 1

    kwargs = {"scheduler": "threads"}
    if job.get("threads"):
        kwargs["num_workers"] = job["threads"]
    with _CountReads():
        u, s, v = dask.compute(u, s, v, **kwargs)
    seconds = time.perf_counter() - t0
    _save_factors(job, s, v.T)
    chunk_count = A.npartitions
    return {
        "seconds": seconds,
        # sweeps over A in the graph, from dask's svd_compressed source: the mean, the
        # sketch A·Ω, two products per power iteration, and the projection Qᵀ·A
        "passes": 2 * q + 3,
        "store_reads": reads["tasks"] / chunk_count if reads["tasks"] else None,
        "chunks": chunk_count,
    }


def worker_floor(job: dict) -> dict:
    """One streaming pass in row blocks: read only, or read + block product A_b·Ω."""
    _limit_threads(job.get("threads"))
    from concurrent.futures import ThreadPoolExecutor

    import numpy as np

    product = job["kind"] == "product"
    fmt = job["format"]
    if fmt == "zarr":
        import zarr

        arr = zarr.open_array(job["path"], mode="r")
        n, p = arr.shape
        rows = _block_rows(p, 4, align=arr.chunks[0])
    else:
        import h5py

        h5 = h5py.File(job["path"], "r")
        arr = h5["matrix"]
        n, p = arr.shape
        rows = _block_rows(p, 4)
    omega = np.random.default_rng(0).standard_normal((p, FLOOR_WIDTH)).astype(np.float32) if product else None
    threads = job.get("threads") or os.cpu_count() or 1

    def task(span):
        a, b = span
        if fmt == "zarr":
            block = arr[a:b]
        else:
            block = np.empty((b - a, p), dtype=np.float32)
            arr.read_direct(block, np.s_[a:b])
        if product:
            return block @ omega
        return float(block[0, 0])

    t0 = time.perf_counter()
    with ThreadPoolExecutor(max_workers=threads) as pool:
        out = list(pool.map(task, _spans(n, rows)))
    seconds = time.perf_counter() - t0
    if product:
        assert sum(o.shape[0] for o in out) == n
    return {"seconds": seconds, "passes": 1, "block_rows": min(rows, n)}


def worker_evaluate(job: dict) -> dict:
    """Accuracy of every run's factors against the reference."""
    import numpy as np
    import scipy.linalg

    ref = np.load(job["reference"])
    k = job["k"]
    s_ref, V_ref = ref["s"][:k], ref["V"][:, :k]
    out = {"reference_s": ref["s"].tolist()}
    for name, path in job["runs"].items():
        got = np.load(path)
        s, V = got["s"], got["V"]
        if s.shape[0] < k or V.shape != V_ref.shape:
            out[name] = {"error": f"shapes s{s.shape} V{V.shape} vs reference V{V_ref.shape}"}
            continue
        rel = np.abs(s[:k] - s_ref) / s_ref
        angles = scipy.linalg.subspace_angles(V_ref, V)
        out[name] = {"max_rel_err": float(rel.max()), "argmax": int(rel.argmax()) + 1,
                     "max_sin": float(np.sin(angles.max()))}
    return out


WORKERS = {
    "generate": worker_generate,
    "reference": worker_reference,
    "axiscope": worker_axiscope,
    "sklearn": worker_sklearn,
    "incremental": worker_incremental,
    "dask": worker_dask,
    "floor": worker_floor,
    "evaluate": worker_evaluate,
}


def _worker_main(name: str, job_file: str) -> int:
    job = json.loads(Path(job_file).read_text())
    result = WORKERS[name](job)
    Path(job["result"]).write_text(json.dumps(result))
    return 0


# ------------------------------------------------------------------------------ parent
# The parent imports only the standard library (see the module notes on peak RSS).


@dataclass
class Child:
    returncode: int
    wall: float
    max_rss: int  # bytes
    result: dict | None
    stderr_tail: str


def run_child(name: str, job: dict, workdir: Path, *, timeout: float | None = None,
              echo: bool = False, env: dict | None = None) -> Child:
    """Run one worker in a fresh interpreter; time it and read its own peak RSS (wait4)."""
    fd, job_file = tempfile.mkstemp(prefix=f"{name}-", suffix=".json", dir=workdir)
    os.close(fd)
    job = dict(job, result=job_file + ".result")
    Path(job_file).write_text(json.dumps(job))
    err_path = Path(job_file + ".stderr")
    cmd = [sys.executable, str(SCRIPT), "--worker", name, "--job", job_file]
    with open(err_path, "wb") as err:
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                stderr=None if echo else err, env=None if env is None else {**os.environ, **env})
        deadline = None if timeout is None else t0 + timeout
        killed = False
        while True:
            pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                break
            if deadline is not None and time.perf_counter() > deadline:
                os.kill(proc.pid, signal.SIGKILL)  # our own child, by its pid
                killed = True
                pid, status, usage = os.wait4(proc.pid, 0)
                break
            time.sleep(0.005)
        wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    result = None
    res_path = Path(job["result"])
    if proc.returncode == 0 and res_path.exists():
        result = json.loads(res_path.read_text())
    tail = ""
    if proc.returncode != 0:
        lines = [ln for ln in err_path.read_text(errors="replace").splitlines() if ln.strip()]
        tail = lines[-1].strip() if lines else ""
        if killed:
            tail = f"timed out after {timeout:g} s"
    return Child(proc.returncode, wall, usage.ru_maxrss * 1024, result, tail)


@dataclass
class Row:
    method: str
    input: str
    walls: list[float] = field(default_factory=list)
    inside: list[float] = field(default_factory=list)
    rss: list[int] = field(default_factory=list)
    passes: str = ""
    rel_err: float | None = None
    max_sin: float | None = None
    notes: list[str] = field(default_factory=list)
    failed: str = ""
    factors: str | None = None


def _values_dir(args, n: int, p: int) -> Path:
    """Folder of what depends on the values only: the HDF5 copy and the exact reference."""
    return Path(args.data_dir) / (f"planted-{n}x{p}-rank{args.rank}-noise{args.noise:g}-decay{args.decay:g}"
                                  f"-seed{args.seed}-units{GEN_ROWS}")


def _dataset_dir(args, n: int, p: int) -> Path:
    chunks = "auto" if args.zarr_chunks is None else f"{args.zarr_chunks[0]}x{args.zarr_chunks[1]}"
    return Path(str(_values_dir(args, n, p)) + f"-chunks{chunks}")


def ensure_data(args, n: int, p: int, workdir: Path) -> dict:
    d = _dataset_dir(args, n, p)
    meta_path = d / "meta.json"
    if meta_path.exists():
        say(f"[{n}x{p}] reusing data in {d}")
        return json.loads(meta_path.read_text())
    if d.exists():
        shutil.rmtree(d)  # an interrupted generation: start again
    d.mkdir(parents=True)
    values = _values_dir(args, n, p)
    values.mkdir(parents=True, exist_ok=True)
    write_hdf5 = not (values / "hdf5.done").exists()
    need = (2.1 if write_hdf5 else 1.05) * n * p * 4
    free = shutil.disk_usage(d).free
    if free < need:
        raise SystemExit(f"error: {d}: needs about {_fmt_bytes(need)} of disk for the Zarr and "
                         f"HDF5 copies, {_fmt_bytes(free)} free; choose another --data-dir")
    say(f"[{n}x{p}] generating planted matrix in {d}")
    job = {"n": n, "p": p, "rank": args.rank, "seed": args.seed, "noise": args.noise,
           "decay": args.decay, "chunks": args.zarr_chunks, "write_hdf5": write_hdf5,
           "zarr": str(d / "matrix.zarr"), "hdf5": str(values / "matrix.h5")}
    child = run_child("generate", job, workdir, echo=args.verbose)
    if child.returncode != 0:
        raise SystemExit(f"error: generating {d} failed: {child.stderr_tail}")
    if write_hdf5:
        (values / "hdf5.done").write_text("the HDF5 copy is complete\n")
    meta = dict(job, **child.result, seconds=round(child.wall, 1))
    meta_path.write_text(json.dumps(meta, indent=1))  # written last: marks a complete data set
    return meta


def ensure_reference(args, n: int, p: int, meta: dict, workdir: Path) -> tuple[Path, dict]:
    d = _values_dir(args, n, p)
    m = min(args.components + 1, p - 1)
    ref = d / f"reference-top{m}.npz"
    info_path = ref.with_suffix(".json")
    if ref.exists() and info_path.exists():
        say(f"[{n}x{p}] reusing exact reference {ref.name}")
        return ref, json.loads(info_path.read_text())
    # a reference with more eigenpairs serves too
    for other in sorted(d.glob("reference-top*.npz")):
        if int(other.stem.split("top")[1]) >= m and other.with_suffix(".json").exists():
            say(f"[{n}x{p}] reusing exact reference {other.name}")
            return other, json.loads(other.with_suffix(".json").read_text())
    say(f"[{n}x{p}] computing exact reference (float64 Gram {p}x{p} + LAPACK eigh)")
    tmp = d / f".tmp-{ref.name}"
    # OpenBLAS 0.3.30 (scipy's) picks its SkylakeX kernels on CPUs with AVX-512 and crashed
    # (segmentation fault) in dsyrk for the 20,000 × 20,000 Gram here; the Haswell kernels
    # do not. Only the reference is computed so; the measured methods keep the default.
    coretype = {} if os.environ.get("OPENBLAS_CORETYPE") else {"OPENBLAS_CORETYPE": "Haswell"}
    child = run_child("reference", {"hdf5": meta["hdf5"], "m": m, "out": str(tmp)}, workdir,
                      echo=args.verbose, env=coretype)
    if child.returncode != 0:
        raise SystemExit(f"error: exact reference for {d} failed: {child.stderr_tail}")
    os.replace(tmp, ref)
    info = dict(child.result, wall=child.wall, peak_rss=child.max_rss)
    info_path.write_text(json.dumps(info))
    return ref, info


def say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def plan_runs(args, size_index: int, meta: dict) -> list[tuple[Row, str, dict]]:
    """The (row, worker, job) triples to run at one size, in order."""
    zpath, hpath = meta["zarr"], meta["hdf5"]
    common = {"k": args.components, "threads": args.threads}
    plan: list[tuple[Row, str, dict]] = []
    methods = args.methods
    for method in methods:
        inputs = [(fmt, path) for fmt, path in (("zarr", zpath), ("hdf5", hpath)) if fmt in args.inputs]
        if method == "floor":
            for kind, label in (("read", "floor: one streaming read"),
                                ("product", f"floor: one pass A·Ω (Ω {FLOOR_WIDTH} columns)")):
                for fmt, path in inputs:
                    plan.append((Row(label, fmt), "floor", dict(common, kind=kind, format=fmt, path=path)))
        elif method == "axiscope":
            for fmt, path in inputs:
                for kind, tol in args.axiscope_runs:
                    what = [f"memory limit {args.memory_limit}"]
                    if kind != "auto":
                        what.append(f"cache imposed: {kind}")
                    if tol is not None:
                        what.append(f"tol {tol:g}")
                    plan.append((Row(f"axiscope ({'; '.join(what)})", fmt), "axiscope",
                                 dict(common, path=path, memory_limit=args.memory_limit, format=fmt, cache=kind,
                                      tol=1e-6 if tol is None else tol, scratch=args.scratch)))
        elif method == "sklearn":
            plan.append((Row("scikit-learn PCA randomized (load included)", "zarr"), "sklearn",
                         dict(common, path=zpath)))
        elif method == "incremental":
            if args.skip_incremental:
                continue
            if not args.methods_given and size_index != 0:
                continue  # slow: by default only at the smallest size
            plan.append((Row("scikit-learn IncrementalPCA (partial_fit)", "zarr"), "incremental",
                         dict(common, path=zpath, block_rows=args.incremental_rows)))
        elif method == "dask":
            plan.append((Row(f"dask svd_compressed (n_power_iter={args.dask_power_iter})", "zarr"),
                         "dask", dict(common, path=zpath, power_iter=args.dask_power_iter)))
    return plan


def run_size(args, size_index: int, n: int, p: int, workdir: Path) -> str:
    meta = ensure_data(args, n, p, workdir)
    ref_path, ref_info = (None, {})
    if not args.skip_reference:
        ref_path, ref_info = ensure_reference(args, n, p, meta, workdir)
    rows: list[Row] = []
    for row, worker, job in plan_runs(args, size_index, meta):
        rows.append(row)
        for rep in range(args.repeats):
            if worker != "floor" and rep == 0:
                where = Path(args.factors_dir) if args.factors_dir else workdir
                chunks = "auto" if args.zarr_chunks is None else f"{args.zarr_chunks[0]}x{args.zarr_chunks[1]}"
                row.factors = str(where / f"factors-{n}x{p}-chunks{chunks}-{len(rows)}-{worker}.npz")
                job = dict(job, factors=row.factors)
            else:
                job = dict(job, factors=None)
            say(f"[{n}x{p}] {row.method} on {row.input} (run {rep + 1}/{args.repeats}) ...")
            child = run_child(worker, job, workdir, timeout=args.timeout, echo=args.verbose)
            if child.returncode != 0:
                row.failed = f"failed (exit {child.returncode}): {child.stderr_tail}"
                row.factors = None
                say(f"    {row.failed}")
                break
            res = child.result
            row.rss.append(child.max_rss)
            row.inside.append(res["seconds"])
            if worker == "floor":
                row.walls.append(res["seconds"])  # the floor is the pass itself, timed inside
            else:
                row.walls.append(child.wall)
            say(f"    wall {child.wall:.1f} s (inside {res['seconds']:.1f} s), peak RSS {_fmt_bytes(child.max_rss)}")
            if rep == 0:
                _describe(row, worker, res)
    # accuracy
    evaluated = {}
    if ref_path is not None:
        runs = {str(i): r.factors for i, r in enumerate(rows) if r.factors}
        if runs:
            child = run_child("evaluate", {"reference": str(ref_path), "k": args.components,
                                           "runs": runs}, workdir)
            if child.returncode != 0:
                say(f"evaluation failed: {child.stderr_tail}")
            else:
                evaluated = child.result
        for i, r in enumerate(rows):
            e = evaluated.get(str(i))
            if e and "error" not in e:
                r.rel_err, r.max_sin = e["max_rel_err"], e["max_sin"]
                r.notes.append(f"worst σ{e['argmax']}")
            elif e:
                r.notes.append(e["error"])
    return _size_report(args, n, p, meta, ref_info, evaluated.get("reference_s"), rows), \
        [x for r in rows for x in r.rss]


def _describe(row: Row, worker: str, res: dict) -> None:
    if worker == "floor":
        row.passes = "1"
        row.notes.append(f"timed inside the process; row blocks of {res['block_rows']}")
        return
    row.notes.append("inside {inside}")  # filled with the median when the table is written
    if worker == "axiscope":
        row.passes = str(res["passes"])
        row.notes.append(f"cache: {res['cache']}")
        row.notes.append(f"{res['power_iterations']} power iterations")
        row.notes.append(f"blocks of {res['block_rows']} rows, {res['threads']} threads")
        if res.get("rss_before"):
            row.notes.append(f"RSS before the fit {_fmt_bytes(res['rss_before'])}")
        row.notes.append(f"first pass {res['first_pass_seconds']:.1f} s, {res['passes'] - 1} later "
                         f"{res['later_pass_seconds']:.1f} s; {res['source_passes']} read the source")
        if res.get("cache_held_bytes") is not None:
            held, spilled = res["cache_held_bytes"], res["cache_spilled_bytes"]
            kept = res["decoded_bytes"] - spilled
            ratio = f", ratio {kept / held:.2f}" if held else ""
            row.notes.append(f"compressed in memory {_fmt_bytes(held)}{ratio}, scratch {_fmt_bytes(spilled)}")
        if res.get("chunk_fetches") is not None:
            row.notes.append(f"Zarr chunk fetches {res['chunk_fetches']} for {res['chunks_fetched']} chunks")
    elif worker == "sklearn":
        row.passes = "1 read"
        row.notes.append(f"load {res['seconds_load']:.1f} s; then in memory")
    elif worker == "incremental":
        row.passes = "1"
        row.notes.append(f"batches of {res['block_rows']} rows")
    elif worker == "dask":
        row.passes = str(res["passes"])
        reads = res.get("store_reads")
        row.notes.append(f"passes = 2q+3 from svd_compressed's graph; store read "
                         f"{'%.3g×' % reads if reads else '? (not counted)'} ({res['chunks']} chunks)")


def _size_report(args, n, p, meta, ref_info, ref_s, rows: list[Row]) -> str:
    k = args.components
    out = [f"### {n:,} × {p:,} float32, planted rank {args.rank}, k = {k}", ""]
    chunks = meta.get("zarr_chunks")
    comp = ", ".join(meta.get("compressors", []))
    out.append(f"Data: `{_dataset_dir(args, n, p)}` — Zarr chunks {chunks[0]}×{chunks[1]}, "
               f"codec {comp}; HDF5 contiguous, uncompressed. Noise SD {args.noise:g} per entry, "
               f"planted spectrum decay {args.decay:g}, seed {args.seed}.")
    if ref_s:
        gap = f", σ{k}/σ{k + 1} = {ref_s[k - 1] / ref_s[k]:.3f}" if len(ref_s) > k else ""
        out.append(f"Exact reference (float64 Gram + LAPACK eigh): σ1 = {ref_s[0]:.6g}, "
                   f"σ{k} = {ref_s[k - 1]:.6g}{gap}; computed in {ref_info.get('wall', 0):.0f} s "
                   f"(cached).")
    out.append("")
    reps = f" (median of {args.repeats})" if args.repeats > 1 else ""
    out.append(f"| method | input | wall s{reps} | peak RSS | passes | max rel. error σ1..σ{k} "
               f"| max sin θ | notes |")
    out.append("|---|---|---:|---:|---:|---:|---:|---|")
    for r in rows:
        if r.failed:
            out.append(f"| {r.method} | {r.input} | | | | | | {r.failed.replace('|', '/')} |")
            continue
        wall = statistics.median(r.walls) if r.walls else None
        if r.inside:
            r.notes = [t.replace("{inside}", f"{statistics.median(r.inside):.1f} s") for t in r.notes]
        out.append(
            f"| {r.method} | {r.input} | {_fmt_float(wall, '.2f')} | {_fmt_bytes(max(r.rss) if r.rss else None)} "
            f"| {r.passes} | {_fmt_float(r.rel_err)} | {_fmt_float(r.max_sin)} | {'; '.join(r.notes)} |"
        )
    out.append("")
    return "\n".join(out)


def machine_report(args, argv: list[str]) -> str:
    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        cpu = platform.processor()
    ram = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                ram = int(line.split()[1]) * 1024
    except OSError:
        pass

    def v(pkg: str) -> str:
        try:
            return metadata.version(pkg)
        except metadata.PackageNotFoundError:
            return "not installed"

    versions = ", ".join(f"{name} {v(pkg)}" for name, pkg in (
        ("axiscope", "axiscope"), ("numpy", "numpy"), ("scipy", "scipy"), ("dask", "dask"),
        ("zarr", "zarr"), ("h5py", "h5py"), ("scikit-learn", "scikit-learn")))
    coretype = os.environ.get("OPENBLAS_CORETYPE")
    blas_threads = {k: os.environ[k] for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
                    if k in os.environ}
    lines = [
        f"## axiscope fit benchmark — {_dt.datetime.now().astimezone().isoformat(timespec='seconds')}",
        "",
        f"Command: `{shlex.join(['python'] + argv)}`",
        "",
        f"Machine: {cpu or 'unknown CPU'}, {os.cpu_count()} cores, {_fmt_bytes(ram)} RAM, "
        f"{platform.system()} {platform.release()}; Python {platform.python_version()}; {versions}; "
        f"OPENBLAS_CORETYPE {'= ' + coretype if coretype else 'not set'}"
        + (f"; {', '.join(f'{k}={val}' for k, val in blas_threads.items())}" if blas_threads else "")
        + f"; --threads {args.threads or 'default (all cores)'}.",
        "",
        "Each run is a separate process. *wall s*: from process start to exit, measured by the "
        "parent (interpreter start-up and imports included; *inside* in the notes is the time "
        "of the work itself); floors are timed inside the process. *peak RSS*: the child's own "
        "maximum resident set size (`wait4`). *passes*: sweeps over the data matrix (axiscope: "
        "`manifest['passes']['count']`, from the source or its decoded cache). Files are read "
        "warm from the operating system's page cache (nothing drops it between runs). "
        "Accuracy: against the exact SVD of the whole centred matrix.",
        "",
    ]
    return "\n".join(lines)


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", default=DEFAULT_SIZES,
                    help=f"comma-separated ROWSxCOLUMNS (default {DEFAULT_SIZES})")
    ap.add_argument("--large", action="store_true", help=f"also run {LARGE_SIZE}")
    ap.add_argument("--rank", type=int, default=30, help="planted rank (default 30)")
    ap.add_argument("--noise", type=float, default=1.0,
                    help="noise SD per entry; the planted signal has unit SD per entry (default 1)")
    ap.add_argument("--decay", type=float, default=0.9,
                    help="planted singular values decay as decay**j (default 0.9)")
    ap.add_argument("--seed", type=int, default=0, help="seed of the planted matrix (default 0)")
    ap.add_argument("--components", "-k", type=int, default=20, help="k (default 20)")
    ap.add_argument("--memory-limit", default="1GB", help="axiscope's --memory-limit (default 1GB)")
    ap.add_argument("--methods", default=None,
                    help=f"comma-separated subset of {','.join(ALL_METHODS)} (default: all; "
                         "incremental then runs only at the smallest size)")
    ap.add_argument("--skip-incremental", action="store_true", help="never run IncrementalPCA")
    ap.add_argument("--incremental-rows", type=int, default=None,
                    help="IncrementalPCA batch rows (default ~1000, aligned to Zarr chunks)")
    ap.add_argument("--dask-power-iter", type=int, default=2, help="dask n_power_iter (default 2)")
    ap.add_argument("--threads", type=int, default=None,
                    help="threads for axiscope, dask, the floors and BLAS (default: all cores)")
    ap.add_argument("--repeats", type=int, default=1, help="runs per method; median wall (default 1)")
    ap.add_argument("--zarr-chunks", default="auto", metavar="ROWSxCOLS|auto[,...]",
                    help="chunk shape of the Zarr store; several, comma-separated, are measured one after "
                         "the other in one run, on the same values (default: zarr's own 'auto')")
    ap.add_argument("--inputs", default="zarr,hdf5",
                    help="inputs of the axiscope and floor runs: zarr, hdf5 or both (default zarr,hdf5)")
    ap.add_argument("--axiscope-runs", default="auto", metavar="KIND[@TOL][,...]",
                    help="one axiscope run per entry: the block cache imposed on the plan (auto: the "
                         f"plan's choice; {', '.join(CACHE_KINDS[1:])}) and optionally the tolerance "
                         "of the singular values (default auto, tol 1e-6)")
    ap.add_argument("--scratch", default=None, help="axiscope's scratch folder (default: the temporary folder)")
    ap.add_argument("--data-dir", default="bench-data", help="where data and references are cached")
    ap.add_argument("--out", default=None, help="append the Markdown report to this file")
    ap.add_argument("--factors-dir", default=None,
                    help="keep each run's singular values and loadings here (default: a temporary folder), "
                         "e.g. to compare two versions' results")
    ap.add_argument("--skip-reference", action="store_true",
                    help="no exact reference (accuracy columns left blank)")
    ap.add_argument("--timeout", type=float, default=None, help="kill a run after this many seconds")
    ap.add_argument("--verbose", action="store_true", help="show the workers' stderr")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--job", help=argparse.SUPPRESS)
    return ap


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    ap = build_parser()
    args = ap.parse_args(argv)
    if args.worker:
        return _worker_main(args.worker, args.job)
    try:
        sizes = [_parse_size(s) for s in args.sizes.split(",") if s.strip()]
    except argparse.ArgumentTypeError as exc:
        ap.error(str(exc))
    if args.large:
        sizes.append(_parse_size(LARGE_SIZE))
    sizes.sort()
    args.methods_given = args.methods is not None
    methods = ALL_METHODS if args.methods is None else tuple(m.strip() for m in args.methods.split(","))
    unknown = [m for m in methods if m not in ALL_METHODS]
    if unknown:
        ap.error(f"--methods: unknown {', '.join(unknown)}; choose from {', '.join(ALL_METHODS)}")
    args.methods = methods
    try:
        layouts = [_parse_chunks(c.strip()) for c in args.zarr_chunks.split(",") if c.strip()]
    except argparse.ArgumentTypeError as exc:
        ap.error(f"--zarr-chunks: {exc}")
    args.inputs = tuple(x.strip() for x in args.inputs.split(",") if x.strip())
    if not args.inputs or any(x not in ("zarr", "hdf5") for x in args.inputs):
        ap.error("--inputs: choose zarr, hdf5 or zarr,hdf5")
    entries, args.axiscope_runs = args.axiscope_runs, []
    for entry in (e.strip() for e in entries.split(",") if e.strip()):
        kind, _, tol = entry.partition("@")
        if kind not in CACHE_KINDS:
            ap.error(f"--axiscope-runs: unknown cache kind {kind!r}; choose from {', '.join(CACHE_KINDS)}")
        try:
            args.axiscope_runs.append((kind, float(tol) if tol else None))
        except ValueError:
            ap.error(f"--axiscope-runs: {tol!r} is not a tolerance")
    if args.repeats < 1:
        ap.error("--repeats must be at least 1")
    for n, p in sizes:
        if args.components >= min(n, p) - 1:
            ap.error(f"--components {args.components} is too large for {n}x{p}")
    Path(args.data_dir).mkdir(parents=True, exist_ok=True)
    if args.factors_dir:
        Path(args.factors_dir).mkdir(parents=True, exist_ok=True)
    script = os.path.relpath(SCRIPT) if not os.path.relpath(SCRIPT).startswith("..") else str(SCRIPT)
    parts = [machine_report(args, [script] + argv)]
    with tempfile.TemporaryDirectory(prefix="bench-fit-") as tmp:
        workdir = Path(tmp)
        child_rss: list[int] = []
        for i, (n, p) in enumerate(sizes):
            for layout in layouts:
                args.zarr_chunks = layout
                text, rss = run_size(args, i, n, p, workdir)
                parts.append(text)
                child_rss += rss
    parent_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    check = ("every figure above is larger, so each is the child's own peak"
             if child_rss and min(child_rss) > parent_rss else
             "some figures above are not larger and may only reflect the parent")
    parts.append(f"Parent process peak RSS: {_fmt_bytes(parent_rss)} (on Linux a child's measured "
                 f"peak cannot be below its parent's resident size at exec; {check}).\n")
    report = "\n".join(parts)
    print(report)
    if args.out:
        with open(args.out, "a", encoding="utf-8") as fh:
            fh.write(report + "\n")
        say(f"appended to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
