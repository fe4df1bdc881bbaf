"""Automatic description of each axis from its statistics.

For every axis: the features most positively and most negatively correlated with it
(Benjamini–Hochberg adjusted p-values over all features), the annotations significantly
associated with it (quantitative: correlation; qualitative: correlation ratio and the
categories with large test values), the most extreme and the best- and worst-represented
samples, and a one-sentence summary in plain language. The wording reports associations
only, never causes. An axis more strongly associated with a technical annotation than with
any other gets a warning: that is the usual sign of a batch effect.

Entry point: :func:`describe`, on a :class:`axiscope.fit.FitResult` or on a result directory
written by ``axiscope fit`` (no refit: the model, scores and feature statistics are read).
"""

from __future__ import annotations

import json
import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..errors import InputError
from ..io.output import read_result_table
from ..model.statistics import (
    FeatureAxisStatistics,
    benjamini_hochberg,
    feature_statistics,
    read_feature_statistics,
    sample_contributions,
    sample_quality,
)
from ..model.store import load_model
from .annotations import (
    AnnotationSet,
    load_annotations,
    qualitative_associations,
    quantitative_associations,
)

if TYPE_CHECKING:
    from ..fitting.result import FitResult

__all__ = ["Description", "SupplementarySamples", "InterpretationPlan", "describe", "describe_axes",
           "plan_interpretation", "interpret_fit", "read_feature_list"]

logger = logging.getLogger(__name__)

#: |test value| at or above which a category is reported (common practice, no source).
V_THRESHOLD = 2.0
#: Significance level of the adjusted p-values (common practice, no source).
ALPHA = 0.05
#: Smallest r² or η² for which the batch warning is raised (common practice, no source).
MIN_STRENGTH = 0.1


@dataclass
class SupplementarySamples:
    """Samples projected on the axes after the fit (not used to build them)."""

    sample_ids: np.ndarray
    scores: np.ndarray
    sq_dist: np.ndarray


@dataclass
class Description:
    """Statistics and text describing each axis; every table is a DataFrame.

    Attributes
    ----------
    axes : DataFrame
        One row per axis: variance ratio, summary sentence, strongest features and
        annotation, and the batch warning (``axis_description.tsv``).
    features : DataFrame
        Top features per axis and side with correlation and p-values (``axis_features.tsv``).
    samples : DataFrame
        Extreme and best/worst represented samples per axis (``axis_samples.tsv``).
    quantitative, qualitative, categories, variables : DataFrame
        Annotation statistics (``annotation_*.tsv``); empty without annotations.
    sample_quality, sample_contributions : DataFrame
    feature_statistics : FeatureAxisStatistics
    warnings : list of str
    markdown : dict of str to str
        ``axes/PC{j}.md`` contents, by axis name.
    """

    axes: pd.DataFrame
    features: pd.DataFrame
    samples: pd.DataFrame
    quantitative: pd.DataFrame
    qualitative: pd.DataFrame
    categories: pd.DataFrame
    variables: pd.DataFrame
    sample_quality: pd.DataFrame
    sample_contributions: pd.DataFrame
    feature_statistics: FeatureAxisStatistics
    warnings: list[str] = field(default_factory=list)
    markdown: dict[str, str] = field(default_factory=dict)
    supplementary_scores: pd.DataFrame | None = None

    @property
    def summaries(self) -> dict[str, str]:
        return dict(zip(self.axes["axis"], self.axes["summary"]))

    def write(self, directory: Path, *, features: bool = True) -> None:
        """Write every table, ``axes/PC{j}.md`` and the feature statistics into ``directory``."""
        from ..io.output import write_table

        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        write_table(self.sample_quality, directory / "sample_quality.tsv")
        write_table(self.sample_contributions, directory / "sample_contributions.tsv")
        if self.supplementary_scores is not None:
            write_table(self.supplementary_scores, directory / "supplementary_sample_scores.tsv")
        if features:
            self.feature_statistics.write(directory)
        write_table(self.axes, directory / "axis_description.tsv")
        write_table(self.features, directory / "axis_features.tsv")
        write_table(self.samples, directory / "axis_samples.tsv")
        if len(self.variables):
            write_table(self.variables, directory / "annotation_variables.tsv")
            write_table(self.quantitative, directory / "annotation_quantitative.tsv")
            write_table(self.qualitative, directory / "annotation_qualitative.tsv")
            write_table(self.categories, directory / "annotation_categories.tsv")
        axes_dir = directory / "axes"
        axes_dir.mkdir(exist_ok=True)
        for axis, text in self.markdown.items():
            (axes_dir / f"{axis}.md").write_text(text, encoding="utf-8")


