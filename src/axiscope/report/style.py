"""The look of every axiscope figure, set in one place.

Colours
    Categories take the colour-blind-safe palette of Okabe & Ito (2008), without its black,
    which marks flagged samples instead; more categories than colours cycle the colours and
    change the marker shape. Numbers (annotations, squared cosines, densities) take one
    sequential map, ``cividis``, designed to read the same with and without colour vision
    deficiency (Nuñez, Anderton & Renslow 2018).

Marks
    Samples that built the axes are small filled circles; supplementary samples triangles and
    newly scored samples diamonds, both with a dark edge; flagged samples get a black ring.

Nothing here imports matplotlib: :func:`rc` returns plain settings for
``matplotlib.rc_context``.

References
----------
Okabe, M. & Ito, K. (2008). Color Universal Design (CUD): how to make figures and
presentations that are friendly to colorblind people. https://jfly.uni-koeln.de/color/
Nuñez, J. R., Anderton, C. R. & Renslow, R. S. (2018). Optimizing colormaps with
consideration for color vision deficiency. *PLOS ONE* 13, e0199239.
doi:10.1371/journal.pone.0199239
"""

from __future__ import annotations

__all__ = [
    "CATEGORY_COLOURS", "CATEGORY_MARKERS", "SEQUENTIAL_MAP", "DENSITY_MAP", "INK", "MUTED", "NO_VALUE",
    "POINT", "SUPPLEMENTARY", "NEW", "FLAGGED", "CENTRE", "ELLIPSE", "ARROW", "LIMIT", "LIMIT_SECONDARY",
    "UNIFORM", "BAR", "CUMULATIVE", "MAP_SIZE", "WIDE_SIZE", "DPI", "rc", "category_style",
]

#: Okabe–Ito colours in the order used for categories (black left out; yellow, the least
#: visible on white, last).
CATEGORY_COLOURS = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442")
#: Marker shapes taken in turn once the colours have all been used.
CATEGORY_MARKERS = ("o", "s", "v", "P", "X")
#: The one sequential colour map (numeric annotations, squared cosines).
SEQUENTIAL_MAP = "cividis"
#: Light grey ramp under the points when samples are too many to draw one by one.
DENSITY_MAP = "Greys"
#: Text, axes and lines.
INK = "#222222"
#: Secondary lines and samples without colour.
MUTED = "#8C8C8C"
#: Samples without a value of the colouring annotation.
NO_VALUE = "#BBBBBB"

#: Samples that built the axes.
POINT = {"marker": "o", "s": 14.0, "alpha": 0.75, "linewidths": 0.0}
#: Supplementary samples (placed on the axes after the fit).
SUPPLEMENTARY = {"marker": "^", "s": 30.0, "alpha": 0.9, "edgecolors": INK, "linewidths": 0.6}
#: Newly scored samples.
NEW = {"marker": "D", "s": 24.0, "alpha": 0.9, "edgecolors": INK, "linewidths": 0.6}
#: The ring drawn around flagged samples.
FLAGGED = {"marker": "o", "s": 90.0, "facecolors": "none", "edgecolors": "#000000", "linewidths": 1.6}
#: The centre of a category.
CENTRE = {"marker": "P", "s": 110.0, "edgecolors": "#000000", "linewidths": 0.9, "zorder": 6}
#: The 95% confidence ellipse of a category's centre.
ELLIPSE = {"fill": False, "linewidth": 1.6, "zorder": 5}
#: Feature arrows.
ARROW = {"width": 0.004, "head_width": 0.035, "head_length": 0.045, "length_includes_head": True,
         "color": "#0072B2", "zorder": 4}
#: Control limits (solid: the confidence used for the flags; dashed: the 0.95 limits).
LIMIT = {"color": "#D55E00", "linewidth": 1.3, "linestyle": "-"}
LIMIT_SECONDARY = {"color": "#D55E00", "linewidth": 1.0, "linestyle": (0, (4, 3))}
#: The line of equal contributions.
UNIFORM = {"color": "#D55E00", "linewidth": 1.2, "linestyle": (0, (4, 3))}
#: Bars (variance, contributions) and the cumulative line.
BAR = {"color": "#56B4E9", "edgecolor": "#0072B2", "linewidth": 0.6}
CUMULATIVE = {"color": "#0072B2", "marker": "o", "markersize": 3.5, "linewidth": 1.4}

#: Figure sizes in inches.
MAP_SIZE = (6.4, 5.4)
WIDE_SIZE = (8.6, 4.4)
#: Resolution of PNG files.
DPI = 150


def rc() -> dict:
    """Settings for ``matplotlib.rc_context``: fonts, sizes, spines, reproducible SVG."""
    return {
        "font.family": "DejaVu Sans",
        "font.size": 9.0,
        "axes.titlesize": 10.5,
        "axes.titleweight": "bold",
        "axes.titlelocation": "left",
        "axes.labelsize": 9.0,
        "axes.edgecolor": INK,
        "axes.labelcolor": INK,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": True,
        "grid.color": "#E6E6E6",
        "grid.linewidth": 0.6,
        "axes.axisbelow": True,
        "xtick.color": INK,
        "ytick.color": INK,
        "xtick.labelsize": 8.0,
        "ytick.labelsize": 8.0,
        "legend.fontsize": 8.0,
        "legend.frameon": False,
        "figure.facecolor": "white",
        "savefig.facecolor": "white",
        "svg.hashsalt": "axiscope",
        "svg.fonttype": "path",
        "path.simplify": True,
    }


def category_style(index: int) -> tuple[str, str]:
    """Colour and marker of the ``index``-th category (0-based)."""
    n = len(CATEGORY_COLOURS)
    return CATEGORY_COLOURS[index % n], CATEGORY_MARKERS[(index // n) % len(CATEGORY_MARKERS)]


def ordered_levels(levels) -> list[str]:
    """Categories in a stable order: numerically when they are all numbers, else alphabetically."""
    labels = [str(v) for v in levels]
    try:
        return sorted(labels, key=float)
    except ValueError:
        return sorted(labels)
