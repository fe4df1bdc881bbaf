"""Static figures of a fit (and of a scoring run), drawn from the tables the library wrote.

Every figure renders records that already exist in a result directory; none recomputes a
statistic. The readers (:func:`read_fit_records`, :func:`read_score_records`) collect those
tables; the figure functions take them (or plain arrays) and return a
:class:`matplotlib.figure.Figure`; :func:`write_figures` writes them all as PNG (150 dpi)
and SVG.

Files written by :func:`write_figures` (``<a>``, ``<b>``: axis names such as ``PC1``):

====================================  ===========================================================
``variance.{png,svg}``                 variance share per axis (bars) and cumulative share (line)
``samples_<a>_<b>.{png,svg}``          samples on a pair of axes, coloured by an annotation
``quality_<a>_<b>.{png,svg}``          the same map shaded by the squared cosine on the pair
``features_<a>_<b>.{png,svg}``         correlations (standardized PCA) or loadings on the pair
``contributions_<a>.{png,svg}``        top feature and sample contributions to each axis drawn
``diagnostics.{png,svg}``              new samples' T² against Q with both control limits
====================================  ===========================================================

matplotlib is imported inside the functions (Agg canvas, no pyplot), so importing this
module stays light.
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..errors import InputError, OptionError
from ..explain.annotations import load_annotations, read_annotations
from ..explain.saved import cards_folder
from ..io.output import read_result_table
from ..model.statistics import FeatureAxisStatistics, read_feature_statistics
from ..model.store import stored_checksum
from . import style

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = [
    "FitRecords", "ScoreRecords", "Colouring", "read_fit_records", "read_score_records", "annotation_colours",
    "centre_ellipse", "variance_figure", "sample_map", "quality_map", "feature_map", "contributions_figure",
    "diagnostics_figure", "write_figures", "DEFAULT_PAIRS", "DENSITY_ABOVE", "EXTREME_POINTS", "FIGURE_FORMATS",
]

logger = logging.getLogger(__name__)

#: Axis pairs drawn by default (1-based axis numbers).
DEFAULT_PAIRS = ((1, 2), (1, 3), (2, 3))
#: Above this many samples a map draws their density and only the extreme points on top,
#: so that it stays readable and small (common practice, no source).
DENSITY_ABOVE = 5000
#: Points drawn on top of the density: the samples farthest from the centre of the map.
EXTREME_POINTS = 1000
#: Output formats :func:`write_figures` knows.
FIGURE_FORMATS = ("png", "svg")
#: Confidence of the ellipse drawn around each category's centre.
ELLIPSE_LEVEL = 0.95
#: Categories with fewer samples get a centre but no ellipse (a covariance needs three).
ELLIPSE_MIN_SAMPLES = 3
#: Features labelled on a feature map, contributions listed per axis, flagged samples named.
TOP_FEATURES = 8
TOP_CONTRIBUTIONS = 15
NAMED_FLAGGED = 20
#: The diagnostics figure turns a scale logarithmic when a value exceeds its limit this many times.
LOG_SCALE_BEYOND = 20.0


# =============================================================================== records


@dataclass
class FitRecords:
    """The tables of a fit's result directory that the figures draw.

    Attributes
    ----------
    directory : Path
    components : DataFrame
        ``components.tsv``: ``axis``, ``variance``, ``variance_ratio``, ``cumulative_ratio``.
    scores : DataFrame
        ``sample_scores.tsv``: ``sample_id`` and one column per axis (samples that built the axes).
    axis_names : list of str
    standardized : bool
        Centred and scaled to unit variance: the feature map is a correlation circle.
    model_checksum : str or None
        SHA-256 of ``model/model.json`` (what a scoring run records of its model).
    supplementary_scores : DataFrame or None
        ``supplementary_sample_scores.tsv``.
    sample_statistics : DataFrame or None
        ``sample_statistics.tsv``: squared cosines and contributions of every sample.
    features : FeatureAxisStatistics or None
        ``feature_statistics.tsv`` (or ``.zarr``): loadings, correlations, contributions.
    loadings : DataFrame or None
        ``feature_loadings.tsv``, read only when the feature statistics are absent.
    cards : list of dict or None
        The records of ``axis_cards.json``.
    """

    directory: Path
    components: pd.DataFrame
    scores: pd.DataFrame
    axis_names: list[str]
    standardized: bool
    model_checksum: str | None
    supplementary_scores: pd.DataFrame | None
    sample_statistics: pd.DataFrame | None
    features: FeatureAxisStatistics | None
    loadings: pd.DataFrame | None
    cards: list[dict] | None

    @property
    def variance_ratio(self) -> dict[str, float]:
        return dict(zip(self.components["axis"], self.components["variance_ratio"]))


@dataclass
class ScoreRecords:
    """The tables of a scoring run: ``scores.tsv`` and ``diagnostics.tsv``."""

    directory: Path
    scores: pd.DataFrame
    diagnostics: pd.DataFrame
    model_checksum: str | None

    @property
    def flagged_ids(self) -> np.ndarray:
        """Samples flagged by the diagnostics (any flag other than ``within``)."""
        d = self.diagnostics
        return d["sample_id"].to_numpy(dtype=object)[(d["flag"] != "within").to_numpy()]


def _find(directory: Path, name: str) -> Path | None:
    """``name`` among the axis cards' tables (:func:`axiscope.explain.saved.cards_folder`: the
    cards of a later ``axiscope explain`` first), or else in ``directory``; None if absent."""
    for place in (cards_folder(directory), directory):
        if (place / name).exists():
            return place / name
    return None


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{path}: unreadable ({exc.__class__.__name__}); restore it or rerun the command "
                         "that wrote it") from exc


def read_fit_records(result_dir: str | Path) -> FitRecords:
    """Read the tables of a directory written by ``axiscope fit`` (or the demo's ``fit/``).

    The explanation's tables (``sample_statistics.tsv``, ``feature_statistics.tsv``,
    ``axis_cards.json``, ``supplementary_sample_scores.tsv``) are looked for in the result
    directory and in its ``explanation/`` folder; missing ones are None.

    Raises
    ------
    InputError
        The directory is not a fit result, or a table is damaged.
    """
    directory = Path(result_dir)
    for required in ("components.tsv", "sample_scores.tsv"):
        if not (directory / required).is_file():
            raise InputError(f"{directory}: not an axiscope fit result ({required} is missing); "
                             "pass the output directory of 'axiscope fit'")
    components = read_result_table(directory / "components.tsv",
                                   required=["axis", "variance", "variance_ratio", "cumulative_ratio"],
                                   numeric=["variance", "variance_ratio", "cumulative_ratio"])
    axes = components["axis"].astype(str).tolist()
    components["axis"] = axes
    scores = read_result_table(directory / "sample_scores.tsv", required=["sample_id", *axes], numeric=axes)
    manifest = _read_json(directory / "manifest.json") if (directory / "manifest.json").is_file() else {}
    prep = (manifest.get("options") or {}).get("preprocessing") or {}
    if not prep and (directory / "model" / "model.json").is_file():
        prep = _read_json(directory / "model" / "model.json").get("preprocessing") or {}
    standardized = bool(prep.get("center", True)) and prep.get("scale") == "unit"
    supplementary = _optional_table(directory, "supplementary_sample_scores.tsv", axes, axes)
    sample_stats = _optional_table(directory, "sample_statistics.tsv",
                                   [f"sq_cosine_{a}" for a in axes] + [f"contribution_pct_{a}" for a in axes],
                                   [f"sq_cosine_{a}" for a in axes] + [f"contribution_pct_{a}" for a in axes],
                                   extra_required=["supplementary"])
    if sample_stats is not None:
        sample_stats["supplementary"] = sample_stats["supplementary"].astype(str).str.lower() == "true"
    features = None
    place = _find(directory, "feature_statistics.tsv") or _find(directory, "feature_statistics.zarr")
    if place is not None:
        features = read_feature_statistics(place.parent, n_samples=len(scores))
    loadings = None
    if features is None and (directory / "feature_loadings.tsv").is_file():
        loadings = read_result_table(directory / "feature_loadings.tsv", required=["feature_id", *axes], numeric=axes)
    cards = None
    cards_path = _find(directory, "axis_cards.json")
    if cards_path is not None:
        records = _read_json(cards_path).get("records")
        cards = records if isinstance(records, list) else None
    return FitRecords(directory, components, scores, axes, standardized, stored_checksum(directory / "model"),
                      supplementary, sample_stats, features, loadings, cards)


def _optional_table(directory: Path, name: str, required: list[str], numeric: list[str], *,
                    extra_required: Sequence[str] = ()) -> pd.DataFrame | None:
    path = _find(directory, name)
    if path is None:
        return None
    return read_result_table(path, required=["sample_id", *extra_required, *required], numeric=numeric)


def read_score_records(score_dir: str | Path, fit: FitRecords | None = None) -> ScoreRecords:
    """Read ``scores.tsv`` and ``diagnostics.tsv`` written by ``axiscope score``.

    With ``fit``, the scoring run must have used that fit's model (checked against the
    model checksum recorded in the run's manifest) and its axes.

    Raises
    ------
    InputError
        Files missing or damaged, or the run used another model.
    """
    directory = Path(score_dir)
    for required in ("scores.tsv", "diagnostics.tsv"):
        if not (directory / required).is_file():
            raise InputError(f"{directory}: not an axiscope scoring result ({required} is missing); "
                             "pass the output directory of 'axiscope score' as diagnostics_dir")
    manifest = _read_json(directory / "manifest.json") if (directory / "manifest.json").is_file() else {}
    checksum = (manifest.get("model") or {}).get("checksum")
    diagnostics = read_result_table(directory / "diagnostics.tsv",
                                    required=["sample_id", "t2", "q", "flag", "t2_limit", "q_limit"],
                                    numeric=["t2", "q", "t2_limit", "q_limit"])
    for column in ("t2_limit_95", "q_limit_95", "confidence"):
        if column in diagnostics.columns:
            diagnostics[column] = pd.to_numeric(diagnostics[column], errors="coerce")
    diagnostics["flag"] = diagnostics["flag"].astype(str)
    axes = fit.axis_names if fit is not None else None
    if axes is None:
        header = pd.read_csv(directory / "scores.tsv", sep="\t", nrows=0).columns
        axes = [c for c in header if c != "sample_id"]
    scores = read_result_table(directory / "scores.tsv", required=["sample_id", *axes], numeric=axes)
    if fit is not None and checksum and fit.model_checksum and checksum != fit.model_checksum:
        raise InputError(f"{directory}: these samples were scored against another model than the one in "
                         f"{fit.directory / 'model'}; pass the scoring run of this fit as diagnostics_dir")
    return ScoreRecords(directory, scores, diagnostics, checksum)


# =========================================================================== annotations


@dataclass
class Colouring:
    """One annotation column used to colour samples.

    Attributes
    ----------
    name : str
    kind : {"categorical", "numeric"}
    values : Series
        Indexed by sample id: category labels (object, None where missing) or floats (NaN).
    levels : list of str
        The categories in drawing order (empty for numeric columns).
    """

    name: str
    kind: str
    values: pd.Series
    levels: list[str]

    def of(self, sample_ids: Sequence[str]) -> np.ndarray:
        """The values of ``sample_ids`` (None or NaN for samples without one)."""
        values = self.values.reindex(pd.Index(np.asarray(sample_ids, dtype=object)))
        if self.kind == "numeric":
            return values.to_numpy(dtype=np.float64)
        return np.array([v if isinstance(v, str) else None for v in values], dtype=object)


def annotation_colours(annotations: str | Path | pd.DataFrame, *, id_column: str = "sample_id",
                       color_by: str | None = None, cards: list[dict] | None = None,
                       first_axis: str = "PC1") -> Colouring | None:
    """The annotation column that colours the sample maps, typed as the axis cards type it.

    The table is read with :func:`axiscope.explain.annotations.read_annotations` (a path) and
    treated with :func:`axiscope.explain.annotations.load_annotations`, so a column is numeric
    or categorical by the same rule as in the axis cards.

    Parameters
    ----------
    annotations : path or DataFrame
    id_column : str, default="sample_id"
    color_by : str, optional
        The column. By default, the annotation explaining most of ``first_axis`` according to
        the axis cards (``cards``), else the first usable column.
    cards : list of dict, optional
        Records of ``axis_cards.json``.
    first_axis : str, default="PC1"

    Returns
    -------
    Colouring or None
        None when no column can colour (every column constant, or an identifier).

    Raises
    ------
    OptionError
        ``color_by`` names no column, or a column that cannot colour.
    """
    where = "annotations" if isinstance(annotations, pd.DataFrame) else str(annotations)
    frame = read_annotations(annotations, id_column=id_column)  # a file or a table, as text by id
    columns, ids = list(frame.columns), [str(i) for i in frame.index]
    if color_by is not None and color_by not in columns:
        shown = ", ".join(repr(c) for c in columns[:15])
        raise OptionError(f"color_by={color_by!r}: no such column in {where} (columns: {shown}); check the spelling")
    candidates = [color_by] if color_by is not None else _ranked_columns(columns, cards, first_axis)
    for name in candidates:
        ann = load_annotations(frame, ids, id_column=id_column, ignore=[c for c in columns if c != name], where=where)
        if name in ann.categorical:
            values = pd.Series(ann.categorical[name], index=pd.Index(ann.sample_ids, dtype=object), dtype=object)
            return Colouring(name, "categorical", values, style.ordered_levels(values.dropna().unique()))
        if name in ann.numeric:
            values = pd.Series(ann.numeric[name], index=pd.Index(ann.sample_ids, dtype=object), dtype=np.float64)
            return Colouring(name, "numeric", values, [])
        if color_by is not None:
            note = ann.usage.loc[ann.usage["annotation"] == name, "note"]
            reason = note.iloc[0] if len(note) else "not usable"
            raise OptionError(f"color_by={color_by!r}: the column cannot colour the samples ({reason}); "
                              "choose another column")
    logger.warning("%s: no annotation column can colour the samples; the maps are drawn in one colour", where)
    return None


def _ranked_columns(columns: list[str], cards: list[dict] | None, axis: str) -> list[str]:
    """Columns by the share of ``axis`` they explain in the axis cards, then in file order."""
    share: dict[str, float] = {}
    for record in cards or []:
        if record.get("section") == "lines_up" and record.get("axis") == axis and record.get("annotation") in columns:
            r2 = record.get("r_squared")
            share[record["annotation"]] = float(r2) if isinstance(r2, (int, float)) else -1.0
    return sorted(columns, key=lambda c: (-share.get(c, -2.0), columns.index(c)))


# ============================================================================== geometry


def centre_ellipse(points: np.ndarray, level: float = ELLIPSE_LEVEL) -> tuple[np.ndarray, float, float, float]:
    """Confidence ellipse of the mean of 2-D points.

    Hotelling's confidence region of a mean vector,
    ``{μ : n·(x̄ − μ)ᵀ S⁻¹ (x̄ − μ) ≤ c²}`` with ``S`` the sample covariance (denominator
    n − 1) and ``c² = 2(n − 1)/(n − 2) · F_{2, n−2}(level)``, which covers the true mean with
    probability ``level`` for normal data of any size n ≥ 3 (Johnson & Wichern, *Applied
    Multivariate Statistical Analysis*, 6th ed., 2007, §5.2; the chi-square form of §5.5 is
    its large-sample limit and covers far less for small groups, 50% at n = 3): an ellipse
    centred on ``x̄`` whose semi-axes are ``sqrt(λ_i · c²)`` for the eigenvalues ``λ_i`` of
    ``S/n``, along their eigenvectors.

    Parameters
    ----------
    points : ndarray, shape (n, 2)
        n ≥ 3.
    level : float, default=0.95

    Returns
    -------
    centre : ndarray, shape (2,)
    width, height : float
        Full lengths of the axes along the first and second eigenvector (width ≥ height).
    angle : float
        Angle of the first eigenvector in degrees, counter-clockwise from the horizontal axis.
    """
    from scipy.stats import f

    points = np.asarray(points, dtype=np.float64)
    centre = points.mean(axis=0)
    cov = np.cov(points, rowvar=False) / points.shape[0]
    values, vectors = np.linalg.eigh(cov)
    values = np.clip(values[::-1], 0.0, None)
    first = vectors[:, -1]
    n = points.shape[0]
    q = 2.0 * (n - 1) / (n - 2) * f.ppf(level, 2, n - 2)
    width, height = 2.0 * np.sqrt(values * q)
    return centre, float(width), float(height), float(np.degrees(np.arctan2(first[1], first[0])))


def _extreme_rows(xy: np.ndarray, limit: int) -> np.ndarray:
    """Indices of the ``limit`` points farthest from the centre, each axis in units of its spread."""
    if xy.shape[0] <= limit:
        return np.arange(xy.shape[0])
    spread = xy.std(axis=0)
    spread[spread == 0] = 1.0
    distance = (((xy - xy.mean(axis=0)) / spread) ** 2).sum(axis=1)
    return np.sort(np.argpartition(distance, -limit)[-limit:])


def _repel_labels(fig: "Figure", texts: list, *, iterations: int = 200, pad: float = 2.0) -> None:
    """Move text labels apart until their boxes no longer overlap (or ``iterations`` run out).

    Each round measures every label's box on the canvas and pushes each overlapping pair
    apart along the direction of least overlap, half each way.
    """
    if len(texts) < 2:
        return
    renderer = fig.canvas.get_renderer()
    for _ in range(iterations):
        boxes = np.array([t.get_window_extent(renderer).extents for t in texts])  # x0, y0, x1, y1
        boxes[:, :2] -= pad
        boxes[:, 2:] += pad
        shift = np.zeros((len(texts), 2))
        for i in range(len(texts)):
            for j in range(i + 1, len(texts)):
                dx = min(boxes[i, 2], boxes[j, 2]) - max(boxes[i, 0], boxes[j, 0])
                dy = min(boxes[i, 3], boxes[j, 3]) - max(boxes[i, 1], boxes[j, 1])
                if dx <= 0 or dy <= 0:
                    continue
                ci, cj = boxes[i].reshape(2, 2).mean(axis=0), boxes[j].reshape(2, 2).mean(axis=0)
                if dy <= dx:
                    sign = 1.0 if ci[1] >= cj[1] else -1.0
                    if ci[1] == cj[1]:
                        sign = 1.0 if i < j else -1.0
                    shift[i, 1] += sign * (dy / 2 + 0.5)
                    shift[j, 1] -= sign * (dy / 2 + 0.5)
                else:
                    sign = 1.0 if ci[0] >= cj[0] else -1.0
                    shift[i, 0] += sign * (dx / 2 + 0.5)
                    shift[j, 0] -= sign * (dx / 2 + 0.5)
        if not shift.any():
            return
        for text, move in zip(texts, shift):
            if move.any():
                transform = text.get_transform()
                x, y = transform.transform(text.get_position())
                text.set_position(transform.inverted().transform((x + move[0], y + move[1])))


# =============================================================================== figures


def _new_figure(size: tuple[float, float]) -> "Figure":
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _percent(value: float) -> str:
    return f"{100 * value:.1f}%" if np.isfinite(value) else "n/a"


def _axis_label(axis: str, variance_ratio: Mapping[str, float] | None) -> str:
    if variance_ratio and axis in variance_ratio:
        return f"{axis} ({_percent(float(variance_ratio[axis]))} of variance)"
    return axis


def variance_figure(components: pd.DataFrame, *, thresholds: Mapping[str, float | Sequence[float]] | None = None,
                    chosen: int | None = None, max_axes: int = 50) -> "Figure":
    """Variance share of each axis (bars) and the cumulative share (line, right-hand scale).

    Parameters
    ----------
    components : DataFrame
        ``components.tsv``: ``axis``, ``variance_ratio``, ``cumulative_ratio``.
    thresholds : mapping of str to float or sequence of float, optional
        Criteria for the number of axes, by name: a number draws a horizontal line at that
        variance share (e.g. the share every axis would carry if none stood out), a sequence
        (one value per axis) a reference curve (e.g. the shares expected by chance).
    chosen : int, optional
        A number of axes to mark with a vertical line.
    max_axes : int, default=50
        Axes drawn at most.
    """
    with _style():
        table = components.iloc[:max_axes]
        ratio = table["variance_ratio"].to_numpy(dtype=np.float64) * 100
        cumulative = table["cumulative_ratio"].to_numpy(dtype=np.float64) * 100
        x = np.arange(1, len(table) + 1)
        fig = _new_figure(style.WIDE_SIZE)
        ax = fig.add_subplot()
        bars = ax.bar(x, ratio, label="share of variance", **style.BAR)
        _number_gids(bars, "variance-bar")
        ax.set_xlabel("axis")
        ax.set_ylabel("share of the variance (%)")
        ax.set_xticks(x, [str(a) for a in table["axis"]], rotation=90 if len(x) > 15 else 0)
        ax.set_xlim(0.4, len(x) + 0.6)
        ax.set_ylim(0, max(ratio.max(), _largest(thresholds) * 100) * 1.15 if len(x) else 1)
        right = ax.twinx()
        right.grid(False)
        right.spines["right"].set_visible(True)
        (line,) = right.plot(x, cumulative, label="cumulative share (right-hand scale)", **style.CUMULATIVE)
        line.set_gid("cumulative")
        right.set_ylabel("cumulative share (%)")
        right.set_ylim(0, min(100.0, max(cumulative.max(), 1.0) * 1.1) if len(x) else 100)
        handles = [bars, line]
        for i, (name, value) in enumerate((thresholds or {}).items()):
            colour = style.CATEGORY_COLOURS[(i + 3) % len(style.CATEGORY_COLOURS)]
            values = np.atleast_1d(np.asarray(value, dtype=np.float64)) * 100
            if values.size == 1:
                handle = ax.axhline(values[0], color=colour, linewidth=1.2, linestyle=(0, (4, 3)), label=name)
            else:
                (handle,) = ax.plot(x[: values.size], values[: len(x)], color=colour, linewidth=1.2,
                                    linestyle=(0, (4, 3)), marker="_", label=name)
            handle.set_gid(f"threshold-{i}")
            handles.append(handle)
        if chosen is not None:
            handle = ax.axvline(chosen + 0.5, color=style.INK, linewidth=1.0, linestyle=":",
                                label=f"{chosen} axes kept")
            handle.set_gid("chosen")
            handles.append(handle)
        ax.legend(handles=handles, loc="center right")
        ax.set_title("Variance carried by each axis")
        return fig


def _variance_with_signal(fit: FitRecords) -> tuple:
    """``variance_figure``'s arguments: the fit's axes, or, when the fit assessed how many axes
    carry signal (``signal_axes.tsv``), every candidate axis with the broken stick, the noise
    edge and the parallel analysis's permuted quantile as shares, and the axes kept."""
    path = fit.directory / "signal_axes.tsv"
    if not path.is_file():
        return fit.components, None, None
    numeric = ["variance", "variance_ratio", "cumulative_ratio", "broken_stick_ratio", "noise_edge_variance",
               "permuted_quantile_variance"]
    table = read_result_table(path, required=["axis", *numeric, "kept"], numeric=numeric)
    share = table["variance_ratio"] / table["variance"]  # 1 / total variance
    thresholds = {"broken stick (expected share)": table["broken_stick_ratio"].to_numpy(),
                  "noise edge (Marchenko–Pastur)": float((table["noise_edge_variance"] * share).iloc[0])}
    permuted = (table["permuted_quantile_variance"] * share).to_numpy()
    if np.isfinite(permuted).any():
        thresholds["permuted copies, 95% quantile"] = permuted
    kept = int(table["kept"].astype(str).str.lower().eq("true").sum())
    return table[["axis", "variance", "variance_ratio", "cumulative_ratio"]], thresholds, kept


