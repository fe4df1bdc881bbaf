"""Scoring new samples against a saved model, with out-of-model diagnostics.

:func:`score` places a batch of new samples on a fitted model's axes in one streaming pass
(:func:`axiscope.model.project.project`: features matched by id, the stored preprocessing
replayed) and computes two distances per sample:

* Hotelling's T² inside the model's ``k``-dimensional space,
  ``T² = Σ_j t_j² / λ_j`` with ``λ_j = s_j²/(n−1)`` the (unbiased) variance of axis ``j``;
* the squared prediction error ``Q = ‖x̃ − V·t‖²``, the part of the preprocessed sample
  left after projection on the axes.

Each is compared with a control limit at the requested confidence (and at 0.95):

* T²: for a new sample independent of the ``n`` training samples,
  ``T²_α = k(n−1)(n+1) / (n(n−k)) · F_α(k, n−k)`` (Tracy, Young & Mason 1992, "Multivariate
  control charts for individual observations", Journal of Quality Technology 24(2),
  88–95, doi:10.1080/00224065.1992.11979383);
* Q: the approximation of Jackson & Mudholkar (1979, "Control procedures for residuals
  associated with principal component analysis", Technometrics 21(3), 341–349,
  doi:10.1080/00401706.1979.10489779), written in terms of ``θ_r = Σ_{j>k} λ_j^r``, the
  moments of the residual eigenvalues; or Box's (1954) scaled chi-square ``g·χ²_h``
  matching the mean ``θ1`` and variance ``2θ2`` of the training residuals (Box 1954,
  Annals of Mathematical Statistics 25(2), 290–302, doi:10.1214/aoms/1177728786).

The residual eigenvalues beyond the ``k`` axes are not computed, so only ``θ1`` is the
eigenvalue moment itself (total variance minus the variance of the ``k`` axes). ``θ2`` and
``θ3`` are *estimates* from the variance and the third central moment of the training
residuals ``Q``, through the identities that hold for a Gaussian sample
(``Q = Σ_{j>k} λ_j z_j²``): ``var(Q) = 2θ2`` and ``E[(Q − θ1)³] = 8θ3``. For Gaussian data
they are unbiased up to ``O(1/n)``; otherwise they fit the limit to the observed spread and
skew of the residuals rather than to the eigenvalues.
:func:`axiscope.model.training.training_extras` stores ``(θ1, θ2, θ3)`` and per-axis
shrinkage factors (:mod:`axiscope.model.shrinkage`) in the model at fit time.
"""

from __future__ import annotations

import logging
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from .. import __version__
from ..core.adjust import Covariates
from ..core.backends import open_backend
from ..core.options import Resources
from ..core.passes import PassRunner
from ..errors import InputError, ModelError, OptionError, agree, counted
from ..io import MatrixSource, opened
from ..model.project import project
from ..model.store import MODEL_VERSION, Model, load_model

__all__ = [
    "Q_LIMIT_METHODS",
    "FLAGS",
    "ControlLimits",
    "DIAGNOSTICS_COLUMNS",
    "ScoreResult",
    "score",
    "model_directory",
    "t2_limit",
    "q_limit_jackson_mudholkar",
    "q_limit_box",
]

logger = logging.getLogger(__name__)

#: How the Q limit is computed.
Q_LIMIT_METHODS = ("jackson-mudholkar", "box")
#: Values of the ``flag`` column of the diagnostics.
FLAGS = ("within", "t2", "q", "both", "missing")
#: Confidence always reported besides the requested one.
SECONDARY_CONFIDENCE = 0.95
#: Columns of ``diagnostics.tsv``, in order.
DIAGNOSTICS_COLUMNS = ("sample_id", "t2", "q", "flag", "missing_fraction", "confidence", "t2_limit",
                       "q_limit", "t2_limit_95", "q_limit_95")
#: Added to messages about non-finite values when the model's preprocessing takes logs.
_LOG_HINT = (
    " (the model's preprocessing applies log(1 + x), which turns values <= -1 into NaN or -inf: "
    "check the input for negative values, e.g. data that are already log-transformed)"
)


