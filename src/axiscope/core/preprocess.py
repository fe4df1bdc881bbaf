"""Lazy preprocessing: per-sample transforms, streaming feature statistics, feature selection.

The preprocessed matrix is never materialised. A block of samples ``X_b`` goes through the
per-sample transform ``f`` (counts per ``T``, then ``log(1 + x)``); the centred and scaled
matrix ``X̃ = (f(X) − 1·μᵀ)·diag(d)`` enters the engine only through block products,
with ``d = 1/σ`` for kept features and ``d = 0`` for dropped ones.
"""

from __future__ import annotations

import logging
from dataclasses import asdict, dataclass, field, fields

import numpy as np

from ..errors import InputError, OptionError, counted
from .workspace import work_array

__all__ = [
    "SCALES",
    "MISSING",
    "PreprocessSpec",
    "BlockStats",
    "FeatureStatistics",
    "Preprocessing",
    "row_totals",
    "transform_block",
    "block_statistics",
    "statistics_and_sketch",
    "first_nonfinite",
    "constant_features",
    "constant_rule",
    "check_dosages",
    "NotADosage",
]

logger = logging.getLogger(__name__)

SCALES = ("unit", "none", "allele-frequency")
MISSING = ("error", "mean")


@dataclass(frozen=True)
class PreprocessSpec:
    """What to do to the matrix before the factorisation.

    Parameters
    ----------
    center : bool, default=True
        Subtract each feature's mean.
    scale : {"unit", "none", "allele-frequency"}, default="unit"
        ``unit``: divide each feature by its population standard deviation (1/n), so every
        feature weighs the same (standardized PCA). ``none``: covariance PCA.
        ``allele-frequency``: genotype dosages coded 0/1/2, divided by ``sqrt(2q(1−q))``
        with ``q = mean/2`` the allele frequency (Patterson, Price & Reich 2006,
        doi:10.1371/journal.pgen.0020190).
    log_transform : bool, default=False
        Replace each value ``x`` by ``log(1 + x)`` (after ``counts_per``).
    counts_per : float or None, default=None
        Rescale each sample so that its values sum to this total (``1e6``: counts per
        million) before ``log_transform``.
    min_variance : float or None, default=None
        Drop features whose variance (after the transforms, before scaling) is below this.
    top_variable : int or None, default=None
        Keep only the ``top_variable`` features of largest variance.
    missing : {"error", "mean"}, default="error"
        NaN or infinite cells are an error, or are replaced by the feature mean.
    """

    center: bool = True
    scale: str = "unit"
    log_transform: bool = False
    counts_per: float | None = None
    min_variance: float | None = None
    top_variable: int | None = None
    missing: str = "error"

    def __post_init__(self) -> None:
        for name in ("center", "log_transform"):
            if not isinstance(getattr(self, name), (bool, np.bool_)):
                raise OptionError(f"{name}={getattr(self, name)!r} is not True or False; pass a bool")
        if self.scale not in SCALES:
            raise OptionError(f"scale={self.scale!r} is not one of {_choices(SCALES)}; choose one of them")
        if self.missing not in MISSING:
            raise OptionError(f"missing={self.missing!r} is not one of {_choices(MISSING)}; choose one of them")
        if self.counts_per is not None and _is_real(self.counts_per) and not _is_finite(self.counts_per):
            raise OptionError(f"counts_per={self.counts_per!r} is not a finite number; "
                              "pass the total each sample is scaled to (1e6 for counts per million)")
        if self.counts_per is not None and not (_is_real(self.counts_per) and self.counts_per > 0):
            raise OptionError(f"counts_per={self.counts_per!r} is not a positive number; "
                              "pass the total each sample is scaled to (1e6 for counts per million)")
        if self.min_variance is not None and not (_is_real(self.min_variance) and self.min_variance >= 0
                                                  and _is_finite(self.min_variance)):
            # NaN would compare False with every variance and keep all features silently
            raise OptionError(f"min_variance={self.min_variance!r} is not a finite number >= 0; pass one")
        if self.top_variable is not None and not (_is_integer(self.top_variable) and self.top_variable >= 2):
            raise OptionError(f"top_variable={self.top_variable!r} is not a whole number >= 2; pass one")
        # plain Python values, so that the spec is written to JSON as it reads
        for name, kind in (("center", bool), ("log_transform", bool), ("counts_per", float),
                           ("min_variance", float), ("top_variable", int)):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, kind(value))

    @property
    def has_filter(self) -> bool:
        """Whether features are selected by a statistic (beyond dropping constant ones)."""
        return self.min_variance is not None or self.top_variable is not None

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, values: dict) -> "PreprocessSpec":
        """The spec written by :meth:`to_dict`; every setting must be present, no other.

        Raises ``KeyError`` naming the settings that are missing or unknown.
        """
        names = {f.name for f in fields(cls)}
        if not isinstance(values, dict) or set(values) != names:
            given = set(values) if isinstance(values, dict) else set()
            raise KeyError(f"preprocessing settings {sorted(given ^ names)} missing or unknown")
        return cls(**values)


