"""Saved models, edited after the fit (checksums recomputed, so only the content is wrong).

Each case fits a small valid model, changes one thing in it and rewrites the checksums the
way an editor who knows the format would (SHA-256 of every array file, then of the
description without its own checksum), so that only the numbers or the structure are
wrong; ``axiscope score`` must refuse the model with one line.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from . import Case, fit_model

SCORE = ["score", "-q", "--threads", "1"]


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def rehash(model: Path, meta: dict | None = None) -> None:
    """Recompute every checksum of a model folder (arrays, then the description)."""
    meta = meta if meta is not None else json.loads((model / "model.json").read_text())
    if isinstance(meta.get("checksums"), dict):
        meta["checksums"] = {name: _sha256(model / name) for name in meta["checksums"]}
    body = {key: value for key, value in meta.items() if key != "description_checksum"}
    meta["description_checksum"] = hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()
    (model / "model.json").write_text(json.dumps(meta, indent=2) + "\n")


def _edited(edit, *, recompute: bool = True):
    """A builder: fit a model, apply ``edit(model_folder)``, recompute checksums, score."""

    def build(d: Path) -> list[str]:
        model, new = fit_model(d)
        edit(model)
        if recompute:
            rehash(model)
        return [*SCORE, str(model), str(new)]

    return build


def _array(name: str, change):
    """An edit replacing ``name.npy`` by ``change(array)``."""

    def edit(model: Path) -> None:
        path = model / f"{name}.npy"
        value = np.load(path)
        np.save(path, change(value.copy()), allow_pickle=True)

    return edit


def _meta(change):
    """An edit of model.json (its checksum recomputed afterwards)."""

    def edit(model: Path) -> None:
        meta = json.loads((model / "model.json").read_text())
        change(meta)
        (model / "model.json").write_text(json.dumps(meta))

    return edit


def _set(array, index, value):
    array[index] = value
    return array


def _as_npz(model: Path) -> None:
    path = model / "components.npy"
    value = np.load(path)
    with open(path, "wb") as handle:  # an .npz archive under the .npy name
        np.savez(handle, components=value)


def _truncate(model: Path) -> None:
    path = model / "components.npy"
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 40])


def _checksums_as_list(meta: dict) -> None:
    meta["checksums"] = sorted(meta["checksums"].values())


def _rotated(V: np.ndarray) -> np.ndarray:
    V[:, 0] *= 1.01  # 2% off unit length: no longer orthonormal
    return V


def _unsorted(s: np.ndarray) -> np.ndarray:
    return s[::-1].copy()


def _objects(value: np.ndarray) -> np.ndarray:
    return value.astype(object)


def _numbers_as_ids(value: np.ndarray) -> np.ndarray:
    return np.arange(value.shape[0], dtype=float)


def _delete_model_json(model: Path) -> None:
    (model / "model.json").unlink()


def _garbage_model_json(model: Path) -> None:
    (model / "model.json").write_text("{ not json")


def _untouched_checksum(model: Path) -> None:
    path = model / "mean.npy"
    value = np.load(path)
    value[0] += 1.0
    np.save(path, value)


CASES = [
    Case("model_nan_components", "model", _edited(_array("components", lambda V: _set(V, (0, 0), np.nan))), 2,
         "NaN or infinite"),
    Case("model_inf_mean", "model", _edited(_array("mean", lambda m: _set(m, 2, np.inf))), 2, "NaN or infinite"),
    Case("model_nan_shrinkage_extra", "model",
         _edited(_array("extra_shrinkage_factor", lambda f: _set(f, 0, np.nan))), 2, "NaN or infinite"),
    Case("model_components_not_orthonormal", "model", _edited(_array("components", _rotated)), 2, "orthonormal"),
    Case("model_negative_singular_value", "model",
         _edited(_array("singular_values", lambda s: _set(s, 2, -s[2]))), 2, "positive"),
    Case("model_singular_values_increasing", "model", _edited(_array("singular_values", _unsorted)), 2,
         "non-increasing"),
    Case("model_zero_scale", "model", _edited(_array("scale", lambda v: _set(v, 1, 0.0))), 2, "scales"),
    Case("model_shapes_disagree", "model", _edited(_array("mean", lambda m: m[:-1])), 2, "shapes"),
    Case("model_ids_not_text", "model", _edited(_array("feature_ids", _numbers_as_ids)), 2, "not text"),
    Case("model_object_array", "model", _edited(_array("std", _objects)), 2, "std.npy"),
    Case("model_npz_in_place_of_npy", "model", _edited(_as_npz), 2, ".npz"),
    Case("model_truncated_array", "model", _edited(_truncate), 2, "components.npy"),
    Case("model_checksums_a_list", "model", _edited(_meta(_checksums_as_list)), 2, "'checksums'"),
    Case("model_zero_samples", "model", _edited(_meta(lambda m: m.update(n_samples=0))), 2, "n_samples=0"),
    Case("model_fractional_samples", "model", _edited(_meta(lambda m: m.update(n_samples=59.5))), 2, "n_samples"),
    Case("model_nan_total_inertia", "model", _edited(_meta(lambda m: m.update(total_inertia=float("nan")))), 2,
         "total_inertia"),
    Case("model_axis_count_disagrees", "model", _edited(_meta(lambda m: m.update(n_components=4))), 2,
         "counts of axes"),
    Case("model_unknown_setting", "model",
         _edited(_meta(lambda m: m["preprocessing"].update(whiten=True))), 2, "model.json"),
    Case("model_edited_without_checksums", "model", _edited(_untouched_checksum, recompute=False), 2,
         "checksum does not match"),
    Case("model_description_missing", "model", _edited(_delete_model_json, recompute=False), 2, "model.json"),
    Case("model_description_not_json", "model", _edited(_garbage_model_json, recompute=False), 2, "unreadable"),
]