# ----------------------------------------------------------------------- at fit time


def t2_limit(confidence: float, n_components: int, n_samples: int) -> float:
    """Control limit of Hotelling's T² for a new sample (Tracy, Young & Mason 1992).

    ``k(n−1)(n+1) / (n(n−k)) · F⁻¹(confidence; k, n−k)`` with T² computed from the
    unbiased axis variances ``s²/(n−1)``. NaN when ``n <= k``.
    """
    k, n = int(n_components), int(n_samples)
    if n <= k:
        return float("nan")
    return float(k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(confidence, k, n - k))


def _jackson_mudholkar_base(confidence: float, theta1: float, theta2: float,
                             theta3: float) -> tuple[float, float, str | None]:
    """``(h0, base, reason)`` of the Jackson–Mudholkar formula; ``reason`` says why it is unusable."""
    if not (theta1 > 0 and theta2 > 0):
        return float("nan"), float("nan"), (
            f"theta1 = {theta1:.4g} and theta2 = {theta2:.4g} must be positive (no residual "
            "variance left outside the axes)")
    h0 = 1.0 - 2.0 * theta1 * theta3 / (3.0 * theta2**2)
    if not h0 > 0:
        return h0, float("nan"), (
            f"h0 = 1 - 2 theta1 theta3 / (3 theta2^2) = {h0:.4g} <= 0: the training residuals are "
            "more skewed than a Gaussian quadratic form allows")
    c = stats.norm.ppf(confidence)
    base = c * np.sqrt(2.0 * theta2 * h0**2) / theta1 + 1.0 + theta2 * h0 * (h0 - 1.0) / theta1**2
    if not base > 0:
        return h0, base, (
            f"the bracket of the formula is {base:.4g} <= 0 at confidence {confidence:g} "
            "(theta2 large for theta1)")
    return h0, base, None


def q_limit_jackson_mudholkar(confidence: float, theta1: float, theta2: float, theta3: float) -> float:
    """Jackson & Mudholkar (1979) limit of the squared prediction error.

    ``Q_α = θ1·[c_α·sqrt(2θ2h0²)/θ1 + 1 + θ2h0(h0 − 1)/θ1²]^(1/h0)``,
    ``h0 = 1 − 2θ1θ3/(3θ2²)``, ``c_α`` the standard normal quantile at ``confidence``.
    In the paper ``θ_r`` are the moments of the residual eigenvalues; the limits of
    :func:`score` pass ``θ1`` exact and ``θ2``, ``θ3`` estimated from the training
    residuals (see :func:`axiscope.model.training.training_extras`). NaN when the values do not allow it
    (``θ1, θ2 <= 0``, ``h0 <= 0`` or a non-positive bracket).
    """
    h0, base, reason = _jackson_mudholkar_base(confidence, theta1, theta2, theta3)
    if reason is not None:
        return float("nan")
    return float(theta1 * base ** (1.0 / h0))


def q_limit_box(confidence: float, mean: float, variance: float) -> float:
    """Box (1954) limit: ``g·χ²⁻¹(confidence; h)`` with ``g = var/(2·mean)``, ``h = 2·mean²/var``.

    :func:`score` passes the mean ``θ1`` and the variance ``2θ2`` of the training residuals.
    """
    if not (mean > 0 and variance > 0):
        return float("nan")
    g = variance / (2.0 * mean)
    h = 2.0 * mean**2 / variance
    return float(g * stats.chi2.ppf(confidence, h))


@dataclass
class ControlLimits:
    """Limits of T² and Q at one confidence level.

    ``q`` includes ``q_offset``, the expected excess of new samples' residuals over the
    training residuals (:func:`residual_excess`; zero when ``adjust_q=False``).
    """

    confidence: float
    t2: float
    q: float
    q_offset: float = 0.0

    def to_dict(self) -> dict:
        return {"confidence": self.confidence, "t2_limit": self.t2, "q_limit": self.q,
                "q_offset": self.q_offset}