def _number_gids(bars, prefix: str) -> None:
    for i, patch in enumerate(bars):
        patch.set_gid(f"{prefix}-{i}")


def _largest(thresholds: Mapping[str, float | Sequence[float]] | None) -> float:
    values = [np.nanmax(np.atleast_1d(np.asarray(v, dtype=np.float64))) for v in (thresholds or {}).values()]
    return max(values, default=0.0)


def _style():
    import matplotlib

    return matplotlib.rc_context(style.rc())


@dataclass
class _Layer:
    """Samples of one kind on a map."""

    kind: str  # "active", "supplementary", "new"
    ids: np.ndarray
    xy: np.ndarray


def sample_map(scores: pd.DataFrame, pair: tuple[str, str] = ("PC1", "PC2"), *,
               variance_ratio: Mapping[str, float] | None = None, colour: Colouring | None = None,
               supplementary: pd.DataFrame | None = None, new: pd.DataFrame | None = None,
               flagged: Sequence[str] = (), shade: pd.Series | None = None, shade_name: str | None = None,
               density_above: int = DENSITY_ABOVE, extreme_points: int = EXTREME_POINTS,
               title: str | None = None) -> "Figure":
    """Samples on a pair of axes.

    Parameters
    ----------
    scores : DataFrame
        ``sample_id`` and the two axis columns: the samples that built the axes.
    pair : (str, str)
        Axis names, horizontal then vertical.
    variance_ratio : mapping, optional
        Variance share of each axis, shown in the axis labels.
    colour : Colouring, optional
        A categorical annotation colours the samples and draws each category's centre with
        the 95% confidence ellipse of that centre (:func:`centre_ellipse`, from the samples
        that built the axes); a numeric one a colour scale.
    supplementary, new : DataFrame, optional
        Supplementary samples and newly scored samples (``sample_id`` and the axis columns),
        drawn with their own markers.
    flagged : sequence of str
        Ids of samples to ring (those the scoring diagnostics flag), among any of the above.
    shade : Series, optional
        A number per sample id in [0, 1] shading every point instead of ``colour`` (the
        quality of representation); ``shade_name`` labels its scale.
    density_above : int, default=DENSITY_ABOVE
        With more samples that built the axes, their density is drawn underneath and only
        the ``extreme_points`` farthest from the centre on top (supplementary or new samples
        beyond this number are thinned the same way, without a density).
    title : str, optional

    Returns
    -------
    Figure
        Artists carry ids (``gid``, also the ``id`` of their group in SVG files):
        ``samples``, ``supplementary`` and ``new-samples`` (with ``-<i>`` per category and
        ``-no-value`` for samples without a value), ``flagged``, ``density``, ``centre-<i>``
        and ``centre-ellipse-<i>`` (the ellipse's label is its category).
    """
    a, b = pair
    layers = [_Layer("active", scores["sample_id"].to_numpy(dtype=object), scores[[a, b]].to_numpy(np.float64))]
    for kind, table in (("supplementary", supplementary), ("new", new)):
        if table is not None and len(table):
            layers.append(_Layer(kind, table["sample_id"].to_numpy(dtype=object), table[[a, b]].to_numpy(np.float64)))
    with _style():
        fig = _new_figure(style.MAP_SIZE)
        ax = fig.add_subplot()
        ax.axhline(0, color=style.MUTED, linewidth=0.6, zorder=1)
        ax.axvline(0, color=style.MUTED, linewidth=0.6, zorder=1)
        active = layers[0]
        dense = active.xy.shape[0] > density_above
        numeric_norm = None
        if shade is not None:  # from 0 to the largest value drawn, so that small shares stay apart
            shown = np.concatenate([shade.reindex(layer.ids).to_numpy(np.float64) for layer in layers])
            numeric_norm = _normalize(0.0, float(np.nanmax(shown)) if np.isfinite(shown).any() else 1.0)
        elif colour is not None and colour.kind == "numeric":
            shown = np.concatenate([colour.of(layer.ids) for layer in layers])
            numeric_norm = _normalize(np.nanmin(shown) if np.isfinite(shown).any() else 0.0,
                                      np.nanmax(shown) if np.isfinite(shown).any() else 1.0)
        if dense:
            _density(ax, active.xy, None if shade is None else shade.reindex(active.ids).to_numpy(np.float64),
                     numeric_norm)
        mappable = None
        for layer in layers:
            rows = _extreme_rows(layer.xy, extreme_points) if layer.xy.shape[0] > density_above else slice(None)
            art = _draw_layer(ax, layer.kind, layer.xy[rows], layer.ids[rows], colour, shade, numeric_norm)
            if mappable is None:
                mappable = art
        if colour is not None and colour.kind == "categorical" and shade is None:
            _centres(ax, active.xy, colour.of(active.ids), colour.levels)
        _ring_flagged(ax, layers, flagged)
        if mappable is not None:
            label = shade_name if shade is not None else colour.name
            fig.colorbar(mappable, ax=ax, label=label, shrink=0.85)
        ax.set_xlabel(_axis_label(a, variance_ratio))
        ax.set_ylabel(_axis_label(b, variance_ratio))
        _legend(ax, colour if shade is None else None, layers, flagged)
        ax.set_title(title or _map_title(a, b, colour))
        return fig