def describe(
    source: "FitResult | str | Path",
    *,
    annotations: str | Path | pd.DataFrame | AnnotationSet | None = None,
    id_column: str = "sample_id",
    categorical: Iterable[str] | str | None = None,
    quantitative: Iterable[str] | str | None = None,
    technical: Iterable[str] | str | None = None,
    exclude_columns: Iterable[str] | str | None = None,
    allow_missing: bool = False,
    supplementary_features: FeatureAxisStatistics | None = None,
    supplementary_samples: SupplementarySamples | None = None,
    top: int = 10,
    n_samples: int = 5,
    alpha: float = ALPHA,
    v_threshold: float = V_THRESHOLD,
    min_strength: float = MIN_STRENGTH,
) -> Description:
    """Describe the axes of a fit, optionally against sample annotations.

    Parameters
    ----------
    source : FitResult or path
        A fit, or a directory written by ``axiscope fit`` (read without refitting: the
        ``model/`` folder, ``sample_scores.tsv``, ``manifest.json``, and if present
        ``feature_statistics.tsv``/``.zarr`` and ``supplementary_sample_scores.tsv``).
    annotations : path, DataFrame or AnnotationSet, optional
        Sample annotations, matched by ``id_column`` (see
        :func:`axiscope.annotations.load_annotations` for the other options). They must
        cover the active and the supplementary samples; columns are typed and counted on
        the active samples.
    exclude_columns : column names, optional
        Annotation columns not to analyse (e.g. the true/false supplementary-samples flag).
    supplementary_features : FeatureAxisStatistics, optional
        From :func:`axiscope.interpret.supplementary_feature_statistics`.
    supplementary_samples : SupplementarySamples, optional
    top : int, default=10
        Features listed per side of each axis.
    n_samples : int, default=5
        Samples listed per side and per quality extreme.
    alpha : float, default=0.05
        Level for adjusted p-values.
    v_threshold : float, default=2.0
        Categories with ``|v| ≥ v_threshold`` are reported.
    min_strength : float, default=0.1
        Smallest r² or η² of a technical annotation that triggers the batch warning.

    Returns
    -------
    Description
    """
    if isinstance(source, (str, Path)):
        loaded = _load_result_dir(Path(source))
        model, ids, scores, sq_dist = loaded["model"], loaded["sample_ids"], loaded["scores"], loaded["sq_dist"]
        feats = loaded["features"]
        if supplementary_samples is None:
            supplementary_samples = loaded["supplementary"]
    else:
        model, ids, scores, sq_dist = source.model, source.sample_ids, source.scores, source.sample_sq_dist
        feats = feature_statistics(model)
    if supplementary_features is not None:
        feats = feats.concat(supplementary_features)
    ann = None
    if annotations is not None:
        all_ids = np.asarray(ids, dtype=object)
        if supplementary_samples is not None:
            all_ids = np.concatenate([all_ids, np.asarray(supplementary_samples.sample_ids, dtype=object)])
        if isinstance(annotations, AnnotationSet):
            ann = annotations.take(ids)
        else:
            active = np.zeros(all_ids.shape[0], dtype=bool)
            active[: len(ids)] = True
            ann = load_annotations(annotations, all_ids, id_column=id_column, categorical=categorical,
                                   quantitative=quantitative, technical=technical, exclude=exclude_columns,
                                   allow_missing=allow_missing, active=active).take(ids)
    return describe_axes(
        axis_names=model.axis_names, variance_ratio=model.variance_ratio,
        singular_values=model.singular_values, sample_ids=np.asarray(ids), scores=scores,
        sq_dist=sq_dist, features=feats, annotations=ann, supplementary_samples=supplementary_samples,
        top=top, n_samples=n_samples, alpha=alpha, v_threshold=v_threshold, min_strength=min_strength,
    )