def _choices(values: tuple[str, ...]) -> str:
    return ", ".join(repr(v) for v in values)


def _is_real(value) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _is_finite(value) -> bool:
    """Whether a real number is finite (a Python int too large for a float is not)."""
    try:
        return bool(np.isfinite(float(value)))
    except OverflowError:
        return False


def _is_integer(value) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


def feature_scale(scale: str, mean: np.ndarray, std: np.ndarray) -> np.ndarray:
    """Per-feature divisor of a scaling: the population SD (``unit``), ``sqrt(2q(1−q))`` with
    ``q = mean/2`` (``allele-frequency``), or 1 (``none``)."""
    if scale == "unit":
        return np.array(std, dtype=np.float64, copy=True)
    if scale == "allele-frequency":
        freq = np.asarray(mean, dtype=np.float64) / 2.0
        return np.sqrt(2.0 * freq * (1.0 - freq))
    if scale == "none":
        return np.ones(np.shape(mean)[0])
    raise OptionError(f"scale={scale!r} is not one of {_choices(SCALES)}")


def constant_features(mean: np.ndarray, variance: np.ndarray, eps: float) -> np.ndarray:
    """Features whose spread is below the resolution of their values in the input's precision.

    A feature is constant when its standard deviation is at most ``eps·|mean|``, with
    ``eps`` the machine epsilon of the input's dtype (values differing only in their last
    bit), or its variance is below the smallest normal float64 (zero, in practice).
    Relative to the feature's own magnitude, so units do not matter: a float64 feature
    with mean 1e6 and SD 0.05 is kept, and so is one with mean 1e-12 and SD 1e-13.
    """
    variance = np.asarray(variance, dtype=np.float64)
    limit = (eps * np.abs(np.asarray(mean, dtype=np.float64))) ** 2
    return (variance <= limit) | (variance < np.finfo(np.float64).tiny)


def constant_rule(eps: float) -> str:
    """The constant rule of :func:`constant_features`, in words."""
    precision = {float(np.finfo(np.float32).eps): "float32", float(np.finfo(np.float64).eps): "float64"}
    name = precision.get(float(eps))
    where = f", the precision of the {name} input" if name else ""
    return f"standard deviation at most eps·|mean| with eps = {eps:.3g}{where} (constant)"


#: Genotype dosages accepted under ``scale="allele-frequency"``.
DOSAGES = (0.0, 1.0, 2.0)


class NotADosage(InputError):
    """A value other than 0, 1, 2 or NaN under ``scale="allele-frequency"``.

    ``row`` and ``column`` locate the first such value in the block; callers that know the
    file and the ids re-raise it with :meth:`located`.
    """

    def __init__(self, value: float, row: int, column: int, count: int) -> None:
        self.value, self.row, self.column, self.count = float(value), int(row), int(column), int(count)
        super().__init__(self.located(""))

    def located(self, where: str) -> str:
        """The message, with ``where`` (e.g. "file: sample 's1', feature 'g2'") in front."""
        place = f"{where} holds {self.value:g}" if where else f"the input holds {self.value:g}"
        return (f"{place}, but scale='allele-frequency' reads genotype dosages 0, 1 or 2 (NaN for "
                f"missing); {counted(self.count, 'such value')} in that block. Recode the genotypes, "
                "or choose scale='unit' for other data")


