"""The command line as a new user first meets it: version, command list, help, errors.

Outside references: the installed package's metadata (importlib.metadata) for the
version; Python's own import log (``PYTHONPROFILEIMPORTTIME``, the documented
``-X importtime`` switch) for what ``axiscope --help`` loads; the rest checks the
command line against its own declared parameters and the Python API's messages.
"""

from __future__ import annotations

import importlib.metadata
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import typer
from typer.main import get_command
from typer.testing import CliRunner

import axiscope
from axiscope.cli import app, main
from axiscope.cli._app import COMMAND_ORDER, to_option_spellings

runner = CliRunner()

#: Modules that listing the commands must not load (tests/test_layout.py checks the same
#: for ``import axiscope.cli``).
HEAVY = ("numpy", "pandas", "dask", "scipy", "h5py", "zarr", "sklearn", "pyarrow", "rich")


def _group():
    return get_command(app)


def _commands() -> list[str]:
    group = _group()
    return group.list_commands(typer.Context(group, info_name="axiscope"))


# ------------------------------------------------------------------------------- version


def test_version_prints_the_installed_version_and_exits(capsys):
    # reference: the version recorded in the installed package's metadata
    expected = importlib.metadata.version("axiscope")
    assert axiscope.__version__ == expected
    r = runner.invoke(app, ["--version"])
    assert r.exit_code == 0
    assert r.stdout.strip() == f"axiscope {expected}"
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"axiscope {expected}"


# -------------------------------------------------------------------------- command list


def test_commands_are_listed_in_the_order_of_the_work():
    names = _commands()
    listed = [name for name in COMMAND_ORDER if name in names]
    assert listed == ["inspect", "fit", "score", "demo", "simulate"]
    position = {name: i for i, name in enumerate(names)}
    assert [position[name] for name in listed] == sorted(position[name] for name in listed)
    # the command explaining the axes (whatever its name) comes after fit and before score
    others = [name for name in names if name not in COMMAND_ORDER]
    assert others, "no command besides the listed ones: where is the explanation of the axes?"
    assert all(position["fit"] < position[name] < position["score"] for name in others)


def _command_rows(width: int) -> dict[str, str]:
    r = runner.invoke(app, ["--help"], terminal_width=width)
    assert r.exit_code == 0
    section = r.stdout.split("Commands:\n", 1)[1].split("Exit codes:", 1)[0]  # the epilog lists exit codes
    rows: dict[str, str] = {}
    name = None
    for line in section.splitlines():
        match = re.match(r"^  (\S+)\s+(.*)$", line)
        if match:
            name = match[1]
            rows[name] = match[2].strip()
        elif line.strip() and name is not None:
            rows[name] += " " + line.strip()
    return rows


@pytest.mark.parametrize("width", [60, 80, 120])
def test_command_list_is_never_cut_off(width):
    rows = _command_rows(width)
    assert list(rows) == _commands()
    group = _group()
    for name, text in rows.items():
        assert "..." not in text and "…" not in text, f"{name}: {text!r}"
        command = group.get_command(None, name)
        if command.short_help:
            expected = " ".join(command.short_help.split())
        else:  # the first sentence of the command's help, whole
            first = " ".join(command.help.split("\n\n")[0].split())
            expected = first.split(". ")[0].rstrip(".") + "."
        assert text == expected, f"{name}: {text!r} != {expected!r}"


def _options_of_every_command():
    group = _group()
    for name in _commands():
        command = group.get_command(None, name)
        for param in command.params:
            if param.param_type_name == "option":
                yield name, command, param


@pytest.mark.parametrize(("name", "command", "param"),
                         list(_options_of_every_command()),
                         ids=[f"{n} {p.opts[0]}" for n, _, p in _options_of_every_command()])
def test_every_option_has_help_and_shows_its_default(name, command, param):
    # A default that is a value is shown as "[default: ...]"; an option that is off or unset
    # unless given (a flag, a None default) shows one where the help declares it with
    # show_default="..." (e.g. --memory-limit: half the RAM).
    ctx = typer.Context(command, info_name=name)
    record = param.get_help_record(ctx)
    assert param.help and param.help.strip(), f"{name} {param.opts[0]} has no help text"
    unset = param.default is None or (getattr(param, "is_flag", False) and not param.default
                                      and not param.secondary_opts)
    if not (param.required or unset):
        assert "default:" in record[1], f"{name} {param.opts[0]} shows no default: {record[1]!r}"


def test_version_option_has_help():
    group = _group()
    (version,) = [p for p in group.params if "--version" in p.opts]
    assert version.help


# ------------------------------------------------------------------------ fast start


