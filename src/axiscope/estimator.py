"""A scikit-learn transformer backed by the axiscope engine.

:class:`AxiscopePCA` follows scikit-learn's estimator conventions (parameters stored by
``__init__`` unchanged, fitted attributes with a trailing underscore, ``fit`` returning
``self``) so it works in a :class:`sklearn.pipeline.Pipeline`, with ``clone``, grid search
and ``set_output``. It fits with :func:`axiscope.fit` on an in-memory array wrapped by
:func:`axiscope.io.array_source` and transforms with :func:`axiscope.model.project.project`,
so its results are those of the command line. :meth:`AxiscopePCA.save` writes the same
``model/`` format as ``axiscope fit``: a model fitted in Python scores from the command
line (``axiscope score``) and :meth:`AxiscopePCA.load` reads a model fitted by the command
line.
"""

from __future__ import annotations

import numbers
import os
from pathlib import Path

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils import check_random_state
from sklearn.utils.validation import (
    _check_feature_names_in,
    check_is_fitted,
    validate_data,
)

from .core.options import METHODS, EngineSettings, Resources
from .core.preprocess import MISSING, SCALES, PreprocessSpec
from .errors import AxiscopeError
from .fitting.run import fit, max_components
from .io import array_source
from .model.store import Model, load_model

__all__ = ["AxiscopePCA"]

_IDS_INFO_KEY = "feature_names"


