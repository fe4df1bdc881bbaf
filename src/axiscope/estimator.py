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

What a user of :class:`sklearn.decomposition.PCA` finds here: ``whiten``; float32 in,
float32 out; ``explained_variance_`` with the divisor ``n − 1``; ``noise_variance_``,
``get_covariance``, ``get_precision``, ``score`` and ``score_samples`` of the probabilistic
model (Tipping & Bishop 1999, :mod:`axiscope.model.probabilistic`); ``n_components`` as a
share of variance or ``'mle'`` (Minka 2000); ``partial_fit`` for batches arriving one at a
time (:mod:`axiscope.core.incremental`, Ross et al. 2008).
"""

from __future__ import annotations

import numbers
import os
from pathlib import Path

import numpy as np
import scipy.sparse
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils import check_random_state
from sklearn.utils.metaestimators import available_if
from sklearn.utils.validation import (
    _check_feature_names_in,
    check_is_fitted,
    validate_data,
)

from .core.incremental import IncrementalAxes
from .core.options import METHODS, EngineSettings, Resources
from .core.preprocess import MISSING, SCALES, PreprocessSpec
from .errors import AxiscopeError
from .fitting.run import fit, max_components
from .io import array_source
from .io.ids import generated_ids
from .model import probabilistic
from .model.store import Model, load_model

__all__ = ["AxiscopePCA", "SPARSE_FORMATS"]

_IDS_INFO_KEY = "feature_names"

#: scipy.sparse formats handed to :func:`axiscope.io.array_source` unchanged (never
#: densified; :mod:`axiscope.io.sparse`); other sparse formats (COO, LIL, …) are converted to
#: the first of them, still sparse, as scikit-learn's own validation does.
SPARSE_FORMATS: tuple[str, ...] = ("csr", "csc")

#: Parameters of the preprocessing that ``partial_fit`` cannot apply batch by batch.
_WHOLE_DATA_OPTIONS = ("min_variance", "top_variable")


class AxiscopePCA(TransformerMixin, BaseEstimator):
    """Principal component analysis with axiscope's preprocessing, as a scikit-learn transformer.

    Parameters
    ----------
    n_components : int, float, "mle" or None, default=None
        Number of principal components. An int: at most the rank the data can have,
        ``min(n_samples − 1, n_features)`` when centred and ``min(n_samples, n_features)``
        when not, and no more than the numerical rank of the preprocessed matrix. None:
        that largest number (all axes). A float in (0, 1): the fewest axes whose variance
        ratios add up to more than it. ``"mle"``: the number of largest evidence by
        Minka's approximation [2]_ (needs ``n_samples ≥ n_features``). The last two read the
        whole spectrum from an exact (LAPACK) factorisation first, then fit that many axes.
    whiten : bool, default=False
        Divide the scores by the standard deviation of each axis (``sqrt(explained_variance_)``),
        so that each has sample variance 1 on the training data.
    center : bool, default=True
        Subtract each feature's mean.
    scale : {"unit", "none", "allele-frequency"}, default="unit"
        ``unit`` divides each feature by its population standard deviation (standardized
        PCA, so no ``StandardScaler`` is needed in front); ``none`` is covariance PCA (what
        :class:`sklearn.decomposition.PCA` computes); ``allele-frequency`` divides genotype
        dosages 0/1/2 by ``sqrt(2q(1−q))``.
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
    components_ : ndarray, shape (n_components_, n_features_in_)
        Loadings of each axis in the space of the preprocessed features; zero for
        features dropped by the preprocessing (constant or filtered). Of the input's dtype
        (float32 or float64).
    explained_variance_ : ndarray, shape (n_components_,)
        Variance of each axis with the divisor ``n − 1``, ``s²/(n − 1)``, as in
        scikit-learn. (The command line's tables and :attr:`Model.variance` use ``s²/n``.)
    explained_variance_ratio_ : ndarray, shape (n_components_,)
        Share of the total variance of the preprocessed features (the same in both
        conventions).
    singular_values_ : ndarray, shape (n_components_,)
    noise_variance_ : float
        Noise variance of the probabilistic model [1]_: the mean of the
        ``min(n_samples, n_features_in_) − n_components_`` eigenvalues not kept (divisor
        ``n − 1``), 0 when none is left.
    mean_ : ndarray, shape (n_features_in_,)
        Mean of each feature after the per-sample transforms.
    scale_ : ndarray, shape (n_features_in_,)
        Divisor of each feature (1 for dropped features).
    shrinkage_factor_ : ndarray, shape (n_components_,)
        Expected shrinkage of new samples' scores (:mod:`axiscope.model.shrinkage`).
    n_components_ : int
    n_samples_ : int
        Samples fitted (all batches so far after :meth:`partial_fit`).
    n_samples_seen_ : int
        The same, under the name scikit-learn's incremental estimators use.
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

    Notes
    -----
    ``fit`` makes the passes of :func:`axiscope.fit` over the array (wrapped, not copied);
    ``transform`` one pass. A float ``n_components`` or ``"mle"`` adds one exact pass that
    holds the preprocessed matrix in float64. ``partial_fit`` holds a
    ``(n_components + batch + 1) × n_features`` matrix per batch.

    Sparse input (scipy.sparse; CSR or CSC as given, other formats converted to CSR) is
    passed to :func:`axiscope.io.array_source` and never densified by the fit.

    References
    ----------
    .. [1] M. E. Tipping and C. M. Bishop, "Probabilistic principal component analysis",
       JRSS B 61(3), 611–622, 1999. https://doi.org/10.1111/1467-9868.00196
    .. [2] T. P. Minka, "Automatic choice of dimensionality for PCA", NIPS 13, 2000.
    .. [3] D. A. Ross, J. Lim, R.-S. Lin and M.-H. Yang, "Incremental learning for robust
       visual tracking", IJCV 77, 125–141, 2008. https://doi.org/10.1007/s11263-007-0075-7
    """

    def __init__(
        self,
        n_components: int | float | str | None = None,
        *,
        whiten: bool = False,
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
        self.whiten = whiten
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

    def _options(self) -> dict:
        """The parameters under axiscope's names (a renaming subclass overrides this)."""
        return self.get_params(deep=False)

    # ------------------------------------------------------------------ scikit-learn API

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = self._options()["missing"] == "mean"
        tags.input_tags.sparse = bool(SPARSE_FORMATS)
        tags.transformer_tags.preserves_dtype = ["float64", "float32"]
        return tags

    def _validate(self, X, *, reset: bool, missing: str):
        return validate_data(
            self, X, reset=reset, dtype=[np.float64, np.float32], accept_sparse=list(SPARSE_FORMATS) or False,
            ensure_all_finite="allow-nan" if missing == "mean" else True,
            ensure_min_samples=2 if reset else 1, ensure_min_features=2 if reset else 1,
        )

    @staticmethod
    def _spec(o: dict) -> PreprocessSpec:
        if o["scale"] not in SCALES:
            raise ValueError(f"scale={o['scale']!r} is not one of {', '.join(SCALES)}")
        if o["missing"] not in MISSING:
            raise ValueError(f"missing={o['missing']!r} is not one of {', '.join(MISSING)}")
        try:
            return PreprocessSpec(center=bool(o["center"]), scale=o["scale"],
                                  log_transform=bool(o["log_transform"]), counts_per=o["counts_per"],
                                  min_variance=o["min_variance"], top_variable=o["top_variable"],
                                  missing=o["missing"])
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
        o = self._options()
        X = self._validate(X, reset=True, missing=o["missing"])
        spec = self._spec(o)
        seed = int(check_random_state(o["random_state"]).randint(np.iinfo(np.int32).max))
        names = getattr(self, "feature_names_in_", None)
        source = array_source(X, feature_ids=None if names is None else [str(v) for v in names],
                              name="<array>")
        self.__dict__.pop("_incremental", None)  # a full fit ends any run of partial_fit
        k = self._number_of_axes(o, source, spec, seed, X.shape)
        result = self._run(o, source, spec, seed, k, o["method"])
        model = result.model
        model.info[_IDS_INFO_KEY] = "given" if names is not None else "generated"
        model.info["estimator"] = {"class": type(self).__name__, "random_state_seed": seed,
                                   "whiten": bool(o["whiten"])}
        self._set_fitted(model, dtype=X.dtype, whiten=bool(o["whiten"]))
        return self._output(np.asarray(result.scores, dtype=np.float64), X.dtype)

    def _run(self, o: dict, source, spec: PreprocessSpec, seed: int, k: int, method: str):
        try:
            engine = EngineSettings(method=method, oversample=o["oversample"],
                                    power_iterations=o["power_iterations"], tol=o["tol"], seed=seed)
            resources = Resources(memory_limit=o["memory_limit"], threads=o["threads"])
            return fit(source, n_components=int(k), preprocess=spec, engine=engine, resources=resources)
        except AxiscopeError as exc:
            raise ValueError(str(exc)) from exc

    def _number_of_axes(self, o: dict, source, spec: PreprocessSpec, seed: int, shape) -> int:
        """``n_components`` resolved to a number, from the whole spectrum when it asks for it."""
        n, p = shape
        k = o["n_components"]
        limit = max_components(n, p, center=bool(o["center"]))
        rule = "min(n_samples − 1, n_features)" if o["center"] else "min(n_samples, n_features)"
        if k is None:
            return limit
        if isinstance(k, str):
            if k != "mle":
                raise ValueError(f"n_components={k!r} is not a number, None or 'mle'; pass one of those")
            if n < p:
                raise ValueError(f"n_components='mle' needs at least as many samples as features "
                                 f"({n} samples × {p} features); pass a number instead")
        elif isinstance(k, numbers.Integral) and not isinstance(k, bool):
            if k < 1:
                raise ValueError(f"n_components={k!r} is not a positive integer; pass one")
            if k > limit:
                raise ValueError(f"n_components={k} is too large for {n} samples × {p} features; "
                                 f"choose at most {rule} = {limit}")
            return int(k)
        elif isinstance(k, numbers.Real) and not isinstance(k, bool):
            if not 0 < k < 1:
                raise ValueError(f"n_components={k!r} is a share of variance outside (0, 1); "
                                 "pass a share in (0, 1) or a whole number of axes")
        else:
            raise ValueError(f"n_components={k!r} is not a number, None or 'mle'; pass one of those")
        return self._from_spectrum(o, source, spec, seed, k, n)

    def _from_spectrum(self, o: dict, source, spec: PreprocessSpec, seed: int, k, n: int) -> int:
        first = self._run(o, source, spec, seed, 1, "exact")
        s = np.asarray(first.factorization.spectrum, dtype=np.float64)
        limit = max_components(n, int(first.model.n_features), center=spec.center)
        if k == "mle":
            return probabilistic.minka_rank(s**2 / (n - 1), n)
        ratio = s**2 / n / first.model.total_inertia
        return min(probabilistic.share_rank(ratio, float(k)), limit)

    def _set_fitted(self, model: Model, *, dtype=np.float64, whiten: bool = False) -> None:
        ids = np.asarray(model.extras["input_feature_ids"], dtype=str)
        position = {fid: i for i, fid in enumerate(ids.tolist())}
        kept = np.array([position[f] for f in np.asarray(model.feature_ids, dtype=str).tolist()], dtype=np.intp)
        p = ids.shape[0]
        n = int(model.n_samples)
        components = np.zeros((model.n_components, p))
        components[:, kept] = model.components.T
        scale = np.ones(p)
        scale[kept] = model.scale
        singular = np.asarray(model.singular_values, dtype=np.float64)
        variance = singular**2 / (n - 1)
        mean = model.extras.get("input_feature_mean")
        if mean is None:  # models written before the full feature means were stored
            mean = np.full(p, np.nan)
            mean[kept] = model.extras.get("feature_mean", model.mean)
        filtered = model.spec.has_filter
        modelled = kept.shape[0] if filtered else p
        noise = probabilistic.noise_variance(model.total_inertia * n / (n - 1), variance, n, modelled)
        dtype = np.dtype(dtype)
        self.model_ = model
        self.feature_ids_ = ids
        self.kept_features_ = kept
        self.components_ = components.astype(dtype)
        self.explained_variance_ = variance.astype(dtype)
        self.explained_variance_ratio_ = np.asarray(model.variance_ratio, dtype=dtype)
        self.singular_values_ = singular.astype(dtype)
        self.noise_variance_ = float(noise)
        self.mean_ = np.asarray(mean, dtype=dtype)
        self.scale_ = scale.astype(dtype)
        self.shrinkage_factor_ = np.asarray(model.extras.get("shrinkage_factor", np.ones(model.n_components)))
        self.n_components_ = model.n_components
        self.n_samples_ = n
        self.n_samples_seen_ = n
        self.n_features_in_ = p
        self._whiten = whiten

    def _output(self, scores: np.ndarray, dtype) -> np.ndarray:
        """Scores whitened when asked, in the dtype scikit-learn gives (input and components)."""
        if self._whiten:
            scores = scores / np.sqrt(self.explained_variance_.astype(np.float64))
        return scores.astype(np.result_type(dtype, self.components_.dtype), copy=False)

    def _projection(self, X):
        from .model.project import project

        m = X.shape[0]
        if m == 1:  # readers need two samples; project the sample twice
            X = scipy.sparse.vstack([X, X], format=X.format) if scipy.sparse.issparse(X) else np.repeat(X, 2, axis=0)
        source = array_source(X, feature_ids=self.feature_ids_, name="<array>")
        try:
            o = self._options()
            projection = project(self.model_, source, memory_limit=o["memory_limit"], threads=o["threads"])
        except AxiscopeError as exc:
            raise ValueError(str(exc)) from exc
        return projection, m

    def transform(self, X):
        """Scores of the samples of ``X`` on the fitted axes, shape (n_samples, n_components_)."""
        check_is_fitted(self)
        X = self._validate(X, reset=False, missing=self.model_.spec.missing)
        projection, m = self._projection(X)
        return self._output(np.asarray(projection.scores[:m], dtype=np.float64), X.dtype)

    def inverse_transform(self, X):
        """Map scores back to the input space (features dropped by the preprocessing get their mean).

        Whitened scores are first multiplied back by ``sqrt(explained_variance_)``; the
        rank-``k`` reconstruction is then un-scaled (every ``scale``) and un-centred, and
        ``log(1 + x)`` is undone with ``expm1``. Scaling to ``counts_per`` cannot be undone
        (the original totals are not kept): a ``ValueError`` is raised when ``counts_per``
        was used.
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
        scores = Z.astype(np.float64)
        if self._whiten:
            scores = scores * np.sqrt(self.explained_variance_.astype(np.float64))
        out = np.tile(self.mean_.astype(np.float64), (Z.shape[0], 1))
        out[:, self.kept_features_] = (scores @ model.components.T) * model.scale + model.mean
        if spec.log_transform:
            out = np.expm1(out)
        return out.astype(np.result_type(Z.dtype, self.components_.dtype), copy=False)

    def get_feature_names_out(self, input_features=None):
        """Names of the output columns: ``PC1`` … ``PCk``."""
        check_is_fitted(self)
        _check_feature_names_in(self, input_features, generate_names=False)
        return np.asarray([f"PC{j + 1}" for j in range(self.n_components_)], dtype=object)

    # ------------------------------------------------------------- probabilistic model

    def _probabilistic_check(self, what: str) -> None:
        check_is_fitted(self)
        spec = self.model_.spec
        if not spec.center:
            raise ValueError(f"{what} needs a centred model (center=True): the probabilistic model "
                             "has a mean")
        if spec.has_filter:
            raise ValueError(f"{what} needs every feature in the model; min_variance and top_variable "
                             "dropped some, so their density is unknown: fit without them")

    def get_covariance(self):
        """Covariance of the features under the probabilistic model, shape (n_features_in_, n_features_in_).

        ``D (V (Λ − σ² I) V^T + σ² I) D`` with ``V`` the loadings (``components_.T``), ``Λ``
        ``explained_variance_``, ``σ²`` ``noise_variance_`` and ``D`` the feature scales
        ``scale_``: the covariance of the features after the per-sample transforms
        (``counts_per``, ``log_transform``), in their own units.
        """
        self._probabilistic_check("get_covariance")
        V = self.components_.astype(np.float64).T
        lam = self.explained_variance_.astype(np.float64)
        noise = self.noise_variance_
        cov = (V * (lam - noise)) @ V.T
        cov[np.diag_indices_from(cov)] += noise
        d = self.scale_.astype(np.float64)
        return (cov * np.outer(d, d)).astype(self.components_.dtype)

    def get_precision(self):
        """Inverse of :meth:`get_covariance`, by the matrix inversion lemma (no p × p inverse).

        ``D⁻¹ (I − V diag(1 − σ²/λ) V^T) D⁻¹ / σ²``; with ``σ² = 0`` (every axis kept)
        ``D⁻¹ V Λ⁻¹ V^T D⁻¹`` when the axes span all features, otherwise a ``ValueError``
        (the covariance is singular).
        """
        self._probabilistic_check("get_precision")
        V = self.components_.astype(np.float64).T
        lam = self.explained_variance_.astype(np.float64)
        noise = self.noise_variance_
        p = V.shape[0]
        if noise > 0:
            precision = -(V * (1.0 - noise / lam)) @ V.T
            precision[np.diag_indices_from(precision)] += 1.0
            precision /= noise
        elif lam.shape[0] == p:
            precision = (V / lam) @ V.T
        else:
            raise ValueError(f"the covariance is singular: {lam.shape[0]} axes take all the variance of "
                             f"{p} features and no noise is left; choose fewer components")
        d = 1.0 / self.scale_.astype(np.float64)
        return (precision * np.outer(d, d)).astype(self.components_.dtype)

    def score_samples(self, X):
        """Log-likelihood of each sample under the probabilistic PCA model (Tipping & Bishop 1999).

        The density of the input values ``x``: that of the centred and scaled features,
        plus the logarithm of the Jacobian of the preprocessing (``−Σ log scale_j`` for the
        scaling, ``−Σ log(1 + x_j)`` for ``log_transform``). ``counts_per`` has no
        per-value Jacobian and is refused. Large negative values flag samples the model
        explains poorly (far along the axes or far from them).

        Returns
        -------
        ndarray, shape (n_samples,)
        """
        self._probabilistic_check("score_samples")
        spec = self.model_.spec
        if spec.counts_per is not None:
            raise ValueError("score_samples cannot give a density after counts_per (each sample "
                             "rescaled to a total); fit without counts_per")
        X = self._validate(X, reset=False, missing=spec.missing)
        projection, m = self._projection(X)
        scores = np.asarray(projection.scores[:m], dtype=np.float64)
        sq_norms = np.asarray(projection.squared_norms[:m], dtype=np.float64) + self._dropped_sq(X)
        lam = self.explained_variance_.astype(np.float64)
        ll = probabilistic.log_density(sq_norms, scores, lam, self.noise_variance_, self.n_features_in_)
        ll = ll - float(np.sum(np.log(self.scale_.astype(np.float64))))
        if spec.log_transform:
            logs = X.log1p().sum(axis=1) if scipy.sparse.issparse(X) else np.log1p(X.astype(np.float64)).sum(axis=1)
            ll = ll - np.asarray(logs, dtype=np.float64).ravel()
        return ll

    def _dropped_sq(self, X) -> np.ndarray:
        """Squared deviations from their mean of the features dropped as constant (scale 1)."""
        dropped = np.setdiff1d(np.arange(self.n_features_in_), self.kept_features_)
        if dropped.size == 0:
            return np.zeros(X.shape[0])
        cols = X[:, dropped]
        cols = cols.toarray() if scipy.sparse.issparse(cols) else cols  # constant columns only
        values = cols.astype(np.float64)
        if self.model_.spec.log_transform:
            values = np.log1p(values)
        return np.sum((values - self.mean_[dropped].astype(np.float64)) ** 2, axis=1)

    def score(self, X, y=None):
        """Average log-likelihood of the samples of ``X`` (:meth:`score_samples`)."""
        return float(np.mean(self.score_samples(X)))

    # ------------------------------------------------------------------ partial fit

    def _partial_fit_possible(self) -> bool:
        """Whether the options allow :meth:`partial_fit` (``hasattr`` tells; the reason chains)."""
        o = self._options()
        if o["scale"] != "none":
            raise ValueError(f"partial_fit needs scale='none' (got scale={o['scale']!r}): the scale of "
                             "each feature depends on all samples; use fit, or pass scale='none'")
        for name in _WHOLE_DATA_OPTIONS:
            if o[name] is not None:
                raise ValueError(f"partial_fit cannot apply {name}, which needs all samples; use fit")
        if o["missing"] != "error":
            raise ValueError("partial_fit needs missing='error'; use fit to fill missing values")
        return True

    @available_if(_partial_fit_possible)
    def partial_fit(self, X, y=None):
        """Update the axes with one more batch of samples (Ross et al. 2008).

        The first call starts from nothing; later calls fold their batch into the axes
        (:class:`axiscope.core.incremental.IncrementalAxes`). Exact while the data seen
        have centred rank at most ``n_components``; otherwise close to a full fit (see the
        contributor guide for the measured accuracy). Batches may have fewer samples than
        ``n_components``: the axes fill in as data arrive.

        Available (``hasattr``) only with ``scale="none"`` (the scales of all samples are
        not known batch by batch), no ``min_variance``/``top_variable`` and
        ``missing="error"``; otherwise calling it raises ``AttributeError`` caused by a
        ``ValueError`` that names the option. ``n_components`` must be a whole number (None:
        the smaller side of the first batch).
        """
        o = self._options()
        first = not hasattr(self, "_incremental")
        self._partial_check(o)
        X = self._validate(X, reset=first, missing="error")
        if scipy.sparse.issparse(X):
            raise TypeError("partial_fit does not take sparse batches (it would densify them); use fit")
        spec = self._spec(o)
        batch = self._per_sample(X.astype(np.float64), spec)
        if first:
            k = o["n_components"]
            if k is None:
                k = min(X.shape)
            self._incremental = IncrementalAxes.empty(X.shape[1])
            self._incremental_k = int(k)
            self._incremental_spec = spec
        state = self._incremental
        state.update(batch, self._incremental_k, center=spec.center)
        if state.singular_values.shape[0] == 0:
            raise ValueError("the batches so far have no variance; pass more samples")
        self._set_incremental(state, spec, X.dtype, bool(o["whiten"]))
        return self

    def _partial_check(self, o: dict) -> None:
        k = o["n_components"]
        if k is not None and (isinstance(k, bool) or not isinstance(k, numbers.Integral) or k < 1):
            raise ValueError(f"n_components={k!r} must be a positive whole number (or None) for partial_fit")

    @staticmethod
    def _per_sample(batch: np.ndarray, spec: PreprocessSpec) -> np.ndarray:
        from .core.preprocess import transform_block

        out = np.asarray(transform_block(batch, spec), dtype=np.float64)
        if not np.all(np.isfinite(out)):
            raise ValueError("the batch has values that log_transform cannot take (≤ −1); "
                             "pass values above −1 or log_transform=False")
        return out

    def _set_incremental(self, state: IncrementalAxes, spec: PreprocessSpec, dtype, whiten: bool) -> None:
        n, p = state.n_samples, state.mean.shape[0]
        names = getattr(self, "feature_names_in_", None)
        ids = (np.asarray([str(v) for v in names], dtype=str) if names is not None
               else np.asarray(generated_ids("feature", p), dtype=str))
        std = np.sqrt(state.sum_squares / n)
        model = Model(
            spec=spec, feature_ids=ids, mean=state.mean.copy() if spec.center else np.zeros(p),
            scale=np.ones(p), std=std, components=state.components.copy(),
            singular_values=state.singular_values.copy(), n_samples=n,
            total_inertia=float(np.sum(state.sum_squares) / n), n_input_features=p,
            extras={"input_feature_ids": ids, "input_feature_mean": state.mean.copy(),
                    "feature_mean": state.mean.copy()},
            info={_IDS_INFO_KEY: "given" if names is not None else "generated",
                  "method": "incremental",
                  "estimator": {"class": type(self).__name__, "whiten": whiten, "partial_fit": True}},
        )
        self._set_fitted(model, dtype=dtype, whiten=whiten)

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
        settings = model.info.get("estimator", {})
        seed = settings.get("random_state_seed")
        whiten = bool(settings.get("whiten", False))
        method = model.info.get("method")
        est = cls(
            n_components=model.n_components, whiten=whiten, center=spec.center, scale=spec.scale,
            log_transform=spec.log_transform, counts_per=spec.counts_per, min_variance=spec.min_variance,
            top_variable=spec.top_variable, missing=spec.missing,
            method=method if method in METHODS else "auto",
            random_state=seed,
        )
        est._set_fitted(model, whiten=whiten)
        if model.info.get(_IDS_INFO_KEY, "given") == "given":
            est.feature_names_in_ = np.asarray(est.feature_ids_, dtype=object)
        return est
