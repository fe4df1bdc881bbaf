"""The self-contained HTML report of a result directory.

:func:`build_report` reads the records a fit (and optionally a scoring run) wrote —
``manifest.json``, ``components.tsv``, ``axis_cards.json``, ``sample_scores.tsv``,
``sample_statistics.tsv``, ``feature_statistics.tsv``, ``dropped_features.tsv``, the
scoring run's ``diagnostics.tsv``, ``scores.tsv`` and ``manifest.json`` — and renders them
into one HTML file with Jinja2 templates shipped in the package. It never recomputes a
statistic: numbers are formatted, sorted or filtered for display only. Sections whose
tables are absent are left out.

The file opens with no network: the chart library (:mod:`axiscope.report.interactive`),
styles and pictures are inline, and ``*.svg`` figures found in ``RESULT_DIR/figures/`` are
cleaned of scripts and outside references and embedded as data. Every text from the data
(ids, annotation names and values) is escaped by the templates' autoescaping.

Memory: the tables of the result directory are read whole (the sample and feature
tables are the largest: samples × axes and features × 4·axes numbers).
"""

from __future__ import annotations

import base64
import json
import logging
import os
import re
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import InputError, OptionError, agree, counted
from ..explain.pages import format_number, format_p_value
from ..explain.saved import cards_folder
from ..model.store import stored_checksum

__all__ = ["build_report", "CAUTIONS", "MAX_LISTED", "sanitise_svg"]

logger = logging.getLogger(__name__)

#: Rows of a long list (flagged samples, dropped features, groups) shown before "and N more".
MAX_LISTED = 50

#: The cautions closing every report.
CAUTIONS = (
    ("PCA is exploratory.", "The axes summarise where this data set varies most; they are not a model of how "
                            "it came about, and a different set of samples or features can give different axes."),
    ("Associations are not causes.", "An annotation that lines up with an axis shares variation with it in these "
                                     "samples; it does not show what drives the axis."),
    ("Projected scores are only as good as the reference cohort.",
     "New samples are placed on axes fitted to other samples: what the reference did not contain, the axes "
     "cannot show; the scoring diagnostics say which samples the model does not describe."),
    ("These results are not clinical decisions.", "Nothing in this report is a diagnosis or a basis for "
                                                  "treating a person."),
)

_SCALES = {"unit": "each feature divided by its standard deviation (standardised)",
           "none": "features kept in their own units (covariance)",
           "allele-frequency": "genotype dosages divided by sqrt(2q(1−q)), q = mean / 2"}


# ------------------------------------------------------------------------------- entry point


def build_report(result_dir: str | os.PathLike, *, annotations: str | os.PathLike | pd.DataFrame | None = None,
                 id_column: str = "sample_id", scores_dir: str | os.PathLike | None = None,
                 groups_dir: str | os.PathLike | None = None,
                 out: str | os.PathLike | None = None, overwrite: bool = False) -> Path:
    """Write ``report.html``: one self-contained, interactive page about a fit.

    Parameters
    ----------
    result_dir : path
        Output directory of ``axiscope fit`` (or of :meth:`FitResult.write` and the axis cards).
    annotations : path or DataFrame, optional
        Tab-separated sample annotations for the sample map's hover text and colours
        (default: the file the axis cards were computed with, when it still exists).
    id_column : str, default="sample_id"
        Annotation column holding the sample ids.
    scores_dir : path, optional
        Output directory of ``axiscope score`` against this fit: adds the scoring
        diagnostics and the newly scored samples on the map.
    groups_dir : path, optional
        Output directory of ``axiscope groups`` for this fit (default: ``result_dir/groups``
        when it holds groups): adds the groups, their profiles, and the group as a colour of
        the sample map.
    out : path, optional
        Where to write (default: ``result_dir/report.html``); written to a temporary file
        beside it and renamed, so a reader never sees half a report.
    overwrite : bool, default=False
        Replace an existing file at ``out``; without it an existing file is refused.

    Returns
    -------
    Path
        The report written.

    Raises
    ------
    InputError
        ``result_dir`` holds no fit, a record is unreadable, or ``scores_dir`` holds no
        scoring diagnostics.
    OptionError
        ``out`` is a folder, or an existing file and ``overwrite`` is not set.
    """
    started = time.perf_counter()
    result_dir = Path(result_dir)
    target = Path(out) if out is not None else result_dir / "report.html"
    if target.is_dir():
        raise OptionError(f"out={str(target)!r} is a folder; give the path of the page to write")
    if target.exists() and not overwrite:
        raise OptionError(f"{target}: already exists; pass overwrite=True to replace it, or another path as out=...")
    files = _ResultFiles.read(result_dir, scores_dir=Path(scores_dir) if scores_dir is not None else None,
                              groups_dir=Path(groups_dir) if groups_dir is not None else None)
    if annotations is not None and not isinstance(annotations, pd.DataFrame):
        annotations = Path(annotations)
    context = _context(files, annotations=annotations, id_column=id_column)
    html = _render(context)
    _write_atomically(html, target)
    logger.info("report written to %s (%.1f MB, %.1f s)", target, len(html) / 1e6, time.perf_counter() - started)
    return target