def check_dosages(block: np.ndarray) -> None:
    """Under ``scale="allele-frequency"`` every value is a dosage 0, 1 or 2, or NaN (missing).

    Raises
    ------
    NotADosage
        Locating the first other value in the block and counting them.
    """
    bad = (block != 0) & (block != 1) & (block != 2) & ~np.isnan(block)
    if not bad.any():
        return
    rows, cols = np.nonzero(bad)
    raise NotADosage(block[rows[0], cols[0]], rows[0], cols[0], int(bad.sum()))


def row_totals(block: np.ndarray) -> np.ndarray:
    """Row sums in float64, skipping non-finite cells (copying only blocks that have some)."""
    totals = np.add.reduce(block, axis=1, dtype=np.float64)
    if not np.isfinite(totals).all():
        totals = np.add.reduce(np.where(np.isfinite(block), block, 0), axis=1, dtype=np.float64)
    return totals


def transform_block(block: np.ndarray, spec: PreprocessSpec, *,
                    totals: np.ndarray | None = None) -> np.ndarray:
    """Apply the per-sample transforms of ``spec`` to a block of samples, in its own dtype.

    The block is modified in place when a transform applies; callers pass fresh blocks.
    ``totals`` (one per row) replaces the row sums of ``block`` for ``counts_per``, for
    blocks that hold only some of the features the totals run over. Values ≤ −1 give NaN
    or −inf under ``log_transform``; callers report non-finite cells.
    Under ``scale="allele-frequency"`` the values must be dosages 0, 1 or 2 (or NaN):
    anything else raises :class:`~axiscope.errors.InputError` (:func:`check_dosages`).
    """
    if spec.scale == "allele-frequency":
        check_dosages(block)
    if spec.counts_per is not None:
        if totals is None:
            totals = row_totals(block)
        factors = np.where(totals > 0, spec.counts_per / np.where(totals > 0, totals, 1), 0)
        block *= factors.astype(block.dtype)[:, None]
    if spec.log_transform:
        with np.errstate(invalid="ignore", divide="ignore"):
            np.log1p(block, out=block)
    return block


def first_nonfinite(block: np.ndarray) -> tuple[int, int] | None:
    """Row and column of the first NaN or infinite cell of a block, or None."""
    bad = ~np.isfinite(block)
    if not bad.any():
        return None
    rows, cols = np.nonzero(bad)
    return int(rows[0]), int(cols[0])


@dataclass
class BlockStats:
    """Per-feature statistics of a set of samples, mergeable (Chan, Golub & LeVeque 1983).

    ``count`` is the number of finite values per feature, ``mean`` their mean, ``m2`` the
    sum of squared deviations from that mean; all in float64. ``eps`` is the machine
    epsilon of the dtype the blocks were read in (the input's own precision), which
    decides when a feature counts as constant.
    """

    n_samples: int
    count: np.ndarray
    mean: np.ndarray
    m2: np.ndarray
    n_nonfinite: int = 0
    eps: float = float(np.finfo(np.float32).eps)

    def merge(self, other: "BlockStats") -> "BlockStats":
        """Combine with the statistics of disjoint samples (pairwise update, stable)."""
        count = self.count + other.count
        safe = np.maximum(count, 1)
        delta = other.mean - self.mean
        mean = self.mean + delta * (other.count / safe)
        m2 = self.m2 + other.m2 + delta**2 * (self.count * other.count / safe)
        return BlockStats(self.n_samples + other.n_samples, count, mean, m2,
                          self.n_nonfinite + other.n_nonfinite, max(self.eps, other.eps))


def block_statistics(block: np.ndarray) -> BlockStats:
    """Statistics of one block of (transformed) samples; non-finite cells are skipped.

    Sums are accumulated in float64 without a float64 copy of the block: the block is
    shifted by its (rounded) mean in its own dtype, and ``M2 = Σc² − (Σc)²/m`` corrects
    for the rounding of the shift.
    """
    return statistics_and_sketch(block, None)[0]


