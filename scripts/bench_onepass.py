#!/usr/bin/env python
"""Benchmark the one-pass fit (``fit --passes 1``) against one streaming read of its source.

The target of issue 11: the one-pass fit's wall time at most 1.3 × one streaming read of the
source, on the 40,000 × 20,000 float32 Zarr matrix of ``scripts/bench_fit.py`` (same planted
data, generated and cached by that script's code), with its accuracy beside it. In one run,
each repeat runs in turn, each in a process of its own (``bench_fit.run_child``: wall time
around the child, peak RSS from ``wait4``):

* ``floor``: one streaming read of the Zarr store in row blocks on all cores, timed inside
  the process (``bench_fit.worker_floor``, exactly as ``bench_fit.py`` times
  "floor: one streaming read");
* ``one-pass``: ``axiscope.fit(path, preprocess=PreprocessSpec(scale="none"),
  engine=EngineSettings(method="one-pass", seed=0), resources=Resources(memory_limit=...))``
  for each ``--memory-limit`` given, timed inside the process around ``fit`` (the figure
  compared with the floor);

Beside the wall times, the CPU seconds of the process during the timed work
(``time.process_time``): on a machine shared with other jobs they move less than wall times.
* ``one-pass, code at DIR`` (with ``--compare-with DIR``): the same fit with the package
  imported from another source tree (``PYTHONPATH=DIR``, e.g. an earlier commit unpacked by
  ``git archive COMMIT src | tar -x -C /some/dir`` and ``DIR=/some/dir/src``), for a before/after
  comparison within one run;
* ``multi-pass`` (with ``--with-multipass``): the default randomized fit, for the accuracy
  a few more passes buy.

Accuracy, computed afterwards and not timed: the largest relative error of σ1..σk and the
largest principal-angle sine of the k loadings against a reference of the whole centred
matrix; the true relative error ``‖X̃ − S·Vᵀ‖_F / ‖X̃‖_F`` of the one-pass rank-k result
(one more streaming pass in float64) beside the error the fit estimated from its separate
sketch (manifest ``one_pass.estimated_relative_error``), and the best possible rank-k error
``sqrt(‖X̃‖² − Σσ_j²)/‖X̃‖`` from the reference values.

Reference: when ``bench_fit.py`` has cached its exact one (float64 Gram + LAPACK ``eigh``),
that one; otherwise (the Gram matrix of 20,000 features costs about 20 minutes on 2 cores)
block subspace iteration on the whole centred matrix in float64 (``Z = X̃ᵀX̃·V``, LAPACK QR,
then a Rayleigh–Ritz step with LAPACK's SVD), run until the eigen-residuals
``‖X̃ᵀX̃·v − σ²·v‖ / σ²`` of all k+1 pairs are below 1e-10; each eigenvalue of ``X̃ᵀX̃`` is then
within that residual of the computed one (the residual bound for symmetric matrices,
Parlett, *The Symmetric Eigenvalue Problem*, ch. 4; theorem number not checked, recalled from
memory), so each σ within half of it. The
reference is cached beside the data.

Example::

    flock /work/bench.lock python scripts/bench_onepass.py --size 40000x20000 --repeats 3 \\
        --data-dir /work/tmp/onepass2
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shlex
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_fit as bf  # noqa: E402  (standard library only at import)

bf.SCRIPT = Path(__file__).resolve()  # children run this script's workers
REFERENCE_RTOL = 1e-10
REFERENCE_WIDTH = 40
REFERENCE_ROWS = 2000


def worker_floor_cpu(job: dict) -> dict:
    """``bench_fit.worker_floor`` and the CPU seconds of the process during it."""
    c0 = time.process_time()
    result = bf.worker_floor(job)
    return dict(result, cpu=time.process_time() - c0)


def worker_onepass(job: dict) -> dict:
    bf._limit_threads(job.get("threads"))
    import numpy as np

    from axiscope import EngineSettings, PreprocessSpec, Resources, fit

    method = job.get("method", "one-pass")
    t0, c0 = time.perf_counter(), time.process_time()
    res = fit(job["path"], n_components=job["k"], preprocess=PreprocessSpec(scale="none"),
              engine=EngineSettings(method=method, seed=0),
              resources=Resources(memory_limit=job["memory_limit"], threads=job.get("threads")))
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    man = res.manifest
    if job.get("factors"):
        np.savez(job["factors"], s=res.model.singular_values, V=res.model.components,
                 S=res.scores, mean=res.model.mean)
    one = man.get("one_pass", {})
    import axiscope

    return {"seconds": seconds, "cpu": cpu, "passes": man["passes"]["count"], "package": axiscope.__file__,
            "block_rows": man["plan"]["block_rows"],
            "estimated_relative_error": one.get("estimated_relative_error"),
            "widths": one.get("sketch_widths"),
            "pass_seconds": [(d["name"], d["seconds"]) for d in man["passes"]["detail"]]}


def _zarr_blocks(path: str, rows: int):
    import zarr

    z = zarr.open_array(path, mode="r")
    n, p = z.shape
    step = max(z.chunks[0], (rows // z.chunks[0]) * z.chunks[0])
    for a in range(0, n, step):
        yield a, z[a:min(n, a + step)]


def worker_subspace_reference(job: dict) -> dict:
    """Top eigenpairs of X̃ᵀX̃ by block subspace iteration in float64 (see the module notes)."""
    bf._limit_threads(job.get("threads"))
    import numpy as np
    import scipy.linalg
    import zarr

    t0 = time.perf_counter()
    z = zarr.open_array(job["zarr"], mode="r")
    n, p = z.shape
    X = np.empty((n, p), dtype=np.float32)
    for a, block in _zarr_blocks(job["zarr"], REFERENCE_ROWS):
        X[a:a + block.shape[0]] = block
    mean = np.zeros(p)
    for a in range(0, n, REFERENCE_ROWS):
        mean += X[a:a + REFERENCE_ROWS].sum(axis=0, dtype=np.float64)
    mean /= n
    t_load = time.perf_counter() - t0

    def gram_times(V):
        """(X̃V, X̃ᵀX̃V) in float64, X̃ = X − 1μᵀ, over row blocks converted to float64."""
        Y = np.empty((n, V.shape[1]))
        Z = np.zeros((p, V.shape[1]))
        for a in range(0, n, REFERENCE_ROWS):
            B = X[a:a + REFERENCE_ROWS].astype(np.float64)
            B -= mean
            Y[a:a + B.shape[0]] = B @ V
            Z += B.T @ Y[a:a + B.shape[0]]
        return Y, Z

    m, L = job["m"], REFERENCE_WIDTH
    V = np.linalg.qr(np.random.default_rng(0).standard_normal((p, L)))[0]
    history = []
    for sweep in range(1, job.get("max_sweeps", 20) + 1):
        Y, Z = gram_times(V)
        # Rayleigh–Ritz on span(V): X̃V = U Σ Wᵀ, Ritz vectors V·W, values Σ²
        _, sv, Wt = scipy.linalg.svd(Y, full_matrices=False)
        Vr, Zr = V @ Wt.T, Z @ Wt.T
        resid = np.linalg.norm(Zr[:, :m] - Vr[:, :m] * sv[:m] ** 2, axis=0) / sv[:m] ** 2
        history.append(float(resid.max()))
        print(f"  reference sweep {sweep}: max eigen-residual {resid.max():.2e}", file=sys.stderr, flush=True)
        if resid.max() < REFERENCE_RTOL:
            break
        V = np.linalg.qr(Z)[0]
    np.savez(job["out"], s=sv[:m], V=Vr[:, :m])
    return {"seconds_load": t_load, "seconds_total": time.perf_counter() - t0, "sweeps": sweep,
            "max_eigen_residual": history[-1], "history": history, "width": L}


def worker_evaluate_onepass(job: dict) -> dict:
    """Accuracy against the reference; the true rank-k error of each run by one float64 pass."""
    import numpy as np
    import scipy.linalg

    ref = np.load(job["reference"])
    k = job["k"]
    s_ref, V_ref = ref["s"][:k], ref["V"][:, :k]
    runs = {name: np.load(path) for name, path in job["runs"].items()}
    inner = {name: 0.0 for name in runs}
    total = 0.0
    colsum = None
    sq = None
    n = 0
    for a, block in _zarr_blocks(job["zarr"], REFERENCE_ROWS):
        B = block.astype(np.float64)
        colsum = B.sum(axis=0) if colsum is None else colsum + B.sum(axis=0)
        sq = np.einsum("ij,ij->j", B, B) if sq is None else sq + np.einsum("ij,ij->j", B, B)
        n += B.shape[0]
        for name, got in runs.items():
            S = got["S"][a:a + B.shape[0]]
            inner[name] += float(np.sum(S * (B @ got["V"])))
    mu = colsum / n
    total = float(np.sum(sq - n * mu * mu))  # ‖X̃‖²_F
    out = {"total_sq": total, "reference_s": ref["s"].tolist(),
           "best_relative_error": float(np.sqrt(max(total - np.sum(s_ref**2), 0.0) / total))}
    for name, got in runs.items():
        S, V = got["S"], got["V"]
        # ⟨X̃, S·Vᵀ⟩ = Σ s_i·(x_i V) − (1ᵀS)(μᵀV); ‖S·Vᵀ‖² = tr(SᵀS·VᵀV)
        cross = inner[name] - float(S.sum(axis=0) @ (mu @ V))
        approx_sq = float(np.sum((S.T @ S) * (V.T @ V)))
        true_rel = float(np.sqrt(max(total - 2 * cross + approx_sq, 0.0) / total))
        rel = np.abs(got["s"][:k] - s_ref) / s_ref
        angles = scipy.linalg.subspace_angles(V_ref, V)
        out[name] = {"max_rel_err": float(rel.max()), "argmax": int(rel.argmax()) + 1,
                     "rel_err": rel.tolist(), "max_sin": float(np.sin(angles.max())),
                     "true_relative_error": true_rel}
    return out


bf.WORKERS.update(floor_cpu=worker_floor_cpu, onepass=worker_onepass, subspace_reference=worker_subspace_reference,
                  evaluate_onepass=worker_evaluate_onepass)


def ensure_reference(args, n: int, p: int, meta: dict, workdir: Path) -> tuple[Path, dict]:
    d = bf._dataset_dir(args, n, p)
    m = min(args.components + 1, p - 1)
    for other in sorted(d.glob("reference-top*.npz")):  # bench_fit.py's exact one
        if int(other.stem.split("top")[1]) >= m and other.with_suffix(".json").exists():
            return other, dict(json.loads(other.with_suffix(".json").read_text()), kind="gram")
    ref = d / f"reference-subspace-top{m}.npz"
    info_path = ref.with_suffix(".json")
    if ref.exists() and info_path.exists():
        bf.say(f"[{n}x{p}] reusing reference {ref.name}")
        return ref, json.loads(info_path.read_text())
    bf.say(f"[{n}x{p}] computing the reference (float64 subspace iteration, width {REFERENCE_WIDTH})")
    tmp = d / f".tmp-{ref.name}"
    child = bf.run_child("subspace_reference", {"zarr": meta["zarr"], "m": m, "out": str(tmp),
                                                "threads": args.threads}, workdir, echo=True)
    if child.returncode != 0:
        raise SystemExit(f"error: reference failed: {child.stderr_tail}")
    os.replace(tmp, ref)
    info = dict(child.result, wall=child.wall, peak_rss=child.max_rss, kind="subspace")
    info_path.write_text(json.dumps(info))
    return ref, info


def _uptime() -> str:
    try:
        return Path("/proc/loadavg").read_text().split()[:3].__str__()
    except OSError:
        return "?"


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--size", default="40000x20000", help="ROWSxCOLUMNS (default 40000x20000)")
    ap.add_argument("--components", "-k", type=int, default=20)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--memory-limit", default="1GB",
                    help="the one-pass fit's memory limit; several, comma-separated, run side by side")
    ap.add_argument("--threads", type=int, default=None)
    ap.add_argument("--noise", type=float, default=1.0,
                    help="noise SD per entry of bench_fit.py's planted matrix (default 1)")
    ap.add_argument("--with-multipass", action="store_true", help="also the default (randomized) fit")
    ap.add_argument("--compare-with", default=None, metavar="DIR",
                    help="also the one-pass fit with the package imported from DIR (PYTHONPATH), "
                         "e.g. an earlier commit's src/, at the first --memory-limit")
    ap.add_argument("--data-dir", default="bench-data")
    ap.add_argument("--out", default=None, help="append the Markdown report to this file")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--job", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        return bf._worker_main(args.worker, args.job)
    # the data set of bench_fit.py's defaults
    args.rank, args.decay, args.seed, args.zarr_chunks, args.verbose = 30, 0.9, 0, None, False
    n, p = bf._parse_size(args.size)
    load_before = _uptime()
    with tempfile.TemporaryDirectory(prefix="bench-onepass-") as tmp:
        workdir = Path(tmp)
        meta = bf.ensure_data(args, n, p, workdir)
        ref_path, ref_info = ensure_reference(args, n, p, meta, workdir)
        common = {"k": args.components, "threads": args.threads}
        plan = [("floor: one streaming read", "floor_cpu", dict(common, kind="read", format="zarr", path=meta["zarr"]))]
        for limit in args.memory_limit.split(","):
            plan.append((f"axiscope one pass (--passes 1), --memory-limit {limit}", "onepass",
                         dict(common, path=meta["zarr"], memory_limit=limit, method="one-pass")))
        if args.compare_with:
            limit = args.memory_limit.split(",")[0]
            plan.append((f"axiscope one pass, code at {args.compare_with}, --memory-limit {limit}", "onepass",
                         dict(common, path=meta["zarr"], memory_limit=limit, method="one-pass",
                              pythonpath=str(Path(args.compare_with).resolve()))))
        if args.with_multipass:
            limit = args.memory_limit.split(",")[0]
            plan.append((f"axiscope default passes, --memory-limit {limit}", "onepass",
                         dict(common, path=meta["zarr"], memory_limit=limit, method="randomized")))
        rows = {label: {"inside": [], "wall": [], "rss": [], "cpu": [], "res": None, "factors": None}
                for label, _, _ in plan}
        for rep in range(args.repeats):
            for i, (label, worker, job) in enumerate(plan):
                row = rows[label]
                if worker == "onepass" and rep == 0:
                    row["factors"] = str(workdir / f"factors-{i}.npz")
                    job = dict(job, factors=row["factors"])
                bf.say(f"[{n}x{p}] {label} (run {rep + 1}/{args.repeats}) ...")
                env = {"PYTHONPATH": job["pythonpath"]} if job.get("pythonpath") else None
                child = bf.run_child(worker, job, workdir, env=env)
                if child.returncode != 0:
                    raise SystemExit(f"{label} failed: {child.stderr_tail}")
                cpu = child.result["cpu"] if child.returncode == 0 else float("nan")
                row["cpu"].append(cpu)
                row["inside"].append(child.result["seconds"])
                row["wall"].append(child.wall)
                row["rss"].append(child.max_rss)
                row["res"] = row["res"] or child.result
                bf.say(f"    inside {child.result['seconds']:.2f} s, wall {child.wall:.2f} s, CPU {cpu:.1f} s, "
                       f"peak RSS {bf._fmt_bytes(child.max_rss)}")
        runs = {label: r["factors"] for label, r in rows.items() if r["factors"]}
        child = bf.run_child("evaluate_onepass", {"reference": str(ref_path), "k": args.components,
                                                  "zarr": meta["zarr"], "runs": runs}, workdir)
        if child.returncode != 0:
            raise SystemExit(f"evaluation failed: {child.stderr_tail}")
        ev = child.result
    load_after = _uptime()
    report = _report(args, argv, n, p, meta, ref_info, rows, ev, load_before, load_after)
    print(report)
    if args.out:
        with open(args.out, "a", encoding="utf-8") as fh:
            fh.write(report + "\n")
    return 0


def _report(args, argv, n, p, meta, ref_info, rows, ev, load_before, load_after) -> str:
    k = args.components
    med = {label: statistics.median(r["inside"]) for label, r in rows.items()}
    floor = med["floor: one streaming read"]
    one = next(label for label in rows if label.startswith("axiscope one pass"))
    ref_s = ev["reference_s"]
    ref_kind = ("float64 Gram + LAPACK eigh (bench_fit.py)" if ref_info.get("kind") == "gram" else
                f"float64 subspace iteration, width {ref_info.get('width')}, {ref_info.get('sweeps')} sweeps, "
                f"largest eigen-residual {ref_info.get('max_eigen_residual', float('nan')):.1e} of σ²")
    out = [f"Command: `{shlex.join(['python', 'scripts/bench_onepass.py'] + argv)}`", "",
           f"Data: {n:,} × {p:,} float32 Zarr (chunks {meta['zarr_chunks'][0]}×{meta['zarr_chunks'][1]}, "
           f"zarr's default codec), planted rank {args.rank} + noise SD {args.noise:g} (bench_fit.py's data); k = {k}, "
           f"`--memory-limit {args.memory_limit}`, centred, no scaling. Reference: {ref_kind}; "
           f"σ1 = {ref_s[0]:.6g}, σ{k} = {ref_s[k - 1]:.6g}, σ{k}/σ{k + 1} = {ref_s[k - 1] / ref_s[k]:.3f}. "
           f"Load average (1, 5, 15 min) before {load_before}, after {load_after}.", "",
           f"| run | time inside s (median of {args.repeats}) | runs | ratio to the read | CPU s inside (median) "
           f"| CPU ratio | peak RSS | passes | max rel. error σ1..σ{k} | max sin θ | true rel. error "
           f"| estimated rel. error |",
           "|---|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    floor_cpu = statistics.median(rows["floor: one streaming read"]["cpu"])
    for label, r in rows.items():
        e = ev.get(label, {})
        res = r["res"]
        est = res.get("estimated_relative_error")
        out.append(
            f"| {label} | {med[label]:.2f} | {', '.join(f'{x:.2f}' for x in r['inside'])} | "
            f"{med[label] / floor:.2f}× | {statistics.median(r['cpu']):.1f} | "
            f"{statistics.median(r['cpu']) / floor_cpu:.2f}× | {bf._fmt_bytes(max(r['rss']))} | {res.get('passes', 1)} | "
            f"{bf._fmt_float(e.get('max_rel_err'))} | {bf._fmt_float(e.get('max_sin'))} | "
            f"{bf._fmt_float(e.get('true_relative_error'), '.4f')} | {bf._fmt_float(est, '.4f')} |")
    out.append("")
    out.append(f"Best possible rank-{k} relative error (from the reference values): "
               f"{ev['best_relative_error']:.4f}.")
    res = rows[one]["res"]
    out.append(f"One-pass sketch widths {res.get('widths')}; blocks of {res.get('block_rows')} rows; "
               f"pass times {res.get('pass_seconds')}.")
    e = ev.get(one, {})
    if e:
        out.append("One-pass relative error of each σ_j: " + ", ".join(f"{x:.1e}" for x in e["rel_err"]) + ".")
    for label, r in rows.items():
        if r["res"] and r["res"].get("package"):
            out.append(f"{label}: axiscope imported from `{r['res']['package']}`; pass times "
                       f"{r['res'].get('pass_seconds')}.")
    parent = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    out.append(f"Parent process peak RSS {bf._fmt_bytes(parent)}.")
    out.append("")
    return "\n".join(out)


if __name__ == "__main__":
    sys.exit(main())
