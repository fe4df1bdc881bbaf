"""How many axes carry signal: criteria side by side, a recommendation and its reason.

Every criterion is computed on the same preprocessed matrix ``X̃`` (``n`` active samples ×
``p`` kept features, centred and scaled as the fit did), from the ``k`` leading axes of a fit
(``k`` = ``max_components``, the candidates) and from one random subsample of samples:

* **variance share** and **cumulative share** of each candidate axis (the fit's own);
* **broken stick** (Frontier 1976; Jackson 1993, Ecology 74(8)): the share the ``j``-th
  largest piece of a stick broken at random into ``m`` pieces is expected to have,
  ``b_j = (1/m)·Σ_{i=j..m} 1/i``, with ``m`` the number of axes the matrix has
  (``min(n − 1, p)`` when centred); an axis passes when its share exceeds ``b_j``;
* **variance above 1**, standardised PCA only (unit scaling, centred): reported, never
  recommended (it keeps too many axes; common practice, no source);
* **noise edge** (Marchenko & Pastur 1967): with every feature pure noise of variance ``σ²``,
  the largest axis variance ``s²/n`` tends to ``σ²·(1 + √(p/ν))²``. With centring the
  matrix has ``ν = n − 1`` degrees of freedom; dividing by the population SD (``1/n``)
  makes the noise variance ``n/(n − 1)``, which the ``1/n`` of the axis variance cancels, so
  the edge in axis-variance units is ``(1 + √(p/(n − 1)))²`` for standardised data. We take
  ``σ²`` = total variance / ``p`` (1 under unit scaling: the level if every feature were
  noise);
* **optimal hard threshold** (Gavish & Donoho 2014, IEEE Trans. Inf. Theory 60(8)) with
  unknown noise: singular values above ``ω(β)·median(s)`` are kept, ``ω(β) = λ*(β)/√μ_β``,
  ``λ*(β) = √(2(β+1) + 8β/((β+1) + √(β² + 14β + 1)))``, ``μ_β`` the median of the
  Marchenko–Pastur law of ratio ``β`` (found numerically; ``ω(1) ≈ 2.858``). The median is
  over *all* ``min(ν, p)`` singular values, which a truncated fit does not have. We take it
  from the subsample below, where the whole spectrum is computed anyway: its median ``s_med``
  gives the noise level per cell ``σ̂ = s_med / √(max(ν_m, p)·μ_{β_m})``, the same cells as in
  the full matrix since the subsample is scaled by the fit's scales, and the full data's
  threshold is ``τ = λ*(β)·√(max(ν, p))·σ̂`` (the known-noise form of the same paper);
* **parallel analysis** (Horn 1965, Psychometrika 30): the subsample's own axis variances
  against those of the same subsample with each feature independently permuted across its
  samples, ``permutations`` times; an axis passes when its variance exceeds the ``quantile``
  (0.95) of the permuted variances of the same rank (linear interpolation between order
  statistics, numpy's default).

A criterion's count is the number of leading axes that pass it before the first one that
does not. The recommendation is the parallel-analysis count where it is computed, the
optimal-threshold count otherwise.

Out of core
-----------
Permuting a feature across samples needs every sample of it at once, which streaming
blocks do not give. So the parallel analysis runs on a **uniformly random subsample** of
``m`` active samples (all of them when they fit), drawn with the fit's seed and read in
**one pass** over the input; ``m`` is the largest that fits a quarter of the memory budget
(the subsample, one permuted copy and two ``m × m`` Gram matrices in float64), at most
``max_samples`` (default :data:`DEFAULT_SIGNAL_SAMPLES`). The subsample is transformed like
the fit's blocks, centred on its own mean (the fit's centre would add a rank-one term of the
size of the noise) and divided by the fit's scales. The real and every permuted subsample
are compared at the same size ``m``, so the comparison is fair; with ``m < n`` it detects
only axes strong enough to stand out at ``m`` samples (about ``√(p/m)`` times the noise
level for a single spike), so the count can be lower than the full data would support —
the manifest says how many samples were used. Each spectrum is that of the smaller Gram
matrix (``m × m`` when ``m ≤ p``) by LAPACK, ``(1 + permutations)·min(m, p)²·max(m, p)``
multiply-adds in all; no further pass.

Cost in passes: one (the subsample), after the fit's own.
"""

from __future__ import annotations