def statistics_and_sketch(block: np.ndarray, omega: np.ndarray | None, *,
                          centre: bool = True) -> tuple[BlockStats, np.ndarray | None]:
    """:func:`block_statistics`, and with ``omega`` (``p × l``, the block's dtype) the block's
    sketch ``(X_b − 1m_bᵀ)ᵀ(X_b − 1m_bᵀ)·Ω`` about its own mean ``m_b`` in float64 (or
    ``X_bᵀX_b·Ω`` when ``centre`` is false), from one shifted copy of the block.

    The block is shifted in its own dtype by ``s``, its mean rounded to that dtype (nearby
    numbers subtract exactly); the products use the shifted values, and the rounding
    ``e = m_b − s`` is taken out in float64: ``Σ(x−m)(x−m)ᵀ = Σ(x−s)(x−s)ᵀ − rows·e·eᵀ``.
    The shifted copy is a work array of the pass's thread (:mod:`axiscope.core.workspace`).
    No sketch (None) for a block with non-finite cells, whose statistics skip them.
    """
    m = block.shape[0]
    total = np.add.reduce(block, axis=0, dtype=np.float64)
    if not np.isfinite(total).all():
        return _block_statistics_nonfinite(block), None
    shift = (total / m).astype(block.dtype)
    sketch = None
    if omega is not None and not centre:
        sketch = (block.T @ (block @ omega)).astype(np.float64)
    c = np.subtract(block, shift, out=work_array("shifted", block.shape, block.dtype))
    if omega is not None and centre:
        sketch = (c.T @ (c @ omega)).astype(np.float64)
    csum = np.add.reduce(c, axis=0, dtype=np.float64)
    np.square(c, out=c)
    m2 = np.add.reduce(c, axis=0, dtype=np.float64) - csum**2 / m
    mean = shift.astype(np.float64) + csum / m
    if sketch is not None and centre:
        e = csum / m  # m_b − s, the mean of the shifted values
        sketch -= m * np.outer(e, e @ omega.astype(np.float64))
    stats = BlockStats(m, np.full(block.shape[1], float(m)), mean, np.maximum(m2, 0.0), 0, _eps(block.dtype))
    return stats, sketch


def _eps(dtype: np.dtype) -> float:
    """Machine epsilon of a block's dtype (float64's for anything that is not a float)."""
    dtype = np.dtype(dtype)
    return float(np.finfo(dtype if dtype.kind == "f" else np.float64).eps)


def _block_statistics_nonfinite(block: np.ndarray) -> BlockStats:
    x = block.astype(np.float64, copy=True)
    finite = np.isfinite(x)
    n_bad = int(x.size - np.count_nonzero(finite))
    x[~finite] = np.nan
    count = finite.sum(axis=0).astype(np.float64)
    mean = np.where(count > 0, np.nansum(x, axis=0) / np.maximum(count, 1), 0.0)
    x -= mean
    x[~finite] = 0.0
    m2 = np.einsum("ij,ij->j", x, x)
    return BlockStats(block.shape[0], count, mean, m2, n_bad, _eps(block.dtype))


@dataclass
class FeatureStatistics:
    """Per-feature statistics over all samples after the transforms (float64).

    ``variance`` is the population variance (divided by the number of samples); cells
    imputed by the mean add nothing to it. ``eps`` is the machine epsilon of the input's
    precision (see :class:`BlockStats`).
    """

    n_samples: int
    mean: np.ndarray
    variance: np.ndarray
    count: np.ndarray
    n_missing: int
    eps: float = float(np.finfo(np.float32).eps)

    @classmethod
    def from_block_stats(cls, stats: BlockStats) -> "FeatureStatistics":
        return cls(
            n_samples=stats.n_samples,
            mean=stats.mean,
            variance=stats.m2 / stats.n_samples,
            count=stats.count,
            n_missing=stats.n_nonfinite,
            eps=stats.eps,
        )


