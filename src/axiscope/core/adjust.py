"""Principal axes after removing known covariates, without writing a corrected copy.

With ``C`` the covariate matrix of the active samples (``n × c``: an intercept, each numeric
column as it is, each categorical column as indicators of its levels but the first) and

    P = I − C·(CᵀC)⁻¹·Cᵀ = I − Q·Qᵀ,        C = Q·R  (thin QR, Q orthonormal),

the fit factorises ``P·X̃``: every feature of the preprocessed matrix ``X̃`` (centred and
scaled as without adjustment: the scales are those of the features before adjustment, so
"standardise, then adjust") has the least-squares fit on ``C`` taken out. ``P·X̃`` is never
formed:

* the statistics pass also accumulates ``U = (X − 1μᵀ)ᵀ·C`` (features × c, float64), so
  ``M = X̃ᵀQ = D·U·R⁻¹`` is known after it (:meth:`Adjustment.add_cross`);
* each Krylov pass stays one pass: after ``Y = X̃·W`` and ``Z = X̃ᵀY`` are read,
  ``P·Y = Y − Q(QᵀY)`` is an ``n × l`` correction and ``X̃ᵀ·P·Y = Z − M·(QᵀY)`` a
  ``p × l`` one (:meth:`Residualizer.finish`);
* the first pass also takes ``X̃·M`` (``c`` more columns), which turns the squared norms of
  the rows of ``X̃`` into those of ``P·X̃``: ``‖x̃_i − M·q_i‖² = ‖x̃_i‖² − 2·q_iᵀ(X̃M)_i + ‖M·q_i‖²``;
* the total inertia is ``‖P·X̃‖²_F / n = ‖X̃‖²_F / n − ‖M‖²_F / n`` (no pass).

The model stores the coefficients ``Γ = M·R⁻ᵀ`` (features × c, in units of ``X̃``): a new
sample with covariate row ``c`` is placed as ``x̃ − Γ·c``, which for a training sample is
exactly its row of ``P·X̃``.

Memory: ``Q`` (``n × c``), ``U`` and ``M`` (``p × c``), float64. Rounding: the corrections
subtract what the covariates explain; when they explain almost all of a direction, the
part left is known to the rounding of the block products relative to the unadjusted size
(float32 data: about 1e-7 of the unadjusted singular value).
"""

from __future__ import annotations

import logging
import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.linalg

from ..errors import InputError, ModelError, OptionError, counted

__all__ = ["Covariates", "CovariateDesign", "Adjustment", "Residualizer", "block_cross",
           "MAX_CODE_LEVELS", "INTERCEPT"]

logger = logging.getLogger(__name__)

#: Name of the constant term of the design.
INTERCEPT = "intercept"
#: A column of whole numbers with at most this many distinct values, each seen twice on
#: average, holds codes (batch 1, 2, 3) and is treated as categorical, as the axis
#: explanations do (common practice, no source).
MAX_CODE_LEVELS = 12
#: A column whose values are numbers in at least this fraction but not all holds typos.
_MOSTLY_NUMERIC = 0.9
#: A term is collinear with the previous ones when the QR diagonal falls below this times
#: the column's norm (numpy.linalg.matrix_rank's relative tolerance scale, times c).
_RANK_RTOL = 1e-10


def _names(columns: Iterable[str] | str) -> tuple[str, ...]:
    if isinstance(columns, str):
        columns = [columns]
    out: list[str] = []
    for value in columns:
        for name in str(value).split(","):
            name = name.strip()
            if name and name not in out:
                out.append(name)
    return tuple(out)