def _load_result_dir(directory: Path) -> dict:
    """Model, active scores, squared distances and feature statistics of a fit output directory."""
    if not directory.is_dir():
        raise InputError(f"{directory}: no such result directory; pass the --out folder of 'axiscope fit'")
    manifest_path = directory / "manifest.json"
    scores_path = directory / "sample_scores.tsv"
    for path in (manifest_path, scores_path):
        if not path.is_file():
            raise InputError(f"{directory}: not an axiscope fit result ({path.name} is missing); "
                             "pass the --out folder of 'axiscope fit'")
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{manifest_path}: unreadable ({exc.__class__.__name__}); refit or restore the result") from exc
    if not isinstance(manifest, dict):
        raise InputError(f"{manifest_path}: not an axiscope manifest; refit or restore the result")
    model = load_model(directory / "model")
    table = read_result_table(scores_path, required=["sample_id"] + model.axis_names, numeric=model.axis_names)
    scores = table[model.axis_names].to_numpy(dtype=np.float64)
    n_active = manifest.get("n_active_samples", scores.shape[0])
    if scores.shape[0] != model.n_samples or scores.shape[0] != n_active:
        raise InputError(f"{scores_path}: {scores.shape[0]} samples, but the model was fitted on "
                         f"{model.n_samples}; the directory mixes results of different fits, refit")
    sq_dist = model.extras.get("training_sq_dist")
    if sq_dist is None or np.shape(sq_dist) != (scores.shape[0],):
        logger.warning("%s: the model has no squared distances of its samples; squared cosines are "
                       "missing (refit with this axiscope to get them)", directory)
        sq_dist = np.full(scores.shape[0], np.nan)
    active_feats = feature_statistics(model)
    stored = read_feature_statistics(directory, n_samples=model.n_samples)
    feats = active_feats
    if stored is not None and stored.supplementary.any():
        sup = stored.supplementary
        feats = active_feats.concat(FeatureAxisStatistics(
            stored.feature_ids[sup], sup[sup], stored.loading[sup], stored.correlation[sup],
            stored.contribution[sup], stored.sq_cosine[sup], model.n_samples, model.axis_names))
    supplementary = None
    sup_path = directory / "supplementary_sample_scores.tsv"
    if sup_path.is_file():
        numeric = model.axis_names + ["sq_dist"]
        sup_table = read_result_table(sup_path, required=["sample_id"] + numeric, numeric=numeric)
        supplementary = SupplementarySamples(sup_table["sample_id"].to_numpy(dtype=object),
                                             sup_table[model.axis_names].to_numpy(dtype=np.float64),
                                             sup_table["sq_dist"].to_numpy(dtype=np.float64))
    return {"model": model, "sample_ids": table["sample_id"].to_numpy(dtype=object), "scores": scores,
            "sq_dist": np.asarray(sq_dist, dtype=np.float64), "features": feats,
            "supplementary": supplementary}


