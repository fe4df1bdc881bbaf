"""Explaining the axes at fit time: check the annotations and supplementary elements before the
fit, then place the supplementary elements on the axes and build the axis cards after it."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..defaults import DEFAULT_TOP_FEATURES
from ..errors import InputError
from .annotations import (
    AnnotationSet,
    load_annotations,
    read_annotations,
    sample_flags,
    split_names,
)
from .cards import AxisCards, SupplementarySamples, explain_axes

if TYPE_CHECKING:
    from ..fitting.result import FitResult

__all__ = ["ExplanationPlan", "plan_explanation", "explain_fit", "read_feature_list"]


@dataclass
class ExplanationPlan:
    """What to leave out of a fit and the annotations to explain its axes with.

    Attributes
    ----------
    active : ndarray of bool, shape (n_samples,) or None
        Samples used to build the axes (None: all).
    exclude : ndarray of bool, shape (n_features,) or None
        Supplementary features (None: none).
    annotations : AnnotationSet or None
        Aligned to the active samples of the source (treated and counted on them).
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
        raise InputError(f"{path}: no such feature list; check supplementary_features")
    try:
        wanted = [line.strip() for line in path.read_text(encoding="utf-8").splitlines()]
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: not a UTF-8 text file; list one feature id per line") from exc
    wanted = pd.Index([w for w in wanted if w and not w.startswith("#")]).unique()
    if not len(wanted):
        raise InputError(f"{path}: lists no feature id; put one id per line")
    index = pd.Index(np.asarray(feature_ids, dtype=object))
    position = index.get_indexer(wanted)
    unknown = [w for w, i in zip(wanted, position) if i < 0]
    if unknown:
        raise InputError(f"{path}: {len(unknown)} of {len(wanted)} feature ids are not in the matrix "
                         f"(e.g. {', '.join(repr(u) for u in unknown[:5])}); fix them or check feature_ids")
    mask = np.zeros(len(index), dtype=bool)
    mask[position] = True
    return mask


def plan_explanation(
    source,
    *,
    annotations: str | Path | pd.DataFrame | None = None,
    id_column: str = "sample_id",
    categorical: Iterable[str] | str | None = None,
    numeric: Iterable[str] | str | None = None,
    technical: Iterable[str] | str | None = None,
    ignore: Iterable[str] | str | None = None,
    supplementary_features: np.ndarray | None = None,
    supplementary_samples_column: str | None = None,
    allow_missing: bool = False,
) -> ExplanationPlan:
    """Read and check the annotations and supplementary elements before fitting ``source``.

    Every input error surfaces here, before the (long) fit. The supplementary-samples
    column itself is not analysed as an annotation.
    """
    exclude = _supplementary_feature_mask(supplementary_features)
    if annotations is None:
        if supplementary_samples_column:
            raise InputError("supplementary_samples_column needs annotations")
        return ExplanationPlan(None, exclude, None)
    where = "annotations" if isinstance(annotations, pd.DataFrame) else str(annotations)
    frame = annotations if isinstance(annotations, pd.DataFrame) else read_annotations(annotations, id_column=id_column)
    active = None
    if supplementary_samples_column:
        table = frame if frame.index.name == id_column else frame.set_index(id_column)
        flags = sample_flags(table, supplementary_samples_column, source.sample_ids, where=where,
                             allow_missing=allow_missing)
        if flags.all():
            raise InputError(f"{where}: every sample is flagged in {supplementary_samples_column!r}; "
                             "leave at least two samples to build the axes")
        active = ~flags if flags.any() else None
    skipped = split_names(ignore) + ([supplementary_samples_column] if supplementary_samples_column else [])
    ann = load_annotations(frame, source.sample_ids, id_column=id_column, categorical=categorical, numeric=numeric,
                           technical=technical, ignore=skipped, allow_missing=allow_missing, where=where,
                           active=active)
    return ExplanationPlan(active, exclude, ann)


def _supplementary_feature_mask(mask: np.ndarray | None) -> np.ndarray | None:
    if mask is None:
        return None
    exclude = np.asarray(mask, dtype=bool)
    if exclude.all():
        raise InputError("every feature is listed in supplementary_features; leave some features to build the axes")
    return exclude if exclude.any() else None


def explain_fit(plan: ExplanationPlan, result: "FitResult", source, *, top: int = DEFAULT_TOP_FEATURES,
                memory_limit=None, threads=None, progress=None, scheduler=None, cluster=None,
                **options) -> AxisCards:
    """Place the supplementary samples and features on the axes, then build the axis cards.

    One streaming pass projects the supplementary samples and one computes the statistics
    of the supplementary features (each only when there are some). ``scheduler`` and
    ``cluster`` run them on a ``dask.distributed`` cluster as for :func:`axiscope.fit`
    (:class:`axiscope.Resources`); the fit's manifest records them (``explanation``:
    ``execution`` and ``passes``, as the fit's own). ``options`` go to
    :func:`axiscope.explain.cards.explain_axes` (``samples_per_list``, ``alpha``, ``warn_share``).
    """
    sup_samples = sup_features = None
    if (plan.active is not None and not plan.active.all()) or plan.exclude is not None:
        from ..core.options import Resources

        resources = Resources(memory_limit=memory_limit, threads=threads, scheduler=scheduler, cluster=cluster)
        sup_samples, sup_features = _supplementary_passes(plan, result, source, resources, progress)
    return explain_axes(result, annotations=plan.annotations, supplementary_features=sup_features,
                        supplementary_samples=sup_samples, top=top, **options)


def _supplementary_passes(plan: ExplanationPlan, result: "FitResult", source, resources, progress):
    """The supplementary samples' scores and the supplementary features' statistics, each in
    one pass on the back-end ``resources`` asks for; the passes are recorded in the fit's manifest."""
    from ..core.backends import open_backend
    from ..core.passes import PassRunner
    from ..model.project import project
    from .supplementary import supplementary_feature_statistics

    sup_samples = sup_features = None
    memory_limit, threads = resources.memory_limit, resources.n_threads
    with open_backend(resources) as backend:
        runner = PassRunner(threads=threads, progress=progress, backend=backend)
        if plan.active is not None and not plan.active.all():
            placed = project(result.model, source, rows=~plan.active, memory_limit=memory_limit, threads=threads,
                             progress=progress, fill_missing=result.model.spec.missing == "mean", runner=runner)
            # the projection keeps what the axes leave out; adding back the scores' part gives the squared norm
            norms = placed.residual + np.einsum("ij,ij->i", placed.scores, placed.scores)
            sup_samples = SupplementarySamples(placed.sample_ids, placed.scores, norms)
        if plan.exclude is not None:
            sup_features = supplementary_feature_statistics(
                source, result.scores, result.model.singular_values, columns=plan.exclude, rows=plan.active,
                spec=result.model.spec, axis_names=result.axis_names, sample_ids=result.sample_ids,
                memory_limit=memory_limit, threads=threads, progress=progress, runner=runner,
            )
        result.manifest["explanation"] = {"execution": runner.describe(),
                                          "passes": [r.to_dict() for r in runner.records]}
    return sup_samples, sup_features