@dataclass(frozen=True)
class Covariates:
    """Annotation columns to remove from every feature before the axes are fitted.

    Parameters
    ----------
    table : path or DataFrame
        Tab-separated annotation table with a header line (read as
        :func:`axiscope.io.annotation_table.read_annotations` reads it), or a DataFrame with an
        ``id_column`` column or index.
    columns : sequence of str or str, default=()
        Columns adjusted for (comma-separated names allowed). Required by
        :func:`axiscope.fit`; :func:`axiscope.score` takes the model's columns.
    id_column : str, default="sample_id"
    categorical, numeric : sequence of str, default=()
        Columns to treat as levels, or as numbers, whatever their values look like. By
        default a column of numbers is numeric, except whole numbers with at most
        ``MAX_CODE_LEVELS`` distinct values (codes); anything else is categorical.
    """

    table: str | os.PathLike | pd.DataFrame
    columns: Sequence[str] | str = ()
    id_column: str = "sample_id"
    categorical: Sequence[str] | str = ()
    numeric: Sequence[str] | str = ()

    def __post_init__(self) -> None:
        if not isinstance(self.table, (str, os.PathLike, pd.DataFrame)):
            raise OptionError(f"covariates table is a {type(self.table).__name__}; pass a path or a DataFrame")
        for name in ("columns", "categorical", "numeric"):
            object.__setattr__(self, name, _names(getattr(self, name)))
        both = set(self.categorical) & set(self.numeric)
        if both:
            raise OptionError(f"column {sorted(both)[0]!r} is named in both categorical and numeric; name it once")

    @property
    def where(self) -> str:
        return "covariates" if isinstance(self.table, pd.DataFrame) else str(self.table)

    def read(self) -> pd.DataFrame:
        """The table as text, indexed by sample id."""
        from ..io.annotation_table import read_annotations

        return read_annotations(self.table, id_column=self.id_column)

    def design(self, sample_ids: Sequence[str]) -> tuple[np.ndarray, "CovariateDesign"]:
        """The covariate matrix ``C`` (``n × c``, float64) of ``sample_ids`` and how it was made.

        Raises
        ------
        InputError
            A column absent, a sample without a row or a value, a column constant over the
            samples or collinear with the intercept and the columns before it.
        """
        if not self.columns:
            raise OptionError("adjust_for names no column; name the annotation columns to adjust for")
        frame = _rows(self.read(), self.columns, sample_ids, self.where)
        design = CovariateDesign.learn(frame, self, self.where)
        C = design.encode(frame, self.where)
        design.check_rank(C, self.where)
        return C, design

    def encode_for(self, design: "CovariateDesign", sample_ids: Sequence[str]) -> np.ndarray:
        """The covariate terms of new samples, as a model fitted with ``design`` needs them."""
        if self.columns and list(self.columns) != list(design.columns):
            raise OptionError(f"covariates names {', '.join(map(repr, self.columns))}, but the model was adjusted "
                              f"for {', '.join(map(repr, design.columns))}; leave the columns out")
        frame = _rows(self.read(), design.columns, sample_ids, self.where, fitted=True)
        return design.encode(frame, self.where)


def _rows(table: pd.DataFrame, columns: Sequence[str], sample_ids: Sequence[str], where: str, *,
          fitted: bool = False) -> pd.DataFrame:
    """The named columns of ``table`` for ``sample_ids``, in their order; every cell present.

    ``fitted``: the columns are those a model was adjusted for (scoring), not the user's choice.
    """
    absent = [c for c in columns if c not in table.columns]
    if absent:
        shown = ", ".join(repr(c) for c in list(table.columns)[:15])
        fix = ("the model was fitted after adjusting for it; give its values for these samples" if fitted
               else "check the names given as adjust_for")
        raise InputError(f"{where}: no column {absent[0]!r} to adjust for (columns: {shown}); {fix}")
    ids = [str(i) for i in sample_ids]
    row_of = {sid: i for i, sid in enumerate(table.index.tolist())}
    position = np.array([row_of.get(sid, -1) for sid in ids], dtype=np.int64)
    lacking = np.flatnonzero(position < 0)
    if lacking.size:
        raise InputError(f"{where}: {lacking.size} of {counted(len(ids), 'sample')} have no row (first: "
                         f"{ids[lacking[0]]!r}); the covariates adjusted for are needed for every sample")
    frame = table[list(columns)].iloc[position]
    frame.index = pd.Index(ids, dtype=object)
    for column in columns:
        empty = np.flatnonzero(pd.isna(frame[column]).to_numpy())
        if empty.size:
            raise InputError(f"{where}: sample {ids[empty[0]]!r} has no value in column {column!r} "
                             f"({counted(empty.size, 'sample')} lack one); fill it in or leave the sample out")
    return frame


def _as_number(text: str) -> float:
    try:
        value = float(text)
    except (TypeError, ValueError):
        return float("nan")
    return value


def _numbers(cells: np.ndarray) -> np.ndarray:
    """float64 of each text cell, NaN where it is not a number."""
    return pd.to_numeric(pd.Series(cells, dtype=object), errors="coerce").to_numpy(dtype=np.float64)


def _labels(cells: np.ndarray) -> np.ndarray:
    """:func:`_level` of every cell, computed once per distinct value."""
    distinct, inverse = np.unique(np.asarray(cells, dtype=str), return_inverse=True)
    return np.asarray([_level(v) for v in distinct], dtype=object)[inverse]