def _map_title(a: str, b: str, colour: Colouring | None) -> str:
    return f"Samples on {a} and {b}" + (f", coloured by {colour.name}" if colour is not None else "")


def _normalize(low: float, high: float):
    from matplotlib.colors import Normalize

    return Normalize(vmin=low, vmax=high if high > low else low + 1.0)


def _density(ax: "Axes", xy: np.ndarray, values: np.ndarray | None, norm) -> None:
    """Hexagonal bins of the samples under the points: counts, or the mean of ``values``."""
    if values is None:
        art = ax.hexbin(xy[:, 0], xy[:, 1], gridsize=60, bins="log", cmap=style.DENSITY_MAP, mincnt=1,
                        linewidths=0.0, zorder=2, alpha=0.8)
    else:
        art = ax.hexbin(xy[:, 0], xy[:, 1], C=values, reduce_C_function=np.nanmean, gridsize=60,
                        cmap=style.SEQUENTIAL_MAP, norm=norm, mincnt=1, linewidths=0.0, zorder=2)
    art.set_gid("density")
    art.set_rasterized(True)  # thousands of hexagons: an image inside the SVG file


_LAYER_STYLE = {"active": style.POINT, "supplementary": style.SUPPLEMENTARY, "new": style.NEW}
_LAYER_GID = {"active": "samples", "supplementary": "supplementary", "new": "new-samples"}
_LAYER_LABEL = {"active": "samples", "supplementary": "supplementary samples", "new": "newly scored samples"}


