"""Every case of the corpus of malformed and tricky inputs (``tests/bad_inputs``), through the CLI.

For each case: the exit code; for an error, exactly one line on standard error that starts
with ``error:`` and holds the case's fragment, no traceback and no Python warning; for a
valid input, the case's own check of the result; and in every case nothing left behind
(no output folder, no hidden temporary folder beside it, no new file anywhere in the
case's folder, nothing in a private temporary folder given to the run).

A case with a ``known_fault`` is marked ``xfail(strict=True)``: it must fail until the
fault is fixed, and then the mark goes.
"""

from __future__ import annotations

import os
import tempfile
import warnings
from pathlib import Path

import pytest

from bad_inputs import CASES, Case

def _param(case: Case):
    marks = []
    if case.known_fault is not None:
        marks.append(pytest.mark.xfail(strict=True, reason=case.known_fault))
    if case.needs_non_root:
        marks.append(pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                                        reason="root reads and writes regardless of permissions"))
    return pytest.param(case, id=case.name, marks=marks)


def _tree(folder: Path) -> set[str]:
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


def _unlock(folder: Path) -> None:
    """Give back permissions that a case took away, so that pytest can clean up."""
    for path in [folder, *folder.rglob("*")]:
        try:
            path.chmod(0o755 if path.is_dir() else 0o644)
        except OSError:
            pass


def test_corpus_is_large_and_covers_every_kind():
    kinds = {case.kind for case in CASES}
    assert kinds == {"text", "hdf5", "zarr", "npy", "model", "option"}
    assert len(CASES) >= 60


@pytest.mark.parametrize("case", [_param(c) for c in CASES])
def test_bad_input(case: Case, tmp_path, monkeypatch, capsys):
    from axiscope.cli._app import main

    work = tmp_path / "case"
    work.mkdir()
    private_tmp = tmp_path / "private_tmp"
    private_tmp.mkdir()
    monkeypatch.setenv("TMPDIR", str(private_tmp))
    monkeypatch.setattr(tempfile, "tempdir", str(private_tmp))
    try:
        argv = case.build(work)
        out = Path(argv[argv.index("--out") + 1]) if "--out" in argv else work / "out"
        if "--out" not in argv:
            argv = [*argv, "--out", str(out)]
        before = _tree(work)
        capsys.readouterr()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            code = main(argv)  # an exception escaping here is a traceback for the user
        captured = capsys.readouterr()
        after = _tree(work)
    finally:
        _unlock(work)
    assert code == case.code, f"exit code {code}, stderr: {captured.err!r}"
    assert "Traceback" not in captured.err + captured.out
    assert not [str(w.message) for w in caught], "Python warnings were shown"
    assert not list(private_tmp.iterdir()), "files left in the temporary folder"
    if case.code == 0:
        assert after - before == {str(out.relative_to(work))} | {
            str(p.relative_to(work)) for p in out.rglob("*")}, "files other than the output"
        case.check(out)
        return
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 + case.warnings, captured.err
    assert all(line.startswith("warning: ") for line in lines[:-1]), captured.err
    assert lines[-1].startswith("error: "), captured.err
    assert case.fragment in lines[-1], lines[-1]
    assert after == before, f"left behind: {sorted(after ^ before)}"


# ----------------------------------------------------------- the same rules in the Python API

_NAN, _INF = float("nan"), float("inf")


def _options():
    from axiscope import PreprocessSpec
    from axiscope.core.options import EngineSettings, Resources

    return [
        ("counts_per_inf", lambda: PreprocessSpec(counts_per=_INF), r"^counts_per=inf is not a finite number"),
        ("counts_per_nan", lambda: PreprocessSpec(counts_per=_NAN), r"^counts_per=nan is not a finite number"),
        ("counts_per_huge_int", lambda: PreprocessSpec(counts_per=10**400), r"is not a finite number"),
        ("min_variance_nan", lambda: PreprocessSpec(min_variance=_NAN), r"^min_variance=nan is not a finite"),
        ("min_variance_inf", lambda: PreprocessSpec(min_variance=_INF), r"^min_variance=inf is not a finite"),
        ("top_variable_float", lambda: PreprocessSpec(top_variable=5.0), r"^top_variable=5\.0 is not a whole"),
        ("tol_nan", lambda: EngineSettings(tol=_NAN), r"^tol=nan is not a number between 0 and 1"),
        ("tol_inf", lambda: EngineSettings(tol=_INF), r"^tol=inf is not a number between 0 and 1"),
        ("seed_negative", lambda: EngineSettings(seed=-1), r"^seed=-1 is not a whole number >= 0"),
        ("seed_float", lambda: EngineSettings(seed=1.5), r"^seed=1\.5 is not a whole number"),
        ("memory_limit_inf", lambda: Resources(memory_limit=_INF), r"^memory_limit=inf is not a finite size"),
        ("memory_limit_nan", lambda: Resources(memory_limit=_NAN), r"^memory_limit=nan is not a finite size"),
        ("memory_limit_1e400", lambda: Resources(memory_limit="1e400"), r"^memory_limit='1e400' is "),
    ]


@pytest.mark.parametrize("name", [name for name, _, _ in _options()])
def test_option_objects_refuse_non_finite_values_without_warnings(name):
    from axiscope.errors import OptionError

    _, make, message = next(option for option in _options() if option[0] == name)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a Python warning before the refusal fails the test
        with pytest.raises(OptionError, match=message):
            make()


@pytest.mark.parametrize("value", [_NAN, _INF, 1.0, 0.5])
def test_score_refuses_confidence_outside_the_open_interval(value, tmp_path):
    from bad_inputs import fit_model

    from axiscope.errors import OptionError
    from axiscope.scoring.score import score

    model, new = fit_model(tmp_path)
    with pytest.raises(OptionError, match=r"^confidence=\S+ is out of range"):
        score(model, new, confidence=value, threads=1)