@dataclass
class Preprocessing:
    """Fitted preprocessing: which features are kept and the centre and scale of each.

    Attributes
    ----------
    spec : PreprocessSpec
    kept : ndarray of int, shape (n_kept,)
        Indices of the kept features among all the input's features.
    mean : ndarray, shape (n_kept,)
        Centre of each kept feature (zero when ``spec.center`` is false).
    scale : ndarray, shape (n_kept,)
        Divisor of each kept feature (population standard deviation for ``unit``,
        ``sqrt(2q(1−q))`` for ``allele-frequency``, 1 for ``none``).
    std : ndarray, shape (n_kept,)
        Population standard deviation of each kept feature after the transforms.
    dropped : dict
        Number of features dropped for each reason.
    """

    spec: PreprocessSpec
    kept: np.ndarray
    mean: np.ndarray
    scale: np.ndarray
    std: np.ndarray
    dropped: dict = field(default_factory=dict)

    @property
    def inverse_scale(self) -> np.ndarray:
        return 1.0 / self.scale

    @property
    def total_inertia(self) -> float:
        """Sum of the variances of the preprocessed features (trace of the covariance)."""
        centred_var = self.std**2
        if not self.spec.center:
            centred_var = centred_var + self.mean_raw**2
        return float(np.sum(centred_var / self.scale**2))

    mean_raw: np.ndarray = field(default_factory=lambda: np.empty(0))
    #: Why each input feature was left out ("supplementary", "constant", "min_variance",
    #: "top_variable"; "" if kept); :attr:`rules` says each rule in words.
    reason: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))
    #: Machine epsilon of the input's precision, used by the constant rule.
    eps: float = float(np.finfo(np.float32).eps)

    @classmethod
    def from_statistics(cls, spec: PreprocessSpec, stats: FeatureStatistics,
                        exclude: np.ndarray | None = None) -> "Preprocessing":
        """Choose the kept features and their centre and scale from streaming statistics.

        ``exclude`` (bool, one per feature) marks features left out of the axes on purpose
        (supplementary features).
        """
        mean, var = stats.mean, np.maximum(stats.variance, 0.0)
        p = mean.shape[0]
        keep = np.ones(p, dtype=bool)
        dropped: dict[str, int] = {}
        if exclude is not None and np.any(exclude):
            keep &= ~np.asarray(exclude, dtype=bool)
            dropped["supplementary"] = int(np.sum(exclude))
        constant = constant_features(mean, var, stats.eps)
        if spec.scale == "allele-frequency":
            freq = mean / 2.0
            constant |= 2.0 * freq * (1.0 - freq) <= 0
        if spec.scale != "none" or spec.center:
            if constant.any():
                dropped["constant"] = int(constant.sum())
            keep &= ~constant
        if spec.min_variance is not None:
            low = keep & (var < spec.min_variance)
            if low.any():
                dropped["min_variance"] = int(low.sum())
            keep &= ~low
        if spec.top_variable is not None and keep.sum() > spec.top_variable:
            candidates = np.flatnonzero(keep)
            order = np.argsort(-var[candidates], kind="stable")
            chosen = np.zeros(p, dtype=bool)
            chosen[candidates[order[: spec.top_variable]]] = True
            dropped["top_variable"] = int(keep.sum() - spec.top_variable)
            keep = chosen
        kept = np.flatnonzero(keep)
        reason = np.full(p, "", dtype=object)
        if spec.top_variable is not None:
            reason[~keep] = "top_variable"
        if spec.min_variance is not None:
            reason[~keep & (var < spec.min_variance)] = "min_variance"
        reason[~keep & constant] = "constant"
        if exclude is not None:
            reason[np.asarray(exclude, dtype=bool)] = "supplementary"
        std = np.sqrt(var[kept])
        scale = feature_scale(spec.scale, mean[kept], std)
        centre = mean[kept] if spec.center else np.zeros(kept.shape[0])
        return cls(
            spec=spec,
            kept=kept,
            mean=centre,
            scale=scale,
            std=std,
            dropped=dropped,
            mean_raw=mean[kept].copy(),
            reason=reason,
            eps=stats.eps,
        )

    @property
    def rules(self) -> dict[str, str]:
        """The rule behind each reason in :attr:`reason` that occurs, in words."""
        texts = {
            "supplementary": lambda: "left out of the axes on request (supplementary features)",
            "constant": lambda: constant_rule(self.eps),
            "min_variance": lambda: f"variance below min_variance={self.spec.min_variance:g}",
            "top_variable": lambda: f"not among the top_variable={self.spec.top_variable} features of "
                                    "largest variance",
        }
        present = set(self.reason.tolist())
        return {name: text() for name, text in texts.items() if name in present}
