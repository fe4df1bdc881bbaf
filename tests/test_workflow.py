"""The example Snakemake workflow in ``workflows/snakemake/`` runs end to end.

Run with ``snakemake --cores 1`` in a temporary copy (skipped when Snakemake is not
installed or the Snakefile is missing). The fitted axes are checked against a dense
reference computed here from the simulated counts with numpy/LAPACK (eigenvalues of the
sample Gram matrix of the standardized log counts-per-million, scipy.linalg.eigvalsh).
The fit is killed once with SIGKILL in the middle of a pass (an ``axiscope`` placed first
on PATH kills itself the first time): Snakemake's retry resumes it from the checkpoint.
A second run with nothing changed does no work.
"""

from __future__ import annotations

import importlib.util
import json
import os
import pathlib
from pathlib import Path
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

WORKFLOWS = pathlib.Path(__file__).resolve().parents[1] / "workflows"
SNAKEFILE = WORKFLOWS / "snakemake" / "Snakefile"

#: ``axiscope`` that kills itself (SIGKILL) while folding the second block of "iteration 2"
#: of the first fit it runs (FLAG marks that it did), and otherwise is the real command.
_KILLING_ONCE = """#!{python}
import os, signal, sys
flag = os.environ["KILL_ONCE_FLAG"]
if sys.argv[1:2] == ["fit"] and not os.path.exists(flag):
    from axiscope.core import passes
    original = passes.PassRunner._run_pipelined
    def run(self, name, blocks, starts, task, fold, args):
        def fold_then_die(result, index, start):
            fold(result, index, start)
            if name == "iteration 2" and index == 1:
                open(flag, "w").close()
                os.kill(os.getpid(), signal.SIGKILL)
        return original(self, name, blocks, starts, task, fold_then_die, args)
    passes.PassRunner._run_pipelined = run
from axiscope.cli._app import main
sys.exit(main(sys.argv[1:]))
"""


@pytest.mark.filterwarnings("ignore:Object at .snakemake_timestamp")
@pytest.mark.skipif(importlib.util.find_spec("snakemake") is None, reason="snakemake is not installed")
@pytest.mark.skipif(not SNAKEFILE.is_file(), reason=f"no workflow yet: {SNAKEFILE} is missing")
def test_snakemake_workflow_runs(tmp_path):
    import scipy.linalg
    import zarr

    work = tmp_path / "workflow"
    shutil.copytree(SNAKEFILE.parent, work, ignore=shutil.ignore_patterns(".snakemake", "results"))
    shim = tmp_path / "bin"
    shim.mkdir()
    (shim / "axiscope").write_text(_KILLING_ONCE.format(python=sys.executable), encoding="utf-8")
    (shim / "axiscope").chmod(0o755)
    flag = tmp_path / "killed-once"
    env = dict(os.environ, KILL_ONCE_FLAG=str(flag))
    # the workflow's shell commands call `axiscope` from the environment running the tests
    env["PATH"] = os.pathsep.join([str(shim), os.path.dirname(sys.executable), env.get("PATH", "")])
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    k = 4
    cmd = [sys.executable, "-m", "snakemake", "--cores", "1", "--config", f"components={k}", "out=results"]
    run = subprocess.run(cmd, cwd=work, env=env, capture_output=True, text=True, timeout=600, check=False)
    assert run.returncode == 0, run.stderr[-3000:]
    assert flag.exists(), "the fit was never killed"

    fit_dir = work / "results" / "fit"
    manifest = json.loads((fit_dir / "manifest.json").read_text())
    # the retry continued after iteration 1, the last pass completed before the kill
    assert manifest["checkpoint"]["resumed_after_pass"] == 1
    assert manifest["configuration"]["sources"]["components"] == "command line"
    assert manifest["configuration"]["sources"]["counts-per"] == "config file"
    score_manifest = json.loads((work / "results" / "score" / "manifest.json").read_text())
    assert score_manifest["reference_check"]["same_file"] is True
    assert (work / "results" / "explanation" / "axis_cards.tsv").is_file()
    assert (work / "results" / "report.html").is_file()

    again = subprocess.run(cmd, cwd=work, env=env, capture_output=True, text=True, timeout=300, check=False)
    assert again.returncode == 0, again.stderr[-3000:]
    assert "Nothing to be done" in again.stdout + again.stderr
    components = pd.read_csv(fit_dir / "components.tsv", sep="\t")
    scores = pd.read_csv(fit_dir / "sample_scores.tsv", sep="\t")
    assert len(components) == k
    assert (fit_dir / "model" / "model.json").is_file()

    # the reference: the simulated matrix read with zarr itself, preprocessed densely
    reference = pathlib.Path(manifest["input"]["path"])
    if not reference.is_absolute():
        reference = work / reference
    group = zarr.open_group(str(reference), mode="r")
    arrays = {name: a for name, a in group.members(max_depth=None) if isinstance(a, zarr.Array)}
    matrix = next(a for a in arrays.values() if a.ndim == 2)
    counts = np.asarray(matrix[...], dtype=np.float64)
    assert list(manifest["input"]["shape"]) == list(counts.shape)
    assert len(scores) == counts.shape[0]
    if "sample_ids" in arrays:
        assert list(scores.sample_id) == [str(v) for v in arrays["sample_ids"][...]]
    # counts per million, log(1 + x), standardized with the population SD
    A = np.log1p(counts * (1e6 / counts.sum(axis=1, keepdims=True)))
    sd = A.std(axis=0)
    Z = (A[:, sd > 0] - A[:, sd > 0].mean(axis=0)) / sd[sd > 0]
    n = Z.shape[0]
    eig = scipy.linalg.eigvalsh(Z @ Z.T)[::-1][:k]  # reference: LAPACK syevr via scipy
    np.testing.assert_allclose(components.variance, eig / n, rtol=1e-4)
    np.testing.assert_allclose(components.variance_ratio, eig / n / Z.shape[1], rtol=1e-4)


