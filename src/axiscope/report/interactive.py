"""The interactive charts of the report, drawn with Bokeh and embedded with its inline resources.

Every number drawn comes from a table the library wrote; nothing here computes a statistic.
Above :data:`MAX_POINTS` points a chart draws a subset (the extremes of each axis, every
supplementary or flagged point, and an even random draw of the rest, seeded so that the
same result gives the same picture) and says so; the tables and statistics keep every sample.

Why Bokeh: its inline resources put the whole library into the file (about 1.7 MB with the
widgets), so the report opens with no network; it sends numeric columns as base64 binary
arrays, so 100,000 points cost less than half of what the same data cost as JSON text; and it
draws on a canvas, which stays responsive with 100,000 points in a headless browser
without WebGL. Its static export needs a browser, so the static figures are matplotlib's.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .style import CATEGORY_COLOURS, NO_VALUE, ordered_levels

__all__ = ["MAX_POINTS", "CATEGORICAL", "ChartSet", "thin", "sample_map", "feature_map",
           "variance_chart", "diagnostics_chart"]

#: Points drawn per chart at most; above it a chart draws a subset (never the statistics).
MAX_POINTS = 10_000
#: Axes offered in the axis selectors of the maps (their scores travel in the file).
MAX_MAP_AXES = 5
#: Extreme points kept on each side of each offered axis when a chart is thinned.
EXTREMES_PER_SIDE = 100

#: Categorical colours and the colour of points without a value: those of the static figures
#: (:mod:`axiscope.report.style`), so that a category has one colour everywhere.
CATEGORICAL = CATEGORY_COLOURS
NEUTRAL = NO_VALUE
PLAIN = "#33658a"
#: Outline of flagged samples: black, as the ring of the static figures.
FLAGGED = "#000000"
FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'Helvetica Neue', Arial, sans-serif"


def _sequential() -> tuple[str, ...]:
    """The sequential colour map of the static figures (:data:`axiscope.report.style.SEQUENTIAL_MAP`)."""
    from bokeh.palettes import Cividis256

    return tuple(Cividis256)


@dataclass
class ChartSet:
    """Bokeh layouts to embed, by name, and one note per chart (what was thinned)."""

    charts: dict[str, object] = field(default_factory=dict)
    notes: dict[str, str] = field(default_factory=dict)

    def embed(self) -> tuple[str, dict[str, str], str]:
        """The document script, one ``<div>`` per chart, and the inline Bokeh library.

        The three are HTML produced by Bokeh (data inside the script are JSON-escaped by
        Bokeh; the tests check that ids with ``</script>`` stay inert).
        """
        if not self.charts:
            return "", {}, ""
        from bokeh.embed import components
        from bokeh.embed.bundle import bundle_for_objs_and_resources
        from bokeh.resources import INLINE

        script, divs = components(self.charts)
        # only the parts of the library these charts use (not the math-text or table bundles)
        library = bundle_for_objs_and_resources(list(self.charts.values()), INLINE).scripts()
        return script, dict(divs), library


# ----------------------------------------------------------------------------- thinning


def thin(n: int, limit: int, *, keep: np.ndarray | None = None, extremes: np.ndarray | None = None,
         seed: int = 0) -> np.ndarray:
    """Indices of the points to draw, in increasing order.

    All ``n`` when ``n <= limit``. Otherwise the points in ``keep``, the
    :data:`EXTREMES_PER_SIDE` highest and lowest of each column of ``extremes``
    (shape (n, m)), and an even random draw (``numpy.random.default_rng(seed)``) of the
    others up to ``limit`` points in all.
    """
    if n <= limit:
        return np.arange(n)
    chosen = np.zeros(n, dtype=bool)
    if keep is not None:
        chosen |= np.asarray(keep, dtype=bool)
    if extremes is not None and extremes.size:
        order = np.argsort(np.nan_to_num(np.asarray(extremes, dtype=np.float64)), axis=0, kind="stable")
        chosen[np.unique(order[:EXTREMES_PER_SIDE].ravel())] = True
        chosen[np.unique(order[-EXTREMES_PER_SIDE:].ravel())] = True
    room = limit - int(chosen.sum())
    if room > 0:
        rest = np.flatnonzero(~chosen)
        rng = np.random.default_rng(seed)
        chosen[rng.choice(rest, size=min(room, rest.size), replace=False)] = True
    return np.flatnonzero(chosen)


def _thinned_note(drawn: int, total: int, what: str) -> str:
    if drawn >= total:
        return ""
    return (f"{drawn:,} of {total:,} {what} are drawn (the extremes of each axis and an even random "
            f"draw of the rest); every statistic in this report uses all {total:,}.")


# ------------------------------------------------------------------------------- helpers


def _figure(title: str | None, *, width: int = 640, height: int = 520, **kwargs):
    from bokeh.plotting import figure

    plot = figure(title=title, width=width, height=height, sizing_mode="scale_width",
                  tools="pan,wheel_zoom,box_zoom,reset,save", active_scroll="wheel_zoom",
                  toolbar_location="right", **kwargs)
    plot.toolbar.logo = None
    for axis in (plot.xaxis[0], plot.yaxis[0]):
        axis.axis_label_text_font = FONT
        axis.major_label_text_font = FONT
        axis.axis_label_text_font_style = "normal"
    if plot.title is not None:
        plot.title.text_font = FONT
    plot.outline_line_color = None
    plot.grid.grid_line_color = "#e6e6e6"
    return plot


def _bounds(values: np.ndarray) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    if not finite.size:
        return -1.0, 1.0
    low, high = float(finite.min()), float(finite.max())
    pad = 0.05 * (high - low) if high > low else 1.0
    return low - pad, high + pad


def _axis_label(axis: str, ratios: Mapping[str, float]) -> str:
    ratio = ratios.get(axis)
    return f"{axis} ({100 * ratio:.1f} % of the variance)" if ratio is not None and np.isfinite(ratio) else axis


def _pair_selectors(plot, glyphs: Sequence[object], axes: Sequence[str], bounds: Mapping[str, tuple[float, float]],
                    labels: Mapping[str, str], *, square: bool = False):
    """Two selectors choosing the axes drawn; returns a row of widgets (or None for < 3 axes)."""
    if len(axes) < 3:
        return None
    from bokeh.models import CustomJS, Select

    x_select = Select(title="Horizontal axis", value=axes[0], options=list(axes), width=170)
    y_select = Select(title="Vertical axis", value=axes[1], options=list(axes), width=170)
    code = """