def describe_axes(
    *,
    axis_names: Sequence[str],
    variance_ratio: np.ndarray,
    singular_values: np.ndarray,
    sample_ids: np.ndarray,
    scores: np.ndarray,
    sq_dist: np.ndarray,
    features: FeatureAxisStatistics,
    annotations: AnnotationSet | None = None,
    supplementary_samples: SupplementarySamples | None = None,
    top: int = 10,
    n_samples: int = 5,
    alpha: float = ALPHA,
    v_threshold: float = V_THRESHOLD,
    min_strength: float = MIN_STRENGTH,
) -> Description:
    """Build a :class:`Description` from arrays (the active samples in ``scores``)."""
    axis_names = list(axis_names)
    F = np.asarray(scores, dtype=np.float64)
    quality = sample_quality(sample_ids, F, sq_dist, axis_names)
    sup_scores = None
    if supplementary_samples is not None and len(supplementary_samples.sample_ids):
        quality = pd.concat([quality, sample_quality(supplementary_samples.sample_ids, supplementary_samples.scores,
                                                     supplementary_samples.sq_dist, axis_names,
                                                     status="supplementary")], ignore_index=True)
        sup_scores = pd.DataFrame(supplementary_samples.scores, columns=axis_names)
        sup_scores.insert(0, "sq_dist", supplementary_samples.sq_dist)
        sup_scores.insert(0, "sample_id", supplementary_samples.sample_ids)
    contributions = sample_contributions(sample_ids, F, singular_values, axis_names)

    feature_table = _top_features(features, top)
    sample_table = _extreme_samples(sample_ids, F, quality.iloc[: F.shape[0]], axis_names, n_samples)
    if annotations is not None:
        quant = quantitative_associations(annotations, F, axis_names)
        qual, cats = qualitative_associations(annotations, F, axis_names)
        variables = annotations.variables
    else:
        quant = quantitative_associations(_empty_annotations(sample_ids), F, axis_names)
        qual, cats = qualitative_associations(_empty_annotations(sample_ids), F, axis_names)
        variables = pd.DataFrame(columns=["variable", "kind", "technical", "n_used", "n_missing", "n_levels", "status"])

    rows, warnings, markdown = [], [], {}
    for j, axis in enumerate(axis_names):
        ratio = float(variance_ratio[j])
        ftab = feature_table[feature_table.axis == axis]
        strongest = _strongest(axis, quant, qual, alpha)
        warning = ""
        if strongest is not None and strongest["technical"] and strongest["strength"] >= min_strength:
            warning = (f"{axis} is more strongly associated with the technical annotation "
                       f"{strongest['variable']!r} ({strongest['measure']} = {strongest['strength']:.2f}) than with "
                       f"any other annotation; this is the usual sign of a batch effect: check the processing "
                       f"before interpreting {axis}")
            warnings.append(warning)
            logger.warning("%s", warning)
        sig_cats = cats[(cats.axis == axis) & (cats.test_value.abs() >= v_threshold)]
        summary = _summary(axis, ratio, ftab, strongest, sig_cats, alpha, annotations is not None, bool(warning),
                           min_strength)
        pos = ftab[ftab.direction == "positive"].feature_id.tolist()
        neg = ftab[ftab.direction == "negative"].feature_id.tolist()
        rows.append({
            "axis": axis,
            "variance_ratio": ratio,
            "summary": summary,
            "top_positive_features": ", ".join(pos[:5]),
            "top_negative_features": ", ".join(neg[:5]),
            "strongest_annotation": strongest["variable"] if strongest is not None else "",
            "association_measure": strongest["measure"] if strongest is not None else "",
            "association_strength": strongest["strength"] if strongest is not None else np.nan,
            "strongest_is_technical": bool(strongest is not None and strongest["technical"]),
            "batch_warning": bool(warning),
            "warning": warning,
        })
        markdown[axis] = _markdown(axis, ratio, summary, warning, ftab, quant[quant.axis == axis],
                                   qual[qual.axis == axis], sig_cats, sample_table[sample_table.axis == axis],
                                   alpha, v_threshold, annotations is not None)
    axes = pd.DataFrame(rows)
    return Description(axes, feature_table, sample_table, quant, qual, cats, variables, quality,
                       contributions, features, warnings, markdown, sup_scores)


def _empty_annotations(sample_ids) -> AnnotationSet:
    return AnnotationSet(np.asarray(sample_ids, dtype=object), {}, {}, [], pd.DataFrame())


def _top_features(stats: FeatureAxisStatistics, top: int) -> pd.DataFrame:
    """The ``top`` features of largest positive and negative correlation on each axis."""
    p_raw = stats.p_values()
    p_adj = benjamini_hochberg(p_raw, axis=0)
    frames = []
    for j, axis in enumerate(stats.axis_names):
        r = stats.correlation[:, j]
        finite = np.flatnonzero(np.isfinite(r))
        m = min(top, finite.size)
        if m == 0:
            continue
        # partial selection keeps this O(p) for millions of features
        for direction, sign in (("positive", 1.0), ("negative", -1.0)):
            key = -sign * r[finite]
            part = finite[np.argpartition(key, m - 1)[:m]] if m < finite.size else finite
            part = part[np.argsort(-sign * r[part], kind="stable")]
            part = part[sign * r[part] > 0]
            frames.append(pd.DataFrame({
                "axis": axis, "direction": direction, "rank": np.arange(1, part.size + 1),
                "feature_id": stats.feature_ids[part],
                "status": np.where(stats.supplementary[part], "supplementary", "active"),
                "correlation": r[part], "p_value": p_raw[part, j], "p_adjusted": p_adj[part, j],
                "loading": stats.loading[part, j], "contribution": stats.contribution[part, j],
                "sq_cosine": stats.sq_cosine[part, j],
            }))
    columns = ["axis", "direction", "rank", "feature_id", "status", "correlation", "p_value", "p_adjusted",
               "loading", "contribution", "sq_cosine"]
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=columns)