# --------------------------------------------------------------------------------- CWL

CWL = WORKFLOWS / "cwl"


@pytest.mark.skipif(importlib.util.find_spec("cwltool") is None, reason="cwltool is not installed")
def test_cwl_descriptions_are_valid_and_the_pipeline_runs(tmp_path):
    """``cwltool --validate`` accepts every description; the pipeline run on the demo data
    gives the same tables as the same options typed on the command line (byte for byte), and
    scores the new batch against the reference it was fitted on."""
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    env["PATH"] = os.path.dirname(sys.executable) + os.pathsep + env.get("PATH", "")
    cwltool = [sys.executable, "-m", "cwltool"]
    for name in ("fit.cwl", "score.cwl", "pipeline.cwl"):
        done = subprocess.run([*cwltool, "--validate", str(CWL / name)], env=env, capture_output=True, text=True,
                              timeout=300, check=False)
        assert done.returncode == 0 and f"{name} is valid CWL" in done.stdout + done.stderr, done.stderr[-2000:]

    work = tmp_path / "cwl"
    shutil.copytree(CWL, work)
    data = subprocess.run(["axiscope", "simulate", "--out", str(work / "data"), "--quiet"], env=env,
                          capture_output=True, text=True, timeout=300, check=False)
    assert data.returncode == 0, data.stderr
    run = subprocess.run([*cwltool, "--outdir", str(work / "out"), "pipeline.cwl", "job.yml"], cwd=work, env=env,
                         capture_output=True, text=True, timeout=600, check=False)
    assert run.returncode == 0, run.stderr[-3000:]
    outputs = json.loads(run.stdout)
    fit_dir = Path(outputs["fit_result"]["path"])
    score_dir = Path(outputs["score_result"]["path"])

    typed = tmp_path / "typed"
    direct = subprocess.run(["axiscope", "fit", str(work / "data" / "reference.zarr"), "--out", str(typed), "--quiet",
                             "--components", "5", "--counts-per", "1e6", "--log"], env=env, capture_output=True,
                            text=True, timeout=300, check=False)
    assert direct.returncode == 0, direct.stderr
    for name in ("components.tsv", "sample_scores.tsv", "feature_loadings.tsv"):
        assert (fit_dir / name).read_bytes() == (typed / name).read_bytes(), name
    manifest = json.loads((score_dir / "manifest.json").read_text())
    assert manifest["reference_check"]["same_file"] is True
    assert manifest["counts"]["samples"] == len(pd.read_csv(score_dir / "diagnostics.tsv", sep="\t"))


# ---------------------------------------------------------------------------- Nextflow

NEXTFLOW = WORKFLOWS / "nextflow"


def _options_used(script: str, command: str) -> set[str]:
    import re

    found = set()
    for match in re.finditer(rf"axiscope {command}\b(.*?)(?:\"\"\"|\n\s*\n)", script, flags=re.S):
        found |= set(re.findall(r"(?<![\w-])(--[a-z][a-z-]*)", match[1]))
    return found


@pytest.mark.parametrize("command", ["fit", "score"])
def test_nextflow_module_passes_only_options_that_exist(command):
    """Where Nextflow cannot run, the module's command lines are checked against the parser."""
    from typer.main import get_command

    from axiscope.cli import app

    script = (NEXTFLOW / "modules" / "axiscope.nf").read_text(encoding="utf-8")
    used = _options_used(script, command)
    assert "--config" in used and "--out" in used
    parser = get_command(app).get_command(None, command)
    known = {opt for p in parser.params for opt in (*p.opts, *getattr(p, "secondary_opts", ()))}
    assert used <= known, used - known


@pytest.mark.parametrize("folder", ["snakemake", "cwl", "nextflow"])
def test_every_workflow_settings_file_is_valid_for_its_commands(folder):
    from typer.main import get_command

    from axiscope.cli import app
    from axiscope.cli._config import defaults_from_config, read_config_file

    group = get_command(app)
    path = WORKFLOWS / folder / "axiscope.toml"
    loaded = read_config_file(path)
    assert set(loaded) <= set(group.commands)
    for name in loaded:
        defaults = defaults_from_config(loaded, group.get_command(None, name), name, set(group.commands), path)
        assert defaults, name


@pytest.mark.skipif(shutil.which("nextflow") is None, reason="nextflow (and Java) are not installed here")
def test_nextflow_example_runs(tmp_path):
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    env["PATH"] = os.path.dirname(sys.executable) + os.pathsep + env.get("PATH", "")
    work = tmp_path / "nextflow"
    shutil.copytree(NEXTFLOW, work)
    assert subprocess.run(["axiscope", "simulate", "--out", str(work / "data"), "--quiet"], env=env,
                          timeout=300).returncode == 0
    run = subprocess.run(["nextflow", "run", "main.nf"], cwd=work, env=env, capture_output=True, text=True,
                         timeout=900, check=False)
    assert run.returncode == 0, run.stdout[-3000:] + run.stderr[-3000:]
    assert (work / "results" / "axiscope_score" / "score" / "diagnostics.tsv").is_file()
