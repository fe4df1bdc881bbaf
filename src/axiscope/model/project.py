"""Projection of samples onto a fitted model's axes, streamed in blocks.

Used for new samples (scoring) and for supplementary samples of the fitted file. The
stored preprocessing is replayed exactly: counts per ``T`` over the training input's
features, ``log(1 + x)``, the training centre and scale (never statistics of the new samples).
Features are matched by id, not position.
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass

import numpy as np

from ..core.backends import SourceBlocks
from ..core.memory import default_memory_limit, parse_memory
from ..core.passes import PassRunner, Progress, array_from_blocks, blas_threads
from ..core.plan import plan_blocks
from ..core.preprocess import first_nonfinite, row_totals, transform_block
from ..errors import InputError, OptionError, agree, counted
from ..io import MatrixSource
from ..io.source import value_limit
from .store import Model

__all__ = ["FeatureMatch", "match_features", "Projection", "project"]

logger = logging.getLogger(__name__)


@dataclass
class FeatureMatch:
    """Where each model feature sits in a new file.

    Attributes
    ----------
    model_columns : ndarray of int, shape (n_present,)
        Column in the new file of each model feature that is present.
    present : ndarray of bool, shape (p_model,)
        Whether each model feature is present.
    total_columns : ndarray of int
        Columns of the new file that were features of the training input (used for
        total normalisation).
    n_extra : int
        Features of the new file that the model does not use.
    """

    model_columns: np.ndarray
    present: np.ndarray
    total_columns: np.ndarray
    n_extra: int

    @property
    def n_missing(self) -> int:
        return int((~self.present).sum())


def match_features(model: Model, feature_ids: np.ndarray, *, where: str, fill_missing: bool) -> FeatureMatch:
    """Match the model's features to a new file's feature ids."""
    position = {fid: i for i, fid in enumerate(np.asarray(feature_ids).tolist())}
    wanted = np.asarray(model.feature_ids).tolist()
    cols = np.array([position.get(f, -1) for f in wanted], dtype=np.int64)
    present = cols >= 0
    if not present.any():
        raise InputError(
            f"{where}: no feature id of the model occurs in this file (the model has "
            f"{counted(len(wanted), 'feature')}, e.g. {wanted[0]!r}; the file has e.g. "
            f"{next(iter(position), '')!r}); check feature_ids and samples_in"
        )
    missing = np.flatnonzero(~present)
    if missing.size and not fill_missing:
        examples = ", ".join(repr(wanted[i]) for i in missing[:10])
        raise InputError(
            f"{where}: {missing.size} of the model's {counted(len(wanted), 'feature')} "
            f"{agree(missing.size, 'is', 'are')} missing (first: {examples}); supply "
            f"{agree(missing.size, 'it', 'them')} or pass fill_missing='mean'"
        )
    training_inputs = model.extras.get("input_feature_ids")
    if training_inputs is not None:
        total_cols = np.array([position[f] for f in np.asarray(training_inputs).tolist() if f in position], dtype=np.int64)
    else:
        total_cols = np.arange(len(position))
    n_extra = len(position) - int(present.sum())
    return FeatureMatch(cols[present], present, total_cols, n_extra)


@dataclass
class _Adjusted:
    """The covariates of the projected samples and the model's coefficients ``Γ`` (p × c)."""

    rows: np.ndarray
    coef: np.ndarray

    @classmethod
    def check(cls, model: Model, covariates, m: int, where: str) -> "_Adjusted | None":
        coef = model.extras.get("covariate_coef")
        if coef is None:
            if covariates is not None:
                raise OptionError("covariates were given, but the model was fitted without adjusting for any; "
                                  "leave covariates out")
            return None
        if covariates is None:
            columns = ", ".join(repr(c) for c in model.info.get("covariates", {}).get("columns", []))
            raise InputError(f"{where}: the model was fitted after adjusting for {columns}; pass covariates=FILE "
                             "holding these columns for the samples placed on it")
        rows = np.asarray(covariates, dtype=np.float64)
        if rows.shape != (m, coef.shape[1]):
            raise OptionError(f"covariates has shape {rows.shape}, not ({m}, {coef.shape[1]}): one row of "
                              "covariate terms per sample placed")
        return cls(rows, np.array(coef, dtype=np.float64))  # a copy: absent features are zeroed

    def apply(self, scores: np.ndarray, sq: np.ndarray, model: Model) -> tuple[np.ndarray, np.ndarray]:
        """Scores and squared norms of ``x̃ − Γ·c`` from those of ``x̃`` (and ``x̃·Γ``)."""
        k, c, G = model.n_components, self.rows, self.coef
        xg = scores[:, k:]
        adjusted = scores[:, :k] - c @ (G.T @ np.asarray(model.components, dtype=np.float64))
        with np.errstate(over="ignore", invalid="ignore"):
            sq = sq - 2.0 * np.einsum("ij,ij->i", c, xg) + np.einsum("ij,ij->i", c @ (G.T @ G), c)
        return adjusted, np.where(np.isinf(sq), sq, np.maximum(sq, 0.0))