def _extreme_samples(ids, F, quality: pd.DataFrame, axis_names, m) -> pd.DataFrame:
    rows = []
    ids = np.asarray(ids)
    m = min(m, F.shape[0])
    for j, axis in enumerate(axis_names):
        score = F[:, j]
        sq_cos = quality[f"sq_cosine_{axis}"].to_numpy()
        order = np.argsort(score, kind="stable")
        cos_order = np.argsort(np.where(np.isfinite(sq_cos), sq_cos, -np.inf), kind="stable")
        finite_cos = cos_order[np.isfinite(sq_cos[cos_order])]
        lists = {
            "highest_score": order[::-1][:m],
            "lowest_score": order[:m],
            "best_represented": finite_cos[::-1][:m],
            "worst_represented": finite_cos[:m],
        }
        for name, idx in lists.items():
            for rank, i in enumerate(idx, start=1):
                rows.append((axis, name, rank, ids[i], score[i], sq_cos[i]))
    return pd.DataFrame(rows, columns=["axis", "list", "rank", "sample_id", "score", "sq_cosine"])


def _strongest(axis: str, quant: pd.DataFrame, qual: pd.DataFrame, alpha: float) -> dict | None:
    """The annotation most strongly (and significantly) associated with the axis."""
    best = None
    q = quant[(quant.axis == axis) & (quant.p_adjusted < alpha)]
    for row in q.itertuples():
        strength = float(row.correlation) ** 2
        if best is None or strength > best["strength"]:
            best = {"variable": row.variable, "kind": "quantitative", "measure": "r²", "strength": strength,
                    "correlation": float(row.correlation), "technical": bool(row.technical)}
    c = qual[(qual.axis == axis) & (qual.p_adjusted < alpha)]
    for row in c.itertuples():
        strength = float(row.correlation_ratio)
        if best is None or strength > best["strength"]:
            best = {"variable": row.variable, "kind": "qualitative", "measure": "η²", "strength": strength,
                    "technical": bool(row.technical)}
    return best


def _summary(axis, ratio, ftab, strongest, sig_cats, alpha, annotated, warned, min_strength=MIN_STRENGTH) -> str:
    """One sentence: what the axis separates or follows, and its strongest features."""
    head = f"{axis} ({100 * ratio:.1f}% of variance)"
    parts = []
    if strongest is not None:
        var = strongest["variable"]
        if strongest["kind"] == "qualitative":
            cats = sig_cats[sig_cats.variable == var]
            pos = cats[cats.test_value > 0].sort_values("test_value", ascending=False).category.tolist()
            neg = cats[cats.test_value < 0].sort_values("test_value").category.tolist()
            if pos and neg:
                parts.append(f"separates {var} {pos[0]} (higher scores) from {var} {neg[0]} (lower scores)")
            elif pos:
                parts.append(f"sets {var} {pos[0]} apart from the other samples (higher scores)")
            elif neg:
                parts.append(f"sets {var} {neg[0]} apart from the other samples (lower scores)")
            else:
                parts.append(f"is associated with {var} (η² = {strongest['strength']:.2f})")
        else:
            r = strongest["correlation"]
            sign = "positively" if r > 0 else "negatively"
            parts.append(f"is {sign} correlated with {var} (r = {r:.2f})")
        if strongest["strength"] < min_strength:
            parts[-1] = f"is only weakly associated with any annotation (strongest: {var}, " \
                        f"{strongest['measure']} = {strongest['strength']:.2f})"
        if warned:
            parts[-1] += ", a technical annotation (possible batch effect)"
    elif annotated:
        parts.append("is not clearly associated with any annotation tested")
    sig = ftab[ftab.p_adjusted < alpha]
    pos = sig[sig.direction == "positive"].feature_id.tolist()[:3]
    neg = sig[sig.direction == "negative"].feature_id.tolist()[:3]
    feats = []
    if pos:
        feats.append(f"strongest positive features are {', '.join(pos)}")
    if neg:
        feats.append(f"strongest negative features are {', '.join(neg)}")
    if feats:
        feature_text = "its " + " and its ".join(feats)
    else:
        feature_text = "no feature is significantly correlated with it"
    if parts:
        return f"{head} {parts[0]}; {feature_text}."
    return f"{head}: {feature_text}."