import logging
import math
import numbers
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..core.memory import default_memory_limit, parse_memory
from ..core.options import EngineSettings, InputLayout, Resources
from ..core.preprocess import PreprocessSpec, transform_block
from ..defaults import (
    DEFAULT_MAX_COMPONENTS,
    DEFAULT_PERMUTATIONS,
    DEFAULT_SIGNAL_SAMPLES,
)
from ..errors import OptionError, ResourceError, counted
from ..fitting.result import FitResult
from ..fitting.run import fit
from ..fitting.run import max_components as rank_limit
from ..io import MatrixSource, opened

__all__ = [
    "SignalAxes", "assess_signal", "fit_with_signal", "broken_stick", "noise_edge",
    "optimal_threshold_coefficient", "marchenko_pastur_median", "optimal_threshold_lambda",
    "parallel_analysis", "SIGNAL_TABLE", "QUANTILE", "MIN_SUBSAMPLE",
]

logger = logging.getLogger(__name__)

#: File of the criteria table in a fit's result directory.
SIGNAL_TABLE = "signal_axes.tsv"
#: Quantile of the permuted variances an axis must exceed (Glorfeld 1995 proposed the 95th
#: percentile instead of Horn's mean).
QUANTILE = 0.95
#: Fewest samples in the subsample for a parallel analysis.
MIN_SUBSAMPLE = 10


# --------------------------------------------------------------------------- closed forms


def broken_stick(n_pieces: int, k: int | None = None) -> np.ndarray:
    """Expected share of the ``j``-th largest of ``n_pieces`` random pieces of a stick.

    ``b_j = (1/m)·Σ_{i=j..m} 1/i`` (Frontier 1976; Jackson 1993), for ``j = 1..k``.
    """
    m = int(n_pieces)
    k = m if k is None else min(int(k), m)
    inverse = 1.0 / np.arange(1, m + 1, dtype=np.float64)
    tail = np.cumsum(inverse[::-1])[::-1]  # Σ_{i=j..m} 1/i
    return tail[:k] / m


def noise_edge(n_rows: int, n_cols: int) -> float:
    """Marchenko–Pastur upper edge ``(1 + √(p/ν))²`` for ``ν`` rows of unit-variance noise.

    The limit of the largest eigenvalue of ``WᵀW/ν`` for ``W`` (``ν × p``) with independent
    entries of variance 1 (Marchenko & Pastur 1967); also right for ``p > ν``.
    """
    return (1.0 + math.sqrt(n_cols / n_rows)) ** 2


def _mp_density(t: np.ndarray | float, beta: float):
    a, b = (1 - math.sqrt(beta)) ** 2, (1 + math.sqrt(beta)) ** 2
    return np.sqrt(np.maximum((b - t) * (t - a), 0.0)) / (2 * math.pi * beta * t)


def marchenko_pastur_median(beta: float) -> float:
    """Median ``μ_β`` of the Marchenko–Pastur law of ratio ``0 < β ≤ 1`` (numerical).

    The law of the eigenvalues of ``WWᵀ/n`` for ``W`` (``m × n``, ``β = m/n``) with unit
    noise; the median solves ``∫_a^μ f_β = 1/2`` (``scipy.integrate.quad`` and ``brentq``).
    """
    from scipy.integrate import quad
    from scipy.optimize import brentq

    beta = float(beta)
    a, b = (1 - math.sqrt(beta)) ** 2, (1 + math.sqrt(beta)) ** 2

    def below(x: float) -> float:
        return quad(_mp_density, a, x, args=(beta,), limit=200)[0] - 0.5

    return float(brentq(below, a, b, xtol=1e-12))


def optimal_threshold_lambda(beta: float) -> float:
    """``λ*(β)`` of Gavish & Donoho (2014): the known-noise threshold is ``λ*(β)·√n·σ``."""
    beta = float(beta)
    return math.sqrt(2 * (beta + 1) + 8 * beta / ((beta + 1) + math.sqrt(beta**2 + 14 * beta + 1)))


def optimal_threshold_coefficient(beta: float) -> float:
    """``ω(β) = λ*(β)/√μ_β``: the unknown-noise threshold is ``ω(β)·median singular value``."""
    return optimal_threshold_lambda(beta) / math.sqrt(marchenko_pastur_median(beta))


# --------------------------------------------------------------------------- the subsample