def _draw_layer(ax: "Axes", kind: str, xy: np.ndarray, ids: np.ndarray, colour: Colouring | None,
                shade: pd.Series | None, norm):
    """Scatter one kind of samples; returns the collection when it maps numbers to colours."""
    look = dict(_LAYER_STYLE[kind])
    zorder = 3 if kind == "active" else 4
    rasterized = xy.shape[0] > 2000
    if shade is not None or (colour is not None and colour.kind == "numeric"):
        values = (shade.reindex(ids).to_numpy(np.float64) if shade is not None else colour.of(ids))
        known = np.isfinite(values)
        if (~known).any():
            rest = dict(look, color=style.NO_VALUE) if kind == "active" else dict(look, facecolors=style.NO_VALUE)
            ax.scatter(xy[~known, 0], xy[~known, 1], zorder=zorder, rasterized=rasterized, **rest).set_gid(
                _LAYER_GID[kind] + "-no-value")
        art = ax.scatter(xy[known, 0], xy[known, 1], c=values[known], cmap=style.SEQUENTIAL_MAP, norm=norm,
                         zorder=zorder, rasterized=rasterized, **look)
        art.set_gid(_LAYER_GID[kind])
        return art
    if colour is None:
        fill = style.CATEGORY_COLOURS[0] if kind == "active" else style.NO_VALUE
        ax.scatter(xy[:, 0], xy[:, 1], color=fill, zorder=zorder, rasterized=rasterized, **look).set_gid(
            _LAYER_GID[kind])
        return None
    labels = colour.of(ids)
    for i, level in enumerate([*colour.levels, None]):
        rows = np.array([v is None for v in labels]) if level is None else labels == level
        if not rows.any():
            continue
        fill, marker = (style.NO_VALUE, look["marker"]) if level is None else style.category_style(i)
        if kind != "active":
            marker = look["marker"]
        ax.scatter(xy[rows, 0], xy[rows, 1], color=fill, zorder=zorder, rasterized=rasterized,
                   **dict(look, marker=marker)).set_gid(f"{_LAYER_GID[kind]}-{i}")
    return None


