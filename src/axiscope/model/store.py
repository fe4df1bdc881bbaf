"""The fitted model: everything needed to place new samples on the axes, saved as arrays + JSON.

On disk a model is a directory with ``model.json`` (format name and version, settings,
scalars, and a SHA-256 checksum of every array file) and one ``.npy`` file per array,
read with ``allow_pickle=False``: loading a model never executes code.

Loading verifies, in this order, the format and version, the checksums (of the
description and of every array), that every array is a plain ``.npy`` array of the
expected kind and shape, and the numbers themselves (:func:`check_numbers`): a model
edited with its checksums recomputed is still refused when its numbers cannot have come
from a fit (NaN, non-orthonormal components, non-positive variances, fewer than two
samples), since it would otherwise score every new sample silently wrong.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.adjust import CovariateDesign
from ..core.preprocess import PreprocessSpec
from ..errors import AxiscopeError, ModelError, agree, counted, reason

__all__ = ["Model", "MODEL_FORMAT", "MODEL_VERSION", "ADJUSTED_MODEL_VERSION", "load_model", "check_numbers", "orthonormality_tolerance"]

MODEL_FORMAT = "axiscope-model"
#: Version 2: preprocessing settings ``log_transform``, ``counts_per`` and
#: ``scale="allele-frequency"``.
MODEL_VERSION = 2
#: Version 3: a model fitted after adjusting for covariates (``covariate_coef`` and the
#: design in ``info["covariates"]``). Written only for such models, so that an axiscope
#: that cannot adjust new samples refuses them instead of scoring them silently wrong.
ADJUSTED_MODEL_VERSION = 3
#: Versions this axiscope reads.
READABLE_VERSIONS = (MODEL_VERSION, ADJUSTED_MODEL_VERSION)
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

    @property
    def covariates(self) -> "CovariateDesign | None":
        """The covariates the axes were fitted after adjusting for (None when not adjusted)."""
        record = self.info.get("covariates")
        return None if record is None else CovariateDesign.from_dict(record, "the model")

    @property
    def format_version(self) -> int:
        return ADJUSTED_MODEL_VERSION if "covariate_coef" in self.extras else MODEL_VERSION

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
            "version": self.format_version,
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


def stored_checksum(directory: Path) -> str | None:
    """The checksum :meth:`Model.checksum` gives for the model saved in ``directory``, without
    loading it; None when there is no model there."""
    path = Path(directory) / "model.json"
    return _sha256(path) if path.is_file() else None


def load_model(directory: Path) -> Model:
    """Read a model directory written by :meth:`Model.save`, verifying format, checksums and numbers.

    Raises
    ------
    ModelError
        One line naming the file and the fault, for a missing, damaged, tampered or
        foreign model, or one whose numbers fail :func:`check_numbers`.
    """
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
    if version not in READABLE_VERSIONS:
        raise ModelError(
            f"{meta_path}: model format version {version} is not supported by this axiscope "
            f"(reads versions {', '.join(map(str, READABLE_VERSIONS))}); use the axiscope version that "
            "wrote it or refit"
        )
    if "description_checksum" not in meta:
        raise ModelError(f"{meta_path}: no checksum of the model description (written by an earlier "
                         "development version of axiscope); refit the model")
    if meta["description_checksum"] != _description_checksum(meta):
        raise ModelError(f"{meta_path}: its contents do not match their checksum; the model was "
                         "modified or damaged, refit or restore it")
    checksums = meta.get("checksums", {})
    extra_names = meta.get("extras", [])
    if not _is_str_map(checksums):
        raise ModelError(f"{meta_path}: 'checksums' is not a mapping of file names to checksums; "
                         "the model was modified or damaged, refit or restore it")
    if not (isinstance(extra_names, list) and all(isinstance(n, str) and n.isidentifier() for n in extra_names)):
        raise ModelError(f"{meta_path}: 'extras' is not a list of array names; the model was modified "
                         "or damaged, refit or restore it")
    arrays = {}
    for name in list(_ARRAYS) + [f"extra_{n}" for n in extra_names]:
        arrays[name] = _load_array(directory / f"{name}.npy", checksums)
    extras = {n: arrays[f"extra_{n}"] for n in extra_names}
    _check_shapes(directory, arrays)
    try:
        model = _build(meta, arrays, extras)
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelError(f"{meta_path}: malformed model description ({exc.__class__.__name__}: {exc}); "
                         "refit or restore the model") from exc
    if (meta.get("n_components"), meta.get("n_features")) != (model.n_components, model.n_features) \
            or not model.n_input_features >= model.n_features:
        raise ModelError(f"{meta_path}: the counts of axes and features do not agree with the arrays; "
                         "refit or restore the model")
    _check_covariates(model, version, meta_path)
    check_numbers(model, directory)
    return model


def _check_covariates(model: Model, version: int, meta_path: Path) -> None:
    """An adjusted model (version 3) has its design and coefficients (features × terms); others neither."""
    coef = model.extras.get("covariate_coef")
    record = model.info.get("covariates")
    if (version == ADJUSTED_MODEL_VERSION) != (coef is not None) or (coef is None) != (record is None):
        raise ModelError(f"{meta_path}: the covariates adjusted for and the format version do not agree; "
                         "the model was modified or damaged, refit or restore it")
    if coef is None:
        return
    design = CovariateDesign.from_dict(record, str(meta_path))
    if np.shape(coef) != (model.n_features, len(design.terms)) or np.asarray(coef).dtype.kind != "f":
        raise ModelError(f"{meta_path}: covariate coefficients are not one float per feature and term; "
                         "the model was modified or damaged, refit or restore it")


def _is_str_map(value) -> bool:
    return isinstance(value, dict) and all(isinstance(k, str) and isinstance(v, str) for k, v in value.items())


def _load_array(path: Path, checksums: dict) -> np.ndarray:
    """One verified array file: present, matching its checksum, a plain ``.npy`` array."""
    if not path.is_file():
        raise ModelError(f"{path}: missing from the model; restore it or refit")
    if checksums.get(path.name) != _sha256(path):
        raise ModelError(f"{path}: checksum does not match model.json; the model was modified or damaged, refit or restore it")
    try:
        array = np.load(path, allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise ModelError(f"{path}: unreadable array ({reason(exc)}); refit or restore the model") from exc
    if not isinstance(array, np.ndarray):  # np.load opens a zip archive (.npz) as a mapping
        if hasattr(array, "close"):
            array.close()
        raise ModelError(f"{path}: not a single .npy array (an .npz archive?); refit or restore the model")
    return array


def _check_shapes(directory: Path, arrays: dict) -> None:
    """The arrays' shapes and kinds agree: ``components`` (p, k), the vectors (p,) and (k,)."""
    components = arrays["components"]
    p, k = components.shape if components.ndim == 2 else (-1, -1)
    if any(arrays[name].shape != (p,) for name in ("feature_ids", "mean", "scale", "std")) or \
            arrays["singular_values"].shape != (k,) or k < 1 or p < 1:
        raise ModelError(f"{directory}: array shapes do not agree with each other; refit or restore the model")
    if arrays["feature_ids"].dtype.kind != "U":
        raise ModelError(f"{directory / 'feature_ids.npy'}: feature ids are not text "
                         f"(dtype {arrays['feature_ids'].dtype}); refit or restore the model")
    for name in ("mean", "scale", "std", "components", "singular_values"):
        if arrays[name].dtype.kind != "f":
            raise ModelError(f"{directory / (name + '.npy')}: not an array of floating-point numbers "
                             f"(dtype {arrays[name].dtype}); refit or restore the model")


