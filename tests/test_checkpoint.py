"""Resumable fits and input identity.

References: the tables of an uninterrupted fit of the same input and options (byte for
byte); SIGKILL from the kernel (``os.kill``), which no handler can catch; BLAKE2b from the
standard library's ``hashlib`` (RFC 7693) for the whole-file hash.
"""

from __future__ import annotations

import filecmp
import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from axiscope.cli._app import main

#: Runs the command line; with KILL_AT="iteration 3" it kills itself with SIGKILL while the
#: second block of that pass is folded (mid-pass, after earlier passes were checkpointed).
_DRIVER = r'''
import os, signal, sys
import axiscope.core.memory
axiscope.core.memory.resident_bytes = lambda: 0  # the limit for the data alone, whatever this machine holds
kill_at = os.environ.get("KILL_AT")
if kill_at:
    from axiscope.core import passes
    original = passes.PassRunner._run_pipelined
    def run(self, name, blocks, starts, task, fold, args):
        def fold_then_die(result, index, start):
            fold(result, index, start)
            if name == kill_at and index == 1:
                os.kill(os.getpid(), signal.SIGKILL)
        return original(self, name, blocks, starts, task, fold_then_die, args)
    passes.PassRunner._run_pipelined = run
from axiscope.cli._app import main
sys.exit(main(sys.argv[1:]))
'''


@pytest.fixture(scope="module")
def blocked_zarr(tmp_path_factory):
    """600 × 800 float32 Zarr in chunks of 50 samples: 12 blocks per pass."""
    import zarr
    from conftest import make_planted

    X = make_planted(600, 800, rank=4, dtype="float32", seed=45).X
    path = tmp_path_factory.mktemp("checkpoint") / "blocked.zarr"
    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    array = group.create_array("X", shape=X.shape, chunks=(50, 800), dtype="float32")
    array[...] = X
    return path


def _run(args: list, kill_at: str | None = None) -> subprocess.CompletedProcess:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    if kill_at:
        env["KILL_AT"] = kill_at
    return subprocess.run([sys.executable, "-c", _DRIVER, *map(str, args)], env=env, capture_output=True,
                          text=True, timeout=300)


def _args(path: Path, out: Path, *extra) -> list:
    return ["fit", path, "--out", out, "-k", "3", "--method", "randomized", "--power-iterations", "5",
            "--threads", "2", "-q", *extra]


@pytest.mark.parametrize("options", [
    (),                            # the statistics pass fills the block cache, and so does the resumed one
    ("--top-variable", "600"),     # a feature filter: the sketch pass fills the cache; after a resume, iteration 3
], ids=["cached", "filtered"])
def test_a_killed_fit_resumes_to_byte_identical_tables(blocked_zarr, tmp_path, options, monkeypatch):
    from axiscope.core import memory

    monkeypatch.setattr(memory, "resident_bytes", lambda: 0)  # as in the driver: the same plan
    plain = tmp_path / "plain"
    assert main([str(a) for a in _args(blocked_zarr, plain, *options)]) == 0

    out, ckpt = tmp_path / "out", tmp_path / "ckpt"
    killed = _run(_args(blocked_zarr, out, *options, "--checkpoint", ckpt, "--resume"), kill_at="iteration 3")
    assert killed.returncode == -9, killed.stderr  # SIGKILL
    assert not out.exists() and (ckpt / "fit-state.npz").is_file()

    resumed = _run(_args(blocked_zarr, out, *options, "--checkpoint", ckpt, "--resume"))
    assert resumed.returncode == 0, resumed.stderr
    files = sorted(str(p.relative_to(plain)) for p in plain.rglob("*") if p.is_file() and p.name != "manifest.json")
    assert "sample_scores.tsv" in files and "model/components.npy" in files
    match, mismatch, errors = filecmp.cmpfiles(plain, out, files, shallow=False)
    assert mismatch == [] and errors == [], mismatch or errors

    full = json.loads((plain / "manifest.json").read_text())
    again = json.loads((out / "manifest.json").read_text())
    assert again["checkpoint"]["resumed_after_pass"] == 2  # iterations 1 and 2 were complete
    names = [p["name"] for p in again["passes"]["detail"]]
    skipped = ("sketch", "iteration 1", "iteration 2")
    assert names == [p["name"] for p in full["passes"]["detail"] if p["name"] not in skipped]
    assert again["passes"]["detail"][1]["read_from"] == ("input" if options else "memory")
    assert not (ckpt / "fit-state.npz").exists()  # cleared once the results are in place