def _leading_run(passes: np.ndarray) -> int:
    """Number of leading ``True`` values."""
    failed = np.flatnonzero(~np.asarray(passes, dtype=bool))
    return int(failed[0]) if failed.size else int(len(passes))


def _spectrum(Z: np.ndarray, k: int | None = None) -> np.ndarray:
    """The ``k`` largest (default: all) eigenvalues of ``ZᵀZ`` (equal to those of ``ZZᵀ``),
    largest first, float64.

    The smaller Gram matrix, formed by the BLAS rank-k update in ``Z``'s dtype; LAPACK
    ``syevd`` in float64 for all eigenvalues, ``syevr`` in ``Z``'s dtype for the leading ``k``
    (float32 rounding, about 1e-7 of the largest, is far below the spread of the permuted
    values; the float64 reduction took three times as long on float32 data).
    """
    from scipy.linalg import blas, eigh

    m, p = Z.shape
    syrk = blas.dsyrk if Z.dtype == np.float64 else blas.ssyrk
    # Fortran view of a C-ordered array is its transpose, so no copy is made
    gram = syrk(1.0, Z.T, trans=1) if m <= p else syrk(1.0, Z, trans=1)
    size = gram.shape[0]
    if k is None or k >= size:
        values = eigh(np.asarray(gram, dtype=np.float64), lower=False, eigvals_only=True, driver="evd")
    else:  # in the Gram matrix's own dtype: the reduction to tridiagonal form dominates the cost
        values = eigh(gram, lower=False, eigvals_only=True, driver="evr", subset_by_index=[size - k, size - 1])
    return np.maximum(values[::-1].astype(np.float64), 0.0)


def parallel_analysis(Z: np.ndarray, k: int, *, permutations: int, quantile: float = QUANTILE,
                      rng: np.random.Generator, progress=None) -> tuple[np.ndarray, np.ndarray]:
    """Leading ``k`` eigenvalues of ``ZᵀZ`` for ``permutations`` column-wise permutations of ``Z``.

    Parameters
    ----------
    Z : ndarray, shape (m, p)
        Centred (and scaled) subsample; not modified.
    k : int
    permutations : int
    quantile : float
    rng : numpy.random.Generator
        Each column is permuted independently (``Generator.permuted`` along axis 0).

    Returns
    -------
    permuted : ndarray, shape (permutations, k)
        Leading eigenvalues of each permuted copy.
    threshold : ndarray, shape (k,)
        Their ``quantile`` at each rank.
    """
    buffer = np.empty_like(Z)
    permuted = np.empty((permutations, k))
    for r in range(permutations):
        rng.permuted(Z, axis=0, out=buffer)
        permuted[r] = _spectrum(buffer, k)[:k]
        if progress is not None:
            progress("signal: permutations", r + 1, permutations)
    return permuted, np.quantile(permuted, quantile, axis=0)


def _subsample_rows(n: int, p: int, itemsize: int, budget: int, max_samples: int) -> int:
    """Largest ``m ≤ min(n, max_samples)`` whose work fits ``budget`` bytes:
    ``2·m·p·itemsize`` (subsample and permuted copy) + ``2·8·min(m, p)²`` (Gram and LAPACK)."""
    m = min(n, int(max_samples))
    while m >= MIN_SUBSAMPLE and 2 * m * p * itemsize + 16 * min(m, p) ** 2 > budget:
        m = int(m * 0.9)
    return m


def read_subsample(src: MatrixSource, rows: np.ndarray, spec: PreprocessSpec, kept: np.ndarray,
                   inverse_scale: np.ndarray, fill: np.ndarray | None, *, block_rows: int,
                   progress=None) -> np.ndarray:
    """The given input rows, transformed like a fit's blocks, restricted to ``kept``, centred on
    their own mean (when ``spec.center``) and multiplied by ``inverse_scale``; one pass.

    ``rows`` are sorted input row indices; blocks of ``block_rows`` input rows are read in order
    and only the chosen rows kept, so the input is read once, sequentially.
    """
    dtype = np.result_type(src.dtype, np.float32)
    Z = np.empty((rows.shape[0], kept.shape[0]), dtype=dtype)
    n_all = src.shape[0]
    starts = list(range(0, n_all, block_rows))
    filled = 0
    for i, a in enumerate(starts):
        b = min(n_all, a + block_rows)
        lo, hi = np.searchsorted(rows, [a, b])
        if hi > lo:
            block = np.asarray(src.read_samples(a, b))[rows[lo:hi] - a]
            block = transform_block(np.array(block, dtype=dtype), spec)[:, kept]
            if fill is not None:
                bad = ~np.isfinite(block)
                if bad.any():
                    block[bad] = np.broadcast_to(fill.astype(dtype), block.shape)[bad]
            Z[filled:filled + block.shape[0]] = block
            filled += block.shape[0]
        if progress is not None:
            progress("signal: subsample", i + 1, len(starts))
    if spec.center:  # twice: the second takes out what rounding the mean to Z's dtype left
        for _ in range(2):
            Z -= Z.mean(axis=0, dtype=np.float64).astype(dtype)
    Z *= inverse_scale.astype(dtype)
    return Z