def _render(context: dict) -> str:
    from jinja2 import Environment, PackageLoader, StrictUndefined

    env = Environment(loader=PackageLoader("axiscope.report", "templates"), autoescape=True,
                      undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    return env.get_template("report.html.j2").render(**context)


def _write_atomically(text: str, target: Path) -> None:
    if not target.parent.is_dir():
        raise InputError(f"{target.parent}: no such folder for the report; create it first")
    handle = tempfile.NamedTemporaryFile("w", encoding="utf-8", dir=target.parent, prefix=f".{target.name}.",
                                         suffix=".tmp", delete=False)
    try:
        with handle:
            handle.write(text)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(handle.name, 0o666 & ~umask)
        os.replace(handle.name, target)
    except BaseException:
        Path(handle.name).unlink(missing_ok=True)
        raise


# ------------------------------------------------------------------------------- reading


class _ResultFiles:
    """The records of a result directory (None where a file is absent)."""

    def __init__(self, directory: Path) -> None:
        self.directory = directory
        self.manifest: dict | None = None
        self.components: pd.DataFrame | None = None
        self.cards: dict | None = None
        self.sample_scores: pd.DataFrame | None = None
        self.supplementary_scores: pd.DataFrame | None = None
        self.sample_statistics: pd.DataFrame | None = None
        self.feature_statistics: pd.DataFrame | None = None
        self.dropped_features: pd.DataFrame | None = None
        self.groups: pd.DataFrame | None = None
        self.group_files: GroupFiles | None = None
        self.scoring_manifest: dict | None = None
        self.diagnostics: pd.DataFrame | None = None
        self.scores: pd.DataFrame | None = None
        self.scores_dir: Path | None = None

    @classmethod
    def read(cls, directory: Path, *, scores_dir: Path | None, groups_dir: Path | None = None) -> "_ResultFiles":
        if not directory.is_dir():
            raise InputError(f"{directory}: no such result directory; give the --out folder of 'axiscope fit'")
        files = cls(directory)
        files.manifest = _json(directory / "manifest.json")
        files.components = _tsv(directory / "components.tsv", numeric=("variance", "variance_ratio",
                                                                        "cumulative_ratio"))
        if files.manifest is None or files.components is None:
            raise InputError(f"{directory}: no manifest.json and components.tsv; give the --out folder of "
                             "'axiscope fit'")
        cards = cards_folder(directory)  # the cards of a later 'axiscope explain' first
        files.cards = _json(cards / "axis_cards.json")
        files.sample_scores = _tsv(directory / "sample_scores.tsv")
        files.supplementary_scores = _tsv(cards / "supplementary_sample_scores.tsv")
        files.sample_statistics = _tsv(cards / "sample_statistics.tsv")
        files.feature_statistics = _tsv(cards / "feature_statistics.tsv")
        files.dropped_features = _tsv(directory / "dropped_features.tsv")
        files.groups = _tsv(directory / "groups.tsv")
        files.group_files = GroupFiles.read(directory, groups_dir)
        if files.group_files is not None:
            files.group_files.check_samples(
                files.sample_scores["sample_id"] if files.sample_scores is not None else None, directory)
        if scores_dir is not None:
            if not (scores_dir / "diagnostics.tsv").is_file():
                raise InputError(f"{scores_dir}: no diagnostics.tsv; give the --out folder of 'axiscope score'")
            files.scores_dir = scores_dir
            files.scoring_manifest = _json(scores_dir / "manifest.json")
            files.diagnostics = _tsv(scores_dir / "diagnostics.tsv", numeric=("t2", "q"))
            files.scores = _tsv(scores_dir / "scores.tsv")
            scored_with = ((files.scoring_manifest or {}).get("model") or {}).get("checksum")
            own = stored_checksum(directory / "model")
            if scored_with and own and scored_with != own:
                raise InputError(f"{scores_dir}: these samples were scored against another model than the one "
                                 f"in {directory / 'model'}; pass the scoring run of this fit as scores_dir")
        return files


class GroupFiles:
    """The records ``axiscope groups`` wrote (None where a file is absent).

    Found in ``groups_dir`` when given, else in ``RESULT_DIR/groups`` when that folder
    holds groups.
    """

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self.manifest: dict = _json(folder / "manifest.json") or {}
        self.summary = _tsv(folder / "groups.tsv", numeric=("n_samples", "share"))
        self.assignments = _tsv(folder / "assignments.tsv")
        self.counts = _tsv(folder / "group_counts.tsv")
        self.features = _tsv(folder / "group_features.tsv")
        self.annotations = _tsv(folder / "group_annotations.tsv")

    @classmethod
    def read(cls, directory: Path, groups_dir: Path | None) -> "GroupFiles | None":
        folder = groups_dir if groups_dir is not None else directory / "groups"
        holds = (folder / "assignments.tsv").is_file() and (folder / "groups.tsv").is_file()
        if groups_dir is None and not holds:
            return None
        if not holds:
            raise InputError(f"{folder}: no assignments.tsv and groups.tsv; give the --out folder of "
                             "'axiscope groups'")
        found = cls(folder)
        if found.assignments is None or not {"sample_id", "group"} <= set(found.assignments.columns):
            raise InputError(f"{folder / 'assignments.tsv'}: no sample_id and group columns; rerun 'axiscope groups'")
        return found

    def check_samples(self, sample_ids: pd.Series | None, directory: Path) -> None:
        """Refuse groups made on the samples of another fit."""
        if sample_ids is None:
            return
        if set(self.assignments["sample_id"].astype(str)) != set(sample_ids.astype(str)):
            raise InputError(f"{self.folder}: these groups were made on other samples than the fit in {directory}; "
                             "pass the groups of this fit as groups_dir, or rerun 'axiscope groups'")


def _json(path: Path) -> dict | None:
    if not path.is_file():
        return None
    try:
        with path.open(encoding="utf-8") as handle:
            value = json.load(handle)
    except (json.JSONDecodeError, UnicodeDecodeError, OSError) as exc:
        raise InputError(f"{path}: not readable JSON ({exc}); restore the file or rerun the command that wrote it") \
            from exc
    if not isinstance(value, dict):
        raise InputError(f"{path}: not a record of axiscope; restore the file or rerun the command that wrote it")
    return value


_ID_COLUMNS = {"sample_id": str, "feature_id": str, "axis": str}


def _tsv(path: Path, *, numeric: Sequence[str] = ()) -> pd.DataFrame | None:
    """A table written by :func:`axiscope.io.output.write_table`; ids always text, empty cells missing."""
    if not path.is_file():
        return None
    try:
        table = pd.read_csv(path, sep="\t", dtype=_ID_COLUMNS, keep_default_na=False, na_values=[""],
                            comment=None)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError, OSError) as exc:
        first = str(exc).strip().splitlines()
        raise InputError(f"{path}: not a readable table ({first[0] if first else type(exc).__name__}); "
                         "restore the file or rerun the command that wrote it") from exc
    for column in numeric:
        if column not in table.columns:
            raise InputError(f"{path}: no column {column}; restore the file or rerun the command that wrote it")
        try:
            table[column] = table[column].astype(np.float64)
        except (ValueError, TypeError) as exc:
            raise InputError(f"{path}: column {column} holds values that are not numbers; restore the file") from exc
    return table


