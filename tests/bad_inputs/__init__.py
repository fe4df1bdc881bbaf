"""A corpus of malformed and tricky inputs, generated on the fly (no committed binaries).

Each :class:`Case` writes its input into a fresh folder and returns the command line to
run (without ``--out``, which the runner adds), the exit code it must end with and a
fragment of the one error line it must print. ``tests/test_bad_inputs.py`` runs every
case through the console entry point and checks, besides code and fragment, that
standard error is one line starting with ``error:``, that no traceback escaped and that
nothing was left behind (no output folder, no hidden temporary folder beside it, nothing
in the private temporary folder).

A case whose fault is known and not fixed yet carries ``known_fault`` (why); it is
expected to fail (``xfail(strict=True)``), so that fixing it shows up at once.

Modules: :mod:`.text`, :mod:`.hdf5`, :mod:`.zarr_cases`, :mod:`.npy`, :mod:`.models`,
:mod:`.options`, :mod:`.covariates`, :mod:`.groups_cases`. The matrices are invented (random numbers); none encodes a truth a test
relies on beyond "this input is damaged in this one way".
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["Case", "CASES", "good_matrix", "fit_model"]


@dataclass(frozen=True)
class Case:
    """One malformed or tricky input.

    Attributes
    ----------
    name : str
        Unique id (the test id).
    kind : str
        text, hdf5, zarr, npy, model or option.
    build : callable
        ``build(folder) -> argv``: writes the input into ``folder`` and returns the command
        line after ``axiscope`` (``--out`` is added by the runner).
    code : int
        Expected exit code: 2 for bad input or options, 3 for a resource limit, 0 for an
        input that is tricky but valid.
    fragment : str
        A piece of the single error line (for ``code != 0``).
    known_fault : str or None
        A fault known and not fixed yet (the case then must fail), or None.
    check : callable or None
        ``check(out_folder)`` for ``code == 0``: asserts that the result is right.
    needs_non_root : bool
        Permission cases: root reads and writes everywhere, so they are skipped as root.
    warnings : int
        Lines starting with ``warning:`` expected before the error line (an option that
        accepts damage reports what it accepted).
    """

    name: str
    kind: str
    build: Callable[[Path], list[str]]
    code: int
    fragment: str = ""
    known_fault: str | None = None
    check: Callable[[Path], None] | None = None
    needs_non_root: bool = False
    warnings: int = 0


def good_matrix(n: int = 40, p: int = 12, seed: int = 0) -> np.ndarray:
    """A valid Gaussian matrix (invented), the starting point that each case damages."""
    return np.random.default_rng(seed).standard_normal((n, p))


def write_tsv(path: Path, X: np.ndarray, *, sample_ids=None, feature_ids=None, delimiter: str = "\t") -> Path:
    """A delimited text matrix with an ``id`` header row and sample ids in the first column."""
    n, p = X.shape
    s_ids = sample_ids if sample_ids is not None else [f"s{i}" for i in range(n)]
    f_ids = feature_ids if feature_ids is not None else [f"f{j}" for j in range(p)]
    lines = [delimiter.join(["id", *f_ids])]
    lines += [delimiter.join([sid, *(repr(float(v)) for v in row)]) for sid, row in zip(s_ids, X)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def fit_model(folder: Path, *, n: int = 60, p: int = 15, k: int = 3, seed: int = 0) -> tuple[Path, Path]:
    """A model fitted on a valid matrix, and a file of new samples for it: ``(model, new)``."""
    from axiscope import Resources, fit
    from axiscope.io import array_source

    rng = np.random.default_rng(seed)
    ids = [f"g{j}" for j in range(p)]
    X = rng.standard_normal((n, 3)) @ rng.standard_normal((3, p)) + rng.standard_normal((n, p))
    result = fit(array_source(X, feature_ids=ids), n_components=k, resources=Resources(threads=1))
    model = folder / "model"
    result.model.save(model)
    new = write_tsv(folder / "new.tsv", rng.standard_normal((10, p)), feature_ids=ids)
    return model, new


def _collect() -> list[Case]:
    from . import covariates, groups_cases, hdf5, models, npy, options, text, zarr_cases

    cases = [*text.CASES, *hdf5.CASES, *zarr_cases.CASES, *npy.CASES, *models.CASES, *options.CASES,
             *covariates.CASES, *groups_cases.CASES]
    names = [c.name for c in cases]
    assert len(names) == len(set(names)), "case names must be unique"
    return cases


CASES: list[Case] = _collect()
