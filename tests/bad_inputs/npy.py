""".npy inputs: damaged headers and bodies, wrong shapes and types, awkward but valid layouts."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from . import Case, good_matrix

FIT = ["fit", "-k", "2", "-q", "--threads", "1"]


def _npy(name: str, make, *extra: str, raw: bool = False):
    """A builder saving ``make()`` to ``name`` (``raw``: ``make()`` returns the file's bytes)."""

    def build(d: Path) -> list[str]:
        path = d / name
        if raw:
            path.write_bytes(make())
        else:
            np.save(path, make(), allow_pickle=True)
        return [*FIT, str(path), *extra]

    return build


def _saved_bytes(X: np.ndarray) -> bytes:
    import io

    buffer = io.BytesIO()
    np.save(buffer, X)
    return buffer.getvalue()


def _truncated() -> bytes:
    data = _saved_bytes(good_matrix(400, 30))
    return data[: len(data) // 2]


def _bad_magic() -> bytes:
    data = bytearray(_saved_bytes(good_matrix()))
    data[:6] = b"NOTNPY"
    return bytes(data)


def _header_shape_lies() -> bytes:
    """The header says 4000 rows; the body holds 40."""
    data = _saved_bytes(good_matrix())
    return data.replace(b"(40, 12)", b"(4000, 12)", 1)


def _objects() -> np.ndarray:
    X = np.empty((10, 3), dtype=object)
    X[:] = 1.5
    return X


def _with(value: float):
    def make() -> np.ndarray:
        X = good_matrix()
        X[5, 2] = value
        return X

    return make


def _constant_but_precise() -> np.ndarray:
    """A float64 feature with mean 1e6 and SD 0.05 beside others with SD 0.01 (issue 10, case 6)."""
    rng = np.random.default_rng(5)
    X = rng.standard_normal((200, 10)) * 0.01
    X[:, 0] = 1e6 + 0.05 * rng.standard_normal(200)
    return X


def _kept_every_feature(out: Path) -> None:
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["n_features_kept"] == 10, manifest["n_features_kept"]


def _shape_is(shape):
    def check(out: Path) -> None:
        assert json.loads((out / "manifest.json").read_text())["input"]["shape"] == list(shape)

    return check


def _far_from_zero() -> np.ndarray:
    """float32 features with mean 1e5 × their SD (issue 10, case 5): 2,000 × 400, rank-3 signal."""
    rng = np.random.default_rng(7)
    signal = rng.standard_normal((2000, 3)) @ rng.standard_normal((3, 400)) * 5.0
    return (signal + rng.standard_normal((2000, 400)) + 5e5).astype(np.float32)


def _scores_match_float64_lapack(out: Path) -> None:
    """Scores within 1e-4 relative of LAPACK (numpy.linalg.svd) on the same values in float64."""
    import pandas as pd

    A = _far_from_zero().astype(np.float64)
    A = (A - A.mean(axis=0)) / A.std(axis=0)
    U, s, _ = np.linalg.svd(A, full_matrices=False)
    ref = np.abs(U[:, :2] * s[:2])
    got = np.abs(pd.read_csv(out / "sample_scores.tsv", sep="\t")[["PC1", "PC2"]].to_numpy())
    assert np.linalg.norm(got - ref) <= 1e-4 * np.linalg.norm(ref), np.linalg.norm(got - ref) / np.linalg.norm(ref)


def _dosages_with_other_values() -> np.ndarray:
    rng = np.random.default_rng(6)
    G = rng.integers(0, 3, size=(60, 20)).astype(float)
    G[:, 4] = rng.normal(50.0, 10.0, 60)  # not a dosage
    return G


CASES = [
    Case("npy_truncated_body", "npy", _npy("cut.npy", _truncated, raw=True), 2, "cut.npy"),
    Case("npy_bad_magic", "npy", _npy("magic.npy", _bad_magic, raw=True), 2, "magic.npy"),
    Case("npy_header_shape_lies", "npy", _npy("lies.npy", _header_shape_lies, raw=True), 2, "lies.npy"),
    Case("npy_empty_file", "npy", _npy("zero.npy", lambda: b"", raw=True), 2, "zero.npy"),
    Case("npy_object_array", "npy", _npy("objects.npy", _objects), 2, "objects.npy"),
    Case("npy_1d_array", "npy", _npy("oned.npy", lambda: np.arange(40.0)), 2, "oned.npy"),
    Case("npy_3d_array", "npy", _npy("threed.npy", lambda: np.zeros((4, 5, 6))), 2, "threed.npy"),
    Case("npy_empty_matrix", "npy", _npy("nosamples.npy", lambda: np.zeros((0, 12))), 2, "nosamples.npy"),
    Case("npy_no_features", "npy", _npy("nofeatures.npy", lambda: np.zeros((40, 0))), 2, "nofeatures.npy"),
    Case("npy_single_feature", "npy", _npy("onefeature.npy", lambda: good_matrix(40, 1)), 2, "onefeature.npy"),
    Case("npy_string_array", "npy", _npy("strings.npy", lambda: np.array([["1.0", "2.0"]] * 10)), 2, "strings.npy"),
    Case("npy_complex_array", "npy", _npy("complex.npy", lambda: good_matrix().astype(complex)), 2, "complex.npy"),
    Case("npy_structured_array", "npy",
         _npy("record.npy", lambda: np.zeros((10, 3), dtype=[("a", "f8"), ("b", "f8")])), 2, "record.npy"),
    Case("npy_all_constant", "npy", _npy("constant.npy", lambda: np.ones((40, 12))), 2, "constant.npy"),
    Case("npy_nan_cell", "npy", _npy("nan.npy", _with(np.nan)), 2, "NaN or infinite"),
    Case("npy_inf_cell", "npy", _npy("inf.npy", _with(-np.inf)), 2, "NaN or infinite"),
    Case("npy_components_exceed_rank", "npy", _npy("small.npy", lambda: good_matrix(40, 12), "-k", "30"), 2,
         "--components"),
    Case("npy_fortran_order", "npy", _npy("fortran.npy", lambda: np.asfortranarray(good_matrix())), 0,
         check=_shape_is((40, 12))),
    Case("npy_big_endian", "npy", _npy("bigendian.npy", lambda: good_matrix().astype(">f8")), 0,
         check=_shape_is((40, 12))),
    Case("npy_float16", "npy", _npy("half.npy", lambda: good_matrix().astype(np.float16)), 0,
         check=_shape_is((40, 12))),
    Case("npy_cell_1e200", "npy", _npy("huge.npy", _with(1e200)), 2, "huge.npy"),
    Case("npy_precise_feature_far_from_zero", "npy", _npy("precise.npy", _constant_but_precise), 0,
         check=_kept_every_feature),
    Case("npy_float32_far_from_zero_randomized", "npy",
         _npy("offset.npy", _far_from_zero, "--method", "randomized"), 0, check=_scores_match_float64_lapack),
    Case("npy_dosage_scaling_of_non_dosages", "npy",
         _npy("dosages.npy", _dosages_with_other_values, "--scale", "allele-frequency"), 2, "dosages.npy"),
]
