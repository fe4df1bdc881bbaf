"""Unattended runs: exit codes, ``--config``, logging for machines.

References: exit codes 130 and 143 are 128 + SIGINT / SIGTERM (the shell convention, recalled
from memory: POSIX "Shell Command Language" §2.8.2); TOML is read by the standard library's
``tomllib`` and YAML by PyYAML (outside references for the parsing); a file-given option must
give the very result of the same option typed on the command line (byte-identical tables).
"""

from __future__ import annotations

import filecmp
import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Annotated

import numpy as np
import pytest
import typer
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.cli._app import main


@pytest.fixture(scope="module")
def small_npy(tmp_path_factory):
    """120 × 40 float64 .npy with a planted rank-3 structure."""
    from conftest import make_planted

    path = tmp_path_factory.mktemp("unattended") / "small.npy"
    np.save(path, make_planted(120, 40, rank=3, seed=5).X)
    return path


def _fit(path: Path, out: Path, *extra: str) -> list[str]:
    return ["fit", str(path), "--out", str(out), "--threads", "1", *extra]


# ----------------------------------------------------------------------------- exit codes


def test_help_lists_every_exit_code():
    text = CliRunner().invoke(app, ["--help"], terminal_width=100).output
    for code, word in ((0, "success"), (1, "internal error"), (2, "bad input"), (3, "resource"),
                       (130, "interrupted"), (143, "terminated")):
        assert any(line.split()[:1] == [str(code)] and word in line for line in text.splitlines()), (code, text)


def test_readme_lists_every_exit_code():
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    for code in ("| 0 |", "| 1 |", "| 2 |", "| 3 |", "| 130 |", "| 143 |"):
        assert code in readme, code


def test_an_internal_error_is_one_line_with_a_debug_hint_and_exit_1(small_npy, tmp_path, capsys, monkeypatch):
    """A bug (an exception that is not one of axiscope's typed errors) exits 1 with one line;
    ``--debug`` adds the traceback. Nothing is written either way."""
    from axiscope.fitting import run

    def broken(*args, **kwargs):
        raise ZeroDivisionError("planted bug")

    monkeypatch.setattr(run, "_manifest", broken)
    out = tmp_path / "out"
    assert main(_fit(small_npy, out, "-k", "2", "-q")) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("error: internal error (ZeroDivisionError: planted bug)")
    assert "rerun with --debug for a traceback" in err[0]
    assert main(_fit(small_npy, out, "-k", "2", "-q", "--debug")) == 1
    err = capsys.readouterr().err
    assert "Traceback (most recent call last)" in err and "planted bug" in err
    assert not out.exists()


def test_usage_and_input_errors_exit_2(small_npy, tmp_path, capsys):
    """(Exit 3 and 143: tests/test_process.py.)"""
    out = tmp_path / "out"
    assert main(_fit(small_npy, out, "--no-such-option")) == 2
    assert main(_fit(tmp_path / "missing.npy", out, "-q")) == 2
    assert not out.exists()


_INTERRUPTING = r'''
import os, signal, sys
from axiscope.core import passes
original = passes.PassRunner.run
def run(self, name, *args, **kwargs):
    os.kill(os.getpid(), signal.SIGINT)  # Ctrl-C while the first pass starts
    return original(self, name, *args, **kwargs)
passes.PassRunner.run = run
from axiscope.cli._app import main
sys.exit(main(sys.argv[1:]))
'''