def _level(text: str) -> str:
    """A category label: whole numbers written without decimals ("1.0" and "1" are one level)."""
    value = _as_number(text)
    if np.isfinite(value) and value == round(value) and abs(value) < 2**53:
        return str(int(value))
    return str(text)


@dataclass
class CovariateDesign:
    """How annotation columns become the columns (terms) of ``C``; stored with the model.

    Attributes
    ----------
    columns : list of str
        The annotation columns adjusted for, in order.
    kinds : list of {"numeric", "categorical"}
    levels : dict of str to list of str
        For each categorical column, every level seen in training, sorted; the first is the
        reference level, which gets no term.
    terms : list of str
        Names of the columns of ``C``: ``"intercept"``, then a numeric column's name, or
        ``"column=level"`` for each level but the reference.
    """

    columns: list[str]
    kinds: list[str]
    levels: dict[str, list[str]] = field(default_factory=dict)

    @property
    def terms(self) -> list[str]:
        terms = [INTERCEPT]
        for column, kind in zip(self.columns, self.kinds):
            if kind == "numeric":
                terms.append(column)
            else:
                terms += [f"{column}={level}" for level in self.levels[column][1:]]
        return terms

    @classmethod
    def learn(cls, frame: pd.DataFrame, spec: Covariates, where: str) -> "CovariateDesign":
        """Kinds and levels from the training samples' values (all present)."""
        kinds, levels = [], {}
        for column in frame.columns:
            cells = frame[column].to_numpy(dtype=object)
            numbers = _numbers(cells)
            finite = np.isfinite(numbers)
            distinct = np.unique(numbers[finite])
            if column in spec.numeric or (column not in spec.categorical and finite.mean() >= _MOSTLY_NUMERIC):
                if not finite.all():
                    i = int(np.flatnonzero(~finite)[0])
                    raise InputError(f"{where}: column {column!r} is numeric but sample {frame.index[i]!r} has "
                                     f"{cells[i]!r}; fix the value, or name the column in categorical")
                whole = bool(np.all(distinct == np.round(distinct)))
                codes = whole and 2 <= distinct.size <= MAX_CODE_LEVELS and distinct.size <= cells.size / 2
                if column not in spec.numeric and codes:
                    logger.info("%s: column %r holds %d whole-number values, taken for category codes; name it "
                                "in numeric to adjust for it as a number", where, column, distinct.size)
                else:
                    if distinct.size < 2:
                        raise InputError(f"{where}: column {column!r} is constant ({cells[0]!r}) over the "
                                         f"{counted(cells.size, 'sample')}; nothing to adjust for, drop it "
                                         "from adjust_for")
                    kinds.append("numeric")
                    continue
            found = sorted(set(_labels(cells)), key=_level_order)
            if len(found) < 2:
                raise InputError(f"{where}: column {column!r} has a single level ({found[0]!r}) over the "
                                 f"{counted(cells.size, 'sample')}; nothing to adjust for, drop it from adjust_for")
            kinds.append("categorical")
            levels[column] = found
        return cls(list(frame.columns), kinds, levels)

    def encode(self, frame: pd.DataFrame, where: str) -> np.ndarray:
        """``C`` for the rows of ``frame`` (text cells of :attr:`columns`, all present).

        Raises
        ------
        InputError
            A numeric column's cell is not a number, or a categorical column holds a level
            never seen in training (naming the sample).
        """
        parts = [np.ones((frame.shape[0], 1))]
        for column, kind in zip(self.columns, self.kinds):
            cells = frame[column].to_numpy(dtype=object)
            if kind == "numeric":
                x = _numbers(cells)
                bad = np.flatnonzero(~np.isfinite(x))
                if bad.size:
                    raise InputError(f"{where}: sample {frame.index[bad[0]]!r} has {cells[bad[0]]!r} in numeric "
                                     f"column {column!r}; give a number")
                parts.append(x[:, None])
                continue
            known = self.levels[column]
            labels = _labels(cells)
            unseen = np.flatnonzero(~np.isin(labels, np.asarray(known, dtype=object)))
            if unseen.size:
                raise InputError(
                    f"{where}: sample {frame.index[unseen[0]]!r} has level {labels[unseen[0]]!r} in column "
                    f"{column!r}, never seen when the model was fitted (levels: "
                    f"{', '.join(repr(v) for v in known[:10])}); it cannot be adjusted for")
            parts.append((labels[:, None] == np.asarray(known[1:], dtype=object)[None, :]).astype(np.float64))
        return np.hstack(parts)

    def check_rank(self, C: np.ndarray, where: str) -> None:
        """Refuse a column collinear with the intercept and the columns before it (or too few samples)."""
        n, c = C.shape
        if n <= c:
            raise InputError(f"{where}: {counted(c, 'covariate term')} for {counted(n, 'sample')}; adjusting "
                             "needs more samples than terms, drop columns from adjust_for")
        terms = self.terms
        owner = [INTERCEPT] + [t.split("=", 1)[0] for t in terms[1:]]
        _, R = np.linalg.qr(C / np.maximum(np.linalg.norm(C, axis=0), np.finfo(float).tiny))
        diag = np.abs(np.diag(R))
        bad = np.flatnonzero(diag < _RANK_RTOL * c)
        if bad.size:
            column = owner[bad[0]]
            rank = int(np.sum(diag >= _RANK_RTOL * c))
            raise InputError(f"{where}: column {column!r} is collinear with the intercept and the columns adjusted "
                             f"for before it (term {terms[bad[0]]!r}; the covariate matrix has rank {rank}, not "
                             f"{c}); drop it from adjust_for")

    def to_dict(self, rank: int | None = None) -> dict:
        record = {"columns": list(self.columns), "kinds": list(self.kinds),
                  "levels": {k: list(v) for k, v in self.levels.items()}, "terms": self.terms}
        if rank is not None:
            record["rank"] = int(rank)
        return record

    @classmethod
    def from_dict(cls, record: dict, where: str) -> "CovariateDesign":
        try:
            columns = [str(c) for c in record["columns"]]
            kinds = [str(k) for k in record["kinds"]]
            levels = {str(k): [str(v) for v in values] for k, values in record["levels"].items()}
            ok = (len(columns) == len(kinds) and set(kinds) <= {"numeric", "categorical"}
                  and all((k == "categorical") == (c in levels) for c, k in zip(columns, kinds))
                  and all(len(v) >= 2 for v in levels.values()))
        except (KeyError, TypeError, AttributeError):
            ok = False
        if not ok:
            raise ModelError(f"{where}: the description of the covariates adjusted for is malformed; "
                             "the model was modified or damaged, refit or restore it")
        design = cls(columns, kinds, levels)
        if record.get("terms") != design.terms:
            raise ModelError(f"{where}: the covariate terms do not match their columns and levels; "
                             "the model was modified or damaged, refit or restore it")
        return design