def _centres(ax: "Axes", xy: np.ndarray, labels: np.ndarray, levels: list[str]) -> None:
    """Each category's centre (from the samples that built the axes) and its 95% confidence ellipse."""
    from matplotlib.patches import Ellipse

    for i, level in enumerate(levels):
        rows = labels == level
        if not rows.any():
            continue
        colour, _ = style.category_style(i)
        centre = xy[rows].mean(axis=0)
        ax.scatter([centre[0]], [centre[1]], color=colour, **style.CENTRE).set_gid(f"centre-{i}")
        if rows.sum() < ELLIPSE_MIN_SAMPLES:
            continue
        centre, width, height, angle = centre_ellipse(xy[rows])
        patch = Ellipse(tuple(centre), width, height, angle=angle, edgecolor="#000000", **style.ELLIPSE)
        patch.set_gid(f"centre-ellipse-{i}")
        patch.set_label(f"{level}")
        ax.add_patch(patch)
        halo = Ellipse(tuple(centre), width, height, angle=angle, edgecolor=colour,
                       **dict(style.ELLIPSE, linewidth=style.ELLIPSE["linewidth"] * 0.55, zorder=5.1))
        ax.add_patch(halo)


def _ring_flagged(ax: "Axes", layers: list[_Layer], flagged: Sequence[str]) -> None:
    if not len(flagged):
        return
    wanted = set(map(str, flagged))
    xy = np.concatenate([layer.xy[[str(i) in wanted for i in layer.ids]] for layer in layers])
    ax.scatter(xy[:, 0], xy[:, 1], zorder=7, **style.FLAGGED).set_gid("flagged")