def _fmt(x, digits=3) -> str:
    if x is None or (isinstance(x, float) and not np.isfinite(x)):
        return "—"
    if isinstance(x, (float, np.floating)):
        return f"{x:.{digits}g}"
    return str(x)


def _md_table(header: list[str], rows: list[list]) -> str:
    if not rows:
        return "_none_\n"
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(_fmt(v) for v in row) + " |" for row in rows]
    return "\n".join(lines) + "\n"


def _markdown(axis, ratio, summary, warning, ftab, quant, qual, cats, samples, alpha, v_threshold, annotated) -> str:
    out = [f"# {axis} — {100 * ratio:.2f}% of variance\n", summary + "\n"]
    if warning:
        out.append(f"> **Warning:** {warning}.\n")
    out.append(f"## Features most correlated with {axis}\n")
    out.append("Correlation of each feature with the scores; p-values adjusted for the number of "
               "features (Benjamini–Hochberg).\n")
    for direction in ("positive", "negative"):
        sub = ftab[ftab.direction == direction]
        out.append(f"### {direction.capitalize()} side\n")
        out.append(_md_table(["rank", "feature", "status", "correlation", "adjusted p", "contribution (%)"],
                             [[r.rank, r.feature_id, r.status, r.correlation, r.p_adjusted, r.contribution]
                              for r in sub.itertuples()]))
    if annotated:
        out.append("## Annotations\n")
        out.append(f"### Quantitative annotations (adjusted p < {alpha:g})\n")
        q = quant[quant.p_adjusted < alpha].sort_values("correlation", key=np.abs, ascending=False)
        out.append(_md_table(["annotation", "n", "correlation", "adjusted p", "technical"],
                             [[r.variable, r.n, r.correlation, r.p_adjusted, "yes" if r.technical else ""]
                              for r in q.itertuples()]))
        out.append(f"### Qualitative annotations (adjusted p < {alpha:g})\n")
        c = qual[qual.p_adjusted < alpha].sort_values("correlation_ratio", ascending=False)
        out.append(_md_table(["annotation", "n", "levels", "η²", "adjusted p", "technical"],
                             [[r.variable, r.n, r.n_levels, r.correlation_ratio, r.p_adjusted, "yes" if r.technical else ""]
                              for r in c.itertuples()]))
        out.append(f"### Categories with |test value| ≥ {v_threshold:g}\n")
        s = cats.sort_values("test_value", ascending=False)
        out.append(_md_table(["annotation", "category", "count", "mean score", "test value"],
                             [[r.variable, r.category, r.count, r.mean_score, r.test_value] for r in s.itertuples()]))
    out.append("## Samples\n")
    titles = {"highest_score": "Highest scores", "lowest_score": "Lowest scores",
              "best_represented": "Best represented (largest squared cosine)",
              "worst_represented": "Worst represented (smallest squared cosine)"}
    for name, title in titles.items():
        sub = samples[samples.list == name]
        out.append(f"### {title}\n")
        out.append(_md_table(["rank", "sample", "score", "squared cosine"],
                             [[r.rank, r.sample_id, r.score, r.sq_cosine] for r in sub.itertuples()]))
    out.append("\n_Associations only: these statistics do not show what causes the axis._\n")
    return "\n".join(out)


# --------------------------------------------------------------------------- fit + description


@dataclass
class InterpretationPlan:
    """What to leave out of a fit and the annotations to describe it with.

    Attributes
    ----------
    active : ndarray of bool, shape (n_samples,) or None
        Samples used to build the axes (None: all).
    exclude : ndarray of bool, shape (n_features,) or None
        Supplementary features (None: none).
    annotations : AnnotationSet or None
        Aligned to the active samples of the source (typed and counted on them).
    """

    active: np.ndarray | None
    exclude: np.ndarray | None
    annotations: AnnotationSet | None