def _flags(values: pd.Series) -> np.ndarray:
    """A true/false column as booleans (missing → False)."""
    return values.map(lambda v: str(v).strip().lower() in ("true", "1", "yes")).to_numpy(dtype=bool)


# ------------------------------------------------------------------------------- context


def _context(files: _ResultFiles, *, annotations: Path | pd.DataFrame | None, id_column: str) -> dict:
    from .. import __version__
    from .interactive import ChartSet

    charts = ChartSet()
    manifest = files.manifest or {}
    context: dict[str, Any] = {
        "title": _title(files),
        "version": __version__,
        "generated": time.strftime("%Y-%m-%d %H:%M", time.localtime()),
        "run": _run_section(manifest),
        "variance": _variance_section(files, charts),
        "axes": _axes_section(files.cards),
        "annotation_notes": _annotation_notes(files.cards),
        "maps": _maps_section(files, charts, annotations=annotations, id_column=id_column),
        "groups": _groups_section(files),
        "scoring": _scoring_section(files, charts),
        "warnings": _warnings_section(files),
        "cautions": [{"title": t, "text": x} for t, x in CAUTIONS],
        "figures": _figures(files.directory / "figures"),
    }
    script, divs, library = charts.embed()
    context.update(chart_script=_markup(script), chart_divs={k: _markup(v) for k, v in divs.items()},
                   chart_library=_markup(library), chart_notes=charts.notes)
    context["contents"] = [(key, title) for key, title in _SECTION_TITLES if context.get(key)]
    return context


_SECTION_TITLES = (
    ("run", "The run"), ("variance", "Variance along the axes"), ("maps", "Maps"),
    ("axes", "The axes one by one"), ("groups", "Groups"), ("scoring", "New samples against the model"),
    ("warnings", "Warnings"), ("cautions", "Before reading further"),
)


def _markup(html: str):
    from markupsafe import Markup

    return Markup(html)  # produced by Bokeh or by _figures, never from user text


def _title(files: _ResultFiles) -> str:
    path = (files.manifest or {}).get("input", {}).get("path")
    return f"axiscope report: {Path(path).name}" if path else "axiscope report"


def _fmt(value, digits: int = 3) -> str:
    if isinstance(value, str):
        return value
    return format_number(value, digits)


def _pct(value) -> str:
    return "—" if value is None or pd.isna(value) else f"{100 * float(value):.2f} %"


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]], *, numeric: Sequence[bool] | None = None,
           more: int = 0, optional: Sequence[str] = ()) -> dict:
    """A table for the template: cells as text (escaped there), which columns hold numbers.

    Columns named in ``optional`` are left out when every cell of theirs is empty.
    """
    cells = [[c if isinstance(c, str) else _fmt(c) for c in r] for r in rows]
    numeric = list(numeric) if numeric is not None else [False] * len(header)
    keep = [j for j, name in enumerate(header)
            if name not in optional or any(row[j] not in ("", "—") for row in cells)]
    return {"header": [header[j] for j in keep], "rows": [[row[j] for j in keep] for row in cells],
            "numeric": [numeric[j] for j in keep], "more": more}


# ------------------------------------------------------------------------------- the run

_SETTING_NAMES = {"n_components": "axes requested", "oversample": "extra basis columns",
                  "power_iterations": "power iterations", "tol": "requested relative accuracy",
                  "seed": "random seed", "threads": "threads"}