def residual_excess(model: Model) -> float:
    """Expected excess of a new sample's Q over the mean training Q.

    ``Σ_j λ_j(1 − f_j²) + 2θ1/n`` (+ ``2θ1/(n − 3)`` when features are scaled). First term: the training samples helped choose the axes,
    so the axes take up more of their variance (``λ_j``, population convention) than of a
    new sample's (``f_j²·λ_j`` with ``f_j`` the shrinkage factor, :mod:`axiscope.model.shrinkage`);
    the difference is left in a new sample's residual. Second term: the training residuals
    are measured from the training mean with the ``1/n`` convention (expected
    ``(n−1)/n`` of the residual variance) while a new sample also carries the error of that
    mean (``+1/n``). Both vanish when samples far outnumber features.
    """
    f, moments = _require(model, "shrinkage_factor", "residual_moments",
                          hint="refit it, or score without the corrections that need them: "
                          "correct_shrinkage=False, adjust_q=False")
    theta1 = float(moments[0])
    excess = np.sum(model.variance * (1.0 - f**2)) + 2.0 * theta1 / model.n_samples
    if model.spec.scale != "none" and model.n_samples > 3:
        # Scales estimated from the training samples: a new sample's standardized values
        # carry σ²/s², whose mean for a chi-square s² on n − 1 degrees of freedom is
        # (n − 1)/(n − 3), i.e. about 2/(n − 3) more residual variance.
        excess += 2.0 * theta1 / (model.n_samples - 3)
    return float(excess)


def _require(model: Model, *names: str, hint: str = "refit it to score new samples") -> list[np.ndarray]:
    """The model's extras ``names`` as float64 arrays; a clear error when one is absent."""
    absent = [name for name in names if model.extras.get(name) is None]
    if absent:
        raise ModelError(
            f"the model stores no {', '.join(absent)} (it was written by an older axiscope); {hint}"
        )
    return [np.asarray(model.extras[name], dtype=np.float64) for name in names]


def choose_q_method(model: Model, requested: str, lowest_confidence: float) -> tuple[str, str | None]:
    """The Q method to use for all levels, and why Jackson–Mudholkar was given up (or None).

    Whether Jackson–Mudholkar applies does not depend on the level except through the
    bracket of the formula, which grows with the confidence: checking it at the lowest
    level checks it at every higher one.
    """
    if requested != "jackson-mudholkar":
        return requested, None
    (moments,) = _require(model, "residual_moments")
    _, _, reason = _jackson_mudholkar_base(lowest_confidence, *map(float, moments))
    return ("box", reason) if reason is not None else (requested, None)


def model_limits(model: Model, confidence: float, *, q_method: str = "jackson-mudholkar",
                 q_offset: float = 0.0) -> ControlLimits:
    """Limits for ``model`` at ``confidence`` with the given Q method (no fallback).

    ``q_offset`` is added to the Q limit (see :func:`residual_excess`). Box's limit uses
    the mean ``θ1`` and variance ``2θ2`` of the training residuals. Use
    :func:`choose_q_method` to decide the method first.
    """
    (moments,) = _require(model, "residual_moments")
    theta1, theta2, theta3 = map(float, moments)
    t2 = t2_limit(confidence, model.n_components, model.n_samples)
    if q_method == "jackson-mudholkar":
        q = q_limit_jackson_mudholkar(confidence, theta1, theta2, theta3)
    else:
        q = q_limit_box(confidence, theta1, 2.0 * theta2)
    return ControlLimits(float(confidence), t2, q + q_offset, q_offset)