def read_feature_list(path: str | Path, feature_ids: Sequence[str]) -> np.ndarray:
    """Bool mask over ``feature_ids`` of the ids listed in a text file (one per line).

    Blank lines and lines starting with ``#`` are ignored; unknown ids are an error.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such feature list; check --supplementary-features")
    try:
        wanted = [line.strip() for line in path.read_text(encoding="utf-8").splitlines()]
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: not a UTF-8 text file; list one feature id per line") from exc
    wanted = [w for w in wanted if w and not w.startswith("#")]
    if not wanted:
        raise InputError(f"{path}: lists no feature id; put one id per line")
    index = pd.Index(np.asarray(feature_ids, dtype=object))
    position = index.get_indexer(pd.Index(wanted).unique())
    unknown = [w for w, i in zip(pd.Index(wanted).unique(), position) if i < 0]
    if unknown:
        raise InputError(f"{path}: {len(unknown)} of {len(set(wanted))} feature ids are not in the matrix "
                         f"(e.g. {', '.join(repr(u) for u in unknown[:5])}); fix them or check --feature-ids")
    mask = np.zeros(len(index), dtype=bool)
    mask[position] = True
    return mask


def plan_interpretation(
    source,
    *,
    annotations: str | Path | pd.DataFrame | None = None,
    id_column: str = "sample_id",
    categorical: Iterable[str] | str | None = None,
    quantitative: Iterable[str] | str | None = None,
    technical: Iterable[str] | str | None = None,
    supplementary_features: np.ndarray | None = None,
    supplementary_samples_column: str | None = None,
    allow_missing: bool = False,
) -> InterpretationPlan:
    """Read and check the annotations and supplementary elements before fitting ``source``.

    Every input error surfaces here, before the (long) fit.
    """
    from .annotations import read_annotations, sample_flags

    ann = None
    active = None
    if annotations is not None:
        where = str(annotations) if not isinstance(annotations, pd.DataFrame) else "annotations"
        frame = read_annotations(annotations, id_column=id_column) if not isinstance(annotations, pd.DataFrame) \
            else annotations
        if supplementary_samples_column:
            table = frame if frame.index.name == id_column else frame.set_index(id_column)
            flags = sample_flags(table, supplementary_samples_column, source.sample_ids, where=where,
                                 allow_missing=allow_missing)
            if flags.all():
                raise InputError(f"{where}: every sample is flagged in {supplementary_samples_column!r}; "
                                 "leave at least two samples active")
            active = ~flags if flags.any() else None
        ann = load_annotations(frame, source.sample_ids, id_column=id_column, categorical=categorical,
                               quantitative=quantitative, technical=technical,
                               exclude=supplementary_samples_column, allow_missing=allow_missing, where=where,
                               active=active)
    elif supplementary_samples_column:
        raise InputError("--supplementary-samples-column needs --annotations")
    exclude = None
    if supplementary_features is not None:
        exclude = np.asarray(supplementary_features, dtype=bool)
        if exclude.all():
            raise InputError("every feature is listed as supplementary; leave some features to build the axes")
        if not exclude.any():
            exclude = None
    return InterpretationPlan(active, exclude, ann)


def interpret_fit(plan: InterpretationPlan, result: "FitResult", source, *, top: int = 10,
                  memory_limit=None, threads=None, progress=None, **options) -> Description:
    """Project the supplementary samples, stream the supplementary features, and describe the axes.

    ``options`` go to :func:`describe` (``n_samples``, ``alpha``, ``v_threshold``, ``min_strength``).
    """
    from ..model.project import project
    from .supplementary import supplementary_feature_statistics

    sup_samples = None
    if plan.active is not None and not plan.active.all():
        projection = project(result.model, source, rows=~plan.active, memory_limit=memory_limit,
                             threads=threads, progress=progress, fill_missing=result.model.spec.missing == "mean")
        sup_samples = SupplementarySamples(projection.sample_ids, projection.scores, projection.sq_dist)
    sup_features = None
    if plan.exclude is not None:
        sup_features = supplementary_feature_statistics(
            source, result.scores, result.model.singular_values, columns=plan.exclude, rows=plan.active,
            spec=result.model.spec, axis_names=result.axis_names, sample_ids=result.sample_ids,
            memory_limit=memory_limit, threads=threads, progress=progress,
        )
    return describe(result, annotations=plan.annotations, supplementary_features=sup_features,
                    supplementary_samples=sup_samples, top=top, **options)