def _run_section(manifest: dict) -> dict:
    source = manifest.get("input", {})
    options = manifest.get("options", {})
    prep = options.get("preprocessing", {})
    shape = source.get("shape") or [None, None]
    facts = [
        ("input", str(source.get("path", "—"))),
        ("format", " · ".join(str(x) for x in (source.get("format"), source.get("dataset")) if x)),
        ("stored", f"{_fmt(shape[0])} × {_fmt(shape[1])} ({source.get('samples_in', 'rows')} hold the samples), "
                   f"{source.get('dtype', '—')}"),
        ("used", f"{_fmt(manifest.get('n_active_samples'))} samples × {_fmt(manifest.get('n_features_kept'))} "
                 "features"),
        ("axes", f"{_fmt(options.get('n_components'))}, {options.get('method', '—')} factorisation"),
        ("time", f"{float(manifest.get('seconds', float('nan'))):.1f} s"
                 + (f", {manifest['passes']['count']} passes over the data" if "passes" in manifest else "")),
        ("axiscope", str(manifest.get("axiscope_version", "—"))),
    ]
    steps = []
    if prep.get("counts_per"):
        steps.append(f"each sample scaled to sum to {_fmt(prep['counts_per'])}")
    if prep.get("log_transform"):
        steps.append("log(1 + x)")
    if prep.get("min_variance") is not None:
        steps.append(f"features with variance below {_fmt(prep['min_variance'])} dropped")
    if prep.get("top_variable") is not None:
        steps.append(f"the {_fmt(prep['top_variable'])} most variable features kept")
    if prep.get("missing") == "mean":
        steps.append("missing cells filled with the feature mean")
    steps.append("centred on feature means" if prep.get("center", True) else "not centred")
    steps.append(_SCALES.get(str(prep.get("scale")), f"scale {prep.get('scale')}"))
    adjusted = manifest.get("adjusted_for")
    if adjusted:  # written by fit --adjust-for
        steps.append(f"{', '.join(map(str, adjusted.get('columns', [])))} regressed out of every feature "
                     f"({_fmt(len(adjusted.get('terms', [])))} terms with the intercept)")
    settings = [(_SETTING_NAMES.get(k, k.replace("_", " ")), _fmt(v) if not isinstance(v, str) else v)
                for k, v in options.items() if k != "preprocessing" and not isinstance(v, dict)]
    passes = manifest.get("passes", {}).get("detail", [])
    accuracy = manifest.get("accuracy")
    return {
        "facts": facts,
        "steps": steps,
        "settings": settings,
        "passes": _table(["pass", "read from", "blocks", "seconds"],
                         [[str(p.get("name", "")), str(p.get("read_from", "")), p.get("blocks"), p.get("seconds")]
                          for p in passes], numeric=[False, False, True, True]) if passes else None,
        "accuracy": _accuracy(accuracy) if accuracy else None,
        "command_line": " ".join(str(a) for a in manifest.get("command_line", [])) or None,
    }


def _accuracy(accuracy: dict) -> dict:
    axes = accuracy.get("axes", [])
    how = accuracy.get("estimated_from", "")
    tol = accuracy.get("requested_tol")
    rows = [[a.get("axis", ""), _sci(a.get("singular_value_error")), _sci(a.get("loading_error")),
             _fmt(a.get("relative_gap")), "yes" if a.get("below_tol") else "no"] for a in axes]
    return {
        "summary": (f"Errors {'estimated from the Ritz residuals' if how == 'ritz residuals' else 'bounded by LAPACK'}"
                    f"; requested relative accuracy {_sci(tol)}; "
                    + ("every singular value meets it." if accuracy.get("all_below_tol") else
                       "not every singular value meets it.")),
        "table": _table(["axis", "singular value error (relative)", "loading error (sine of angle)",
                         "gap to the nearest axis (relative)", "meets the request"], rows,
                        numeric=[False, True, True, True, False]),
    }


def _sci(value) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "—"
    return f"{float(value):.1e}"


# -------------------------------------------------------------------------- variance