def q_limit_description(method: str, adjust_q: bool) -> str:
    """How the Q limit was computed, for the manifest."""
    if method == "jackson-mudholkar":
        text = (
            "Jackson & Mudholkar (1979) with theta1 exact (total variance minus the variance of "
            "the k axes); theta2 and theta3 are not the residual eigenvalue moments but "
            "estimates from the variance and third central moment of the training residuals "
            "through the Gaussian identities var(Q) = 2 theta2 and E[(Q - theta1)^3] = 8 theta3"
        )
    else:
        text = (
            "Box (1954) scaled chi-square g chi2(h) matching the mean (theta1) and variance "
            "(2 theta2) of the training residuals"
        )
    if adjust_q:
        text += "; plus q_offset, the expected excess of new samples' residuals"
    return text


# ---------------------------------------------------------------------------- results


@dataclass
class ScoreResult:
    """New samples placed on a model's axes, with diagnostics.

    Attributes
    ----------
    scores : DataFrame
        ``sample_id``, ``PC1`` … ``PCk``.
    diagnostics : DataFrame
        One row per sample, the columns of :data:`DIAGNOSTICS_COLUMNS`: ``sample_id``,
        ``t2`` and ``q``; ``flag`` (one of ``within``, ``t2``, ``q``, ``both``,
        ``missing``) at the requested confidence; ``missing_fraction``; ``confidence``
        and the limits ``t2_limit`` and ``q_limit`` at that confidence; ``t2_limit_95``
        and ``q_limit_95``, the limits at 0.95.
    limits : dict of float to ControlLimits
        Limits at the requested confidence and at 0.95.
    q_method : str
        ``"jackson-mudholkar"`` or ``"box"`` (the method that produced the Q limits).
    manifest : dict
        Model checksum and version, input, options, counts and timings.
    """

    scores: pd.DataFrame
    diagnostics: pd.DataFrame
    limits: dict
    q_method: str
    manifest: dict = field(default_factory=dict)

    def counts(self) -> dict[str, int]:
        """Number of samples with each flag at the requested confidence."""
        values = self.diagnostics["flag"].to_numpy()
        return {f: int(np.sum(values == f)) for f in FLAGS}

    def flagged(self, confidence: float | None = None) -> np.ndarray:
        """Boolean mask of samples beyond a limit (or above the missing fraction)."""
        if confidence is None:
            return self.diagnostics["flag"].to_numpy() != "within"
        lim = self.limits[confidence]
        d = self.diagnostics
        return ((d["t2"] > lim.t2) | (d["q"] > lim.q) | (d["flag"] == "missing")).to_numpy()

    def write(self, directory: Path, *, parquet: bool = False, command_line: list[str] | None = None) -> None:
        """Write ``scores.tsv``, ``diagnostics.tsv`` and ``manifest.json`` into ``directory``.

        With ``parquet``, every table also gets a Parquet copy (``scores.parquet``,
        ``diagnostics.parquet``). Callers wanting atomic output wrap this in
        :func:`axiscope.io.output.atomic_directory`.
        """
        from ..io.output import write_json, write_table

        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        write_table(self.scores, directory / "scores.tsv", parquet=parquet)
        write_table(self.diagnostics, directory / "diagnostics.tsv", parquet=parquet)
        manifest = dict(self.manifest)
        if command_line is not None:
            manifest["command_line"] = command_line
        write_json(manifest, directory / "manifest.json")


# ----------------------------------------------------------------------------- scoring


def model_directory(path: str | os.PathLike) -> Path:
    """The model folder given either itself or the result folder of a fit that holds it.

    A folder with a ``model.json`` is a model folder; a folder without one but with a
    ``model/model.json`` is the result folder of ``axiscope fit``. Anything else is left
    to :func:`axiscope.model.load_model` to report, except a folder that is neither.
    """
    path = Path(path)
    if not path.is_dir() or (path / "model.json").exists():
        return path
    if (path / "model" / "model.json").exists():
        return path / "model"
    raise ModelError(f"{path}: neither a model folder (no model.json) nor the result folder of a fit "
                     "(no model/model.json); pass the folder written by 'axiscope fit' or its model/ subfolder")


def _fill_option(fill_missing) -> bool:
    if fill_missing is None or fill_missing is False:
        return False
    if fill_missing is True or fill_missing == "mean":
        return True
    raise OptionError(f"fill_missing={fill_missing!r} is not supported; use 'mean' or leave it out")