# --------------------------------------------------------------------------- the decision


@dataclass
class SignalAxes:
    """The criteria for the number of axes, side by side, and the recommendation.

    Attributes
    ----------
    table : DataFrame
        One row per candidate axis, written as ``signal_axes.tsv``: ``axis``, ``variance``,
        ``variance_ratio``, ``cumulative_ratio``, ``broken_stick_ratio``, ``above_broken_stick``,
        ``above_unit_variance``, ``noise_edge_variance``, ``above_noise_edge``,
        ``optimal_threshold_variance``, ``above_optimal_threshold``, ``subsample_variance``,
        ``permuted_mean_variance``, ``permuted_quantile_variance``, ``above_permuted``,
        ``recommended``, ``kept``.
    recommended : int
        Recommended number of axes (may be 0).
    criterion : str
        ``"parallel_analysis"`` or ``"optimal_threshold"``.
    reason : str
        One plain sentence: why this number.
    summary : dict
        The manifest's ``"signal_axes"`` record (``recommended``, ``reason``, the counts of
        every criterion, the noise levels and how the subsample was taken).
    """

    table: pd.DataFrame
    recommended: int
    criterion: str
    reason: str
    summary: dict = field(default_factory=dict)

    def write(self, directory: Path, *, parquet: bool = False) -> None:
        """Write ``signal_axes.tsv`` into ``directory`` (and ``.parquet`` with ``parquet``)."""
        from ..io.output import write_table

        write_table(self.table, Path(directory) / SIGNAL_TABLE, parquet=parquet)


def _check_settings(permutations, quantile, max_samples) -> None:
    if not _whole(permutations) or permutations < 0:
        raise OptionError(f"permutations={permutations!r} is not a whole number >= 0; pass e.g. 20")
    if not (isinstance(quantile, numbers.Real) and 0.5 <= float(quantile) < 1.0):
        raise OptionError(f"quantile={quantile!r} is not between 0.5 and 1; pass e.g. 0.95")
    if not _whole(max_samples) or max_samples < MIN_SUBSAMPLE:
        raise OptionError(f"max_samples={max_samples!r} is below {MIN_SUBSAMPLE}; pass e.g. {DEFAULT_SIGNAL_SAMPLES}")


