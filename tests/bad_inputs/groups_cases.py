"""Requests that ``axiscope groups`` must refuse: more groups than samples, more axes than the
fit kept, a result folder without scores, a matrix that is not the fitted one."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import Case, good_matrix

GROUPS = ["groups", "-q", "--threads", "1"]


def _fitted(d: Path) -> Path:
    """A valid fit (40 samples, 3 axes) written as 'axiscope fit' writes it."""
    from axiscope import Resources, fit

    np.save(d / "m.npy", good_matrix())
    fit(d / "m.npy", n_components=3, resources=Resources(threads=1)).write(d / "fit")
    return d / "fit"


def _groups_with(*options: str, damage=None):
    """A builder: a valid fit, optionally damaged, grouped with ``options``."""

    def build(d: Path) -> list[str]:
        result = _fitted(d)
        if damage is not None:
            damage(d, result)
        return [*GROUPS, str(result), *options]

    return build


def _no_scores(d: Path, result: Path) -> None:
    (result / "sample_scores.tsv").unlink()


def _other_matrix(d: Path, result: Path) -> None:
    np.save(d / "other.npy", good_matrix(30, 12))


CASES = [
    Case("groups_more_than_samples", "option", _groups_with("--groups", "40"), 2,
         "--groups 40 is not fewer than the 40 samples of the fit; ask for at most 39 groups"),
    Case("groups_not_a_number", "option", _groups_with("--groups", "many"), 2,
         "--groups many is neither 'auto' nor a whole number"),
    Case("groups_axes_beyond_the_fit", "option", _groups_with("--axes", "4"), 2,
         "--axes 4 is more than the 3 axes of the fit"),
    Case("groups_result_without_scores", "option", _groups_with(damage=_no_scores), 2,
         "not an axiscope fit result (sample_scores.tsv is missing)"),
    Case("groups_other_matrix", "option",
         lambda d: _groups_with("--matrix", str(d / "other.npy"), damage=_other_matrix)(d), 2,
         "of the fit are not in this matrix"),
]