@dataclass
class Projection:
    """Samples placed on a model's axes.

    Attributes
    ----------
    sample_ids : ndarray of str, shape (m,)
    scores : ndarray, shape (m, k)
    squared_norms : ndarray, shape (m,)
        Squared distance to the centre in the preprocessed space (missing features add 0).
    residual : ndarray, shape (m,)
        Squared distance left after projection on the k axes (``squared_norms − ‖score‖²``).
    missing_fraction : ndarray, shape (m,)
        Fraction of the model's features filled with the training mean (absent features
        and non-finite cells).
    match : FeatureMatch
    """

    sample_ids: np.ndarray
    scores: np.ndarray
    squared_norms: np.ndarray
    residual: np.ndarray
    missing_fraction: np.ndarray
    match: FeatureMatch
    passes: PassRunner


@dataclass
class _Placement:
    """The projection's task: one block of stored values to its scores, squared norms and
    filled-cell counts (a picklable object, so that a cluster's workers can run it).

    Called as ``task(block, model_columns, total_columns, mean, inv, V, fill[, mean64,
    inv64, V64])``: the model's arrays in the input's dtype, then in float64 for rows with
    values too large for that dtype (absent for float64 input). Returns
    ``((scores, sq, n_bad), None)``, or ``(None, (row, column))`` of the first non-finite
    cell when they are not filled.
    """

    spec: object
    fill_missing: bool
    all_total: bool
    same_columns: bool
    limit: float

    def __call__(self, block, model_columns, total_columns, mean_t, inv_t, V_t, fill_t, *exact):
        mean, inv, V = exact or (mean_t, inv_t, V_t)
        spec = self.spec
        # at most one gathered copy of the model's columns, then everything in place in the input dtype
        totals = None
        if spec.counts_per is not None:
            totals = row_totals(block if self.all_total else block[:, total_columns])
        x = block if self.same_columns else block[:, model_columns]
        x = transform_block(x, spec, totals=totals)
        n_bad = np.zeros(x.shape[0])
        limit = self.limit
        if x.size and -limit <= x.min() and x.max() <= limit:  # the common case: two reductions
            return (*_place(x, mean_t, inv_t, V_t), n_bad), None
        missing = ~np.isfinite(x)
        if missing.any():  # non-finite cells: an error, or the training mean
            if spec.missing != "mean" and not self.fill_missing:
                return None, first_nonfinite(x)
            n_bad = missing.sum(axis=1)
            x[missing] = fill_t[np.nonzero(missing)[1]]
        with np.errstate(invalid="ignore"):
            wide = (np.abs(x) > limit).any(axis=1)
        if not wide.any():
            return (*_place(x, mean_t, inv_t, V_t), n_bad), None
        # rows with values too large for sums of squares in the input dtype: placed in float64
        # (where their squared norm may still overflow: it is then infinite, and flagged)
        scores = np.empty((x.shape[0], V.shape[1]))
        sq = np.empty(x.shape[0])
        scores[~wide], sq[~wide] = _place(x[~wide], mean_t, inv_t, V_t)
        scores[wide], sq[wide] = _place(x[wide].astype(np.float64), mean, inv, V)
        return (scores, sq, n_bad), None


def _place(x, centre, inverse, loadings):
    """Scores and squared norms of transformed, filled rows (in place, in their own dtype)."""
    with np.errstate(over="ignore", invalid="ignore"):
        x -= centre
        x *= inverse
        scores = (x @ loadings).astype(np.float64)
        sq = np.einsum("ij,ij->i", x, x, dtype=np.float64)
    sq[~np.isfinite(sq)] = np.inf  # overflow: the sample lies beyond any limit
    return scores, sq