def _legend(ax: "Axes", colour: Colouring | None, layers: list[_Layer], flagged: Sequence[str]) -> None:
    from matplotlib.lines import Line2D

    handles = []
    if colour is not None and colour.kind == "categorical":
        for i, level in enumerate(colour.levels[:20]):
            fill, marker = style.category_style(i)
            handles.append(Line2D([], [], linestyle="", marker=marker, color=fill, label=str(level)))
        if len(colour.levels) > 20:
            handles.append(Line2D([], [], linestyle="", label=f"… {len(colour.levels) - 20} more"))
        handles.append(Line2D([], [], linestyle="", marker=style.CENTRE["marker"], markerfacecolor="white",
                              markeredgecolor="#000000", label="centre, 95% ellipse"))
    kinds = {layer.kind for layer in layers}
    for kind in ("supplementary", "new"):
        if kind in kinds:
            look = _LAYER_STYLE[kind]
            handles.append(Line2D([], [], linestyle="", marker=look["marker"], markerfacecolor=style.NO_VALUE,
                                  markeredgecolor=style.INK, label=_LAYER_LABEL[kind]))
    if len(flagged):
        handles.append(Line2D([], [], linestyle="", marker="o", markerfacecolor="none", markeredgecolor="#000000",
                              markersize=9, markeredgewidth=1.6, label=f"flagged ({len(flagged)})"))
    if handles:
        title = colour.name if colour is not None and colour.kind == "categorical" else None
        ax.legend(handles=handles, title=title, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)


def quality_map(scores: pd.DataFrame, sample_statistics: pd.DataFrame, pair: tuple[str, str] = ("PC1", "PC2"), *,
                variance_ratio: Mapping[str, float] | None = None, supplementary: pd.DataFrame | None = None,
                density_above: int = DENSITY_ABOVE, extreme_points: int = EXTREME_POINTS) -> "Figure":
    """The sample map shaded by the quality of representation on the pair.

    The shade of a sample is the sum of its squared cosines on the two axes
    (``sq_cosine_<a> + sq_cosine_<b>`` of ``sample_statistics.tsv``): the share of its
    squared distance to the centre that the plane shows.
    """
    a, b = pair
    stats = sample_statistics.set_index("sample_id")
    shade = (stats[f"sq_cosine_{a}"] + stats[f"sq_cosine_{b}"]).clip(0.0, 1.0)
    shade.index = pd.Index(shade.index.astype(str), dtype=object)
    return sample_map(scores, pair, variance_ratio=variance_ratio, supplementary=supplementary, shade=shade,
                      shade_name=f"squared cosine on {a} and {b}", density_above=density_above,
                      extreme_points=extreme_points,
                      title=f"How well {a} and {b} show each sample")


def feature_map(feature_ids: Sequence[str], values: np.ndarray, pair: tuple[str, str] = ("PC1", "PC2"), *,
                kind: str = "correlation", variance_ratio: Mapping[str, float] | None = None,
                top: int = TOP_FEATURES) -> "Figure":
    """Features on a pair of axes, the ``top`` longest labelled.

    Parameters
    ----------
    feature_ids : sequence of str, shape (p,)
    values : ndarray, shape (p, 2)
        Correlations of the features with the two axes (``kind="correlation"``, standardized
        PCA: drawn as arrows inside the unit circle), or their loadings (``kind="loading"``:
        every feature a point, the top ones labelled).
    top : int, default=TOP_FEATURES
        Features with the longest vectors on the pair (largest sum of squares of the two
        values) drawn as arrows (correlations) or labelled (loadings).

    Returns
    -------
    Figure
        Arrows carry the gid ``feature-arrow``, labels ``feature-label``.
    """
    from matplotlib.patches import Circle

    if kind not in ("correlation", "loading"):
        raise OptionError(f"kind={kind!r}: choose 'correlation' or 'loading'")
    a, b = pair
    ids = np.asarray(feature_ids, dtype=object)
    v = np.asarray(values, dtype=np.float64)
    length = np.nansum(v**2, axis=1)
    chosen = np.argsort(-np.where(np.isfinite(length), length, -1.0), kind="stable")[: max(0, min(top, len(ids)))]
    with _style():
        fig = _new_figure((5.8, 5.6))
        ax = fig.add_subplot()
        ax.axhline(0, color=style.MUTED, linewidth=0.6, zorder=1)
        ax.axvline(0, color=style.MUTED, linewidth=0.6, zorder=1)
        texts = []
        if kind == "correlation":
            ax.add_patch(Circle((0, 0), 1.0, fill=False, edgecolor=style.INK, linewidth=0.9, zorder=2))
            ax.add_patch(Circle((0, 0), 0.5, fill=False, edgecolor=style.MUTED, linewidth=0.5,
                                linestyle=(0, (3, 3)), zorder=2))
            for j in chosen:
                arrow = ax.arrow(0, 0, v[j, 0], v[j, 1], **style.ARROW)
                arrow.set_gid("feature-arrow")
            ax.set_xlim(-1.18, 1.18)
            ax.set_ylim(-1.18, 1.18)
            ax.set_aspect("equal")
            ax.set_xlabel(f"correlation with {_axis_label(a, variance_ratio)}")
            ax.set_ylabel(f"correlation with {_axis_label(b, variance_ratio)}")
            ax.set_title(f"Features on {a} and {b}: the {len(chosen)} most correlated")
        else:
            rows = np.ones(len(ids), dtype=bool)
            rows[chosen] = False
            rest = ax.scatter(v[rows, 0], v[rows, 1], s=6, color=style.NO_VALUE, linewidths=0.0, zorder=2,
                              rasterized=rows.sum() > 2000)
            rest.set_gid("features")
            ax.scatter(v[chosen, 0], v[chosen, 1], s=22, color=style.CATEGORY_COLOURS[0], zorder=4).set_gid(
                "feature-top")
            ax.set_xlabel(f"loading on {_axis_label(a, variance_ratio)}")
            ax.set_ylabel(f"loading on {_axis_label(b, variance_ratio)}")
            ax.set_title(f"Feature loadings on {a} and {b}: the {len(chosen)} largest labelled")
        for j in chosen:
            direction = v[j] / (np.hypot(*v[j]) or 1.0)
            anchor = v[j] + 0.04 * direction * (1.0 if kind == "correlation" else np.abs(v).max())
            text = ax.text(anchor[0], anchor[1], str(ids[j]), fontsize=8, color=style.INK, zorder=6,
                           ha="left" if direction[0] >= 0 else "right", va="bottom" if direction[1] >= 0 else "top",
                           clip_on=False)
            text.set_gid("feature-label")
            texts.append(text)
        _repel_labels(fig, texts)
        return fig


