"""Covariates adjusted for (``fit --adjust-for``, ``score --annotations``): absent, constant,
collinear or incomplete columns, and new samples whose covariates are missing or unseen."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import Case, good_matrix, write_tsv

FIT = ["fit", "-k", "2", "-q", "--threads", "1"]
N = 40


def _table(d: Path, columns: dict[str, list], name: str = "ann.tsv", ids=None) -> Path:
    ids = ids if ids is not None else [f"sample_{i + 1:06d}" for i in range(N)]  # the ids a .npy file gets
    lines = ["\t".join(["sample_id", *columns])]
    lines += ["\t".join([sid, *(str(columns[c][i]) for c in columns)]) for i, sid in enumerate(ids)]
    path = d / name
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _batches(n: int = N) -> list[str]:
    return ["A" if i % 2 else "B" for i in range(n)]


def _fit_adjusted(columns: dict[str, list], *options: str):
    """A builder: a valid matrix fitted with ``--annotations`` holding ``columns`` and ``options``."""

    def build(d: Path) -> list[str]:
        path = d / "m.npy"
        np.save(path, good_matrix())
        return [*FIT, str(path), "--annotations", str(_table(d, columns)), *options]

    return build


def _no_annotations(d: Path) -> list[str]:
    path = d / "m.npy"
    np.save(path, good_matrix())
    return [*FIT, str(path), "--adjust-for", "batch"]


def _adjusted_model(d: Path) -> Path:
    """A model fitted after adjusting for a two-level batch (invented matrix)."""
    from axiscope import Resources, fit
    from axiscope.core.adjust import Covariates
    from axiscope.io import array_source

    X = good_matrix(N, 12, seed=1)
    ids = [f"g{j}" for j in range(12)]
    table = _table(d, {"batch": _batches()}, "train.tsv")
    result = fit(array_source(X, feature_ids=ids), n_components=2, resources=Resources(threads=1),
                 covariates=Covariates(table, ["batch"]))
    result.model.save(d / "model")
    return d / "model"


def _score_adjusted(new_columns: dict[str, list] | None):
    """A builder: an adjusted model scored on 10 new samples, with ``new_columns`` as their annotations."""

    def build(d: Path) -> list[str]:
        model = _adjusted_model(d)
        ids = [f"n{i}" for i in range(10)]
        new = write_tsv(d / "new.tsv", good_matrix(10, 12, seed=2), sample_ids=ids,
                        feature_ids=[f"g{j}" for j in range(12)])
        argv = ["score", "-q", "--threads", "1", str(model), str(new)]
        if new_columns is not None:
            argv += ["--annotations", str(_table(d, new_columns, "new_ann.tsv", ids=ids))]
        return argv

    return build


_depth = [10.5 + 0.25 * (i % 7) for i in range(N)]
_missing = _batches()
_missing[3] = "NA"

CASES = [
    Case("adjust_without_annotations", "option", _no_annotations, 2, "give the table with --annotations FILE"),
    Case("adjust_absent_column", "option", _fit_adjusted({"batch": _batches()}, "--adjust-for", "site"), 2,
         "no column 'site' to adjust for"),
    # the axis explanations read the same table and say first that they skip the column (one warning)
    Case("adjust_single_level", "option", _fit_adjusted({"batch": ["A"] * N, "depth": _depth}, "--adjust-for",
                                                         "batch,depth"), 2, "column 'batch' has a single level",
         warnings=1),
    Case("adjust_constant_number", "option", _fit_adjusted({"depth": [7.5] * N}, "--adjust-for", "depth"), 2,
         "column 'depth' is constant", warnings=1),
    Case("adjust_collinear", "option", _fit_adjusted({"depth": _depth, "twice": [2 * v for v in _depth]},
                                                     "--adjust-for", "depth,twice"), 2,
         "column 'twice' is collinear"),
    Case("adjust_missing_value", "option", _fit_adjusted({"batch": _missing}, "--adjust-for", "batch"), 2,
         "sample 'sample_000004' has no value in column 'batch'"),
    Case("adjust_too_many_axes", "option", _fit_adjusted({"plate": [f"P{i % 30}" for i in range(N)]},
                                                         "--adjust-for", "plate", "-k", "11"),
         2, "--components 11 is more axes than 40 samples leave after adjusting for 30 covariate terms"),
    Case("score_adjusted_without_annotations", "model", _score_adjusted(None), 2,
         "fitted after adjusting for 'batch'; pass --annotations FILE"),
    Case("score_adjusted_unseen_level", "model", _score_adjusted({"batch": ["A"] * 9 + ["C"]}), 2,
         "sample 'n9' has level 'C' in column 'batch', never seen"),
    Case("score_adjusted_missing_value", "model", _score_adjusted({"batch": ["NA"] + ["A"] * 9}), 2,
         "sample 'n0' has no value in column 'batch'"),
    Case("score_adjusted_absent_column", "model", _score_adjusted({"site": ["A"] * 10}), 2,
         "no column 'batch' to adjust for"),
]