def _level_order(level: str):
    value = _as_number(level)
    return (0, value, "") if np.isfinite(value) else (1, 0.0, level)


def block_cross(block: np.ndarray, centred_rows: np.ndarray, mean: np.ndarray | None = None) -> np.ndarray:
    """``X_bᵀ·C̄_b`` (float64) for one block, ``C̄`` the covariates centred over all samples.

    The block is shifted by its own column means (``mean``, computed when not given)
    rounded to its dtype (exact subtraction of nearby numbers) before the product in the
    block's dtype; the shift comes back in float64 as ``m_b·(1ᵀC̄_b)``. Summed over blocks
    this is ``(X − 1μᵀ)ᵀ·C`` for every column of ``C`` but the intercept (for which it is
    zero), since ``1ᵀC̄ = 0``.
    """
    m = (block.mean(axis=0, dtype=np.float64) if mean is None else mean).astype(block.dtype)
    shifted = block - m
    cross = (shifted.T @ centred_rows.astype(block.dtype)).astype(np.float64)
    cross += np.outer(m.astype(np.float64), centred_rows.sum(axis=0))
    return cross


@dataclass
class Adjustment:
    """The covariates of a fit: ``C = Q·R`` and, after the statistics pass, ``U = (X − 1μᵀ)ᵀC``.

    Attributes
    ----------
    design : CovariateDesign
    basis : ndarray, shape (n, c)
        ``Q``, orthonormal columns spanning ``C``.
    triangle : ndarray, shape (c, c)
        ``R`` of ``C = Q·R``.
    centred : ndarray, shape (n, c − 1)
        The non-intercept columns of ``C`` centred over the samples (read block by block
        by the statistics pass).
    cross : ndarray, shape (p_input, c)
        ``U`` for every input feature, unscaled (zero until :meth:`add_cross`).
    """

    design: CovariateDesign
    basis: np.ndarray
    triangle: np.ndarray
    centred: np.ndarray
    cross: np.ndarray | None = None

    @classmethod
    def prepare(cls, covariates: Covariates, sample_ids: Sequence[str], *, center: bool, missing: str,
                n_components: int) -> "Adjustment":
        """Checks the settings, builds ``C`` for the active samples and factorises it."""
        if not isinstance(covariates, Covariates):
            raise OptionError(f"covariates is a {type(covariates).__name__}, not a Covariates object; pass "
                              "axiscope.Covariates(table, columns)")
        if not center:
            raise OptionError("adjusting for covariates includes an intercept, which centres every feature; "
                              "leave center on")
        if missing != "error":
            raise OptionError("adjusting for covariates does not yet combine with missing='mean'; "
                              "impute the matrix first or leave missing at 'error'")
        C, design = covariates.design(sample_ids)
        n, c = C.shape
        if n_components > n - c:
            raise OptionError(f"n_components={n_components} is more axes than {counted(n, 'sample')} leave after "
                              f"adjusting for {counted(c, 'covariate term')} (intercept included); choose at "
                              f"most {n - c}")
        Q, R = scipy.linalg.qr(C, mode="economic", check_finite=False)
        centred = C[:, 1:] - C[:, 1:].mean(axis=0)
        return cls(design, Q, R, np.ascontiguousarray(centred))

    @property
    def rank(self) -> int:
        return int(self.basis.shape[1])

    def add_cross(self, cross: np.ndarray) -> None:
        """Accumulate one block's ``X_bᵀ·C̄_b`` (p_input × (c − 1)) from :func:`block_cross`."""
        if self.cross is None:
            self.cross = np.zeros((cross.shape[0], self.rank))
        self.cross[:, 1:] += cross

    def unscaled_loadings(self, columns: np.ndarray | None) -> np.ndarray:
        """``N = U·R⁻¹ = (X − 1μᵀ)ᵀQ`` for the given input columns (all when None)."""
        U = self.cross if columns is None else self.cross[columns]
        return scipy.linalg.solve_triangular(self.triangle, U.T, trans="T", check_finite=False).T

    def residualizer(self, inverse_scale: np.ndarray, columns: np.ndarray | None) -> "Residualizer":
        """What the engine needs for its columns: ``Q`` and ``M = X̃ᵀQ = D·N``."""
        return Residualizer(self.basis, inverse_scale[:, None] * self.unscaled_loadings(columns))

    def adjusted_sketch(self, sketch: np.ndarray, omega: np.ndarray) -> np.ndarray:
        """``(X−1μᵀ)ᵀ·P·(X−1μᵀ)·Ω`` from the unadjusted sketch of the statistics pass (all columns)."""
        N = self.unscaled_loadings(None)
        return sketch - N @ (N.T @ omega)

    def coefficients(self, M: np.ndarray) -> np.ndarray:
        """``Γ = M·R⁻ᵀ`` (p × c): fitted value of each feature of ``X̃`` is ``Γ·c`` for covariates ``c``."""
        return scipy.linalg.solve_triangular(self.triangle, M.T, check_finite=False).T