def test_a_checkpoint_of_other_options_or_input_is_refused(blocked_zarr, tmp_path, capsys):
    import axiscope

    out, ckpt = tmp_path / "out", tmp_path / "ckpt"
    # the Python API leaves the checkpoint in place (the command line removes it once the results are written)
    axiscope.fit(blocked_zarr, n_components=3, engine=axiscope.EngineSettings(method="randomized", power_iterations=5),
                 checkpoint=ckpt)
    assert main([str(a) for a in _args(blocked_zarr, out, "--checkpoint", ckpt, "--resume", "--seed", "7")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "belongs to a fit of other inputs or options (differs in: engine.seed" in err[0], err
    assert "leave out --resume to start afresh, or pass another folder as --checkpoint ..." in err[0]
    assert not out.exists() and (ckpt / "fit-state.npz").is_file()  # the saved state is kept


def test_a_changed_input_is_refused_by_its_statistics(tmp_path, capsys, monkeypatch):
    """Even when the identity of the input looks the same (here: the hash of the identity is
    made blind), statistics computed again that differ from the saved ones refuse the state."""
    import axiscope
    from axiscope.fitting import run
    from conftest import make_planted

    path, ckpt = tmp_path / "x.npy", tmp_path / "ckpt"
    X = make_planted(200, 60, rank=3, seed=2).X
    np.save(path, X)
    settings = axiscope.EngineSettings(method="randomized", power_iterations=3)
    axiscope.fit(path, n_components=2, engine=settings, checkpoint=ckpt)
    np.save(path, X * 1.5)
    monkeypatch.setattr(run, "_input_identity", lambda src, checksum: None)  # identity blind on both sides
    state = np.load(ckpt / "fit-state.npz")
    meta = json.loads(str(state["_meta"]))
    meta["fingerprint"]["input"] = {"size": None, "hash": None}
    np.savez(ckpt / "fit-state.npz", **{**{k: state[k] for k in state.files}, "_meta": np.asarray(json.dumps(meta))})
    with pytest.raises(axiscope.InputError, match=r"feature statistics \(feature centre\) differ"):
        axiscope.fit(path, n_components=2, engine=settings, checkpoint=ckpt, resume=True)


def test_resume_without_a_checkpoint_folder_is_a_usage_error(blocked_zarr, tmp_path, capsys):
    assert main(["fit", str(blocked_zarr), "--out", str(tmp_path / "o"), "--resume", "-q"]) == 2
    assert "--resume needs the folder of the saved state; pass --checkpoint" in capsys.readouterr().err


# ------------------------------------------------------------------------------ identity


def test_input_identity_is_recorded_and_the_full_hash_is_blake2b_of_the_bytes(tmp_path):
    from axiscope.io.identity import PIECE_BYTES, SAMPLED_PIECES, compare_identity, file_identity

    rng = np.random.default_rng(3)
    path = tmp_path / "x.npy"
    np.save(path, rng.standard_normal((300, 200)))  # 480 kB: more than the sampled pieces
    assert path.stat().st_size > SAMPLED_PIECES * PIECE_BYTES / 4
    full = file_identity(path, checksum="full")
    assert full["hash"] == hashlib.blake2b(f"x.npy\0{path.stat().st_size}\0".encode() + path.read_bytes(),
                                           digest_size=16).hexdigest()
    assert full["size"] == path.stat().st_size and full["files"] == 1
    sampled = file_identity(path)
    assert compare_identity(sampled, path) is None
    copy = tmp_path / "copy" / "x.npy"
    copy.parent.mkdir()
    copy.write_bytes(path.read_bytes())
    assert compare_identity(sampled, copy) is None  # a copy is the same input
    data = bytearray(path.read_bytes())
    data[-1] ^= 1  # the last byte is always sampled
    copy.write_bytes(bytes(data))
    assert compare_identity(sampled, copy) == "its sampled hash differs"
    copy.write_bytes(bytes(data[:-8]))
    assert "its size is" in compare_identity(sampled, copy)


def test_fit_records_the_input_and_score_warns_about_another_reference(tmp_path, capsys):
    from conftest import make_planted

    X = make_planted(150, 40, rank=3, seed=8).X
    train, new = tmp_path / "train.npy", tmp_path / "new.npy"
    np.save(train, X)
    np.save(new, X[:20] + 0.5)
    fitted = tmp_path / "fit"
    assert main(["fit", str(train), "--out", str(fitted), "-k", "2", "-q", "--checksum", "full"]) == 0
    manifest = json.loads((fitted / "manifest.json").read_text())
    identity = manifest["input"]["identity"]
    assert identity["checksum"] == "full" and identity["size"] == train.stat().st_size
    assert json.loads((fitted / "model" / "model.json").read_text())["info"]["training_input"] == identity

    assert main(["score", str(fitted), str(new), "--out", str(tmp_path / "s1"), "-q", "--reference", str(train)]) == 0
    assert "fitted on" not in capsys.readouterr().err
    check = json.loads((tmp_path / "s1" / "manifest.json").read_text())["reference_check"]
    assert check["same_file"] is True
    assert main(["score", str(fitted), str(new), "--out", str(tmp_path / "s2"), "-q", "--reference", str(new)]) == 0
    err = capsys.readouterr().err
    assert f"the model was fitted on {train}, but --reference {new} is another file (its size is" in err
    assert json.loads((tmp_path / "s2" / "manifest.json").read_text())["reference_check"]["same_file"] is False