const b = bounds[cb_obj.value];
for (const g of glyphs) { g[coord] = {field: cb_obj.value}; }
const range = coord === 'x' ? plot.x_range : plot.y_range;
range.start = b[0]; range.end = b[1]; range.reset_start = b[0]; range.reset_end = b[1];
const axis = coord === 'x' ? plot.below[0] : plot.left[0];
axis.axis_label = labels[cb_obj.value];
"""
    args = dict(glyphs=list(glyphs), plot=plot, bounds={k: list(v) for k, v in bounds.items()}, labels=dict(labels))
    if square:  # correlation circle: both ranges fixed, nothing to move
        code = "for (const g of glyphs) { g[coord] = {field: cb_obj.value}; }\n" \
               "(coord === 'x' ? plot.below[0] : plot.left[0]).axis_label = labels[cb_obj.value];"
        args.pop("bounds")
    x_select.js_on_change("value", CustomJS(args=dict(args, coord="x"), code=code))
    y_select.js_on_change("value", CustomJS(args=dict(args, coord="y"), code=code))
    return [x_select, y_select]


# ---------------------------------------------------------------------------- sample map


@dataclass
class Colouring:
    """One way of colouring the sample map: a column of the data source and its mapper."""

    label: str
    field: str | None  # None: one plain colour
    mapper: object | None
    guide: object | None  # the legend or colour bar shown with it


def sample_map(scores: pd.DataFrame, axes: Sequence[str], *, ratios: Mapping[str, float],
               supplementary: np.ndarray | None = None, annotations: pd.DataFrame | None = None,
               treatments: Mapping[str, str] | None = None, default_colour: str | None = None,
               scored: pd.DataFrame | None = None, limit: int = MAX_POINTS):
    """The map of the samples on two axes, with hover, zoom and a choice of colouring.

    Parameters
    ----------
    scores : DataFrame
        ``sample_id`` and one column of scores per axis (``sample_scores.tsv``).
    axes : sequence of str
        The axes offered (the first two are drawn first).
    ratios : mapping
        Variance ratio of each axis (for the axis labels).
    supplementary : ndarray of bool, optional
        Which samples were placed on the axes afterwards.
    annotations : DataFrame, optional
        Annotation values as text (None where missing), one row per sample of ``scores``.
    treatments : mapping, optional
        ``numeric`` or ``categorical`` for each annotation column.
    default_colour : str, optional
        The annotation coloured first.
    scored : DataFrame, optional
        Newly scored samples: ``sample_id``, the axes, ``flag`` (``within`` or a reason).

    Returns
    -------
    layout, note : Bokeh layout and a sentence on thinning ("" when every point is drawn)
    """
    from bokeh.layouts import column, row
    from bokeh.models import (
        ColorBar,
        ColumnDataSource,
        CustomJS,
        HoverTool,
        Legend,
        LegendItem,
        LinearColorMapper,
        Select,
    )

    n = len(scores)
    supplementary = np.zeros(n, dtype=bool) if supplementary is None else np.asarray(supplementary, dtype=bool)
    values = scores[list(axes)].to_numpy(dtype=np.float64)
    drawn = thin(n, limit, keep=supplementary, extremes=values)
    data: dict[str, object] = {"sample_id": scores["sample_id"].astype(str).to_numpy()[drawn]}
    for j, axis in enumerate(axes):
        data[axis] = values[drawn, j].astype(np.float32)
    data["sample_set"] = np.where(supplementary[drawn], "supplementary", "active")
    # markers of the static figures (report/style.py): supplementary samples are triangles
    data["marker"] = np.where(supplementary[drawn], "triangle", "circle")

    labels = {axis: _axis_label(axis, ratios) for axis in axes}
    bounds = {axis: _bounds(values[:, j]) for j, axis in enumerate(axes)}
    if scored is not None and len(scored):
        scored_values = scored[list(axes)].to_numpy(dtype=np.float64)
        for j, axis in enumerate(axes):
            low, high = bounds[axis]
            b = _bounds(np.concatenate([values[:, j], scored_values[:, j]]))
            bounds[axis] = (min(low, b[0]), max(high, b[1]))

    plot = _figure(None, x_range=bounds[axes[0]], y_range=bounds[axes[1]])
    plot.xaxis.axis_label = labels[axes[0]]
    plot.yaxis.axis_label = labels[axes[1]]

    colourings: list[Colouring] = []
    tooltips = [("sample", "@sample_id"), ("set", "@sample_set")]
    treatments = dict(treatments or {})
    if annotations is not None:
        for j, name in enumerate(annotations.columns):
            key = f"annotation_{j}"
            cells = annotations[name].to_numpy(dtype=object)[drawn]
            if treatments.get(name) == "numeric":
                numbers = pd.to_numeric(pd.Series(cells, dtype=object), errors="coerce").to_numpy(np.float64)
                data[key] = numbers
                finite = numbers[np.isfinite(numbers)]
                low, high = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
                mapper = LinearColorMapper(palette=list(_sequential()), low=low, high=high, nan_color=NEUTRAL)
                guide = ColorBar(color_mapper=mapper, title=str(name), visible=False, width=12,
                                 title_text_font=FONT, title_text_font_style="normal")
                colourings.append(Colouring(str(name), key, mapper, guide))
            else:
                text = np.array(["" if c is None or (isinstance(c, float) and c != c) else str(c) for c in cells],
                                dtype=object)
                data[key] = text
                colourings.append(_categorical_colouring(str(name), key, text))
            tooltips.append((str(name), f"@{key}"))
    if supplementary.any():
        colourings.append(_categorical_colouring("active or supplementary", "sample_set", data["sample_set"]))
    colourings.append(Colouring("one colour", None, None, None))

    source = ColumnDataSource(data, name="sample-points")
    first = next((i for i, c in enumerate(colourings) if c.label == default_colour), 0)
    start = colourings[first]
    fill = {"field": start.field, "transform": start.mapper} if start.field else PLAIN
    renderer = plot.scatter(axes[0], axes[1], source=source, size=6, marker="marker", fill_color=fill, fill_alpha=0.75,
                            line_color=None, name="samples")
    renderers = [renderer]
    glyphs = [renderer.glyph]

    for i, colouring in enumerate(colourings):
        if isinstance(colouring.guide, _LegendSpec):
            items = [LegendItem(label=label, renderers=[renderer], index=index)
                     for label, index in colouring.guide.items]
            colouring.guide = Legend(items=items, visible=(i == first), title=colouring.label,
                                     label_text_font=FONT, title_text_font=FONT, click_policy="none")
        if colouring.guide is not None:
            colouring.guide.visible = i == first
            plot.add_layout(colouring.guide, "right")

    if scored is not None and len(scored):
        flagged = scored["flag"].astype(str).to_numpy() != "within"
        keep_scored = thin(len(scored), limit, keep=flagged)
        scored_data = {"sample_id": scored["sample_id"].astype(str).to_numpy()[keep_scored],
                       "flag": scored["flag"].astype(str).to_numpy()[keep_scored],
                       "colour": np.where(flagged[keep_scored], FLAGGED, "#555555"),
                       "width": np.where(flagged[keep_scored], 2.6, 1.0)}
        for j, axis in enumerate(axes):
            scored_data[axis] = scored[axis].to_numpy(dtype=np.float32)[keep_scored]
        scored_renderer = plot.scatter(axes[0], axes[1], source=ColumnDataSource(scored_data), marker="diamond",
                                       size=9, fill_color=None, line_color="colour", line_width="width",
                                       name="scored")
        renderers.append(scored_renderer)
        glyphs.append(scored_renderer.glyph)
        plot.add_tools(HoverTool(renderers=[scored_renderer],
                                 tooltips=[("scored sample", "@sample_id"), ("diagnostics", "@flag")]))
        key = Legend(items=[LegendItem(label="newly scored (diamonds; heavy black outline: flagged)", renderers=[scored_renderer])],
                     location="top_left", label_text_font=FONT, click_policy="hide")
        plot.add_layout(key, "above")

    plot.add_tools(HoverTool(renderers=[renderer], tooltips=tooltips))

    widgets = []
    if len(colourings) > 1:
        select = Select(title="Colour by", value=str(first), width=220,
                        options=[(str(i), c.label) for i, c in enumerate(colourings)])
        select.js_on_change("value", CustomJS(
            args=dict(glyph=renderer.glyph, fields=[c.field for c in colourings],
                      mappers=[c.mapper for c in colourings], guides=[c.guide for c in colourings], plain=PLAIN),
            code="""