def _modules_loaded(args: list[str]) -> tuple[int, set[str], str]:
    """Run the console script in a fresh process with Python's import log; top-level modules it loaded."""
    script = Path(sys.executable).with_name("axiscope")
    command = [str(script), *args] if script.is_file() else [
        sys.executable, "-c", "import sys; from axiscope.cli import main; sys.exit(main())", *args]
    env = {**os.environ, "PYTHONPROFILEIMPORTTIME": "1"}
    done = subprocess.run(command, capture_output=True, text=True, env=env, timeout=120)
    names = set()
    for line in done.stderr.splitlines():
        if line.startswith("import time:") and "|" in line:
            name = line.rsplit("|", 1)[1].strip()
            if name != "package":  # the header line
                names.add(name.split(".")[0])
    return done.returncode, names, done.stdout


def test_help_loads_no_numerical_library():
    code, loaded, out = _modules_loaded(["--help"])
    assert code == 0 and "Commands:" in out
    assert "typer" in loaded  # the import log works
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))


@pytest.mark.parametrize("name", _commands())
def test_a_command_s_help_loads_no_numerical_library(name):
    code, loaded, out = _modules_loaded([name, "--help"])
    assert code == 0 and "Usage:" in out
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))


# --------------------------------------------------------- Python names → option names


def _score_params():
    command = _group().get_command(None, "score")
    return {p.name: p for p in command.params if p.param_type_name == "option"}


@pytest.mark.parametrize(("message", "expected"), [
    ("confidence=1.0 is out of range", "--confidence 1.0 is out of range"),
    ("pass fill_missing='mean'", "pass --fill-missing mean"),
    ("check feature_ids and samples_in", "check --feature-ids and --samples-in"),
    ("score with adjust_q=False", "score with --no-adjust-q"),
    ("pass overwrite=True", "pass --overwrite"),
    ("correct_shrinkage=False", "without --correct-shrinkage"),
    ("raise memory_limit, e.g. memory_limit='8GB'", "raise --memory-limit, e.g. --memory-limit 8GB"),
    ("q_method='box' is valid", "--q-limit box is valid"),
    # left alone: one-word names as plain English, quoted names, paths and file names
    ("3 features are missing; the confidence is low; left out", "3 features are missing; the confidence is low; left out"),
    ("dataset 'sample_ids' has 3 ids", "dataset 'sample_ids' has 3 ids"),
    ("file ids/sample_ids.txt and /data/feature_ids", "file ids/sample_ids.txt and /data/feature_ids"),
    ("column n_sample_ids and sample_ids_x", "column n_sample_ids and sample_ids_x"),
])
def test_python_argument_names_become_option_spellings(message, expected):
    assert to_option_spellings(message, _score_params()) == expected


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    from axiscope import fit
    from axiscope.io import array_source

    rng = np.random.default_rng(0)
    X = rng.standard_normal((40, 6)) @ rng.standard_normal((6, 6))
    folder = tmp_path_factory.mktemp("fitted")
    ids = [f"g{j}" for j in range(6)]
    fit(array_source(X, feature_ids=ids), n_components=2).write(folder / "result")
    np.save(folder / "new.npy", X[:10])
    (folder / "features.txt").write_text("\n".join(ids) + "\n")
    return folder


def test_the_same_error_names_the_argument_in_python_and_the_option_on_the_command_line(fitted, tmp_path):
    from axiscope.errors import OptionError
    from axiscope.scoring import score

    with pytest.raises(OptionError) as python_error:
        score(fitted / "result", fitted / "new.npy", feature_ids=str(fitted / "features.txt"), confidence=1.0)
    assert str(python_error.value).startswith("confidence=1.0 is out of range")
    out = tmp_path / "out"
    r = runner.invoke(app, ["score", str(fitted / "result"), str(fitted / "new.npy"), "--out", str(out),
                            "--feature-ids", str(fitted / "features.txt"), "--confidence", "1.0"])
    assert r.exit_code == 2
    assert r.stderr == ("error: --confidence 1.0 is out of range; choose a value between 0.5 and 1 "
                        "(both excluded)\n")
    assert not out.exists()


def test_an_existing_output_folder_names_the_overwrite_option(fitted, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    r = runner.invoke(app, ["score", str(fitted / "result"), str(fitted / "new.npy"), "--out", str(out),
                            "--feature-ids", str(fitted / "features.txt")])
    assert r.exit_code == 2
    assert r.stderr == f"error: {out}: already exists; choose another directory or pass --overwrite\n"


# ------------------------------------------------------------------------ usage errors


@pytest.mark.parametrize("args", [["frobnicate"],
                                  ["score", "m", "x.h5", "--out", "o", "--bogus"],
                                  ["score", "m", "x.h5", "--out", "o", "--max-missing-fraction", "2"],
                                  ["score", "m"]])
def test_usage_errors_are_one_line_with_exit_code_2(args, capsys):
    # common practice for usage errors, no source: exit code 2, one line on standard error
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and "--help')" in err[0]