@dataclass
class Residualizer:
    """``P = I − Q·Qᵀ`` applied to the products of the engine's passes (see the module notes).

    Attributes
    ----------
    basis : ndarray, shape (n, c)
        ``Q``.
    loadings : ndarray, shape (p, c)
        ``M = X̃ᵀQ`` for the engine's columns.
    """

    basis: np.ndarray
    loadings: np.ndarray

    def extra_columns(self) -> np.ndarray:
        """Columns appended to ``W`` in a pass that takes row norms: ``X̃·M`` follows."""
        return self.loadings

    def finish(self, Y: np.ndarray, Z: np.ndarray | None, norms: np.ndarray | None, width: int,
               gram: int) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        """``P·Y``, ``X̃ᵀ·P·Y`` and ``‖(P·X̃)_i‖²`` from the unadjusted products of one pass.

        ``Y`` holds ``width`` requested columns (followed by ``X̃·M`` when ``norms`` is given);
        ``Z = X̃ᵀ·Y[:, :gram]``.
        """
        Q, M = self.basis, self.loadings
        if norms is not None:
            XM = Y[:, width:]
            norms = norms - 2.0 * np.einsum("ij,ij->i", Q, XM) + np.einsum("ij,ij->i", Q @ (M.T @ M), Q)
            norms = np.maximum(norms, 0.0)
        Y = Y[:, :width]
        QtY = Q.T @ Y
        if Z is not None:
            Z = Z - M @ QtY[:, :gram]
        return Y - Q @ QtY, Z, norms

    def dense(self, dense: np.ndarray) -> None:
        """``P·X̃`` in place, for the exact path."""
        dense -= self.basis @ (self.basis.T @ dense)

    def removed_inertia(self, n: int) -> float:
        """``‖Q·Qᵀ·X̃‖²_F / n``: the variance the covariates account for."""
        return float(np.sum(self.loadings**2)) / n