class AxiscopePCA(TransformerMixin, BaseEstimator):
    """Principal component analysis with axiscope's preprocessing, as a scikit-learn transformer.

    Parameters
    ----------
    n_components : int or None, default=None
        Number of principal components; at most the rank the data can have,
        ``min(n_samples − 1, n_features)`` when centred and ``min(n_samples, n_features)``
        when not (as :class:`sklearn.decomposition.PCA` allows). None: that rank, at most
        10 (the default of :func:`axiscope.fit`).
    center : bool, default=True
        Subtract each feature's mean.
    scale : {"unit", "none", "allele-frequency"}, default="unit"
        ``unit`` divides each feature by its population standard deviation (standardized
        PCA, so no ``StandardScaler`` is needed in front); ``none`` is covariance PCA;
        ``allele-frequency`` divides genotype dosages 0/1/2 by ``sqrt(2q(1−q))``.
    log_transform : bool, default=False
        Replace each value ``x`` by ``log(1 + x)`` (after ``counts_per``).
    counts_per : float or None, default=None
        Rescale each sample to this total before ``log_transform`` (1e6: counts per
        million).
    min_variance : float or None, default=None
        Drop features of smaller variance.
    top_variable : int or None, default=None
        Keep only this many most variable features.
    missing : {"error", "mean"}, default="error"
        NaN cells are an error (``ValueError``) or are replaced by the feature mean.
    method : {"auto", "randomized", "exact"}, default="auto"
    oversample : int, default=10
    power_iterations : int or "auto", default="auto"
    tol : float, default=1e-6
        See :func:`axiscope.fit`.
    random_state : int, RandomState instance or None, default=None
        Seed of the random test matrices of the randomized method.
    memory_limit : int or str or None, default=None
        Memory budget (e.g. ``"2GB"``); default half of the machine's memory.
    threads : int or None, default=None
        Blocks processed at once (default: the number of cores).

    Attributes
    ----------
    model_ : Model
        The fitted model (what :meth:`save` writes).
    components_ : ndarray, shape (n_components, n_features_in_)
        Loadings of each axis in the space of the preprocessed features; zero for
        features dropped by the preprocessing (constant or filtered).
    explained_variance_ : ndarray, shape (n_components,)
        Variance of each axis, ``s²/n`` (population convention, as in axiscope).
    explained_variance_ratio_ : ndarray, shape (n_components,)
    singular_values_ : ndarray, shape (n_components,)
    mean_ : ndarray, shape (n_features_in_,)
        Mean of each feature after the per-sample transforms.
    scale_ : ndarray, shape (n_features_in_,)
        Divisor of each feature (1 for dropped features).
    shrinkage_factor_ : ndarray, shape (n_components,)
        Expected shrinkage of new samples' scores (:mod:`axiscope.model.shrinkage`).
    n_components_ : int
    n_samples_ : int
    n_features_in_ : int
    feature_names_in_ : ndarray of str
        Only when fitted on a table with string column names (or loaded from a model).
    feature_ids_ : ndarray of str
        Ids under which the features are stored in the model (the column names, or
        generated ids ``feature_000001``…), used to match features when transforming.
    kept_features_ : ndarray of int, shape (n_kept,)
        Column of ``X`` (index into ``feature_ids_``) of each feature used by the axes, in
        the model's order (rows of ``model_.components``); the other columns were dropped
        by the preprocessing (constant or filtered).
    """

    def __init__(
        self,
        n_components: int | None = None,
        *,
        center: bool = True,
        scale: str = "unit",
        log_transform: bool = False,
        counts_per: float | None = None,
        min_variance: float | None = None,
        top_variable: int | None = None,
        missing: str = "error",
        method: str = "auto",
        oversample: int = 10,
        power_iterations: int | str = "auto",
        tol: float = 1e-6,
        random_state=None,
        memory_limit: int | str | None = None,
        threads: int | None = None,
    ) -> None:
        self.n_components = n_components
        self.center = center
        self.scale = scale
        self.log_transform = log_transform
        self.counts_per = counts_per
        self.min_variance = min_variance
        self.top_variable = top_variable
        self.missing = missing
        self.method = method
        self.oversample = oversample
        self.power_iterations = power_iterations
        self.tol = tol
        self.random_state = random_state
        self.memory_limit = memory_limit
        self.threads = threads

    # ------------------------------------------------------------------ scikit-learn API

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = self.missing == "mean"
        tags.transformer_tags.preserves_dtype = ["float64"]
        tags.input_tags.sparse = True  # scipy.sparse: never densified by the fit (io/sparse.py)
        return tags

    def _validate(self, X, *, reset: bool) -> np.ndarray:
        return validate_data(
            self, X, reset=reset, dtype=[np.float64, np.float32], accept_sparse=["csr", "csc"],
            ensure_all_finite="allow-nan" if self.missing == "mean" else True,
            ensure_min_samples=2, ensure_min_features=2,
        )

    def _spec(self) -> PreprocessSpec:
        if self.scale not in SCALES:
            raise ValueError(f"scale={self.scale!r} is not one of {', '.join(SCALES)}")
        if self.missing not in MISSING:
            raise ValueError(f"missing={self.missing!r} is not one of {', '.join(MISSING)}")
        try:
            return PreprocessSpec(center=bool(self.center), scale=self.scale,
                                  log_transform=bool(self.log_transform), counts_per=self.counts_per,
                                  min_variance=self.min_variance, top_variable=self.top_variable,
                                  missing=self.missing)
        except AxiscopeError as exc:
            raise ValueError(str(exc)) from exc

    def fit(self, X, y=None):
        """Fit the axes to ``X`` (n_samples × n_features); ``y`` is ignored."""
        self._fit(X)
        return self

    def fit_transform(self, X, y=None, **fit_params):
        """Fit to ``X`` and return the training scores (no second pass over ``X``)."""
        return self._fit(X)

    def _fit(self, X) -> np.ndarray:
        X = self._validate(X, reset=True)
        n, p = X.shape
        k = self.n_components
        limit = max_components(n, p, center=bool(self.center))
        if k is None:
            k = min(10, limit)
        if not isinstance(k, numbers.Integral) or isinstance(k, bool) or k < 1:
            raise ValueError(f"n_components={k!r} is not a positive integer; pass one")
        if k > limit:
            rule = "min(n_samples − 1, n_features)" if self.center else "min(n_samples, n_features)"
            raise ValueError(f"n_components={k} is too large for {n} samples × {p} features; "
                             f"choose at most {rule} = {limit}")
        spec = self._spec()
        seed = int(check_random_state(self.random_state).randint(np.iinfo(np.int32).max))
        names = getattr(self, "feature_names_in_", None)
        source = array_source(X, feature_ids=None if names is None else [str(v) for v in names],
                              name="<array>")
        try:
            engine = EngineSettings(method=self.method, oversample=self.oversample,
                                    power_iterations=self.power_iterations, tol=self.tol, seed=seed)
            resources = Resources(memory_limit=self.memory_limit, threads=self.threads)
            result = fit(source, n_components=int(k), preprocess=spec, engine=engine, resources=resources)
        except AxiscopeError as exc:
            raise ValueError(str(exc)) from exc
        model = result.model
        model.info[_IDS_INFO_KEY] = "given" if names is not None else "generated"
        model.info["estimator"] = {"class": type(self).__name__, "random_state_seed": seed}
        self._set_fitted(model)
        return np.asarray(result.scores, dtype=np.float64)

    def _set_fitted(self, model: Model) -> None:
        ids = np.asarray(model.extras["input_feature_ids"], dtype=str)
        position = {fid: i for i, fid in enumerate(ids.tolist())}
        kept = np.array([position[f] for f in np.asarray(model.feature_ids, dtype=str).tolist()], dtype=np.intp)
        p = ids.shape[0]
        components = np.zeros((model.n_components, p))
        components[:, kept] = model.components.T
        scale = np.ones(p)
        scale[kept] = model.scale
        self.model_ = model
        self.feature_ids_ = ids
        self.kept_features_ = kept
        self.components_ = components
        self.explained_variance_ = model.variance
        self.explained_variance_ratio_ = model.variance_ratio
        self.singular_values_ = np.asarray(model.singular_values, dtype=np.float64)
        mean = model.extras.get("input_feature_mean")
        if mean is None:  # models written before the full feature means were stored
            mean = np.full(p, np.nan)
            mean[kept] = model.extras.get("feature_mean", model.mean)
        self.mean_ = np.asarray(mean, dtype=np.float64)
        self.scale_ = scale
        self.shrinkage_factor_ = np.asarray(model.extras.get("shrinkage_factor", np.ones(model.n_components)))
        self.n_components_ = model.n_components
        self.n_samples_ = model.n_samples
        self.n_features_in_ = p

    def transform(self, X):
        """Scores of the samples of ``X`` on the fitted axes, shape (n_samples, n_components_)."""
        from .model.project import project

        check_is_fitted(self)
        X = validate_data(self, X, reset=False, dtype=[np.float64, np.float32], accept_sparse=["csr", "csc"],
                          ensure_all_finite="allow-nan" if self.model_.spec.missing == "mean" else True)
        m = X.shape[0]
        if m == 1:  # readers need two samples; project the sample twice
            X = X[[0, 0]]
        source = array_source(X, feature_ids=self.feature_ids_, name="<array>")
        try:
            projection = project(self.model_, source, memory_limit=self.memory_limit, threads=self.threads)
        except AxiscopeError as exc:
            raise ValueError(str(exc)) from exc
        return np.asarray(projection.scores[:m], dtype=np.float64)

    def inverse_transform(self, X):
        """Map scores back to the input space (features dropped by the preprocessing get their mean).

        The rank-``k`` reconstruction is un-scaled and un-centred, then ``log(1 + x)`` is
        undone with ``expm1``. Scaling to ``counts_per`` cannot be undone (the original
        totals are not kept): a ``ValueError`` is raised when ``counts_per`` was used.
        """
        from sklearn.utils import check_array

        check_is_fitted(self)
        Z = check_array(X, dtype=[np.float64, np.float32])
        if Z.shape[1] != self.n_components_:
            raise ValueError(f"X has {Z.shape[1]} columns, but {type(self).__name__} has {self.n_components_} components")
        spec = self.model_.spec
        if spec.counts_per is not None:
            raise ValueError("inverse_transform cannot undo counts_per (each sample scaled to a total); "
                             "the original sample totals are not kept")
        model = self.model_
        out = np.tile(self.mean_, (Z.shape[0], 1))
        out[:, self.kept_features_] = (Z.astype(np.float64) @ model.components.T) * model.scale + model.mean
        if spec.log_transform:
            out = np.expm1(out)
        return out

    def get_feature_names_out(self, input_features=None):
        """Names of the output columns: ``PC1`` … ``PCk``."""
        check_is_fitted(self)
        _check_feature_names_in(self, input_features, generate_names=False)
        return np.asarray([f"PC{j + 1}" for j in range(self.n_components_)], dtype=object)

    # --------------------------------------------------------------------- persistence

    def save(self, directory: str | os.PathLike, *, overwrite: bool = False) -> None:
        """Write the fitted model to ``directory`` in axiscope's ``model/`` format (atomically).

        The directory can be passed to ``axiscope score`` or :func:`axiscope.scoring.score`.
        """
        from .io.output import atomic_directory

        check_is_fitted(self)
        with atomic_directory(Path(directory), overwrite=overwrite) as tmp:
            self.model_.save(tmp)

    @classmethod
    def load(cls, directory: str | os.PathLike) -> "AxiscopePCA":
        """A fitted estimator from a model directory (written by :meth:`save` or ``axiscope fit``).

        Raises :class:`axiscope.errors.ModelError` for a missing, tampered or incompatible model.
        """
        model = load_model(Path(directory))
        spec = model.spec
        seed = model.info.get("estimator", {}).get("random_state_seed")
        method = model.info.get("method")
        est = cls(
            n_components=model.n_components, center=spec.center, scale=spec.scale,
            log_transform=spec.log_transform, counts_per=spec.counts_per, min_variance=spec.min_variance,
            top_variable=spec.top_variable, missing=spec.missing,
            method=method if method in METHODS else "auto",
            random_state=seed,
        )
        est._set_fitted(model)
        if model.info.get(_IDS_INFO_KEY, "given") == "given":
            est.feature_names_in_ = np.asarray(est.feature_ids_, dtype=object)
        return est
