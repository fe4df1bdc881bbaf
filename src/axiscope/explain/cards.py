"""Axis cards: what each principal axis carries, is built from, lines up with, and where samples sit on it.

For every axis, one card answers five questions:

1. **How much it carries**: variance, variance ratio and cumulative ratio, and a slot for
   whether the axis stands above the noise level (``above_noise``: from the fit's ``signal_axes``
   decision, null when the fit did not assess it).
2. **What it is built from**: the features with the largest positive and negative
   loadings, with their correlation with the scores, contribution (percent), squared
   cosine and Benjamini–Hochberg adjusted p-values (supplementary features too).
3. **What it lines up with**: every sample annotation, numeric or categorical, in one
   ranking by R² (:mod:`axiscope.explain.associations`), and for categorical ones which
   categories sit above or below the mean score.
4. **Which samples sit at its ends**, and **which samples it represents poorly** (smallest
   squared cosine), supplementary samples included.
5. **A one-line reading**, and a warning when a technical annotation explains more of the
   axis than any other annotation, the usual sign of a batch effect. The wording states
   associations, never causes.

The cards are one record set (:meth:`AxisCards.records`, written as ``axis_cards.tsv`` and
``axis_cards.json``) plus one Markdown page per axis (``axis_cards/PC1.md`` ...), all
carrying the meaning of each column (:mod:`axiscope.explain.legend`).

Entry point: :func:`explain_axes`, on a :class:`axiscope.fitting.FitResult` or on a result
directory written by ``axiscope fit`` (no refit).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..defaults import DEFAULT_TOP_FEATURES, SAMPLES_PER_LIST
from ..errors import OptionError
from ..io.output import write_table
from ..model.statistics import (
    FeatureAxisStatistics,
    feature_statistics,
    sample_statistics,
)
from .annotations import AnnotationSet, load_annotations
from .associations import annotation_shares
from .legend import (
    CARDS_FORMAT,
    CARDS_VERSION,
    COLUMNS,
    RECORD_COLUMNS,
    SECTIONS,
    header_lines,
)
from .pages import render_page
from .saved import SUPPLEMENTARY_SCORES_FILE, SupplementarySamples, read_manifest, read_saved_fit

if TYPE_CHECKING:
    from ..fitting.result import FitResult

__all__ = ["AxisCards", "SupplementarySamples", "explain_axes", "build_cards", "ALPHA", "WARN_SHARE",
           "SAMPLES_PER_LIST", "CARDS_FILE", "PAGES_FOLDER"]

logger = logging.getLogger(__name__)

#: Level of the adjusted p-values for the reading, the warning and the categories shown (common practice, no source).
ALPHA = 0.05
#: Smallest R² of a technical annotation that raises the batch warning (common practice, no source).
WARN_SHARE = 0.1
#: Stem of the record set's files (``.tsv`` and ``.json``).
CARDS_FILE = "axis_cards"
#: Folder of the per-axis pages.
PAGES_FOLDER = "axis_cards"
#: The per-sample and per-feature tables written beside the cards.
SAMPLE_TABLE = "sample_statistics.tsv"

_FEATURE_COLUMNS = ["axis", "side", "rank", "feature_id", "supplementary", "loading", "correlation",
                    "contribution_pct", "sq_cosine", "p_value", "p_adjusted"]
_END_COLUMNS = ["axis", "side", "rank", "sample_id", "supplementary", "score", "sq_cosine", "contribution_pct"]


@dataclass
class AxisCards:
    """The axis cards of a fit: every section as a DataFrame, the pages, and the warnings.

    Attributes
    ----------
    carries : DataFrame
        One row per axis: ``variance``, ``variance_ratio``, ``cumulative_ratio`` and
        ``above_noise`` (from the manifest's ``signal_axes``; null: not assessed).
    readings : DataFrame
        One row per axis: ``reading`` (one line) and ``warning`` ("" when none).
    built_from : DataFrame
        Features with the largest loadings per axis and side.
    lines_up : DataFrame
        R² of every annotation on every axis (see :func:`axiscope.explain.associations.annotation_shares`).
    categories : DataFrame
        Mean score, size and z-score of every category of the categorical annotations.
    ends, off_axis : DataFrame
        Samples at the ends of each axis, and those it represents poorly.
    annotation_use : DataFrame
        How each annotation column was treated (see :class:`axiscope.explain.annotations.AnnotationSet`).
    sample_statistics : DataFrame
        Every sample (supplementary ones too): squared norm, squared cosines, contributions (percent).
    feature_statistics : FeatureAxisStatistics
        Every feature (supplementary ones too).
    supplementary_scores : DataFrame or None
        Scores and squared norms of the supplementary samples.
    settings : dict
        The options the cards were built with.
    pages : dict of str to str
        Markdown page of each axis.
    warnings : list of str
    """

    carries: pd.DataFrame
    readings: pd.DataFrame
    built_from: pd.DataFrame
    lines_up: pd.DataFrame
    categories: pd.DataFrame
    ends: pd.DataFrame
    off_axis: pd.DataFrame
    annotation_use: pd.DataFrame
    sample_statistics: pd.DataFrame
    feature_statistics: FeatureAxisStatistics
    supplementary_scores: pd.DataFrame | None = None
    settings: dict = field(default_factory=dict)
    pages: dict[str, str] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    @property
    def axis_names(self) -> list[str]:
        return list(self.carries["axis"])

    def reading(self, axis: str) -> str:
        """The one-line reading of ``axis``."""
        return str(self.readings.set_index("axis").loc[axis, "reading"])

    def records(self) -> pd.DataFrame:
        """Every section in one long table, columns :data:`axiscope.explain.legend.RECORD_COLUMNS`.

        Rows come axis by axis in the order of the sections
        (:data:`axiscope.explain.legend.SECTIONS`), then the ``annotation_use`` rows.
        """
        parts = {
            "carries": self.carries,
            "reading": self.readings.rename(columns={"reading": "text"})[["axis", "text"]],
            "warning": self._warning_rows(),
            "built_from": self.built_from,
            "lines_up": self.lines_up,
            "category": self.categories.assign(side=_side(self.categories["z"].to_numpy(dtype=np.float64))),
            "end": self.ends,
            "off_axis": self.off_axis,
        }
        order = {a: i for i, a in enumerate(self.axis_names)}
        frames = [frame.assign(section=name, _section=i) for i, (name, frame) in enumerate(parts.items()) if len(frame)]
        per_axis = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=["axis", "_section"])
        per_axis = per_axis.assign(_axis=per_axis["axis"].map(order)).sort_values(
            ["_axis", "_section"], kind="stable")
        use = self.annotation_use.rename(columns={"n_used": "n", "note": "text"}).assign(section="annotation_use")
        table = pd.concat([per_axis, use], ignore_index=True) if len(use) else per_axis
        table = table.reindex(columns=RECORD_COLUMNS)
        return _tidy(table)

    def _warning_rows(self) -> pd.DataFrame:
        rows = self.readings[self.readings["warning"] != ""]
        return pd.DataFrame({"axis": rows["axis"], "text": rows["warning"],
                             "annotation": rows["warning_annotation"], "r_squared": rows["warning_r_squared"],
                             "technical": True})

    def to_json(self) -> dict:
        """The record set as a JSON-ready dict: layout name and version, the meaning of every
        section and column, the settings, and the records (same keys as the TSV columns,
        ``None`` where empty)."""
        records = self.records()
        plain = records.astype(object).where(records.notna(), None)
        return {
            "format": CARDS_FORMAT,
            "version": CARDS_VERSION,
            "note": "Associations only: these statistics do not show what causes an axis.",
            "sections": SECTIONS,
            "columns": COLUMNS,
            "settings": self.settings,
            "axes": self.axis_names,
            "records": plain.to_dict(orient="records"),
        }

    def write(self, directory: Path, *, parquet: bool = False, features: bool = True) -> None:
        """Write the cards, the pages and the per-sample/per-feature tables into ``directory``.

        Files: ``axis_cards.tsv`` (``#`` lines explain every column), ``axis_cards.json``,
        ``axis_cards/<axis>.md``, ``sample_statistics.tsv``, ``feature_statistics.tsv`` (or
        ``.zarr`` for very many features; left out with ``features=False``) and, with
        supplementary samples, ``supplementary_sample_scores.tsv``. With ``parquet`` every
        table also gets a ``.parquet`` copy.
        """
        from ..io.output import write_json

        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        records = self.records()
        write_table(records, directory / f"{CARDS_FILE}.tsv", parquet=parquet, header=header_lines())
        json_path = directory / f"{CARDS_FILE}.json"
        write_json(self.to_json(), json_path)
        _make_html_safe(json_path)
        pages = directory / PAGES_FOLDER
        pages.mkdir(exist_ok=True)
        for axis, text in self.pages.items():
            (pages / f"{axis}.md").write_text(text, encoding="utf-8")
        write_table(self.sample_statistics, directory / SAMPLE_TABLE, parquet=parquet)
        if self.supplementary_scores is not None:
            write_table(self.supplementary_scores, directory / SUPPLEMENTARY_SCORES_FILE, parquet=parquet)
        if features:
            self.feature_statistics.write(directory, parquet=parquet)


def _side(values: np.ndarray) -> np.ndarray:
    """"positive" / "negative" by sign; None where the value is missing or zero."""
    return np.where(values > 0, "positive", np.where(values < 0, "negative", None)).astype(object)


def _tidy(table: pd.DataFrame) -> pd.DataFrame:
    """Whole numbers as nullable integers and flags as nullable booleans, so that the TSV shows
    ``3`` rather than ``3.0`` and ``True`` rather than ``1.0``."""
    table = table.copy()
    for column in ("rank", "n", "n_missing", "n_categories", "df_between", "df_within"):
        table[column] = pd.to_numeric(table[column], errors="coerce").round().astype("Int64")
    for column in ("supplementary", "technical", "used", "above_noise", "stable"):
        table[column] = table[column].astype("boolean")
    for column in ("variance", "variance_ratio", "cumulative_ratio", "stability", "loading", "correlation",
                   "contribution_pct", "sq_cosine", "score", "r_squared", "f_statistic", "category_mean",
                   "overall_mean", "z", "p_value", "p_adjusted"):
        table[column] = pd.to_numeric(table[column], errors="coerce").astype(np.float64)
    for column in ("axis", "section", "side", "feature_id", "sample_id", "annotation", "category", "treated_as",
                   "text"):
        table[column] = table[column].astype(object).where(table[column].notna(), None)
    return table.reset_index(drop=True)


def _make_html_safe(path: Path) -> None:
    """Escape ``<``, ``>`` and ``&`` inside the JSON strings (still the same JSON), so that the
    file can be embedded in an HTML ``<script>`` element as it is."""
    text = path.read_text(encoding="utf-8")
    text = text.replace("&", "\\u0026").replace("<", "\\u003c").replace(">", "\\u003e")
    path.write_text(text, encoding="utf-8")


# --------------------------------------------------------------------------- entry points


def _recorded_source(source: str) -> str:
    """Where the annotations came from, as recorded: an absolute path when they were a file
    (so that a later command finds them from any folder), else the description given."""
    path = Path(source)
    return str(path.resolve()) if path.is_file() else source


def explain_axes(
    source: "FitResult | str | Path",
    *,
    annotations: str | Path | pd.DataFrame | AnnotationSet | None = None,
    id_column: str = "sample_id",
    categorical: Iterable[str] | str | None = None,
    numeric: Iterable[str] | str | None = None,
    technical: Iterable[str] | str | None = None,
    ignore: Iterable[str] | str | None = None,
    allow_missing: bool = False,
    supplementary_features: FeatureAxisStatistics | None = None,
    supplementary_samples: SupplementarySamples | None = None,
    top: int = DEFAULT_TOP_FEATURES,
    samples_per_list: int = SAMPLES_PER_LIST,
    alpha: float = ALPHA,
    warn_share: float = WARN_SHARE,
) -> AxisCards:
    """Axis cards of a fit, optionally against sample annotations.

    Parameters
    ----------
    source : FitResult or path
        A fit, or a directory written by ``axiscope fit`` (read without refitting: the
        ``model/`` folder, ``sample_scores.tsv``, ``manifest.json``, and if present
        ``feature_statistics.tsv``/``.zarr`` and ``supplementary_sample_scores.tsv``).
    annotations : path, DataFrame or AnnotationSet, optional
        Sample annotations, matched by ``id_column``. They must cover the samples that built
        the axes and the supplementary samples; how each column is treated is decided on
        the former (see :func:`axiscope.explain.annotations.load_annotations`).
    id_column, categorical, numeric, technical, ignore, allow_missing
        See :func:`axiscope.explain.annotations.load_annotations`.
    supplementary_features : FeatureAxisStatistics, optional
        From :func:`axiscope.explain.supplementary.supplementary_feature_statistics`.
    supplementary_samples : SupplementarySamples, optional
    top : int, default=DEFAULT_TOP_FEATURES
        Features listed per side of each axis.
    samples_per_list : int, default=10
        Samples listed at each end and among those represented poorly.
    alpha : float, default=0.05
        Level of the adjusted p-values used by the reading, the warning and the pages.
    warn_share : float, default=0.1
        Smallest R² of a technical annotation that raises the batch warning.

    Returns
    -------
    AxisCards
    """
    _check_settings(top, samples_per_list, alpha, warn_share)
    if isinstance(source, (str, Path)):
        saved = read_saved_fit(Path(source))
        manifest = read_manifest(Path(source))
        stability = manifest.get("stability")
        model, ids, scores, norms, feats = saved.model, saved.sample_ids, saved.scores, saved.squared_norms, saved.features
        signal = signal_axes_recommended(manifest)
        if supplementary_samples is None:
            supplementary_samples = saved.supplementary
    else:
        model, ids, scores, norms = source.model, source.sample_ids, source.scores, source.sample_sq_dist
        feats = feature_statistics(model)
        signal = signal_axes_recommended(source.manifest)
        stability = source.manifest.get("stability")
    if supplementary_features is not None:
        feats = feats.concat(supplementary_features)
    ann = None
    if isinstance(annotations, AnnotationSet):
        ann = annotations.take(ids)
    elif annotations is not None:
        all_ids = np.asarray(ids, dtype=object)
        if supplementary_samples is not None:
            all_ids = np.concatenate([all_ids, np.asarray(supplementary_samples.sample_ids, dtype=object)])
        active = np.arange(all_ids.shape[0]) < len(ids)
        ann = load_annotations(annotations, all_ids, id_column=id_column, categorical=categorical, numeric=numeric,
                               technical=technical, ignore=ignore, allow_missing=allow_missing, active=active)
    return build_cards(
        axis_names=model.axis_names, singular_values=model.singular_values, variance=model.variance,
        variance_ratio=model.variance_ratio, sample_ids=np.asarray(ids, dtype=object), scores=scores,
        squared_norms=norms, features=feats, annotations=ann, supplementary_samples=supplementary_samples,
        signal_axes=signal, top=top, samples_per_list=samples_per_list, alpha=alpha, warn_share=warn_share, stability=stability,
    )


def _check_settings(top: int, samples_per_list: int, alpha: float, warn_share: float) -> None:
    if int(top) < 1:
        raise OptionError(f"top={top} lists no feature; choose at least 1")
    if int(samples_per_list) < 1:
        raise OptionError(f"samples_per_list={samples_per_list} lists no sample; choose at least 1")
    if not 0.0 < float(alpha) < 1.0:
        raise OptionError(f"alpha={alpha} is not a level between 0 and 1; choose e.g. 0.05")
    if not 0.0 <= float(warn_share) <= 1.0:
        raise OptionError(f"warn_share={warn_share} is not a share between 0 and 1; choose e.g. 0.1")


def build_cards(
    *,
    axis_names: Sequence[str],
    singular_values: np.ndarray,
    variance: np.ndarray,
    variance_ratio: np.ndarray,
    sample_ids: np.ndarray,
    scores: np.ndarray,
    squared_norms: np.ndarray,
    features: FeatureAxisStatistics,
    annotations: AnnotationSet | None = None,
    supplementary_samples: SupplementarySamples | None = None,
    signal_axes: int | None = None,
    top: int = DEFAULT_TOP_FEATURES,
    samples_per_list: int = SAMPLES_PER_LIST,
    alpha: float = ALPHA,
    warn_share: float = WARN_SHARE,
    stability: dict | None = None,
) -> AxisCards:
    """Build :class:`AxisCards` from arrays (``scores``: the samples that built the axes).

    ``signal_axes``: the number of leading axes above the noise level (the ``recommended``
    member of the manifest's ``signal_axes`` record); None leaves ``above_noise`` null.
    ``stability`` is the fit manifest's ``"stability"`` record (split-half stability of each
    axis, :mod:`axiscope.decide.stability`), shown in the ``carries`` section when given.
    """
    axis_names = list(axis_names)
    F = np.asarray(scores, dtype=np.float64)
    samples = sample_statistics(sample_ids, F, squared_norms, axis_names, singular_values=singular_values)
    all_ids, all_scores, sup_scores = np.asarray(sample_ids, dtype=object), F, None
    if supplementary_samples is not None and len(supplementary_samples.sample_ids):
        sup = supplementary_samples
        samples = pd.concat([samples, sample_statistics(sup.sample_ids, sup.scores, sup.squared_norms, axis_names,
                                                        supplementary=True)], ignore_index=True)
        all_ids = np.concatenate([all_ids, np.asarray(sup.sample_ids, dtype=object)])
        all_scores = np.vstack([F, np.asarray(sup.scores, dtype=np.float64)])
        sup_scores = pd.DataFrame(np.asarray(sup.scores, dtype=np.float64), columns=axis_names)
        sup_scores.insert(0, "squared_norm", np.asarray(sup.squared_norms, dtype=np.float64))
        sup_scores.insert(0, "sample_id", np.asarray(sup.sample_ids, dtype=object))

    annotated = annotations is not None
    ann = annotations if annotated else AnnotationSet.empty(sample_ids)
    shares, categories = annotation_shares(ann, F, axis_names)
    cards = AxisCards(
        carries=_carries(axis_names, variance, variance_ratio, signal_axes, stability),
        readings=pd.DataFrame(),
        built_from=_built_from(features, top),
        lines_up=shares,
        categories=categories,
        ends=_ends(all_ids, all_scores, samples, axis_names, samples_per_list),
        off_axis=_off_axis(all_ids, all_scores, samples, axis_names, samples_per_list),
        annotation_use=ann.usage.copy(),
        sample_statistics=samples,
        feature_statistics=features,
        supplementary_scores=sup_scores,
        settings={"top": int(top), "samples_per_list": int(samples_per_list), "alpha": float(alpha),
                  "warn_share": float(warn_share), "annotations": _recorded_source(ann.source) if annotated else None,
                  "technical": list(ann.technical)},
    )
    cards.readings = _readings(cards, alpha, warn_share, annotated)
    cards.warnings = [w for w in cards.readings["warning"] if w]
    for warning in cards.warnings:
        logger.warning("%s", warning)
    records = cards.records()
    usage = records[records["section"] == "annotation_use"]
    cards.pages = {axis: render_page(axis, records[records["axis"] == axis], usage, annotated=annotated, alpha=alpha)
                   for axis in axis_names}
    return cards


# --------------------------------------------------------------------------- sections


def signal_axes_recommended(manifest: dict | None) -> int | None:
    """The ``recommended`` number of a manifest's ``signal_axes`` record (``axiscope.decide.signal``),
    or None when the fit did not assess it."""
    record = (manifest or {}).get("signal_axes")
    value = record.get("recommended") if isinstance(record, dict) else None
    return int(value) if isinstance(value, (int, np.integer)) and not isinstance(value, bool) else None


def _carries(axis_names: list[str], variance: np.ndarray, variance_ratio: np.ndarray,
             signal_axes: int | None = None, stability: dict | None = None) -> pd.DataFrame:
    ratio = np.asarray(variance_ratio, dtype=np.float64)
    above = [None] * len(axis_names) if signal_axes is None else [j < signal_axes for j in range(len(axis_names))]
    known = {a["axis"]: a for a in (stability or {}).get("axes", [])}
    return pd.DataFrame({"axis": axis_names, "variance": np.asarray(variance, dtype=np.float64),
                         "variance_ratio": ratio, "cumulative_ratio": np.cumsum(ratio),
                         "above_noise": pd.array(above, dtype="boolean"),
                         "stability": [known[a]["stability"] if a in known else np.nan for a in axis_names],
                         "stable": pd.array([known[a]["stable"] if a in known else None for a in axis_names],
                                            dtype="boolean")})


def _largest(values: np.ndarray, m: int, sign: float) -> np.ndarray:
    """Indices of the ``m`` largest ``sign·values`` that are > 0, largest first (O(p) selection)."""
    finite = np.flatnonzero(np.isfinite(values) & (sign * values > 0))
    m = min(m, finite.size)
    if m == 0:
        return finite
    key = -sign * values[finite]
    part = finite[np.argpartition(key, m - 1)[:m]] if m < finite.size else finite
    return part[np.argsort(-sign * values[part], kind="stable")]


def _built_from(stats: FeatureAxisStatistics, top: int) -> pd.DataFrame:
    """The ``top`` features with the largest positive and the largest negative loadings per axis."""
    p_raw = stats.p_values()
    p_adj = stats.adjusted_p_values(p_raw)
    frames = []
    for j, axis in enumerate(stats.axis_names):
        for side, sign in (("positive", 1.0), ("negative", -1.0)):
            idx = _largest(stats.loading[:, j], top, sign)
            frames.append(pd.DataFrame({
                "axis": axis, "side": side, "rank": np.arange(1, idx.size + 1),
                "feature_id": np.asarray(stats.feature_ids, dtype=object)[idx],
                "supplementary": np.asarray(stats.supplementary, dtype=bool)[idx],
                "loading": stats.loading[idx, j], "correlation": stats.correlation[idx, j],
                "contribution_pct": stats.contribution[idx, j], "sq_cosine": stats.sq_cosine[idx, j],
                "p_value": p_raw[idx, j], "p_adjusted": p_adj[idx, j],
            }, columns=_FEATURE_COLUMNS))
    frames = [f for f in frames if len(f)]
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=_FEATURE_COLUMNS)


def _sample_column(samples: pd.DataFrame, prefix: str, axis: str) -> np.ndarray:
    return samples[f"{prefix}_{axis}"].to_numpy(dtype=np.float64)


def _ends(ids, scores, samples: pd.DataFrame, axis_names, m: int) -> pd.DataFrame:
    """The ``m`` samples with the highest and the ``m`` with the lowest scores on each axis."""
    supplementary = samples["supplementary"].to_numpy(dtype=bool)
    frames = []
    for j, axis in enumerate(axis_names):
        order = np.argsort(scores[:, j], kind="stable")
        for side, idx in (("positive", order[::-1][:m]), ("negative", order[:m])):
            frames.append(pd.DataFrame({
                "axis": axis, "side": side, "rank": np.arange(1, idx.size + 1), "sample_id": ids[idx],
                "supplementary": supplementary[idx], "score": scores[idx, j],
                "sq_cosine": _sample_column(samples, "sq_cosine", axis)[idx],
                "contribution_pct": _sample_column(samples, "contribution_pct", axis)[idx],
            }, columns=_END_COLUMNS))
    return pd.concat(frames, ignore_index=True)


def _off_axis(ids, scores, samples: pd.DataFrame, axis_names, m: int) -> pd.DataFrame:
    """The ``m`` samples with the smallest squared cosine on each axis (unknown cosines left out)."""
    supplementary = samples["supplementary"].to_numpy(dtype=bool)
    frames = []
    for j, axis in enumerate(axis_names):
        cos = _sample_column(samples, "sq_cosine", axis)
        known = np.flatnonzero(np.isfinite(cos))
        idx = known[np.argsort(cos[known], kind="stable")][:m]
        frames.append(pd.DataFrame({
            "axis": axis, "rank": np.arange(1, idx.size + 1), "sample_id": ids[idx],
            "supplementary": supplementary[idx], "score": scores[idx, j], "sq_cosine": cos[idx],
        }))
    return pd.concat(frames, ignore_index=True)


# --------------------------------------------------------------------------- reading and warning


def _strongest(shares: pd.DataFrame, alpha: float) -> pd.Series | None:
    """The annotation explaining the largest share of the axis among those with adjusted p < alpha."""
    significant = shares[shares["p_adjusted"] < alpha]
    if not len(significant):
        return None
    return significant.loc[significant["r_squared"].astype(np.float64).idxmax()]


def _warning(axis: str, strongest: pd.Series | None, warn_share: float) -> str:
    if strongest is None or not bool(strongest["technical"]) or not strongest["r_squared"] >= warn_share:
        return ""
    return (f"{axis} lines up more with the technical annotation {strongest['annotation']!r} "
            f"(R² = {strongest['r_squared']:.2f}) than with any other annotation; this is the usual sign of a "
            f"batch effect: check how the samples were processed before reading biology into {axis}")


def _association_phrase(strongest: pd.Series | None, categories: pd.DataFrame, alpha: float,
                        warn_share: float, technical_warning: bool) -> str:
    """The middle of the reading: which annotation the axis lines up with, and how."""
    if strongest is None:
        return "lines up with none of the annotations tested"
    name, r2 = strongest["annotation"], float(strongest["r_squared"])
    if r2 < warn_share:
        return f"lines up only weakly with any annotation (largest: {name}, R² = {r2:.2f})"
    if strongest["treated_as"] == "numeric":
        trend = "rise" if strongest["correlation"] > 0 else "fall"
        how = f"scores {trend} with {name}"
    else:
        cats = categories[(categories["annotation"] == name) & (categories["p_adjusted"] < alpha)]
        high = cats[cats["z"] > 0].sort_values("z", ascending=False)["category"].tolist()
        low = cats[cats["z"] < 0].sort_values("z")["category"].tolist()
        parts = ([f"{high[0]} high"] if high else []) + ([f"{low[0]} low"] if low else [])
        how = ", ".join(parts) if parts else "no single category stands out"
    tail = ", a technical annotation" if technical_warning else ""
    return f"lines up with {name} (R² = {r2:.2f}; {how}){tail}"


def _loadings_phrase(built_from: pd.DataFrame, n: int = 3) -> str:
    pos = built_from[built_from["side"] == "positive"]["feature_id"].astype(str).tolist()[:n]
    neg = built_from[built_from["side"] == "negative"]["feature_id"].astype(str).tolist()[:n]
    parts = ([f"+ {', '.join(pos)}"] if pos else []) + ([f"− {', '.join(neg)}"] if neg else [])
    return "largest loadings " + "; ".join(parts) if parts else "no feature loads on it"


def _stability_phrase(carries: pd.DataFrame) -> str:
    """`` Unstable: …`` when the split-half stability of the axis is known and below its threshold."""
    if not len(carries) or "stable" not in carries or pd.isna(carries["stable"].iloc[0]) \
            or bool(carries["stable"].iloc[0]):
        return ""
    return (f" Unstable: two random halves of the samples give different versions of it (split-half "
            f"stability {float(carries['stability'].iloc[0]):.2f}); do not read it on its own.")


def _readings(cards: AxisCards, alpha: float, warn_share: float, annotated: bool) -> pd.DataFrame:
    rows = []
    for axis, ratio in zip(cards.carries["axis"], cards.carries["variance_ratio"]):
        shares = cards.lines_up[cards.lines_up["axis"] == axis]
        strongest = _strongest(shares, alpha) if annotated else None
        warning = _warning(axis, strongest, warn_share)
        text = f"{axis} carries {100 * ratio:.1f}% of the variance"
        if annotated:
            phrase = _association_phrase(strongest, cards.categories[cards.categories["axis"] == axis], alpha,
                                         warn_share, bool(warning))
            text += f" and {phrase}"
        text += f"; {_loadings_phrase(cards.built_from[cards.built_from['axis'] == axis])}."
        text += _stability_phrase(cards.carries[cards.carries["axis"] == axis])
        rows.append({"axis": axis, "reading": text, "warning": warning,
                     "warning_annotation": strongest["annotation"] if warning else None,
                     "warning_r_squared": float(strongest["r_squared"]) if warning else np.nan})
    return pd.DataFrame(rows, columns=["axis", "reading", "warning", "warning_annotation", "warning_r_squared"])
