"""The human page of one axis (Markdown), rendered from the records of the axis cards.

Nothing is computed here: every number comes from the records. Every text that comes from
the user's data (feature, sample, annotation and category names) goes through
:func:`markdown_text`, so that ``|``, backticks, line breaks or ``<script>`` in an id can
neither break a table nor inject markup.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import pandas as pd

from .legend import COLUMNS

__all__ = ["format_p_value", "format_number", "markdown_text", "markdown_table", "render_page",
           "P_VALUE_FLOOR"]

#: Below this, p-values are shown as "< 1e-300" (they underflow near the end of double precision).
P_VALUE_FLOOR = 1e-300

_MARKDOWN_SPECIAL = set("\\`*_[]|~#!")
_HTML = {"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;"}


def format_p_value(p: float | None) -> str:
    """A p-value in scientific notation with three significant digits, never ``0``.

    ``nan`` or None → ``"—"``; values below 1e-300 (including an underflowed 0) →
    ``"< 1e-300"``.
    """
    if p is None or pd.isna(p):
        return "—"
    p = float(p)
    if p < P_VALUE_FLOOR:
        return "< 1e-300"
    return f"{p:.2e}"


def format_number(x, digits: int = 3) -> str:
    """A number with ``digits`` significant digits (whole numbers in full); missing → ``"—"``;
    booleans as yes/no."""
    if x is None or (not isinstance(x, str) and pd.isna(x)):
        return "—"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    if isinstance(x, float):
        if math.isinf(x):
            return "∞" if x > 0 else "−∞"
        if x == int(x) and abs(x) < 1e15:  # counts and ranks, stored as floats in a long table
            return str(int(x))
        return f"{x:.{digits}g}"
    try:
        return format_number(x.item(), digits)  # numpy scalars
    except AttributeError:
        return markdown_text(x)


def markdown_text(value) -> str:
    """``value`` as inert Markdown text: markup characters escaped, HTML characters as entities,
    control characters (tab, line breaks ...) shown as their visible symbols (U+2400 block)."""
    out = []
    for ch in str(value):
        code = ord(ch)
        if code < 0x20:
            out.append(chr(0x2400 + code))
        elif code == 0x7F:
            out.append("\u2421")
        elif ch in _HTML:
            out.append(_HTML[ch])
        elif ch in _MARKDOWN_SPECIAL:
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def markdown_table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """A Markdown table from cells that are already formatted (and escaped)."""
    if not rows:
        return "_none_\n"
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(row) + " |" for row in rows]
    return "\n".join(lines) + "\n"


def _yes(flag) -> str:
    return "yes" if flag is True or (not pd.isna(flag) and bool(flag)) else ""


def _section(records: pd.DataFrame, section: str, side: str | None = None) -> pd.DataFrame:
    rows = records[records["section"] == section]
    if side is not None:
        rows = rows[rows["side"] == side]
    return rows


def render_page(axis: str, records: pd.DataFrame, usage: pd.DataFrame, *, annotated: bool, alpha: float) -> str:
    """The Markdown page of ``axis`` from its records (see :mod:`axiscope.explain.legend`).

    Parameters
    ----------
    axis : str
    records : DataFrame
        The records of this axis (``axis_cards`` rows with ``axis == axis``).
    usage : DataFrame
        The ``annotation_use`` records (how each annotation column was treated).
    annotated : bool
        Whether annotations were given.
    alpha : float
        Level of the adjusted p-values under which categories are listed.
    """
    name = markdown_text(axis)
    out = [f"# {name}: axis card\n"]
    reading = _section(records, "reading")
    if len(reading):
        out.append(f"**Reading.** {markdown_text(reading['text'].iloc[0])}\n")
    for text in _section(records, "warning")["text"]:
        out.append(f"> **Possible batch effect.** {markdown_text(text)}.\n")
    used = ["variance", "variance_ratio", "cumulative_ratio", "above_noise", "stability", "stable"]
    out.append("## How much it carries\n")
    out.append(_carries(_section(records, "carries")))
    out.append("## What it is built from\n")
    out.append("The features with the largest loadings on each side. Adjusted p-values test the "
               "feature's correlation with the scores (Benjamini–Hochberg over all features).\n")
    for side in ("positive", "negative"):
        out.append(f"### Largest {side} loadings\n")
        out.append(_built_from(_section(records, "built_from", side)))
    used += ["loading", "correlation", "contribution_pct", "sq_cosine", "p_adjusted", "supplementary"]
    if annotated:
        out.append("## What it lines up with\n")
        out.append("Every annotation, ranked by the share of this axis's variance it explains.\n")
        out.append(_lines_up(_section(records, "lines_up")))
        out.append(_usage_notes(usage))
        significant = _section(records, "lines_up")
        significant = significant[(significant["treated_as"] == "categorical") & (significant["p_adjusted"] < alpha)]
        out.append(f"### Categories above and below the mean score (annotations with adjusted p < {alpha:g})\n")
        out.append(_categories(_section(records, "category"), list(significant["annotation"])))
        used += ["treated_as", "technical", "n", "r_squared", "f_statistic", "p_value", "category_mean", "z"]
    out.append("## Samples at its ends\n")
    for side, title in (("positive", "Positive end (highest scores)"), ("negative", "Negative end (lowest scores)")):
        out.append(f"### {title}\n")
        out.append(_samples(_section(records, "end", side), contribution=True))
    out.append("## Samples it represents poorly\n")
    out.append("Little of these samples' distance from the centre lies along this axis (smallest squared "
               "cosines); their score says little about them.\n")
    out.append(_samples(_section(records, "off_axis"), contribution=False))
    used += ["score"]
    out.append("## How to read this page\n")
    out.extend(f"- **{column}**: {COLUMNS[column]}." for column in used)
    out.append("\n_These statistics report associations in this data set; they do not show what causes "
               "the axis._\n")
    return "\n".join(out)


def _carries(rows: pd.DataFrame) -> str:
    if not len(rows):
        return "_none_\n"
    r = rows.iloc[0]
    above = r["above_noise"]
    noise = "not assessed yet" if above is None or pd.isna(above) else ("yes" if bool(above) else "no")
    stability = r.get("stability")
    stable = "not assessed" if stability is None or pd.isna(stability) else (
        f"{float(stability):.2f} ({'stable' if bool(r.get('stable')) else 'unstable'})")
    return markdown_table(
        ["variance", "variance ratio (%)", "cumulative ratio (%)", "above the noise level", "split-half stability"],
        [[format_number(r["variance"]), f"{100 * float(r['variance_ratio']):.2f}",
          f"{100 * float(r['cumulative_ratio']):.2f}", noise, stable]],
    )


def _built_from(rows: pd.DataFrame) -> str:
    return markdown_table(
        ["rank", "feature", "loading", "correlation", "contribution (%)", "squared cosine", "adjusted p",
         "supplementary"],
        [[format_number(r["rank"]), markdown_text(r["feature_id"]), format_number(r["loading"]),
          format_number(r["correlation"]), format_number(r["contribution_pct"]), format_number(r["sq_cosine"]),
          format_p_value(r["p_adjusted"]), _yes(r["supplementary"])] for _, r in rows.iterrows()],
    )


def _lines_up(rows: pd.DataFrame) -> str:
    return markdown_table(
        ["annotation", "treated as", "technical", "n", "R²", "correlation", "F", "p-value", "adjusted p"],
        [[markdown_text(r["annotation"]), str(r["treated_as"]), _yes(r["technical"]), format_number(r["n"]),
          format_number(r["r_squared"]), format_number(r["correlation"]), format_number(r["f_statistic"]),
          format_p_value(r["p_value"]), format_p_value(r["p_adjusted"])] for _, r in rows.iterrows()],
    )


def _usage_notes(usage: pd.DataFrame) -> str:
    notes = [f"- {markdown_text(r['annotation'])}: {markdown_text(r['text'])}"
             for _, r in usage.iterrows() if isinstance(r["text"], str) and r["text"]]
    if not notes:
        return ""
    return "How the annotation columns were treated:\n\n" + "\n".join(notes) + "\n"


def _categories(rows: pd.DataFrame, annotations: list[str]) -> str:
    rows = rows[rows["annotation"].isin(annotations)]
    order = {a: i for i, a in enumerate(annotations)}
    rows = rows.assign(_order=rows["annotation"].map(order)).sort_values(
        ["_order", "z"], ascending=[True, False], kind="stable")
    return markdown_table(
        ["annotation", "category", "n", "category mean", "z", "p-value"],
        [[markdown_text(r["annotation"]), markdown_text(r["category"]), format_number(r["n"]),
          format_number(r["category_mean"]), format_number(r["z"]), format_p_value(r["p_value"])]
         for _, r in rows.iterrows()],
    )


def _samples(rows: pd.DataFrame, *, contribution: bool) -> str:
    header = ["rank", "sample", "score", "squared cosine"] + (["contribution (%)"] if contribution else [])
    header.append("supplementary")
    body = []
    for _, r in rows.iterrows():
        cells = [format_number(r["rank"]), markdown_text(r["sample_id"]), format_number(r["score"]),
                 format_number(r["sq_cosine"])]
        if contribution:
            cells.append(format_number(r["contribution_pct"]))
        cells.append(_yes(r["supplementary"]))
        body.append(cells)
    return markdown_table(header, body)