def contributions_figure(axis: str, *, feature_ids: Sequence[str] | None = None,
                         feature_contributions: np.ndarray | None = None, sample_ids: Sequence[str] | None = None,
                         sample_contributions: np.ndarray | None = None, top: int = TOP_CONTRIBUTIONS) -> "Figure":
    """The largest contributions to one axis, features and samples side by side.

    Each panel draws the ``top`` largest contributions (percent) as bars against the
    contribution every member would make if all contributed equally: ``100/p`` percent for
    ``p`` features, ``100/n`` for ``n`` samples (the contributions of one axis sum to 100).

    Parameters
    ----------
    axis : str
    feature_ids, feature_contributions : shape (p,), optional
        The features that built the axes and their contributions (percent).
    sample_ids, sample_contributions : shape (n,), optional
        The samples that built the axes and their contributions (percent).
    """
    panels = [(name, ids, np.asarray(values, dtype=np.float64))
              for name, ids, values in (("features", feature_ids, feature_contributions),
                                        ("samples", sample_ids, sample_contributions))
              if ids is not None and values is not None]
    if not panels:
        raise OptionError("contributions_figure needs the features' or the samples' contributions")
    with _style():
        fig = _new_figure((4.3 * len(panels), 4.6))
        for k, (name, ids, values) in enumerate(panels):
            ax = fig.add_subplot(1, len(panels), k + 1)
            known = np.flatnonzero(np.isfinite(values))
            order = known[np.argsort(-values[known], kind="stable")[:top]]
            y = np.arange(len(order))[::-1]
            bars = ax.barh(y, values[order], height=0.7, **style.BAR)
            _number_gids(bars, f"{name}-bar")
            ax.set_yticks(y, [str(ids[i]) for i in order])
            uniform = 100.0 / len(values)
            line = ax.axvline(uniform, **style.UNIFORM)
            line.set_gid(f"{name}-uniform")
            ax.set_xlabel(f"contribution (%); dashed: equal share,\n100/{len(values)} = {uniform:.3g}%")
            ax.set_xlim(0, max(uniform, values[order].max() if len(order) else 0.0) * 1.12)
            ax.grid(axis="y", visible=False)
            ax.set_title(f"{axis}: largest {name}", fontsize=9.5)
        fig.suptitle(f"What builds {axis}", x=0.01, ha="left", fontweight="bold", fontsize=10.5)
        return fig


def diagnostics_figure(diagnostics: pd.DataFrame, *, named: int = NAMED_FLAGGED) -> "Figure":
    """Each newly scored sample's T² against its Q, with both control limits.

    Parameters
    ----------
    diagnostics : DataFrame
        ``diagnostics.tsv`` of ``axiscope score``: ``sample_id``, ``t2``, ``q``, ``flag``,
        ``t2_limit``, ``q_limit`` (the confidence used for the flags), optionally
        ``t2_limit_95`` and ``q_limit_95`` (dashed) and ``confidence``.
    named : int, default=NAMED_FLAGGED
        Flagged samples named at most (those farthest beyond a limit first).
    """
    d = diagnostics
    t2, q = d["t2"].to_numpy(np.float64), d["q"].to_numpy(np.float64)
    flagged = (d["flag"].astype(str) != "within").to_numpy()
    ids = d["sample_id"].to_numpy(dtype=object)
    t2_limit, q_limit = float(d["t2_limit"].iloc[0]), float(d["q_limit"].iloc[0])
    confidence = float(d["confidence"].iloc[0]) if "confidence" in d.columns else float("nan")
    with _style():
        fig = _new_figure((6.4, 5.0))
        ax = fig.add_subplot()
        ax.scatter(t2[~flagged], q[~flagged], color=style.CATEGORY_COLOURS[0], zorder=3,
                   **dict(style.NEW, edgecolors="none", marker="o", s=18)).set_gid("within")
        ax.scatter(t2[flagged], q[flagged], color=style.CATEGORY_COLOURS[3], zorder=4,
                   **dict(style.NEW, marker="o", s=18, edgecolors="none"))
        ring = ax.scatter(t2[flagged], q[flagged], zorder=5, **style.FLAGGED)
        ring.set_gid("flagged")
        level = f" ({confidence:.3g})" if np.isfinite(confidence) else ""
        ax.axvline(t2_limit, label=f"T² limit{level}", **style.LIMIT).set_gid("t2-limit")
        ax.axhline(q_limit, label=f"Q limit{level}", **style.LIMIT).set_gid("q-limit")
        if "t2_limit_95" in d.columns and "q_limit_95" in d.columns and not np.isclose(confidence, 0.95):
            ax.axvline(float(d["t2_limit_95"].iloc[0]), label="limits (0.95)", **style.LIMIT_SECONDARY).set_gid(
                "t2-limit-95")
            ax.axhline(float(d["q_limit_95"].iloc[0]), **style.LIMIT_SECONDARY).set_gid("q-limit-95")
        beyond = np.maximum(t2 / t2_limit, q / q_limit)
        order = np.flatnonzero(flagged)[np.argsort(-beyond[flagged], kind="stable")][:named]
        texts = []
        for i in order:
            text = ax.annotate(str(ids[i]), (t2[i], q[i]), xytext=(5, 4), textcoords="offset points",
                               fontsize=7.5, color=style.INK, zorder=6)
            text.set_gid("flagged-label")
            texts.append(text)
        ax.set_xlabel("T² (distance along the axes)")
        ax.set_ylabel("Q (squared distance off the axes)")
        for values, limit, setter in ((t2, t2_limit, ax.set_xscale), (q, q_limit, ax.set_yscale)):
            if np.nanmax(values, initial=0.0) > LOG_SCALE_BEYOND * limit and np.nanmin(values, initial=1.0) > 0:
                setter("log")
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=3)
        more = f"; {flagged.sum() - len(order)} more not named" if flagged.sum() > len(order) else ""
        ax.set_title(f"New samples against the model: {int(flagged.sum())} of {len(ids)} flagged{more}")
        _repel_labels(fig, texts)
        return fig


# ========================================================================== write them


def _check_formats(formats: Sequence[str] | str) -> tuple[str, ...]:
    chosen = (formats,) if isinstance(formats, str) else tuple(formats)
    unknown = [f for f in chosen if f not in FIGURE_FORMATS]
    if unknown or not chosen:
        raise OptionError(f"formats={chosen!r}: choose png and/or svg")
    return tuple(dict.fromkeys(chosen))


def _check_pairs(pairs: Sequence[Sequence[int]], axis_names: list[str]) -> list[tuple[str, str]]:
    """Axis-name pairs; pairs beyond the fit's axes are an error, except in the default pairs."""
    k = len(axis_names)
    out = []
    default = tuple(map(tuple, pairs)) == DEFAULT_PAIRS
    for pair in pairs:
        pair = tuple(pair)
        if len(pair) != 2 or not all(isinstance(i, (int, np.integer)) for i in pair) or pair[0] == pair[1]:
            raise OptionError(f"pairs={pair!r}: give each pair as two different axis numbers, such as (1, 2)")
        if not all(1 <= i <= k for i in pair):
            if default:
                continue
            raise OptionError(f"pairs=({pair[0]}, {pair[1]}): the fit has {k} axes; choose axis numbers "
                              f"from 1 to {k}")
        out.append((axis_names[pair[0] - 1], axis_names[pair[1] - 1]))
    return list(dict.fromkeys(out))