def orthonormality_tolerance(dtype: np.dtype, n_features: int) -> float:
    """Largest ``max |VᵀV − I|`` accepted for stored components of ``dtype`` with ``p`` rows.

    ``max(1e-6, 10·√p·ε)``, ``ε`` the machine epsilon of the stored dtype. An inner product
    of length ``p`` carries a rounding error of at most about ``p·ε`` and typically
    ``√p·ε`` (Higham 2002, *Accuracy and Stability of Numerical Algorithms*, §3.1 and
    §2.8); orthonormal bases from Householder QR or LAPACK's SVD lose orthogonality of
    the same order. For float64 the floor 1e-6 decides (LAPACK reaches about 1e-14 here):
    far above rounding, and far below any change that moves scores by the 1e-4 relative
    accuracy a fit promises. For float32 (``ε ≈ 1.2e-7``) the √p term decides from
    ``p ≈ 70`` on (1.2e-3 at a million features).
    """
    eps = float(np.finfo(dtype).eps)
    return max(1e-6, 10.0 * np.sqrt(max(int(n_features), 1)) * eps)


def check_numbers(model: Model, directory: Path) -> None:
    """Refuse a model whose numbers cannot have come from a fit.

    Every floating-point array is finite; ``n_samples`` is a whole number >= 2 (and at
    least the number of axes); the components are orthonormal within
    :func:`orthonormality_tolerance`; the singular values are positive and non-increasing;
    the divisors ``scale`` are positive and ``std`` non-negative; the total inertia is
    positive and at least the variance of the axes; the shrinkage factors lie in (0, 1].
    """
    where = Path(directory)

    def refuse(what: str) -> ModelError:
        return ModelError(f"{where}: {what}; the model was modified or damaged, refit or restore it")

    n, k = model.n_samples, model.n_components
    if not (isinstance(n, int) and n >= 2):
        raise refuse(f"n_samples={n} is not a whole number >= 2")
    if k > n:
        raise refuse(f"{counted(k, 'axis', 'axes')} from {counted(n, 'sample')} is impossible")
    arrays = {name: getattr(model, name) for name in _ARRAYS if name != "feature_ids"}
    arrays.update({f"extra_{name}": value for name, value in model.extras.items()})
    for name, value in arrays.items():
        value = np.asarray(value)
        if value.dtype.kind == "O":
            raise refuse(f"{name}.npy holds Python objects")
        if value.dtype.kind in "fc" and not np.isfinite(value).all():
            bad = int(np.sum(~np.isfinite(value)))
            raise refuse(f"{name}.npy has {counted(bad, 'value')} that {agree(bad, 'is', 'are')} NaN or infinite")
    V = np.asarray(model.components)
    gram = V.T.astype(np.float64) @ V.astype(np.float64)
    error = float(np.max(np.abs(gram - np.eye(k))))
    tol = orthonormality_tolerance(V.dtype, V.shape[0])
    if not error <= tol:
        raise refuse(f"components are not orthonormal (max |V'V - I| = {error:.2g} > {tol:.0e})")
    s = np.asarray(model.singular_values, dtype=np.float64)
    if not (s > 0).all():
        raise refuse("singular values are not all positive")
    if not (np.diff(s) <= 0).all():
        raise refuse("singular values are not in non-increasing order")
    if not (np.asarray(model.scale) > 0).all():
        raise refuse("feature scales (divisors) are not all positive")
    if not (np.asarray(model.std) >= 0).all():
        raise refuse("feature standard deviations are not all >= 0")
    inertia = model.total_inertia
    if not (np.isfinite(inertia) and inertia > 0 and float(np.sum(s**2)) / n <= inertia * (1 + 1e-6)):
        raise refuse(f"total_inertia={inertia!r} is not positive and at least the variance of the axes")
    factor = model.extras.get("shrinkage_factor")
    if factor is not None and not (np.shape(factor) == (k,) and ((factor > 0) & (factor <= 1)).all()):
        raise refuse("shrinkage factors are not k numbers in (0, 1]")
    moments = model.extras.get("residual_moments")
    if moments is not None and not (np.shape(moments) == (3,) and moments[0] >= 0 and moments[1] >= 0):
        raise refuse("residual moments are not (theta1 >= 0, theta2 >= 0, theta3)")


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
        n_samples=_whole(meta["n_samples"], "n_samples"),
        total_inertia=float(meta["total_inertia"]),
        n_input_features=_whole(meta["n_input_features"], "n_input_features"),
        extras=extras,
        info=_mapping(meta.get("info", {}), "info"),
    )


def _mapping(value, name: str) -> dict:
    if not isinstance(value, dict):
        raise TypeError(f"{name} is not a mapping")
    return value


def _whole(value, name: str) -> int:
    if not isinstance(value, int) or isinstance(value, bool):
        raise TypeError(f"{name}={value!r} is not a whole number")
    return value


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()