def test_ctrl_c_exits_130_and_writes_nothing(small_npy, tmp_path):
    out = tmp_path / "out"
    done = subprocess.run([sys.executable, "-c", _INTERRUPTING, *_fit(small_npy, out, "-q", "-k", "2")],
                          capture_output=True, text=True, timeout=120,
                          env=dict(os.environ, OPENBLAS_NUM_THREADS="1"))
    assert done.returncode == 130, done.stderr
    assert done.stderr.strip().splitlines() == ["error: interrupted; nothing was written"]
    assert sorted(p.name for p in tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------------- --config


def test_config_file_gives_the_same_fit_as_the_command_line(small_npy, tmp_path):
    """TOML and YAML, top level and the command's table, underscores and dashes, a negated
    flag and a file-given input: the tables equal those of the same options typed."""
    typed = tmp_path / "typed"
    assert main(_fit(small_npy, typed, "-q", "-k", "3", "--scale", "none", "--seed", "4",
                     "--oversample", "5", "--power-iterations", "2", "--method", "randomized")) == 0
    toml = tmp_path / "run.toml"
    toml.write_text(f'input = "{small_npy}"\ncomponents = 7\npower_iterations = "2"\n'
                    '[fit]\ncomponents = 3\nscale = "none"\nseed = 4\noversample = 5\nmethod = "randomized"\n'
                    '[score]\nconfidence = 0.9\n', encoding="utf-8")
    from_toml = tmp_path / "toml"
    assert main(["fit", "--config", str(toml), "--out", str(from_toml), "-q", "--threads", "1"]) == 0
    pytest.importorskip("yaml")  # YAML files need PyYAML (installed with the test extra's Snakemake)
    yaml_file = tmp_path / "run.yaml"
    yaml_file.write_text("fit:\n  components: 3\n  scale: none\n  seed: 4\n  oversample: 5\n"
                         "  power-iterations: '2'\n  method: randomized\n  threads: 1\n", encoding="utf-8")
    from_yaml = tmp_path / "yaml"
    assert main(["fit", str(small_npy), "--config", str(yaml_file), "--out", str(from_yaml), "-q"]) == 0
    names = ["components.tsv", "sample_scores.tsv", "feature_loadings.tsv"]
    for other in (from_toml, from_yaml):
        match, mismatch, errors = filecmp.cmpfiles(typed, other, names, shallow=False)
        assert mismatch == [] and errors == [], other

    manifest = json.loads((from_toml / "manifest.json").read_text())
    config = manifest["configuration"]
    assert config["file"] == str(toml)
    assert str(config["values"]["components"]) == "3" and config["sources"]["components"] == "config file"
    assert config["values"]["scale"] == "none" and config["values"]["input"] == str(small_npy)
    assert config["sources"]["out"] == "command line" and config["sources"]["tol"] == "default"
    assert manifest["options"]["n_components"] == 3


def test_command_line_overrides_the_config_file(small_npy, tmp_path):
    toml = tmp_path / "run.toml"
    toml.write_text("[fit]\ncomponents = 3\nno-center = true\n", encoding="utf-8")
    out = tmp_path / "out"
    assert main(_fit(small_npy, out, "-q", "--config", str(toml), "-k", "2", "--center")) == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["options"]["n_components"] == 2 and manifest["options"]["preprocessing"]["center"] is True
    assert manifest["configuration"]["sources"]["components"] == "command line"


@pytest.mark.parametrize(("text", "said"), [
    ("componets = 3\n", "unknown key 'componets' for 'axiscope fit'; did you mean 'components'?"),
    ("[fit]\nmemory_limt = '1GB'\n", "[fit] unknown key 'memory_limt' for 'axiscope fit'; did you mean 'memory-limit'?"),
    ("confidence = 0.9\n", "unknown key 'confidence' for 'axiscope fit'"),
    ("components = 'many'\n", "Invalid value for '--components'"),
    ("components = [\n", "not valid TOML"),
    ("fit = 3\n", "'fit' must be a table of options"),
])
def test_bad_config_files_are_one_line_and_exit_2(small_npy, tmp_path, capsys, text, said):
    toml = tmp_path / "run.toml"
    toml.write_text(text, encoding="utf-8")
    out = tmp_path / "out"
    assert main(_fit(small_npy, out, "-q", "--config", str(toml))) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and said in err[0], err
    assert not out.exists()


def test_every_command_takes_the_shared_options():
    runner = CliRunner()
    from axiscope.cli._app import COMMAND_ORDER

    for name in (*COMMAND_ORDER, "explain", "figures", "report"):
        text = runner.invoke(app, [name, "--help"], terminal_width=200).output
        for option in ("--config", "--log-format", "--verbose", "--debug"):
            assert option in text, (name, option)


def test_a_command_s_own_option_of_a_shared_name_is_kept():
    """A command that declares ``--verbose`` itself keeps it: the shared one is not added, and
    its value reaches the command's function."""
    from typer.main import get_command

    from axiscope.cli._session import with_shared_options

    seen = {}
    local = typer.Typer(add_completion=False)

    @local.command()
    def count(verbose: Annotated[int, typer.Option("--verbose", help="How much.")] = 0) -> None:
        seen["verbose"] = verbose

    command = with_shared_options(get_command(local), "count")
    assert [p.name for p in command.params] == ["verbose", "config", "log_format", "debug"]
    command.main(["--verbose", "3"], standalone_mode=False)
    assert seen == {"verbose": 3}


# ----------------------------------------------------------------------------------- logging


_MAIN = "import sys; from axiscope.cli._app import main; sys.exit(main(sys.argv[1:]))"


def test_json_log_has_one_object_per_pass(small_npy, tmp_path):
    """One JSON object per line on standard error, one per pass of the manifest, in order,
    with stage, pass number and seconds; standard output keeps the human summary."""
    out = tmp_path / "out"
    done = subprocess.run([sys.executable, "-c", _MAIN, *_fit(small_npy, out, "-k", "2", "--method",
                                                                        "randomized", "--log-format", "json")],
                          capture_output=True, text=True, timeout=120, env=dict(os.environ, OPENBLAS_NUM_THREADS="1"))
    assert done.returncode == 0, done.stderr
    records = [json.loads(line) for line in done.stderr.splitlines()]
    passes = [r for r in records if r["pass"] is not None]
    detail = json.loads((out / "manifest.json").read_text())["passes"]["detail"]
    assert [r["stage"] for r in passes] == [d["name"] for d in detail]
    assert [r["pass"] for r in passes] == list(range(1, len(detail) + 1))
    assert all(r["command"] == "fit" and r["seconds"] >= 0 and r["level"] == "info" for r in passes)
    assert records[-1]["stage"] == "done" and records[-1]["seconds"] >= sum(r["seconds"] for r in passes)
    assert done.stdout.startswith("fitted 2 components")


def test_verbose_adds_pass_lines_and_quiet_keeps_only_warnings(small_npy, tmp_path, capsys):
    assert main(_fit(small_npy, tmp_path / "a", "-k", "2", "--method", "randomized", "--verbose")) == 0
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert lines[-1].startswith("info: fit done in ") and len(lines) > 1, lines
    assert all(line.startswith("info: pass ") for line in lines[:-1]), lines
    assert main(_fit(small_npy, tmp_path / "b", "-k", "2", "--method", "randomized", "-q")) == 0
    captured = capsys.readouterr()
    assert captured.err == "" and captured.out == ""