def project(
    model: Model,
    source: MatrixSource,
    *,
    rows: np.ndarray | None = None,
    fill_missing: bool = False,
    memory_limit: int | str | None = None,
    threads: int | None = None,
    progress: Progress | None = None,
    covariates: np.ndarray | None = None,
    runner: PassRunner | None = None,
) -> Projection:
    """Scores of (some) samples of ``source`` on the model's axes, in one streaming pass.

    Parameters
    ----------
    model : Model
    source : MatrixSource
    rows : ndarray of bool, shape (n_samples,), optional
        Which samples to project (default all).
    fill_missing : bool, default=False
        Model features absent from ``source`` take their training mean (adding nothing);
        otherwise their absence is an error.
    memory_limit, threads, progress
        As for :func:`axiscope.fit`.
    covariates : ndarray, shape (m, c), optional
        The covariate terms of the projected samples (``CovariateDesign.encode``), required
        when the model was fitted after adjusting for covariates: each sample is placed as
        ``x̃ − Γ·c`` (:mod:`axiscope.core.adjust`), its scores and squared distances those
        of the adjusted sample.
    runner : PassRunner, optional
        Runs the pass and keeps its record (default: a new one on ``threads`` threads).
        Made with a cluster back-end (:func:`axiscope.core.backends.open_backend`), the
        workers read their own blocks of a file they can open, and only the ``m × k``
        scores come back.

    Notes
    -----
    Memory: the model plus a window of blocks; independent of the number of samples
    projected except for the ``m × k`` scores.
    """
    where = str(source.path)
    match = match_features(model, source.feature_ids, where=where, fill_missing=fill_missing)
    n_all, p_in = source.shape
    rows = np.ones(n_all, dtype=bool) if rows is None else np.asarray(rows, dtype=bool)
    adjusted = _Adjusted.check(model, covariates, int(rows.sum()), where)
    budget = default_memory_limit() if memory_limit is None else parse_memory(memory_limit)
    threads = max(1, int(threads or os.cpu_count() or 1))
    plan = plan_blocks(n_all, p_in, source.dtype.itemsize, sketch_width=model.n_components,
                       threads=threads, budget=budget, sample_chunk=source.sample_chunk,
                       cache_features=0)
    spans = [(s, min(n_all, s + plan.block_rows)) for s in range(0, n_all, plan.block_rows)]
    spans = [(a, b) for a, b in spans if rows[a:b].any()]
    spec = model.spec
    present = match.present
    mean = model.mean[present]
    inv = (1.0 / model.scale)[present]
    V = model.components[present]
    if adjusted is not None:  # X̃·Γ as well, for the adjusted squared distances
        # an absent feature (fill_missing) is taken at its fitted value, so it still adds nothing
        adjusted.coef[~present] = 0.0
        V = np.hstack([V, adjusted.coef[present]])
    fill = model.extras.get("feature_mean", model.mean)[present]

    dtype = source.dtype
    # the input's dtype for the common case; float64 for rows with values too large for it
    exact = () if dtype == np.float64 else (mean, inv, V)
    arrays = (match.model_columns, match.total_columns, mean.astype(dtype), inv.astype(dtype), V.astype(dtype),
              fill.astype(dtype), *exact)
    # An absent feature takes its training mean too: a constant contribution to every
    # sample (zero when features are centred).
    absent = ~present
    absent_value = (model.extras.get("feature_mean", model.mean)[absent] - model.mean[absent]) / model.scale[absent]
    absent_scores = absent_value @ (model.components[absent] if adjusted is None
                                    else np.hstack([model.components[absent], adjusted.coef[absent]]))
    absent_sq = float(absent_value @ absent_value)
    task = _Placement(
        spec, fill_missing=fill_missing,
        all_total=match.total_columns.shape[0] == p_in,
        # the common case of the same features in the same order needs no gathered copy
        same_columns=match.model_columns.shape[0] == p_in and bool(
            np.array_equal(match.model_columns, np.arange(p_in))),
        # a row whose values all stay within this squares and sums without overflow in ``dtype``
        limit=value_limit(dtype, (1, int(present.sum()))))

    counts = [int(rows[a:b].sum()) for a, b in spans]
    # the values as stored (spec=None): the task transforms and checks them; a picklable
    # description, so that a cluster's workers read their own blocks
    load = SourceBlocks(source, spans, [None if rows[a:b].all() else rows[a:b] for a, b in spans], None)
    X = array_from_blocks(load, counts, p_in, source.dtype, f"project-{id(source)}-{os.getpid()}")
    m = int(sum(counts))
    scores = np.empty((m, V.shape[1]))
    sq = np.empty(m)
    n_bad = np.empty(m)
    ids = np.asarray(source.sample_ids)[rows]

    hint = (" after log(1 + x), which turns values <= -1 into NaN or -inf (check for negative values, "
            "e.g. data already log-transformed)") if spec.log_transform else ""

    def fold(result, index, start):
        out, bad = result
        if bad is not None:
            r, c = bad
            raise InputError(
                f"{where}: sample {ids[start + r]!r}, feature {model.feature_ids[present][c]!r} is NaN "
                f"or infinite{hint}; fix the input or pass fill_missing='mean' to use the training mean"
            )
        s, q, nb = out
        scores[start : start + s.shape[0]] = s + absent_scores
        sq[start : start + s.shape[0]] = q + absent_sq
        n_bad[start : start + s.shape[0]] = nb

    runner = runner or PassRunner(threads=threads, progress=progress)
    with blas_threads(threads):
        runner.run("projection", "input", X, task, fold, *arrays)
    if adjusted is not None:
        scores, sq = adjusted.apply(scores, sq, model)
    with np.errstate(over="ignore", invalid="ignore"):
        residual = np.maximum(sq - np.einsum("ij,ij->i", scores, scores), 0.0)
    overflow = np.isinf(sq)
    residual[overflow] = np.inf
    if overflow.any():
        logger.warning(
            "%s: %s %s values so large that %s squared distance to the model overflows float64 "
            "(first: %r); %s Q is infinite and %s flagged", where, counted(int(overflow.sum()), "sample"),
            agree(int(overflow.sum()), "holds", "hold"), agree(int(overflow.sum()), "its", "their"),
            str(ids[np.flatnonzero(overflow)[0]]), agree(int(overflow.sum()), "its", "their"),
            agree(int(overflow.sum()), "it is", "they are"))
    missing_fraction = (n_bad + match.n_missing) / model.n_features
    return Projection(ids, scores, sq, residual, missing_fraction, match, runner)

