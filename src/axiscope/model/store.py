"""The fitted model: everything needed to place new samples on the axes, saved as arrays + JSON.

On disk a model is a directory with ``model.json`` (format name and version, settings,
scalars, and a SHA-256 checksum of every array file) and one ``.npy`` file per array,
read with ``allow_pickle=False``: loading a model never executes code.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.preprocess import PreprocessSpec
from ..errors import AxiscopeError, ModelError

__all__ = ["Model", "MODEL_FORMAT", "MODEL_VERSION", "load_model"]

MODEL_FORMAT = "axiscope-model"
#: Version 2: preprocessing settings ``log_transform``, ``counts_per`` and
#: ``scale="allele-frequency"``.
MODEL_VERSION = 2
_ARRAYS = ("feature_ids", "mean", "scale", "std", "components", "singular_values")


@dataclass
class Model:
    """Principal axes of a reference cohort and the preprocessing that produced them.

    Attributes
    ----------
    spec : PreprocessSpec
    feature_ids : ndarray of str, shape (p,)
        Ids of the features used, in the order of the rows of ``components``.
    mean, scale, std : ndarray, shape (p,)
        Centre and divisor of each feature, and its population standard deviation.
    components : ndarray, shape (p, k)
        Unit-norm loadings of each axis.
    singular_values : ndarray, shape (k,)
    n_samples : int
        Number of (active) samples the axes were fitted on.
    total_inertia : float
        Sum of the variances of the preprocessed features.
    n_input_features : int
        Number of features in the input before selection.
    extras : dict of str to ndarray
        Further arrays stored with the model (for example scoring diagnostics).
    info : dict
        Further JSON-serialisable settings and scalars.
    """

    spec: PreprocessSpec
    feature_ids: np.ndarray
    mean: np.ndarray
    scale: np.ndarray
    std: np.ndarray
    components: np.ndarray
    singular_values: np.ndarray
    n_samples: int
    total_inertia: float
    n_input_features: int
    extras: dict = field(default_factory=dict)
    info: dict = field(default_factory=dict)

    @property
    def n_components(self) -> int:
        return int(self.components.shape[1])

    @property
    def n_features(self) -> int:
        return int(self.components.shape[0])

    @property
    def variance(self) -> np.ndarray:
        """Variance of each axis, ``s² / n`` (population convention)."""
        return self.singular_values**2 / self.n_samples

    @property
    def variance_ratio(self) -> np.ndarray:
        return self.variance / self.total_inertia

    @property
    def axis_names(self) -> list[str]:
        return [f"PC{j + 1}" for j in range(self.n_components)]

    def save(self, directory: Path) -> None:
        """Write the model into ``directory`` (created; must not hold another model)."""
        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        arrays = {name: getattr(self, name) for name in _ARRAYS}
        arrays["feature_ids"] = np.asarray(self.feature_ids, dtype=str)
        for name, value in self.extras.items():
            arrays[f"extra_{name}"] = np.asarray(value)
        checksums = {}
        for name, value in arrays.items():
            path = directory / f"{name}.npy"
            np.save(path, value, allow_pickle=False)
            checksums[path.name] = _sha256(path)
        meta = {
            "format": MODEL_FORMAT,
            "version": MODEL_VERSION,
            "preprocessing": self.spec.to_dict(),
            "n_samples": int(self.n_samples),
            "n_components": self.n_components,
            "n_features": self.n_features,
            "n_input_features": int(self.n_input_features),
            "total_inertia": float(self.total_inertia),
            "extras": sorted(self.extras),
            "info": self.info,
            "checksums": checksums,
        }
        meta["description_checksum"] = _description_checksum(meta)
        (directory / "model.json").write_text(json.dumps(meta, indent=2) + "\n")

    def checksum(self, directory: Path) -> str:
        """One SHA-256 over the model's description file (which lists every array's checksum)."""
        return _sha256(Path(directory) / "model.json")


def load_model(directory: Path) -> Model:
    """Read a model directory written by :meth:`Model.save`, verifying format and checksums."""
    directory = Path(directory)
    meta_path = directory / "model.json"
    if not directory.is_dir():
        raise ModelError(f"{directory}: no such model directory; pass the model/ folder written by 'axiscope fit'")
    if not meta_path.is_file():
        raise ModelError(f"{directory}: not a model directory (no model.json); pass the model/ folder written by 'axiscope fit'")
    try:
        meta = json.loads(meta_path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ModelError(f"{meta_path}: unreadable ({exc.__class__.__name__}); refit or restore the model") from exc
    if not isinstance(meta, dict) or meta.get("format") != MODEL_FORMAT:
        raise ModelError(f"{meta_path}: not an axiscope model description; pass the model/ folder written by 'axiscope fit'")
    version = meta.get("version")
    if version != MODEL_VERSION:
        raise ModelError(
            f"{meta_path}: model format version {version} is not supported by this axiscope "
            f"(reads version {MODEL_VERSION}); use the axiscope version that wrote it or refit"
        )
    if "description_checksum" not in meta:
        raise ModelError(f"{meta_path}: no checksum of the model description (written by an earlier "
                         "development version of axiscope); refit the model")
    if meta["description_checksum"] != _description_checksum(meta):
        raise ModelError(f"{meta_path}: its contents do not match their checksum; the model was "
                         "modified or damaged, refit or restore it")
    checksums = meta.get("checksums", {})
    arrays = {}
    names = list(_ARRAYS) + [f"extra_{n}" for n in meta.get("extras", [])]
    for name in names:
        path = directory / f"{name}.npy"
        if not path.is_file():
            raise ModelError(f"{path}: missing from the model; restore it or refit")
        if checksums.get(path.name) != _sha256(path):
            raise ModelError(f"{path}: checksum does not match model.json; the model was modified or damaged, refit or restore it")
        try:
            arrays[name] = np.load(path, allow_pickle=False)
        except ValueError as exc:
            raise ModelError(f"{path}: unreadable array ({exc}); refit or restore the model") from exc
    extras = {n: arrays[f"extra_{n}"] for n in meta.get("extras", [])}
    p, k = arrays["components"].shape if arrays["components"].ndim == 2 else (-1, -1)
    if any(arrays[name].shape != (p,) for name in ("feature_ids", "mean", "scale", "std")) or \
            arrays["singular_values"].shape != (k,):
        raise ModelError(f"{directory}: array shapes do not agree with each other; refit or restore the model")
    try:
        return _build(meta, arrays, extras)
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelError(f"{meta_path}: malformed model description ({exc.__class__.__name__}: {exc}); "
                         "refit or restore the model") from exc


def _description_checksum(meta: dict) -> str:
    """SHA-256 of the canonical JSON of a model description, without its own checksum."""
    body = {key: value for key, value in meta.items() if key != "description_checksum"}
    return hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()


def _build(meta: dict, arrays: dict, extras: dict) -> Model:
    try:
        spec = PreprocessSpec.from_dict(meta["preprocessing"])
    except AxiscopeError as exc:  # a value the settings reject
        raise ValueError(str(exc)) from exc
    return Model(
        spec=spec,
        feature_ids=arrays["feature_ids"],
        mean=arrays["mean"],
        scale=arrays["scale"],
        std=arrays["std"],
        components=arrays["components"],
        singular_values=arrays["singular_values"],
        n_samples=int(meta["n_samples"]),
        total_inertia=float(meta["total_inertia"]),
        n_input_features=int(meta["n_input_features"]),
        extras=extras,
        info=meta.get("info", {}),
    )


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()