def write_figures(result_dir: str | Path, out_dir: str | Path | None = None, *,
                  annotations: str | Path | pd.DataFrame | None = None, id_column: str = "sample_id",
                  color_by: str | None = None, pairs: Sequence[Sequence[int]] = DEFAULT_PAIRS,
                  diagnostics_dir: str | Path | None = None,
                  formats: Sequence[str] = FIGURE_FORMATS) -> list[Path]:
    """Draw every figure the result directory has the tables for, as PNG (150 dpi) and SVG.

    Parameters
    ----------
    result_dir : path
        Output directory of ``axiscope fit`` (the explanation's tables may also sit in its
        ``explanation/`` folder).
    out_dir : path, optional
        Where to write (made if missing; files of the same name are replaced). Default
        ``result_dir/figures``. Callers wanting atomic output pass a temporary directory.
    annotations : path or DataFrame, optional
        Sample annotations (TSV with a header line), matched by ``id_column``; they may also
        cover supplementary and newly scored samples.
    id_column : str, default="sample_id"
    color_by : str, optional
        Annotation column colouring the sample maps (default: the one explaining most of the
        first axis drawn, by the axis cards).
    pairs : sequence of (int, int), default=((1, 2), (1, 3), (2, 3))
        Axis pairs (1-based) of the sample, quality and feature maps. Default pairs beyond
        the fit's axes are left out.
    diagnostics_dir : path, optional
        Output directory of ``axiscope score`` against this fit: its samples are drawn on
        the maps, those it flags ringed, and the T²/Q figure is drawn.
    formats : sequence of {"png", "svg"}, default=("png", "svg")

    Returns
    -------
    list of Path
        The files written, in the order of the table in the module description. Figures
        whose tables are absent are left out (feature maps and contributions need the
        explanation's tables, which ``axiscope fit`` writes).
    """
    started = time.perf_counter()
    formats = _check_formats(formats)
    fit = read_fit_records(result_dir)
    names = _check_pairs(pairs, fit.axis_names)
    scored = read_score_records(diagnostics_dir, fit) if diagnostics_dir is not None else None
    colour = None
    if annotations is not None:
        first = names[0][0] if names else fit.axis_names[0]
        colour = annotation_colours(annotations, id_column=id_column, color_by=color_by, cards=fit.cards,
                                    first_axis=first)
        if colour is not None:
            _report_coverage(colour, fit, scored)
    elif color_by is not None:
        raise OptionError("color_by needs annotations; pass the annotation table too")
    out = Path(out_dir) if out_dir is not None else Path(result_dir) / "figures"
    out.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []

    def save(fig: "Figure", stem: str) -> None:
        with _style():
            for fmt in formats:
                path = out / f"{stem}.{fmt}"
                fig.savefig(path, format=fmt, dpi=style.DPI, metadata=_METADATA[fmt])
                written.append(path)
                fig.set_layout_engine("none")  # laid out once; the next format keeps the positions

    ratio = fit.variance_ratio
    flagged = scored.flagged_ids if scored is not None else ()
    table, thresholds, kept = _variance_with_signal(fit)
    save(variance_figure(table, thresholds=thresholds, chosen=kept), "variance")
    for a, b in names:
        save(sample_map(fit.scores, (a, b), variance_ratio=ratio, colour=colour,
                        supplementary=fit.supplementary_scores, new=scored.scores if scored else None,
                        flagged=flagged), f"samples_{a}_{b}")
        if fit.sample_statistics is not None:
            stats = fit.sample_statistics
            save(quality_map(fit.scores, stats, (a, b), variance_ratio=ratio,
                             supplementary=fit.supplementary_scores), f"quality_{a}_{b}")
        features = _feature_values(fit, a, b)
        if features is not None:
            ids, values, kind = features
            save(feature_map(ids, values, (a, b), kind=kind, variance_ratio=ratio), f"features_{a}_{b}")
    for axis in [x for x in fit.axis_names if any(x in pair for pair in names)]:
        panels = _contributions(fit, axis)
        if panels:
            save(contributions_figure(axis, **panels), f"contributions_{axis}")
    if scored is not None and len(scored.diagnostics):
        save(diagnostics_figure(scored.diagnostics), "diagnostics")
    logger.info("%d figure files written to %s in %.1f s", len(written), out, time.perf_counter() - started)
    return written


#: No creation date in the files, so that the same result gives the same files.
_METADATA = {"png": {"Software": "axiscope"}, "svg": {"Date": None, "Creator": "axiscope"}}


def _feature_values(fit: FitRecords, a: str, b: str) -> tuple[np.ndarray, np.ndarray, str] | None:
    """Feature ids, their two values on the pair and what the values are, from the stored tables."""
    if fit.features is not None:
        f = fit.features
        rows = ~f.supplementary
        cols = [f.axis_names.index(a), f.axis_names.index(b)]
        values = f.correlation if fit.standardized else f.loading
        return f.feature_ids[rows], values[rows][:, cols], "correlation" if fit.standardized else "loading"
    if fit.loadings is not None:
        return fit.loadings["feature_id"].to_numpy(dtype=object), fit.loadings[[a, b]].to_numpy(np.float64), "loading"
    return None


def _contributions(fit: FitRecords, axis: str) -> dict:
    panels: dict = {}
    if fit.features is not None:
        f = fit.features
        rows = ~f.supplementary
        panels.update(feature_ids=f.feature_ids[rows],
                      feature_contributions=f.contribution[rows, f.axis_names.index(axis)])
    if fit.sample_statistics is not None:
        s = fit.sample_statistics[~fit.sample_statistics["supplementary"].to_numpy(dtype=bool)]
        panels.update(sample_ids=s["sample_id"].to_numpy(dtype=object),
                      sample_contributions=s[f"contribution_pct_{axis}"].to_numpy(np.float64))
    return panels


def _report_coverage(colour: Colouring, fit: FitRecords, scored: ScoreRecords | None) -> None:
    """Refuse annotations matching none of the fit's samples; say how many samples lack a value."""
    ids = fit.scores["sample_id"].astype(str)
    present = ids.isin(colour.values.index)
    if not present.any():
        raise InputError(f"annotations: none of the {len(ids)} samples of {fit.directory} has a row "
                         f"(e.g. {ids.iloc[0]!r}); check id_column")
    if not present.all():
        logger.warning("annotations: %d of %d samples have no row; they are drawn in grey", int((~present).sum()),
                       len(ids))
    if scored is not None:
        new = scored.scores["sample_id"].astype(str)
        if not new.isin(colour.values.index).any():
            logger.info("annotations: no newly scored sample has a row; they are drawn in grey")