def _whole(value) -> bool:
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def assess_signal(
    result: FitResult,
    source: MatrixSource,
    *,
    active: np.ndarray | None = None,
    permutations: int = DEFAULT_PERMUTATIONS,
    quantile: float = QUANTILE,
    max_samples: int = DEFAULT_SIGNAL_SAMPLES,
    memory_limit: int | str | None = None,
    seed: int = 0,
    progress=None,
    covariates=None,
) -> SignalAxes:
    """Every criterion for the number of axes of ``result``, a fit of ``source``.

    Parameters
    ----------
    result : FitResult
        A fit whose axes are the candidates (fit ``max_components`` of them).
    source : MatrixSource
        The matrix the fit read (opened), for one more pass: the subsample.
    active : ndarray of bool, shape (n_samples,), optional
        The samples the fit used (default: all).
    permutations : int, default=20
        Permuted copies of the subsample for the parallel analysis; 0 skips it (the
        recommendation is then the optimal-threshold count).
    quantile : float, default=0.95
    max_samples : int, default=DEFAULT_SIGNAL_SAMPLES
        Largest subsample.
    memory_limit : int or str, optional
        Budget; the subsample's work takes at most a quarter of it (default: half the RAM).
    seed : int, default=0
        Seed of the subsample and of the permutations.
    progress : callable, optional
        ``progress(name, done, total)``.
    covariates : axiscope.core.adjust.Covariates, optional
        The covariates ``result`` was fitted after adjusting for (required then): the
        subsample is adjusted for its own covariate values (projected off the span of its
        rows of ``C``) before its spectrum and its permutations are taken, and every noise
        level counts the ``rank(C)`` dimensions the adjustment removed instead of the one
        centring removes.

    Returns
    -------
    SignalAxes

    Raises
    ------
    ResourceError
        A quarter of the budget cannot hold ``MIN_SUBSAMPLE`` samples.

    Notes
    -----
    One pass over the input (the subsample), then ``1 + permutations`` dense spectra of the
    subsample, each ``min(m, p)²·max(m, p)`` multiply-adds. See the module description.
    """
    _check_settings(permutations, quantile, max_samples)
    t0 = time.perf_counter()
    model, prep = result.model, result.preprocessing
    spec = model.spec
    n, p, k = model.n_samples, model.n_features, model.n_components
    centred = bool(spec.center)
    design = model.covariates
    if (design is None) != (covariates is None):
        raise OptionError("the fit was adjusted for covariates: pass the same covariates to assess its axes"
                          if design is not None else
                          "covariates were given, but the fit was not adjusted for any; leave them out")
    removed = len(design.terms) if design is not None else (1 if centred else 0)  # dimensions taken out
    dof = n - removed
    rank = min(dof, p)
    variance = model.variance
    total = float(model.total_inertia)
    share = variance / total
    active = np.ones(source.shape[0], dtype=bool) if active is None else np.asarray(active, dtype=bool)
    rng = np.random.default_rng(seed)

    # the subsample: one pass
    budget = parse_memory(memory_limit) if memory_limit is not None else default_memory_limit()
    itemsize = np.dtype(np.result_type(source.dtype, np.float32)).itemsize
    m = _subsample_rows(n, p, itemsize, budget // 4, max_samples)
    if m < MIN_SUBSAMPLE:
        raise ResourceError(f"a quarter of memory_limit cannot hold {MIN_SUBSAMPLE} samples × {p} features "
                            "for the parallel analysis; raise memory_limit")
    index = np.flatnonzero(active)
    rows = np.sort(rng.choice(index, size=m, replace=False)) if m < n else index
    block_rows = max(1, min(source.shape[0], int(64e6 // max(1, source.shape[1] * itemsize))))
    fill = prep.mean_raw if spec.missing == "mean" and prep.mean_raw.size else None
    Z = read_subsample(source, rows, spec, prep.kept, prep.inverse_scale, fill, block_rows=block_rows,
                       progress=progress)
    if design is not None:  # the subsample adjusted as the fit was: projected off its rows of C
        basis, _ = np.linalg.qr(covariates.encode_for(design, np.asarray(source.sample_ids)[rows]))
        Z -= (basis @ (basis.T @ Z.astype(np.float64))).astype(Z.dtype)
    t_read = time.perf_counter() - t0
    dof_m = m - removed
    rank_m = min(dof_m, p)
    sub_eig = _spectrum(Z)[:rank_m]

    # optimal hard threshold: noise level from the subsample's whole spectrum
    s_sub = np.sqrt(sub_eig)
    beta_m = rank_m / max(dof_m, p)
    sigma = float(np.median(s_sub)) / math.sqrt(max(dof_m, p) * marchenko_pastur_median(beta_m))
    beta = rank / max(dof, p)
    tau = optimal_threshold_lambda(beta) * math.sqrt(max(dof, p)) * sigma
    gd_variance = tau**2 / n
    # noise edge in axis-variance units, noise variance = average feature variance
    sigma2_all = total / p
    # (with centring: ν = n − 1 rows of noise variance σ²·n/(n − 1), divided by n: σ²·edge(ν, p))
    edge_variance = sigma2_all * noise_edge(dof, p)
    stick = np.full(k, np.nan)
    stick[: min(k, rank)] = broken_stick(rank, k)
    unit = centred and spec.scale == "unit"

    # parallel analysis on the subsample
    k_pa = min(k, rank_m)
    sample_var = np.full(k, np.nan)
    sample_var[:k_pa] = sub_eig[:k_pa] / m
    perm_q = np.full(k, np.nan)
    perm_mean = np.full(k, np.nan)
    seconds_perm = 0.0
    if permutations:
        t1 = time.perf_counter()
        permuted, threshold = parallel_analysis(Z, k_pa, permutations=permutations, quantile=quantile,
                                                rng=rng, progress=progress)
        seconds_perm = time.perf_counter() - t1
        perm_q[:k_pa] = threshold / m
        perm_mean[:k_pa] = permuted.mean(axis=0) / m
    del Z

    above = {
        "broken_stick": share > np.nan_to_num(stick, nan=np.inf),
        "unit_variance": variance > 1.0 if unit else None,
        "noise_edge": variance > edge_variance,
        "optimal_threshold": model.singular_values > tau,
        "parallel_analysis": (sample_var > np.nan_to_num(perm_q, nan=np.inf)) if permutations else None,
    }
    counts = {name: (None if passes is None else _leading_run(passes)) for name, passes in above.items()}
    if permutations:
        criterion, recommended = "parallel_analysis", counts["parallel_analysis"]
    else:
        criterion, recommended = "optimal_threshold", counts["optimal_threshold"]
    reason = _reason(criterion, recommended, k=k, m=m, n=n, permutations=permutations, quantile=quantile,
                     counts=counts)

    names = model.axis_names
    table = pd.DataFrame({
        "axis": names,
        "variance": variance,
        "variance_ratio": share,
        "cumulative_ratio": np.cumsum(share),
        "broken_stick_ratio": stick,
        "above_broken_stick": above["broken_stick"],
        "above_unit_variance": pd.array(above["unit_variance"] if unit else [None] * k, dtype="boolean"),
        "noise_edge_variance": np.full(k, edge_variance),
        "above_noise_edge": above["noise_edge"],
        "optimal_threshold_variance": np.full(k, gd_variance),
        "above_optimal_threshold": above["optimal_threshold"],
        "subsample_variance": sample_var,
        "permuted_mean_variance": perm_mean,
        "permuted_quantile_variance": perm_q,
        "above_permuted": pd.array(above["parallel_analysis"] if permutations else [None] * k, dtype="boolean"),
        "recommended": np.arange(k) < recommended,
    })
    summary = {
        "recommended": int(recommended),
        "criterion": criterion,
        "reason": reason,
        "candidates": int(k),
        "counts": counts,
        "table": SIGNAL_TABLE,
        "noise": {
            "noise_edge_variance": edge_variance,
            "noise_edge_rule": ("(1 + sqrt(p/(n-1)))^2 x total variance / p (centred, population scaling)"
                                if centred else "(1 + sqrt(p/n))^2 x total variance / p"),
            "optimal_threshold_singular_value": tau,
            "optimal_threshold_variance": gd_variance,
            "noise_level": sigma,
            "noise_level_from": "median singular value of the subsample (Marchenko-Pastur median)",
            "beta": beta,
            "omega": optimal_threshold_lambda(beta) / math.sqrt(marchenko_pastur_median(beta)),
        },
        "parallel_analysis": {
            "permutations": int(permutations),
            "quantile": float(quantile),
            "subsample_samples": int(m),
            "active_samples": int(n),
            "features": int(p),
            "seed": int(seed),
            "passes": 1,
            "seconds_reading": round(t_read, 3),
            "seconds_permutations": round(seconds_perm, 3),
        },
        "seconds": round(time.perf_counter() - t0, 3),
    }
    logger.info("signal axes: %s", reason)
    return SignalAxes(table, int(recommended), criterion, reason, summary)


def _reason(criterion: str, recommended: int, *, k: int, m: int, n: int, permutations: int, quantile: float,
            counts: dict) -> str:
    if criterion == "parallel_analysis":
        where = f"all {n} samples" if m == n else f"a random subsample of {m} of the {n} samples"
        text = (f"{counted(recommended, 'axis', 'axes')} {'carries' if recommended == 1 else 'carry'} more "
                f"variance than the {quantile:.0%} quantile of {counted(permutations, 'copy', 'copies')} "
                f"with each feature permuted across samples (parallel analysis on {where})")
    else:
        text = (f"{counted(recommended, 'singular value')} {'is' if recommended == 1 else 'are'} above the "
                "optimal hard threshold for unknown noise (Gavish-Donoho); no parallel analysis was run")
    if recommended >= k:
        text += f"; every candidate passed, so more axes may carry signal: raise max_components (--max-components) above {k}"
    return text


# --------------------------------------------------------------------------- orchestration


def fit_with_signal(
    source: MatrixSource | str | os.PathLike,
    *,
    n_components: int | str = "auto",
    max_components: int | None = None,
    permutations: int = DEFAULT_PERMUTATIONS,
    quantile: float = QUANTILE,
    max_samples: int = DEFAULT_SIGNAL_SAMPLES,
    preprocess: PreprocessSpec | None = None,
    engine: EngineSettings | None = None,
    resources: Resources | None = None,
    layout: InputLayout | None = None,
    active: np.ndarray | None = None,
    exclude_features: np.ndarray | None = None,
    progress=None,
    **fit_options,
) -> tuple[FitResult, SignalAxes]:
    """Fit, assess the number of axes, and with ``n_components="auto"`` keep the recommended number.

    Parameters
    ----------
    source : MatrixSource or path
    n_components : int or "auto", default="auto"
        ``"auto"``: fit ``max_components`` axes and keep the recommended number (at least 1);
        a number: fit that many and only report the criteria (the candidates are then those
        ``n_components`` axes).
    max_components : int, optional
        Candidates with ``"auto"`` (default: 50, or the rank the matrix can have when smaller).
    permutations, quantile, max_samples
        See :func:`assess_signal`.
    preprocess, engine, resources, layout, active, exclude_features, progress
        As for :func:`axiscope.fitting.run.fit`.
    **fit_options
        Passed on to :func:`axiscope.fitting.run.fit` (``covariates``, ``checksum``, ``checkpoint``,
        ``resume``, ``then``); the criteria are those of the adjusted matrix with ``covariates``.

    Returns
    -------
    result : FitResult
        With ``manifest["signal_axes"]`` set (the record of :class:`SignalAxes`).
    signal : SignalAxes

    Notes
    -----
    Passes: those of the fit of the candidates, plus one (the subsample).
    """
    auto = n_components == "auto"
    if not auto and not (_whole(n_components) and n_components >= 1):
        raise OptionError(f"n_components={n_components!r} is not 'auto' or a whole number >= 1; pass one")
    if max_components is not None and not auto:
        raise OptionError(f"max_components={max_components} applies to n_components='auto' only; "
                          "drop it or pass n_components='auto'")
    if max_components is not None and not (_whole(max_components) and max_components >= 1):
        raise OptionError(f"max_components={max_components!r} is not a whole number >= 1; pass one")
    _check_settings(permutations, quantile, max_samples)
    preprocess = preprocess or PreprocessSpec()
    engine = engine or EngineSettings()
    resources = resources or Resources()
    layout = layout or InputLayout()
    if isinstance(source, MatrixSource) and not layout.is_default:
        raise OptionError("layout describes a file, but source is an opened MatrixSource; pass the "
                          "file's path instead, or leave layout out")
    with opened(source, **layout.open_options()) as src:
        n = int(np.sum(active)) if active is not None else src.shape[0]
        p = src.shape[1] - (int(np.sum(exclude_features)) if exclude_features is not None else 0)
        limit = rank_limit(n, p, center=preprocess.center)
        if auto:
            if max_components is None:
                k = min(DEFAULT_MAX_COMPONENTS, limit)
            elif max_components > limit:
                raise OptionError(f"max_components={max_components} is more axes than {n} samples × {p} features "
                                  f"can give (rank at most {limit}); choose at most {limit}")
            else:
                k = int(max_components)
        else:
            k = int(n_components)
        result = fit(src, n_components=k, preprocess=preprocess, engine=engine, resources=resources,
                     active=active, exclude_features=exclude_features, progress=progress, **fit_options)
        signal = assess_signal(result, src, active=active, permutations=permutations, quantile=quantile,
                               max_samples=max_samples, memory_limit=resources.memory_limit, seed=engine.seed,
                               progress=progress, covariates=fit_options.get("covariates"))
    if auto:
        keep = max(1, signal.recommended)
        if keep < k:
            result = result.first_axes(keep)
        signal.summary["kept"] = keep
        signal.table["kept"] = np.arange(k) < keep
    else:
        signal.summary["kept"] = k
        signal.table["kept"] = True
    signal.summary["mode"] = "auto" if auto else "report"
    result.manifest["signal_axes"] = signal.summary
    result.manifest["passes"]["count"] += 1
    result.manifest["passes"]["detail"].append(
        {"name": "signal subsample", "read_from": "input", "seconds": signal.summary["parallel_analysis"]["seconds_reading"],
         "blocks": None})
    return result, signal
