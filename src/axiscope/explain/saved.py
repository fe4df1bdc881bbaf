"""Reading back what ``axiscope fit`` wrote, so that the axes can be explained again without refitting."""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io.output import read_result_table
from ..model.statistics import (
    FeatureAxisStatistics,
    feature_statistics,
    read_feature_statistics,
)
from ..model.store import Model, load_model

__all__ = ["SavedFit", "SupplementarySamples", "read_saved_fit", "SUPPLEMENTARY_SCORES_FILE"]

logger = logging.getLogger(__name__)

#: Scores of the supplementary samples, written beside the fit's own tables.
SUPPLEMENTARY_SCORES_FILE = "supplementary_sample_scores.tsv"


@dataclass
class SupplementarySamples:
    """Samples placed on the axes after the fit (they did not help build them).

    Attributes
    ----------
    sample_ids : ndarray of str, shape (m,)
    scores : ndarray, shape (m, k)
    squared_norms : ndarray, shape (m,)
        Squared length of each preprocessed sample (squared distance to the centre when the
        features are centred).
    """

    sample_ids: np.ndarray
    scores: np.ndarray
    squared_norms: np.ndarray


@dataclass
class SavedFit:
    """The parts of a fit's result directory that the explanation needs."""

    model: Model
    sample_ids: np.ndarray
    scores: np.ndarray
    squared_norms: np.ndarray
    features: FeatureAxisStatistics
    supplementary: SupplementarySamples | None


#: Where ``axiscope explain`` writes axis cards inside a result directory by default.
EXPLANATION_DIR = "explanation"


def cards_folder(directory: Path) -> Path:
    """Where the axis cards of a result directory are: its ``explanation/`` folder when
    ``axiscope explain`` wrote cards there (made after the fit's, so the ones asked for last),
    else the directory itself."""
    later = Path(directory) / EXPLANATION_DIR
    return later if (later / "axis_cards.json").is_file() else Path(directory)


def read_saved_fit(directory: Path) -> SavedFit:
    """Model, scores, squared norms and feature statistics of a directory written by ``axiscope fit``.

    Reads ``model/``, ``manifest.json``, ``sample_scores.tsv`` and, when present, the
    supplementary features of ``feature_statistics.tsv``/``.zarr`` and
    ``supplementary_sample_scores.tsv``.

    Raises
    ------
    InputError
        The directory is missing, is not a fit result, or mixes results of different fits.
    """
    directory = Path(directory)
    if not directory.is_dir():
        raise InputError(f"{directory}: no such result directory; pass the output directory of 'axiscope fit'")
    manifest = _read_manifest(directory)
    model = load_model(directory / "model")
    scores_path = directory / "sample_scores.tsv"
    table = read_result_table(scores_path, required=["sample_id"] + model.axis_names, numeric=model.axis_names)
    scores = table[model.axis_names].to_numpy(dtype=np.float64)
    n_active = manifest.get("n_active_samples", scores.shape[0])
    if scores.shape[0] != model.n_samples or scores.shape[0] != n_active:
        raise InputError(f"{scores_path}: {scores.shape[0]} samples, but the model was fitted on "
                         f"{model.n_samples}; the directory mixes results of different fits, refit")
    return SavedFit(model, table["sample_id"].to_numpy(dtype=object), scores, _training_norms(model, directory),
                    _features(model, directory), _supplementary_samples(model, directory))


def read_manifest(directory: Path) -> dict:
    """The ``manifest.json`` of a result directory (an ``InputError`` when missing or unreadable)."""
    return _read_manifest(Path(directory))


def _read_manifest(directory: Path) -> dict:
    path = directory / "manifest.json"
    for required in (path, directory / "sample_scores.tsv"):
        if not required.is_file():
            raise InputError(f"{directory}: not an axiscope fit result ({required.name} is missing); "
                             "pass the output directory of 'axiscope fit'")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: unreadable ({exc.__class__.__name__}); refit or restore the result") from exc
    if not isinstance(manifest, dict):
        raise InputError(f"{path}: not an axiscope manifest; refit or restore the result")
    return manifest


def _training_norms(model: Model, directory: Path) -> np.ndarray:
    """Squared norms of the training samples, stored with the model at fit time."""
    norms = model.extras.get("training_sq_dist")
    if norms is None or np.shape(norms) != (model.n_samples,):
        logger.warning("%s: the model has no squared norms of its samples; squared cosines are missing "
                       "(refit with this axiscope to get them)", directory)
        return np.full(model.n_samples, np.nan)
    return np.asarray(norms, dtype=np.float64)


def _features(model: Model, directory: Path) -> FeatureAxisStatistics:
    """The active features in closed form, and the supplementary ones stored at fit time."""
    active = feature_statistics(model)
    stored = read_feature_statistics(directory, n_samples=model.n_samples)
    if stored is None or not stored.supplementary.any():
        return active
    sup = stored.supplementary
    return active.concat(FeatureAxisStatistics(
        stored.feature_ids[sup], sup[sup], stored.loading[sup], stored.correlation[sup],
        stored.contribution[sup], stored.sq_cosine[sup], model.n_samples, model.axis_names))


def _supplementary_samples(model: Model, directory: Path) -> SupplementarySamples | None:
    path = directory / SUPPLEMENTARY_SCORES_FILE
    if not path.is_file():
        return None
    numeric = model.axis_names + ["squared_norm"]
    table = read_result_table(path, required=["sample_id"] + numeric, numeric=numeric)
    return SupplementarySamples(table["sample_id"].to_numpy(dtype=object),
                                table[model.axis_names].to_numpy(dtype=np.float64),
                                table["squared_norm"].to_numpy(dtype=np.float64))