def _check_reference(model: Model, reference) -> dict | None:
    """Whether ``reference`` is the model's recorded training input; a warning when it is not."""
    if reference is None:
        return None
    from ..io.identity import compare_identity

    recorded = model.info.get("training_input")
    if not recorded:
        logger.warning("the model records no training input (fitted from memory or by an older axiscope); "
                       "cannot check that it was fitted on %s", reference)
        return {"reference": str(reference), "same_file": None, "difference": "no training input recorded"}
    difference = compare_identity(recorded, reference)
    if difference is not None:
        logger.warning("the model was fitted on %s, but reference=%s is another file (%s); the axes may "
                       "not be those of that data", recorded["path"], reference, difference)
    return {"reference": str(reference), "same_file": difference is None, "difference": difference}


def score(
    model: Model | str | os.PathLike,
    source: MatrixSource | str | os.PathLike,
    *,
    fill_missing: str | bool | None = None,
    max_missing_fraction: float = 0.1,
    confidence: float = 0.99,
    correct_shrinkage: bool = False,
    adjust_q: bool = True,
    q_method: str = "jackson-mudholkar",
    memory_limit: int | str | None = None,
    threads: int | None = None,
    progress=None,
    dataset: str | None = None,
    sample_ids: str | None = None,
    feature_ids: str | None = None,
    samples_in: str = "rows",
    allow_external_data: bool = False,
    allow_missing_chunks: bool = False,
    covariates: Covariates | None = None,
    reference: str | os.PathLike | None = None,
    scheduler=None,
    cluster: str | None = None,
) -> ScoreResult:
    """Score new samples against a saved model and flag those the model does not describe.

    Parameters
    ----------
    model : Model or path
        A fitted model, or its folder: the result folder of ``axiscope fit`` (or of
        :meth:`axiscope.fitting.FitResult.write`), its ``model/`` subfolder, or a folder
        written by :meth:`axiscope.estimator.AxiscopePCA.save`. A folder is verified
        (format version and checksums) by :func:`axiscope.model.load_model`.
    source : MatrixSource or path
        The new samples. A path is opened with :func:`axiscope.io.open_matrix` using
        ``dataset``, ``sample_ids``, ``feature_ids``, ``samples_in``, ``allow_external_data``
        and ``allow_missing_chunks`` (see :func:`axiscope.io.open_matrix`).
    fill_missing : {"mean"} or None, default=None
        Model features absent from the input (and NaN cells) take their training mean,
        adding nothing to scores, T² or Q; otherwise their absence is an error.
    max_missing_fraction : float, default=0.1
        Samples with a larger fraction of filled features are flagged ``missing`` (their
        T² and Q are underestimated). Common practice, no source.
    confidence : float, default=0.99
        Confidence of the control limits used for the ``flag`` column; limits at 0.95
        are reported as well.
    correct_shrinkage : bool, default=False
        Divide the projected scores by the per-axis shrinkage factors stored in the model
        (:mod:`axiscope.model.shrinkage`) before writing them and computing T². Worth it when
        features far outnumber the training samples.
    adjust_q : bool, default=True
        Raise the Q limits by the expected excess of new samples' residuals over the
        training residuals (:func:`residual_excess`). Without it, when features far
        outnumber training samples, clean new samples exceed the Q limit far more often
        than ``1 − confidence`` (the training residuals are too small: the axes were fitted
        to those samples). Negligible when samples far outnumber features.
    q_method : {"jackson-mudholkar", "box"}, default="jackson-mudholkar"
        Limit of Q. Jackson–Mudholkar falls back to Box when the stored moments do not
        allow it (the manifest says which was used).
    memory_limit, threads, progress
        As for :func:`axiscope.fit`.
    covariates : Covariates, optional
        The new samples' annotations, required when the model was fitted after adjusting
        for covariates (``Covariates(table)``; the columns are the model's): each sample is
        adjusted with its own values. A sample without a row or a value, or with a level
        never seen in training, is an error naming it.
    reference : path, optional
        The matrix the model should have been fitted on. A warning is logged when the
        model's recorded training input (:func:`axiscope.io.identity.file_identity`) is
        another file, or when the model records none; the manifest keeps the outcome.
    scheduler, cluster
        Run the pass on a ``dask.distributed`` cluster, as for :func:`axiscope.fit`
        (:class:`axiscope.Resources`): a scheduler's address or a client, or ``"local:N"``
        worker processes started for the run; by default the current client when the caller
        made one, otherwise threads of this process. The workers read their own blocks of an
        HDF5, Zarr or ``.npy`` input; the scores equal the threaded ones to rounding.

    Returns
    -------
    ScoreResult

    Notes
    -----
    One streaming pass over the input; memory is the model plus a window of blocks plus
    ``O(m·k)`` for the ``m`` scored samples.
    """
    t0 = time.perf_counter()
    resources = Resources(memory_limit=memory_limit, threads=threads, scheduler=scheduler, cluster=cluster)
    fill = _fill_option(fill_missing)
    if not 0.5 < confidence < 1:
        raise OptionError(f"confidence={confidence} is out of range; choose a value between 0.5 and 1 "
                          "(both excluded)")
    if not 0 <= max_missing_fraction <= 1:
        raise OptionError(f"max_missing_fraction={max_missing_fraction} is out of range; choose a value "
                          "between 0 and 1")
    if q_method not in Q_LIMIT_METHODS:
        raise OptionError(f"q_method={q_method!r} is not valid; use one of: {', '.join(Q_LIMIT_METHODS)}")

    model_info: dict = {"format_version": MODEL_VERSION}
    if isinstance(model, Model):
        model_info.update(path=None, checksum=None)
    else:
        model_dir = model_directory(model)
        model = load_model(model_dir)
        model_info.update(path=str(model_dir), checksum=model.checksum(model_dir))
    model_info["format_version"] = model.format_version
    design = model.covariates
    if design is None and covariates is not None:
        logger.warning("the annotations given are not used: the model was fitted without adjusting for covariates")
    elif design is not None and covariates is None:
        raise InputError(f"the model was fitted after adjusting for {', '.join(map(repr, design.columns))}; "
                         "pass covariates=FILE holding these columns for the new samples")
    reference_check = _check_reference(model, reference)
    levels = sorted({float(confidence), SECONDARY_CONFIDENCE}, reverse=True)
    factor = np.ones(model.n_components)
    if correct_shrinkage:
        (factor,) = _require(model, "shrinkage_factor",
                             hint="refit it, or score without the correction that needs it: correct_shrinkage=False")
    offset = residual_excess(model) if adjust_q else 0.0
    used_method, reason = choose_q_method(model, q_method, min(levels))
    if reason is not None:
        logger.warning("Jackson-Mudholkar Q limit not usable (%s); using Box's scaled chi-square", reason)
    limits = {level: model_limits(model, level, q_method=used_method, q_offset=offset) for level in levels}

    with opened(source, dataset=dataset, sample_ids=sample_ids, feature_ids=feature_ids,
                samples_in=samples_in, allow_external_data=allow_external_data,
                allow_missing_chunks=allow_missing_chunks) as src, open_backend(resources) as backend:
        rows = None if design is None else covariates.encode_for(design, src.sample_ids)
        runner = PassRunner(threads=resources.n_threads, progress=progress, backend=backend)
        proj = project(model, src, fill_missing=fill, memory_limit=memory_limit, threads=threads,
                       progress=progress, covariates=rows, runner=runner)
        execution = runner.describe()
        input_info = {
            "path": str(src.path),
            "format": src.format,
            "dataset": src.dataset,
            "samples_in": src.samples_in,
            "shape": list(src.shape),
            "dtype": str(src.dtype),
        }

    scores = proj.scores / factor
    axis_var = model.singular_values**2 / max(model.n_samples - 1, 1)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        t2 = np.sum(scores**2 / axis_var, axis=1)
    t2[np.isnan(t2) & np.isinf(proj.residual)] = np.inf  # overflowing samples: beyond every limit
    q = proj.residual
    main = limits[float(confidence)]
    over_t2 = t2 > main.t2
    over_q = q > main.q
    flag = np.full(t2.shape[0], "within", dtype=object)
    flag[over_t2 & ~over_q] = "t2"
    flag[over_q & ~over_t2] = "q"
    flag[over_t2 & over_q] = "both"
    flag[proj.missing_fraction > max_missing_fraction] = "missing"

    ids = np.asarray(proj.sample_ids, dtype=str)
    scores_df = pd.DataFrame(scores, columns=model.axis_names)
    scores_df.insert(0, "sample_id", ids)
    secondary = limits[SECONDARY_CONFIDENCE]
    diagnostics = pd.DataFrame(
        {
            "sample_id": ids,
            "t2": t2,
            "q": q,
            "flag": flag,
            "missing_fraction": proj.missing_fraction,
            "confidence": float(confidence),
            "t2_limit": main.t2,
            "q_limit": main.q,
            "t2_limit_95": secondary.t2,
            "q_limit_95": secondary.q,
        },
        columns=list(DIAGNOSTICS_COLUMNS),
    )
    result = ScoreResult(scores_df, diagnostics, limits, used_method)
    result.manifest = {
        "axiscope_version": __version__,
        "model": {
            **model_info,
            "n_components": model.n_components,
            "n_features": model.n_features,
            "n_training_samples": model.n_samples,
            **({"adjusted_for": design.to_dict()} if design is not None else {}),
            "training_input": model.info.get("training_input"),
        },
        "reference_check": reference_check,
        "input": input_info,
        "options": {
            "fill_missing": "mean" if fill else None,
            "max_missing_fraction": max_missing_fraction,
            "confidence": float(confidence),
            "correct_shrinkage": bool(correct_shrinkage),
            "adjust_q": bool(adjust_q),
            "q_limit_method": used_method,
        },
        "limits": {
            "t2": "F distribution, k(n-1)(n+1)/(n(n-k)) F(k, n-k) (Tracy, Young & Mason 1992)",
            "q": q_limit_description(used_method, adjust_q),
            "levels": [limits[level].to_dict() for level in levels],
        },
        "shrinkage_factor": factor.tolist() if correct_shrinkage else None,
        "counts": {
            "samples": int(t2.shape[0]),
            "model_features_matched": int(proj.match.present.sum()),
            "model_features_filled": int(proj.match.n_missing),
            "extra_features_ignored": int(proj.match.n_extra),
            "flags": result.counts(),
            "flagged_at": {f"{level:g}": int(result.flagged(level).sum()) for level in levels},
        },
        "execution": execution,
        "passes": [r.to_dict() for r in proj.passes.records],
        "seconds": round(time.perf_counter() - t0, 3),
    }
    if proj.match.n_missing:
        n_missing = proj.match.n_missing
        logger.warning(
            "%d of the model's %s %s missing from %s and %s filled with %s training mean",
            n_missing, counted(model.n_features, "feature"), agree(n_missing, "is", "are"),
            input_info["path"], agree(n_missing, "was", "were"), agree(n_missing, "its", "their"),
        )
    if model.spec.log_transform:
        # cells filled because they were non-finite after the transforms (absent features excluded)
        filled_cells = np.rint(proj.missing_fraction * model.n_features) - proj.match.n_missing
        if np.any(filled_cells > 0):
            n_cells, n_rows = int(filled_cells.sum()), int(np.sum(filled_cells > 0))
            logger.warning(
                "%s in %s in %s %s NaN or infinite after the stored transforms and %s filled with the "
                "training mean%s",
                counted(n_cells, "cell"), counted(n_rows, "sample"), input_info["path"],
                agree(n_cells, "was", "were"), agree(n_cells, "was", "were"), _LOG_HINT,
            )
    return result