const i = Number(cb_obj.value);
glyph.fill_color = fields[i] === null ? plain : {field: fields[i], transform: mappers[i]};
for (let j = 0; j < guides.length; j++) { if (guides[j] !== null) { guides[j].visible = (j === i); } }
"""))
        widgets.append(select)
    pair = _pair_selectors(plot, glyphs, axes, bounds, labels)
    if pair:
        widgets.extend(pair)
    layout = column(row(*widgets), plot, sizing_mode="stretch_width") if widgets else plot
    return layout, _thinned_note(len(drawn), n, "samples")


@dataclass
class _LegendSpec:
    items: list[tuple[str, int]]


def _categorical_colouring(label: str, key: str, text: np.ndarray) -> Colouring:
    """Colours for the categories of one column, most frequent first; the rest (and missing) grey."""
    from bokeh.models import CategoricalColorMapper

    present = text[text != ""]
    counts = pd.Series(present, dtype=object).value_counts(sort=True)
    kept = {str(c) for c in counts.index[: len(CATEGORICAL)]}  # the most frequent get colours
    factors = [c for c in ordered_levels(counts.index) if c in kept]  # in the figures' order
    mapper = CategoricalColorMapper(factors=factors, palette=list(CATEGORICAL[: len(factors)]) or [PLAIN],
                                    nan_color=NEUTRAL)
    first_index = {}
    for i, value in enumerate(text.tolist()):
        if value in factors and value not in first_index:
            first_index[value] = i
    items = [(f, first_index[f]) for f in factors]
    if len(counts) > len(factors) or (text == "").any():
        other = np.flatnonzero(~np.isin(text, factors))
        if other.size:
            items.append(("other or missing", int(other[0])))
    return Colouring(label, key, mapper, _LegendSpec(items))


# --------------------------------------------------------------------------- feature map


def feature_map(statistics: pd.DataFrame, axes: Sequence[str], *, kind: str, ratios: Mapping[str, float],
                supplementary: np.ndarray | None = None, limit: int = MAX_POINTS):
    """The features on two axes: correlations (with the unit circle) or loadings; hover names them.

    Parameters
    ----------
    statistics : DataFrame
        ``feature_statistics.tsv``: ``feature_id`` and ``correlation_<axis>`` / ``loading_<axis>``.
    kind : {"correlation", "loading"}
    """
    from bokeh.layouts import column, row
    from bokeh.models import ColumnDataSource, HoverTool

    n = len(statistics)
    supplementary = np.zeros(n, dtype=bool) if supplementary is None else np.asarray(supplementary, dtype=bool)
    values = statistics[[f"{kind}_{a}" for a in axes]].to_numpy(dtype=np.float64)
    drawn = thin(n, limit, keep=supplementary, extremes=values)
    data: dict[str, object] = {"feature_id": statistics["feature_id"].astype(str).to_numpy()[drawn],
                               "feature_set": np.where(supplementary[drawn], "supplementary", "active"),
                               "colour": np.where(supplementary[drawn], CATEGORICAL[1], PLAIN)}
    for j, axis in enumerate(axes):
        data[axis] = values[drawn, j].astype(np.float32)
    labels = {a: f"{kind} with {_axis_label(a, ratios)}" for a in axes}
    if kind == "correlation":
        bounds = {a: (-1.08, 1.08) for a in axes}
    else:
        bounds = {a: _bounds(values[:, j]) for j, a in enumerate(axes)}
    plot = _figure(None, x_range=bounds[axes[0]], y_range=bounds[axes[1]], width=560,
                   height=560 if kind == "correlation" else 480)
    plot.xaxis.axis_label = labels[axes[0]]
    plot.yaxis.axis_label = labels[axes[1]]
    if kind == "correlation":
        plot.ellipse(x=0, y=0, width=2, height=2, fill_color=None, line_color="#777777", line_width=1)
    plot.line(x=[bounds[axes[0]][0], bounds[axes[0]][1]], y=[0, 0], line_color="#bbbbbb")
    plot.line(x=[0, 0], y=[bounds[axes[1]][0], bounds[axes[1]][1]], line_color="#bbbbbb")
    renderer = plot.scatter(axes[0], axes[1], source=ColumnDataSource(data, name="feature-points"), size=5,
                            fill_color="colour", fill_alpha=0.6, line_color=None, name="features")
    plot.add_tools(HoverTool(renderers=[renderer], tooltips=[
        ("feature", "@feature_id"), ("set", "@feature_set"),
        (f"{kind} (horizontal)", "$data_x{0.000}"), (f"{kind} (vertical)", "$data_y{0.000}")]))
    pair = _pair_selectors(plot, [renderer.glyph], axes, bounds, labels, square=kind == "correlation")
    layout = column(row(*pair), plot, sizing_mode="stretch_width") if pair else plot
    return layout, _thinned_note(len(drawn), n, "features")


# ------------------------------------------------------------------------------ variance


def variance_chart(components: pd.DataFrame, *, signal_axes: int | None = None):
    """Variance ratio per axis as bars, with the cumulative share as a line (both in percent)."""
    from bokeh.models import ColumnDataSource, HoverTool, Span

    axes = components["axis"].astype(str).tolist()
    data = {"axis": axes,
            "ratio": 100 * components["variance_ratio"].to_numpy(dtype=np.float64),
            "cumulative": 100 * components["cumulative_ratio"].to_numpy(dtype=np.float64),
            "variance": components["variance"].to_numpy(dtype=np.float64)}
    source = ColumnDataSource(data)
    plot = _figure(None, x_range=axes, width=640, height=330)
    plot.tools = [t for t in plot.tools if type(t).__name__ in ("SaveTool", "ResetTool")]
    bars = plot.vbar(x="axis", top="ratio", width=0.7, source=source, fill_color=CATEGORICAL[0], line_color=None,
                     legend_label="share of the variance (%)")
    plot.line(x="axis", y="cumulative", source=source, line_color=CATEGORICAL[1], line_width=2,
              legend_label="cumulative share (%)")
    plot.scatter(x="axis", y="cumulative", source=source, size=6, fill_color=CATEGORICAL[1], line_color=None)
    if signal_axes is not None and 0 < signal_axes <= len(axes):
        plot.add_layout(Span(location=signal_axes + 0.0, dimension="height", line_dash="dashed",
                             line_color="#444444"))
    plot.y_range.start = 0
    plot.yaxis.axis_label = "percent of the variance"
    plot.xaxis.axis_label = "axis"
    plot.legend.location = "top_left"
    plot.legend.label_text_font = FONT
    plot.add_tools(HoverTool(renderers=[bars], tooltips=[
        ("axis", "@axis"), ("share", "@ratio{0.00} %"), ("cumulative", "@cumulative{0.00} %"),
        ("variance", "@variance{0.000}")]))
    if len(axes) > 30:
        plot.xaxis.major_label_orientation = 1.2
    return plot


# ----------------------------------------------------------------------- scoring diagnostics


def diagnostics_chart(diagnostics: pd.DataFrame, *, limit: int = MAX_POINTS):
    """T² against Q of newly scored samples, with the control limits written by scoring."""
    from bokeh.models import ColumnDataSource, HoverTool, Span

    n = len(diagnostics)
    flag = diagnostics["flag"].astype(str).to_numpy()
    flagged = flag != "within"
    drawn = thin(n, limit, keep=flagged)
    data = {"sample_id": diagnostics["sample_id"].astype(str).to_numpy()[drawn], "flag": flag[drawn],
            "t2": diagnostics["t2"].to_numpy(dtype=np.float64)[drawn],
            "q": diagnostics["q"].to_numpy(dtype=np.float64)[drawn],
            "colour": np.where(flagged[drawn], FLAGGED, PLAIN)}
    plot = _figure(None, width=560, height=420)
    renderer = plot.scatter("t2", "q", source=ColumnDataSource(data), size=6, fill_color="colour",
                            fill_alpha=0.75, line_color=None)
    plot.xaxis.axis_label = "Hotelling's T² (distance along the axes)"
    plot.yaxis.axis_label = "Q (squared distance off the axes)"
    for column, dimension in (("t2_limit", "height"), ("q_limit", "width")):
        if column in diagnostics and diagnostics[column].notna().any():
            plot.add_layout(Span(location=float(diagnostics[column].dropna().iloc[0]), dimension=dimension,
                                 line_dash="dashed", line_color="#444444"))
    plot.add_tools(HoverTool(renderers=[renderer], tooltips=[
        ("sample", "@sample_id"), ("diagnostics", "@flag"), ("T²", "@t2{0.00}"), ("Q", "@q{0.00}")]))
    return plot, _thinned_note(len(drawn), n, "scored samples")