def _signal_axes(manifest: dict) -> int | None:
    value = manifest.get("signal_axes")
    if isinstance(value, dict):
        value = next((value[k] for k in ("n_axes", "count", "recommended", "n") if k in value), None)
    return int(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None


def _variance_section(files: _ResultFiles, charts) -> dict | None:
    from .interactive import variance_chart

    table = files.components
    if table is None or not len(table):
        return None
    manifest = files.manifest or {}
    signal = _signal_axes(manifest)
    charts.charts["variance"] = variance_chart(table, signal_axes=signal)
    rows = [[r.axis, r.variance, _pct(r.variance_ratio), _pct(r.cumulative_ratio)] for r in table.itertuples()]
    return {
        "table": _table(["axis", "variance", "share of the variance", "cumulative share"], rows,
                        numeric=[False, True, True, True]),
        "signal_axes": signal,
        "signal_detail": manifest.get("signal_axes") if "signal_axes" in manifest else None,
    }


# ------------------------------------------------------------------------------ axis cards


def _axes_section(cards: dict | None) -> list[dict] | None:
    if not cards or not cards.get("records"):
        return None
    records = pd.DataFrame.from_records(cards["records"])
    settings = cards.get("settings", {})
    alpha = float(settings.get("alpha", 0.05))
    annotated = bool((records["section"] == "lines_up").any())
    by_axis = {str(axis): rows for axis, rows in records.groupby("axis", sort=False)}
    return [_card(str(axis), by_axis.get(str(axis), records.iloc[:0]), alpha=alpha, annotated=annotated)
            for axis in cards.get("axes", [])]


def _annotation_notes(cards: dict | None) -> list[dict]:
    """How each annotation column was treated, from the ``annotation_use`` records."""
    notes = []
    for record in (cards or {}).get("records", []):
        if record.get("section") == "annotation_use":
            treated = record.get("treated_as") if record.get("used") is not False else "not used"
            notes.append({"annotation": str(record.get("annotation")), "treated_as": str(treated or "—"),
                          "technical": bool(record.get("technical")), "text": str(record.get("text") or "")})
    return notes


def _part(rows: pd.DataFrame, section: str, side: str | None = None) -> pd.DataFrame:
    part = rows[rows["section"] == section]
    return part[part["side"] == side] if side is not None else part


def _yes(value) -> str:
    return "yes" if value is True or (isinstance(value, str) and value.lower() == "true") else ""


def _stability(carries: pd.Series) -> str | None:
    """``0.97 (stable)`` / ``0.41 (unstable)`` from the card's split-half stability; None when not assessed."""
    value = carries.get("stability")
    if value is None or pd.isna(value):
        return None
    stable = carries.get("stable")
    return f"{float(value):.2f} ({'stable' if stable is True or _yes(stable) else 'unstable'})"


def _card(axis: str, rows: pd.DataFrame, *, alpha: float, annotated: bool) -> dict:
    carries = _part(rows, "carries")
    card: dict[str, Any] = {
        "axis": axis,
        "reading": next(iter(_part(rows, "reading")["text"]), None),
        "warnings": [str(t) for t in _part(rows, "warning")["text"] if isinstance(t, str)],
        "carries": None,
    }
    if len(carries):
        c = carries.iloc[0]
        noise = c.get("above_noise")
        card["carries"] = {"variance": _fmt(c["variance"]), "ratio": _pct(c["variance_ratio"]),
                           "cumulative": _pct(c["cumulative_ratio"]),
                           "above_noise": None if noise is None or pd.isna(noise) else ("yes" if noise else "no"),
                           "stability": _stability(c)}
    header = ["rank", "feature", "loading", "correlation", "contribution (%)", "squared cosine", "adjusted p",
              "supplementary"]
    card["drivers"] = {side: _table(header, [
        [r["rank"], str(r["feature_id"]), r["loading"], r["correlation"], r["contribution_pct"], r["sq_cosine"],
         format_p_value(r["p_adjusted"]), _yes(r["supplementary"])]
        for r in _part(rows, "built_from", side).to_dict("records")
    ], numeric=[True, False, True, True, True, True, True, False], optional=("supplementary",))
        for side in ("positive", "negative")}
    card["associations"] = None
    card["categories"] = None
    if annotated:
        lines_up = _part(rows, "lines_up")
        card["associations"] = _table(
            ["annotation", "treated as", "technical", "samples", "R²", "correlation", "p-value", "adjusted p"],
            [[str(r["annotation"]), str(r["treated_as"]), _yes(r["technical"]), r["n"], r["r_squared"],
              r["correlation"], format_p_value(r["p_value"]), format_p_value(r["p_adjusted"])]
             for r in lines_up.to_dict("records")],
            numeric=[False, False, False, True, True, True, True, True])
        shown = lines_up[(lines_up["treated_as"] == "categorical") & (lines_up["p_adjusted"].astype(float) < alpha)]
        names = [str(a) for a in shown["annotation"]]
        categories = _part(rows, "category")
        categories = categories[categories["annotation"].astype(str).isin(names)]
        order = {a: i for i, a in enumerate(names)}
        categories = categories.assign(_order=categories["annotation"].astype(str).map(order)).sort_values(
            ["_order", "z"], ascending=[True, False], kind="stable")
        card["categories"] = _table(
            ["annotation", "category", "samples", "mean score", "z", "p-value"],
            [[str(r["annotation"]), str(r["category"]), r["n"], r["category_mean"], r["z"],
              format_p_value(r["p_value"])] for r in categories.to_dict("records")],
            numeric=[False, False, True, True, True, True])
        card["alpha"] = _fmt(alpha)
    sample_header = ["rank", "sample", "score", "squared cosine", "supplementary"]
    card["ends"] = {side: _table(sample_header, [
        [r["rank"], str(r["sample_id"]), r["score"], r["sq_cosine"], _yes(r["supplementary"])]
        for r in _part(rows, "end", side).to_dict("records")], numeric=[True, False, True, True, False],
        optional=("supplementary",))
        for side in ("positive", "negative")}
    card["poorly"] = _table(sample_header, [
        [r["rank"], str(r["sample_id"]), r["score"], r["sq_cosine"], _yes(r["supplementary"])]
        for r in _part(rows, "off_axis").to_dict("records")], numeric=[True, False, True, True, False],
        optional=("supplementary",))
    return card


# ------------------------------------------------------------------------------------ maps


def _ratios(files: _ResultFiles) -> dict[str, float]:
    table = files.components
    return dict(zip(table["axis"].astype(str), table["variance_ratio"].astype(float))) if table is not None else {}


def _maps_section(files: _ResultFiles, charts, *, annotations: Path | pd.DataFrame | None, id_column: str) -> dict | None:
    from .interactive import MAX_MAP_AXES, feature_map, sample_map

    ratios = _ratios(files)
    section: dict[str, Any] = {"samples": False, "features": False, "feature_kind": None, "annotation_note": None}
    scores = files.sample_scores
    if scores is not None and len(scores) and "sample_id" in scores:
        axes = [c for c in scores.columns if c != "sample_id"][:MAX_MAP_AXES]
        if len(axes) >= 2:
            supplementary = np.zeros(len(scores), dtype=bool)
            extra = files.supplementary_scores
            if extra is not None and len(extra) and all(a in extra for a in axes):
                scores = pd.concat([scores[["sample_id", *axes]], extra[["sample_id", *axes]]], ignore_index=True)
                supplementary = np.r_[supplementary, np.ones(len(extra), dtype=bool)]
            table, treatments, default, note = _annotation_table(files, scores["sample_id"], annotations, id_column)
            table, treatments, default = _with_groups(files, scores["sample_id"], table, treatments, default)
            scored = None
            if files.scores is not None and files.diagnostics is not None and all(a in files.scores for a in axes):
                flags = files.diagnostics.set_index("sample_id")["flag"]
                scored = files.scores.assign(flag=files.scores["sample_id"].map(flags).fillna("within").to_numpy())
            layout, thinned = sample_map(scores, axes, ratios=ratios, supplementary=supplementary,
                                         annotations=table, treatments=treatments, default_colour=default,
                                         scored=scored)
            charts.charts["sample_map"] = layout
            charts.notes["sample_map"] = thinned
            section["samples"] = True
            section["annotation_note"] = note
    features = files.feature_statistics
    if features is not None and len(features):
        scale = (files.manifest or {}).get("options", {}).get("preprocessing", {}).get("scale")
        kind = "correlation" if scale == "unit" else "loading"
        axes = [c[len(kind) + 1:] for c in features.columns if c.startswith(f"{kind}_")][:MAX_MAP_AXES]
        if len(axes) >= 2:
            supplementary = _flags(features["supplementary"]) if "supplementary" in features else None
            layout, thinned = feature_map(features, axes, kind=kind, ratios=ratios, supplementary=supplementary)
            charts.charts["feature_map"] = layout
            charts.notes["feature_map"] = thinned
            section["features"] = True
            section["feature_kind"] = kind
    return section if section["samples"] or section["features"] else None


#: The colour of the sample map that shows the groups of ``axiscope groups``.
GROUP_COLOUR = "group (axiscope groups)"


def _with_groups(files: _ResultFiles, sample_ids: pd.Series, table: pd.DataFrame | None, treatments: dict,
                 default: str | None):
    """The map's annotation table with each sample's group added as a category, coloured first."""
    found = files.group_files
    if found is None:
        return table, treatments, default
    ids = pd.Index(sample_ids.astype(str).to_numpy(dtype=object))
    if table is None:
        table = pd.DataFrame(index=ids)
    groups = found.assignments.set_index(found.assignments["sample_id"].astype(str))["group"]
    labels = groups.reindex(ids)
    table = table.copy()
    table[GROUP_COLOUR] = [None if pd.isna(v) else f"group {v}" for v in labels]
    return table, {**treatments, GROUP_COLOUR: "categorical"}, GROUP_COLOUR


def _annotation_table(files: _ResultFiles, sample_ids: pd.Series, annotations: Path | pd.DataFrame | None, id_column: str):
    """Annotation values for the map (text, aligned to the samples), how each column is treated,
    which one to colour first, and a note for the reader."""
    from ..explain.annotations import classify_column, read_annotations

    cards = files.cards or {}
    if annotations is None:
        named = cards.get("settings", {}).get("annotations")
        if not named or not Path(named).is_file():
            return None, {}, None, None
        annotations = Path(named)
    table = read_annotations(annotations, id_column=id_column)
    aligned = table.reindex(pd.Index(sample_ids.astype(str).to_numpy(dtype=object)))
    unmatched = int(aligned.isna().all(axis=1).sum()) if aligned.shape[1] else 0
    records = pd.DataFrame.from_records(cards.get("records", [])) if cards.get("records") else pd.DataFrame()
    treatments: dict[str, str] = {}
    if len(records) and "section" in records:
        for r in records[records["section"] == "annotation_use"].to_dict("records"):
            if isinstance(r.get("treated_as"), str):
                treatments[str(r["annotation"])] = r["treated_as"]
    for name in aligned.columns:
        if name not in treatments:
            try:
                treatments[name] = classify_column(name, aligned[name]).treated_as
            except InputError:
                treatments[name] = "categorical"
    default = None
    if len(records) and "section" in records:
        first_axis = (cards.get("axes") or [None])[0]
        lines = records[(records["section"] == "lines_up") & (records["axis"] == first_axis)]
        lines = lines[lines["annotation"].astype(str).isin([str(c) for c in aligned.columns])]
        if len(lines):  # the records rank annotations by R²; the first is the one to colour by
            default = str(lines.iloc[0]["annotation"])
    note = "colours and hover text from " + (
        annotations.name if isinstance(annotations, Path) else "the annotations given")
    if unmatched:
        note += f"; {unmatched:,} samples have no row there"
    return aligned, treatments, default, note


# ------------------------------------------------------------------------------ groups


def _groups_section(files: _ResultFiles) -> dict | None:
    found = files.group_files
    if found is None:
        return _plain_groups(files.groups)
    manifest = found.manifest
    summary = found.summary if found.summary is not None else pd.DataFrame()
    centres = [c for c in summary.columns if str(c).startswith("centre_")][:4]
    rows = [[str(r["group"]), r["n_samples"], _pct(r["share"]), r.get("spread"), *[r[c] for c in centres]]
            for r in summary.to_dict("records")]
    section: dict[str, Any] = {
        "how": (f"{_fmt(manifest.get('n_groups'))} groups made by "
                f"{'k-means' if manifest.get('method') == 'k-means' else 'Ward'} on the scores of "
                f"{', '.join(str(a) for a in manifest.get('axes', []))}; number of groups: "
                f"{manifest.get('chosen_by', '—')}."),
        "lines": [str(line) for line in manifest.get("lines", [])],
        "table": _table(["group", "samples", "share", "spread", *[f"centre on {c[len('centre_'):]}" for c in centres]],
                        rows, numeric=[False, True, True, True, *[True] * len(centres)]),
        "counts": None,
        "profiles": [],
    }
    if found.counts is not None and len(found.counts) > 1:
        section["counts"] = _table(
            ["groups", "mean silhouette width", "Caliński–Harabasz", "between-group share", "chosen"],
            [[r["n_groups"], r["silhouette"], r["calinski_harabasz"], _pct(r["between_share"]), _yes(r["chosen"])]
             for r in found.counts.to_dict("records")], numeric=[True, True, True, True, False])
    for group in summary["group"].tolist() if len(summary) else []:
        section["profiles"].append(_group_profile(found, group))
    return section


def _group_profile(found: GroupFiles, group) -> dict:
    """The leading features on each side and the over-represented categories of one group."""
    shown = 10
    profile: dict[str, Any] = {"group": str(group), "features": None, "categories": None}
    features = found.features
    if features is not None and len(features):
        mine = features[features["group"].astype(str) == str(group)]
        header = ["rank", "feature", "group mean", "overall mean", "z", "adjusted p"]
        profile["features"] = {side: _table(header, [
            [r["rank"], str(r["feature_id"]), r["group_mean"], r["overall_mean"], r["z"],
             format_p_value(r["p_adjusted"])] for r in mine[mine["side"] == side].head(shown).to_dict("records")],
            numeric=[True, False, True, True, True, True]) for side in ("above", "below")}
    annotations = found.annotations
    if annotations is not None and len(annotations):
        mine = annotations[(annotations["group"].astype(str) == str(group))
                           & (annotations["treated_as"] == "categorical")
                           & (annotations["group_value"] > annotations["overall_value"])]
        mine = mine.sort_values("p_value", kind="stable").head(shown)
        profile["categories"] = _table(
            ["annotation", "category", "in the group", "share in the group", "share overall", "adjusted p"],
            [[str(r["annotation"]), str(r["category"]), r["n_group"], _pct(r["group_value"]),
              _pct(r["overall_value"]), format_p_value(r["p_adjusted"])] for r in mine.to_dict("records")],
            numeric=[False, False, True, True, True, True])
    return profile


def _plain_groups(groups: pd.DataFrame | None) -> dict | None:
    """A table of groups found beside the fit's own tables (``groups.tsv``), shown as it is."""
    if groups is None or not len(groups):
        return None
    shown = groups.head(MAX_LISTED)
    numeric = [pd.api.types.is_numeric_dtype(groups[c]) for c in groups.columns]
    return {"how": None, "lines": [], "counts": None, "profiles": [],
            "table": _table([str(c) for c in groups.columns],
                            [[("" if pd.isna(v) else v) if not isinstance(v, str) else v for v in row]
                             for row in shown.itertuples(index=False)], numeric=numeric,
                            more=len(groups) - len(shown))}


# ----------------------------------------------------------------------------- scoring


def _scoring_section(files: _ResultFiles, charts) -> dict | None:
    from .interactive import diagnostics_chart

    diagnostics = files.diagnostics
    if diagnostics is None:
        return None
    manifest = files.scoring_manifest or {}
    counts = manifest.get("counts", {})
    flags = diagnostics["flag"].astype(str)
    flagged = diagnostics[flags != "within"]
    shown = flagged.head(MAX_LISTED)
    levels = manifest.get("limits", {}).get("levels", [])
    plot, thinned = diagnostics_chart(diagnostics)
    charts.charts["diagnostics"] = plot
    charts.notes["diagnostics"] = thinned
    by_flag = flags.value_counts()
    return {
        "input": str(manifest.get("input", {}).get("path", files.scores_dir)),
        "n": len(diagnostics),
        "n_flagged": len(flagged),
        "flag_counts": _table(["diagnosis", "samples"], [[str(k), int(v)] for k, v in by_flag.items()],
                              numeric=[False, True]),
        "limits": _table(["confidence", "T² limit", "Q limit"],
                         [[_pct(level.get("confidence")), level.get("t2_limit"), level.get("q_limit")]
                          for level in levels], numeric=[True, True, True]) if levels else None,
        "limit_methods": [str(v) for k, v in manifest.get("limits", {}).items() if k in ("t2", "q")],
        "features_matched": counts.get("model_features_matched"),
        "features_filled": counts.get("model_features_filled"),
        "flagged": _table(["sample", "diagnosis", "T²", "Q"],
                          [[str(r["sample_id"]), str(r["flag"]), r["t2"], r["q"]] for r in shown.to_dict("records")],
                          numeric=[False, False, True, True], more=len(flagged) - len(shown)),
    }


# ----------------------------------------------------------------------------- warnings


def _warnings_section(files: _ResultFiles) -> dict | None:
    manifest = files.manifest or {}
    items: list[str] = []
    dropped = manifest.get("features_dropped") or {}
    for reason, count in dropped.items():
        items.append(f"{counted(int(count), 'feature')} left out of the axes ({reason}).")
    imputed = manifest.get("n_missing_imputed") or 0
    if imputed:
        items.append(f"{counted(int(imputed), 'missing cell')} {agree(int(imputed), 'was', 'were')} filled with "
                     "the feature mean before the fit.")
    technical = []
    if files.cards and files.cards.get("records"):
        for record in files.cards["records"]:
            if record.get("section") == "warning" and isinstance(record.get("text"), str):
                technical.append(f"{record['text']}.")
        for record in files.cards["records"]:
            if record.get("section") == "annotation_use" and record.get("used") is False:
                text = record.get("text") or "not analysed"
                items.append(f"Annotation '{record.get('annotation')}' was not used: {text}.")
    accuracy = manifest.get("accuracy") or {}
    if accuracy and not accuracy.get("all_below_tol", True):
        missed = [a.get("axis") for a in accuracy.get("axes", []) if not a.get("below_tol")]
        items.append(f"The singular values of {', '.join(str(m) for m in missed)} are less accurate than "
                     "requested; see the accuracy table of the run.")
    table = None
    if files.dropped_features is not None and len(files.dropped_features):
        d = files.dropped_features
        shown = d.head(MAX_LISTED)
        table = _table(["feature", "reason", "mean", "variance"],
                       [[str(r.get("feature_id")), str(r.get("reason", "")), r.get("mean"), r.get("variance")]
                        for r in shown.to_dict("records")], numeric=[False, False, True, True],
                       more=len(d) - len(shown))
    if not items and not technical and table is None:
        return None
    return {"items": items, "technical": technical, "dropped": table}


# ----------------------------------------------------------------------------- figures


#: Which section shows a static figure, by a word in its file name (first match wins).
_FIGURE_PLACES = (("diagnos", "scoring"), ("contribution", "axes"), ("quality", "maps"))
#: Static figures (named by :func:`axiscope.report.figures.write_figures`) whose picture the
#: page already draws interactively: left out, so that nothing is shown twice.
_DRAWN_INTERACTIVELY = ("variance", "samples_", "features_")


def _figures(folder: Path) -> dict[str, list[dict]]:
    """The ``*.svg`` figures in ``folder``, cleaned and as data URIs, by report section."""
    placed: dict[str, list[dict]] = {}
    if not folder.is_dir():
        return placed
    for path in sorted(folder.glob("*.svg")):
        if path.stem.lower().startswith(_DRAWN_INTERACTIVELY):
            continue
        try:
            svg = sanitise_svg(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, ValueError) as exc:
            logger.warning("%s: figure left out of the report (%s)", path, exc)
            continue
        stem = path.stem.lower()
        place = next((where for word, where in _FIGURE_PLACES if word in stem), "maps")
        placed.setdefault(place, []).append({
            "name": path.stem.replace("_", " "),
            "uri": "data:image/svg+xml;base64," + base64.b64encode(svg.encode("utf-8")).decode("ascii"),
        })
    return placed


_SVG_NS = "http://www.w3.org/2000/svg"
_DROPPED_ELEMENTS = {"script", "foreignObject", "metadata", "iframe", "object", "embed", "audio", "video"}
_OUTSIDE_URL = re.compile(r"url\(\s*(?!['\"]?#)[^)]*\)|@import[^;]*;?", re.IGNORECASE)


def sanitise_svg(text: str) -> str:
    """An SVG document without scripts, event handlers, embedded documents or outside references.

    Removed: ``script``, ``foreignObject``, ``metadata`` (and other embedding) elements,
    ``on*`` attributes, ``href``/``xlink:href`` that do not point inside the document
    (``#id``), and ``url(...)`` / ``@import`` not pointing inside it in styles. Entity
    declarations are refused (``ValueError``).
    """
    import xml.etree.ElementTree as ET

    if re.search(r"<!ENTITY", text, re.IGNORECASE):
        raise ValueError("entity declarations are not accepted")
    text = re.sub(r"<\?xml[^>]*\?>|<!DOCTYPE[^>]*>", "", text, flags=re.IGNORECASE)
    root = ET.fromstring(text)
    if _local(root.tag) != "svg":
        raise ValueError("not an SVG document")
    for parent in list(root.iter()):
        for child in list(parent):
            if not isinstance(child.tag, str) or _local(child.tag) in _DROPPED_ELEMENTS:
                parent.remove(child)
    for element in root.iter():
        for name in list(element.attrib):
            local = _local(name)
            value = element.attrib[name]
            if local.lower().startswith("on"):
                del element.attrib[name]
            elif local == "href" and not value.strip().startswith("#"):
                del element.attrib[name]
            elif local == "style" or (_local(element.tag) != "style" and "url(" in value):
                element.attrib[name] = _OUTSIDE_URL.sub("none", value)
        if _local(element.tag) == "style" and element.text:
            element.text = _OUTSIDE_URL.sub("none", element.text)
    ET.register_namespace("", _SVG_NS)
    ET.register_namespace("xlink", "http://www.w3.org/1999/xlink")
    return ET.tostring(root, encoding="unicode")


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]
