"""Option values out of range or not finite, and output or scratch places that cannot be used."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import Case, fit_model, good_matrix, write_tsv

FIT = ["fit", "-k", "2", "-q", "--threads", "1"]


def _fit_with(*options: str):
    """A builder: a valid matrix fitted with ``options``."""

    def build(d: Path) -> list[str]:
        path = d / "m.npy"
        np.save(path, good_matrix())
        return [*FIT, str(path), *options]

    return build


def _score_with(*options: str, new=None):
    """A builder: a valid model and new samples, scored with ``options``."""

    def build(d: Path) -> list[str]:
        model, new_samples = fit_model(d)
        if new is not None:
            new_samples = new(d)
        return ["score", "-q", "--threads", "1", str(model), str(new_samples), *options]

    return build


def _counts_matrix(*options: str):
    def build(d: Path) -> list[str]:
        path = d / "counts.tsv"
        write_tsv(path, np.random.default_rng(0).poisson(5.0, (40, 12)).astype(float))
        return [*FIT, str(path), *options]

    return build


def _overflowing_new_samples(d: Path) -> Path:
    """New samples with finite values whose squares overflow float64 (1e200)."""
    X = np.random.default_rng(3).standard_normal((10, 15))
    X[4, 2] = 1e200
    return write_tsv(d / "overflow.tsv", X, feature_ids=[f"g{j}" for j in range(15)])


def _flagged_sample_4(out: Path) -> None:
    import pandas as pd

    diagnostics = pd.read_csv(out / "diagnostics.tsv", sep="\t")
    assert diagnostics.loc[4, "flag"] != "within"
    assert (diagnostics.drop(index=4)["q"] < 1e100).all()


def _missing_input(d: Path) -> list[str]:
    return [*FIT, str(d / "absent.npy")]


def _unknown_suffix(d: Path) -> list[str]:
    path = d / "matrix.xyz"
    path.write_text("1 2 3\n")
    return [*FIT, str(path)]


def _unreadable(d: Path) -> list[str]:
    path = d / "locked.npy"
    np.save(path, good_matrix())
    path.chmod(0)
    return [*FIT, str(path)]


def _out_in_read_only(d: Path) -> list[str]:
    locked = d / "readonly"
    locked.mkdir()
    path = d / "m.npy"
    np.save(path, good_matrix())
    locked.chmod(0o555)
    return [*FIT, str(path), "--out", str(locked / "nested" / "out")]


def _out_under_a_file(d: Path) -> list[str]:
    path = d / "m.npy"
    np.save(path, good_matrix())
    blocker = d / "plainfile"
    blocker.write_text("a file, not a folder\n")
    return [*FIT, str(path), "--out", str(blocker / "out")]


def _scratch_read_only(d: Path) -> list[str]:
    scratch = d / "scratch"
    scratch.mkdir()
    scratch.chmod(0o555)
    path = d / "m.tsv"
    write_tsv(path, good_matrix(3000, 50))
    # a budget too small to keep the decoded blocks: the fit needs the scratch folder
    return [*FIT, str(path), "--scratch", str(scratch), "--memory-limit", "16MB"]


def _out_exists(d: Path) -> list[str]:
    path = d / "m.npy"
    np.save(path, good_matrix())
    (d / "taken").mkdir()
    return [*FIT, str(path), "--out", str(d / "taken")]


def _stability_halves_too_small(d: Path) -> list[str]:
    """6 samples fit 3 axes, but halves of 3 samples have rank 2 at most."""
    path = d / "m.npy"
    np.save(path, good_matrix(6, 12))
    return [*FIT, str(path), "-k", "3", "--stability-repeats", "2"]


CASES = [
    Case("option_stability_threshold_nan", "option",
         _fit_with("--stability-repeats", "2", "--stability-threshold", "nan"), 2, "--stability-threshold nan"),
    Case("option_stability_halves_too_small", "option", _stability_halves_too_small, 2,
         "--stability-repeats: halves of 3 samples"),
    Case("option_seed_negative", "option", _fit_with("--seed", "-1"), 2, "--seed"),
    Case("option_min_variance_nan", "option", _fit_with("--min-variance", "nan"), 2, "--min-variance nan"),
    Case("option_min_variance_inf", "option", _fit_with("--min-variance", "inf"), 2, "--min-variance inf"),
    Case("option_counts_per_inf", "option", _counts_matrix("--counts-per", "inf"), 2, "--counts-per inf"),
    Case("option_counts_per_nan", "option", _counts_matrix("--counts-per", "nan"), 2, "--counts-per nan"),
    Case("option_counts_per_negative", "option", _counts_matrix("--counts-per", "-5"), 2, "--counts-per -5"),
    Case("option_tol_nan", "option", _fit_with("--tol", "nan"), 2, "--tol nan"),
    Case("option_tol_zero", "option", _fit_with("--tol", "0"), 2, "--tol 0"),
    Case("option_memory_limit_1e400", "option", _fit_with("--memory-limit", "1e400"), 2, "--memory-limit"),
    Case("option_memory_limit_words", "option", _fit_with("--memory-limit", "lots"), 2, "--memory-limit"),
    Case("option_memory_limit_too_small", "option", _fit_with("--memory-limit", "1KB"), 2, "16MB"),
    Case("option_components_zero", "option", _fit_with("-k", "0"), 2, "--components"),
    Case("option_top_variable_one", "option", _fit_with("--top-variable", "1"), 2, "--top-variable"),
    Case("option_power_iterations_101", "option", _fit_with("--power-iterations", "101"), 2, "--power-iterations"),
    Case("option_power_iterations_word", "option", _fit_with("--power-iterations", "many"), 2,
         "Invalid value for '--power-iterations': 'many' is not 'auto' or a whole number"),
    Case("option_threads_zero", "option", _fit_with("--threads", "0"), 2, "--threads"),
    Case("option_scratch_is_a_file", "option",
         lambda d: (d / "afile").write_text("x") and _fit_with("--scratch", str(d / "afile"))(d), 2, "--scratch"),
    Case("option_score_confidence_nan", "option", _score_with("--confidence", "nan"), 2, "--confidence nan"),
    Case("option_score_confidence_one", "option", _score_with("--confidence", "1"), 2, "--confidence 1"),
    Case("option_score_missing_fraction_nan", "option", _score_with("--max-missing-fraction", "nan"), 2,
         "--max-missing-fraction"),
    Case("option_score_memory_limit_1e400", "option", _score_with("--memory-limit", "1e400"), 2,
         "--memory-limit"),
    Case("input_missing", "option", _missing_input, 2, "absent.npy"),
    Case("input_unknown_suffix", "option", _unknown_suffix, 2, "matrix.xyz"),
    Case("input_unreadable", "option", _unreadable, 2, "locked.npy", needs_non_root=True),
    Case("out_exists", "option", _out_exists, 2, "already exists"),
    Case("out_under_a_file", "option", _out_under_a_file, 2, "plainfile"),
    Case("out_in_read_only_folder", "option", _out_in_read_only, 2, "readonly",
         needs_non_root=True),
    Case("scratch_read_only", "option", _scratch_read_only, 2, "scratch", needs_non_root=True),
    Case("score_new_values_overflow", "option", _score_with(new=_overflowing_new_samples), 0,
         check=_flagged_sample_4),
]
