"""The process around a fit: determinism across threads, kill safety, locks, early checks.

References: the files written by the same command with one thread (byte for byte); the
kernel's view of the file system after a process is stopped (``os.listdir``); POSIX
``O_EXCL`` file creation for the lock; exit codes 130 and 143 (128 + SIGINT / SIGTERM, the
shell convention, recalled from memory: POSIX "Shell Command Language" §2.8.2).
"""

from __future__ import annotations

import filecmp
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from axiscope.cli._app import main


def _tree(root: Path) -> list[str]:
    return sorted(str(p.relative_to(root)) for p in root.rglob("*"))


@pytest.fixture
def cohort_h5(tmp_path, planted):
    """1,000 × 400 float32 in HDF5 chunks of 100 samples, planted rank 5, and a feature list."""
    import h5py

    X = planted(1000, 400, rank=5, dtype="float32", seed=21).X
    path = tmp_path / "cohort.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("X", data=X, chunks=(100, 400))
    listed = tmp_path / "supplementary.txt"
    listed.write_text("".join(f"feature_{i:06d}\n" for i in range(1, 400, 7)), encoding="utf-8")
    return path, listed


@pytest.mark.parametrize("limit", ["1GB", "17MB"])
def test_tables_are_byte_identical_whatever_the_threads(cohort_h5, tmp_path, limit, monkeypatch):
    """threads 1, 2 and 4: every written file but the manifest (which records the threads and
    timings) is the same byte for byte, supplementary-feature statistics included (issue 10)."""
    from axiscope.core import memory

    monkeypatch.setattr(memory, "resident_bytes", lambda: 0)  # the limit for the data alone (test process)
    path, listed = cohort_h5
    outs = {}
    for threads in (1, 2, 4):
        outs[threads] = tmp_path / f"out{threads}"
        code = main(["fit", str(path), "--out", str(outs[threads]), "--threads", str(threads), "-q",
                     "--memory-limit", limit, "--supplementary-features", str(listed)])
        assert code == 0
    reference = outs[1]
    files = [f for f in _tree(reference) if (reference / f).is_file() and f != "manifest.json"]
    assert "sample_scores.tsv" in files and "axis_cards.json" in files and "model/components.npy" in files
    plans = []
    for threads in (2, 4):
        assert _tree(outs[threads]) == _tree(reference)
        match, mismatch, errors = filecmp.cmpfiles(reference, outs[threads], files, shallow=False)
        assert mismatch == [] and errors == [], f"threads={threads}: {mismatch or errors} differ"
        plans.append(json.loads((outs[threads] / "manifest.json").read_text())["plan"]["block_rows"])
    assert json.loads((reference / "manifest.json").read_text())["plan"]["block_rows"] == plans[0] == plans[1]


# ------------------------------------------------------------------ kill safety and locks

#: A child process running the command line, paused where the test wants it: after the
#: second block of the first pass (``pass``: the scratch file exists) or after the first
#: table was written into the temporary output folder (``write``). It touches FLAG when it
#: gets there, then waits for GO to exist (at most 60 s) before going on.
_DRIVER = r'''
import os, sys, time
from pathlib import Path

where, flag, go = os.environ["PAUSE_AT"], Path(os.environ["FLAG"]), Path(os.environ["GO"])

# --memory-limit counts the whole process; these tests want a small budget for the data alone
# whatever the interpreter and libraries hold on this machine
import axiscope.core.memory
axiscope.core.memory.resident_bytes = lambda: 0

def pause():
    flag.touch()
    deadline = time.monotonic() + 60
    while not go.exists() and time.monotonic() < deadline:
        time.sleep(0.05)

if where == "pass":
    from axiscope.core import passes
    original = passes.PassRunner._run_pipelined
    def paused(self, name, blocks, starts, task, fold, args):
        def fold_then_pause(result, index, start):
            fold(result, index, start)
            if index == 1 and not flag.exists():
                pause()
        return original(self, name, blocks, starts, task, fold_then_pause, args)
    passes.PassRunner._run_pipelined = paused
elif where == "write":
    from axiscope.io import output
    original = output.write_table
    def paused(df, path, **kwargs):
        original(df, path, **kwargs)
        if not flag.exists():
            pause()
    output.write_table = paused

from axiscope.cli._app import main
sys.exit(main(sys.argv[1:]))
'''


@pytest.fixture
def scratch_input(tmp_path, planted):
    """1,200 × 2,000 float32 (9.6 MB) in Zarr: under a 16 MB limit the fit keeps blocks in a scratch file."""
    import zarr

    X = planted(1200, 2000, rank=4, dtype="float32", seed=45).X
    path = tmp_path / "big.zarr"
    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    array = group.create_array("X", shape=X.shape, chunks=(125, 2000), dtype="float32")
    array[...] = X
    return path


class _Child:
    """One ``axiscope`` process, paused at ``pause_at`` (or not paused: ``None``)."""

    def __init__(self, tmp_path: Path, name: str, args: list[str], pause_at: str | None = None):
        self.flag, self.go = tmp_path / f"{name}.flag", tmp_path / f"{name}.go"
        if pause_at is None:
            self.go.touch()
        env = dict(os.environ, PAUSE_AT=pause_at or "none", FLAG=str(self.flag), GO=str(self.go),
                   OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        self.proc = subprocess.Popen([sys.executable, "-c", _DRIVER, *map(str, args)], env=env,
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)

    def paused(self, timeout: float = 60) -> None:
        deadline = time.monotonic() + timeout
        while not self.flag.exists():
            assert self.proc.poll() is None, self.proc.communicate()
            assert time.monotonic() < deadline, "the child never reached its pause"
            time.sleep(0.05)

    def release(self) -> None:
        self.go.touch()

    def finish(self, timeout: float = 120) -> tuple[int, str]:
        _, err = self.proc.communicate(timeout=timeout)
        return self.proc.returncode, err


def _fit_args(path: Path, out: Path, scratch: Path, *extra: str) -> list[str]:
    return ["fit", str(path), "--out", str(out), "--memory-limit", "16MB", "--threads", "2", "--scratch", str(scratch),
            "-k", "3", "--power-iterations", "1", "-q", *extra]


def _left_behind(tmp_path: Path, scratch: Path) -> list[str]:
    """Temporary outputs, locks and scratch folders anywhere under the test's folder."""
    names = [p for p in tmp_path.rglob(".*") if ".tmp-" in p.name or ".old-" in p.name or p.name.endswith(".lock")]
    names += list(scratch.iterdir()) if scratch.exists() else []
    return sorted(str(p.relative_to(tmp_path)) for p in names)


@pytest.mark.parametrize("pause_at", ["pass", "write"])
def test_sigterm_cleans_up_and_exits_143(scratch_input, tmp_path, pause_at):
    """SIGTERM mid-pass (scratch file written) or mid-write (temporary output folder half
    full): one line, exit 143 (128 + 15), and no output, temporary folder, lock or scratch."""
    out, scratch = tmp_path / "out", tmp_path / "scratch"
    child = _Child(tmp_path, "a", _fit_args(scratch_input, out, scratch), pause_at)
    child.paused()
    if pause_at == "pass":
        assert [p.name for p in scratch.iterdir()][0].startswith("axiscope-scratch-")  # the test has teeth
    else:
        assert list(tmp_path.glob(".out.tmp-*/*.tsv"))
    child.proc.send_signal(signal.SIGTERM)
    code, err = child.finish()
    assert code == 143, err
    assert err.strip().splitlines() == ["error: terminated; nothing was written"]
    assert not out.exists()
    assert _left_behind(tmp_path, scratch) == []


@pytest.mark.parametrize("pause_at,leftover,said", [
    ("pass", "scratch/axiscope-scratch-", "removed scratch folder"),
    ("write", ".out.tmp-", "removed temporary output folder"),
])
def test_kill_9_leftovers_are_removed_by_the_next_run(scratch_input, tmp_path, pause_at, leftover, said):
    """kill -9 cannot be caught: the scratch folder (mid-pass) or the temporary output folder
    (mid-write) stays. The next run removes it, says so, and succeeds; nothing is left."""
    out, scratch = tmp_path / "out", tmp_path / "scratch"
    child = _Child(tmp_path, pause_at, _fit_args(scratch_input, out, scratch), pause_at)
    child.paused()
    child.proc.kill()
    child.finish()
    left = _left_behind(tmp_path, scratch)
    assert any(name.startswith(leftover) for name in left), left
    rerun = _Child(tmp_path, "rerun", _fit_args(scratch_input, out, scratch))
    code, err = rerun.finish()
    assert code == 0, err
    assert said in err and f"process {child.proc.pid}" in err
    assert (out / "sample_scores.tsv").is_file()
    assert _left_behind(tmp_path, scratch) == []


def test_a_second_writer_is_refused_at_once(scratch_input, tmp_path):
    """Two fits to one --out: the second stops at once with one line naming the first (exit 2),
    also with --overwrite, and the first finishes undisturbed."""
    out, scratch = tmp_path / "out", tmp_path / "scratch"
    first = _Child(tmp_path, "first", _fit_args(scratch_input, out, scratch, "--overwrite"), "pass")
    first.paused()
    started = time.monotonic()
    second = _Child(tmp_path, "second", _fit_args(scratch_input, out, tmp_path / "scratch2", "--overwrite"))
    code, err = second.finish()
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "another axiscope run" in lines[0] and f"process {first.proc.pid}" in lines[0]
    assert "--wait" in lines[0]
    assert time.monotonic() - started < 30  # at once: it did not fit first
    first.release()
    code, err = first.finish()
    assert code == 0, err
    assert (out / "sample_scores.tsv").is_file()
    assert _left_behind(tmp_path, scratch) == []


def test_wait_queues_behind_the_running_writer(scratch_input, tmp_path):
    """--wait: the second run starts when the first has finished, then replaces its output."""
    out, scratch = tmp_path / "out", tmp_path / "scratch"
    first = _Child(tmp_path, "first", _fit_args(scratch_input, out, scratch), "write")
    first.paused()
    second = _Child(tmp_path, "second", _fit_args(scratch_input, out, scratch, "--overwrite", "--wait", "-k", "2"))
    time.sleep(3)
    assert second.proc.poll() is None  # still waiting
    first.release()
    assert first.finish()[0] == 0
    code, err = second.finish()
    assert code == 0, err
    assert "waiting for process" in err
    header = (out / "sample_scores.tsv").read_text().splitlines()[0]
    assert header.split("\t") == ["sample_id", "PC1", "PC2"]  # the second run's output
    assert _left_behind(tmp_path, scratch) == []


# ------------------------------------------------------------------ checks before the work


def test_resource_refusals_exit_3_and_option_errors_exit_2(cohort_h5, tmp_path, capsys):
    """A limit below what the process and one block need: exit 3, one line saying how much
    would do; a limit no machine has: exit 2, one line. Nothing written either way."""
    path, _ = cohort_h5
    out = tmp_path / "out"
    assert main(["fit", str(path), "--out", str(out), "--memory-limit", "17MB", "-k", "3", "-q"]) == 3
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "too small" in err[0] and "raise --memory-limit to at least" in err[0]
    assert "the process already holds" in err[0]  # the command line's limit is for the whole process
    assert main(["fit", str(path), "--out", str(out), "--memory-limit", "1e400", "-q"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: --memory-limit")
    assert not out.exists() and _left_behind(tmp_path, tmp_path / "none") == []


def test_unwritable_output_is_refused_before_the_fit(cohort_h5, tmp_path, capsys, monkeypatch):
    """--out under a file (so its folder cannot be made): one line, exit 2, before any pass."""
    from axiscope.core import passes

    path, _ = cohort_h5
    ran = []
    monkeypatch.setattr(passes.PassRunner, "run", lambda *a, **k: ran.append(1))
    blocker = tmp_path / "a_file"
    blocker.write_text("x")
    assert main(["fit", str(path), "--out", str(blocker / "nested" / "out"), "-q"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot be made" in err[0] and "--out" in err[0]
    assert ran == []


@pytest.fixture
def small_disk(tmp_path):
    """A tmpfs of a given size or number of inodes (root only; skipped elsewhere), unmounted after."""
    mounted = []

    def make(name: str, options: str) -> Path:
        where = tmp_path / name
        where.mkdir()
        done = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(where)],
                              capture_output=True, check=False)
        if done.returncode != 0:
            pytest.skip("cannot mount a small tmpfs here (needs root)")
        mounted.append(where)
        return where

    yield make
    for where in mounted:
        subprocess.run(["umount", "-l", str(where)], check=False)


@pytest.mark.parametrize("options", ["size=64k", "nr_inodes=6"])
def test_full_output_disk_is_exit_3_and_leaves_nothing(cohort_h5, small_disk, capsys, monkeypatch, options):
    """The output's file system fills up (bytes, or inodes) while the tables are written:
    one line naming the place, exit 3, and neither the output nor its temporary folder."""
    from axiscope.core import memory

    monkeypatch.setattr(memory, "resident_bytes", lambda: 0)
    path, _ = cohort_h5
    disk = small_disk("outdisk", options)
    out = disk / "out"
    assert main(["fit", str(path), "--out", str(out), "-k", "3", "-q"]) == 3
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no space left" in err[0] and str(out) in err[0], err
    assert os.listdir(disk) == []


@pytest.mark.parametrize("options,said", [("size=256k", "no space left for the scratch file"),
                                           ("nr_inodes=1", "has no room for a scratch file")])
def test_full_scratch_disk_is_exit_3_and_leaves_nothing(scratch_input, small_disk, capsys, monkeypatch, tmp_path,
                                                        options, said):
    """The scratch file system fills up mid-pass (free space taken after the plan looked), or
    has no inode left for the scratch folder: one line, exit 3, no scratch folder, no output."""
    from axiscope.core import memory, plan

    monkeypatch.setattr(memory, "resident_bytes", lambda: 0)
    monkeypatch.setattr(plan, "scratch_has_room", lambda where, nbytes: True)
    disk = small_disk("scratchdisk", options)
    out = tmp_path / "out"
    assert main(_fit_args(scratch_input, out, disk)) == 3
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and said in err[0] and "--scratch" in err[0], err
    assert os.listdir(disk) == []
    assert not out.exists() and _left_behind(tmp_path, disk) == []


def test_no_space_while_writing_tables_without_root(cohort_h5, tmp_path, capsys, monkeypatch):
    """The same as the tmpfs case, by a writer that fails with ENOSPC after its first table
    (runs everywhere): exit 3, one line, no output, no temporary folder."""
    import errno

    from axiscope.core import memory
    from axiscope.io import output

    monkeypatch.setattr(memory, "resident_bytes", lambda: 0)
    original, calls = output.write_table, []

    def failing(df, path, **kwargs):
        calls.append(path)
        if len(calls) > 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        original(df, path, **kwargs)

    monkeypatch.setattr(output, "write_table", failing)
    path, _ = cohort_h5
    out = tmp_path / "out"
    assert main(["fit", str(path), "--out", str(out), "-k", "3", "-q"]) == 3
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no space left" in err[0], err
    assert not out.exists() and _left_behind(tmp_path, tmp_path / "none") == []


def test_read_only_scratch_is_refused_before_the_work(scratch_input, small_disk, capsys, monkeypatch, tmp_path):
    """--scratch on a read-only file system, when the plan needs it: one line, exit 2, no pass run."""
    from axiscope.core import passes

    ran = []
    monkeypatch.setattr(passes.PassRunner, "run", lambda *a, **k: ran.append(1))
    from axiscope.core import memory, plan

    monkeypatch.setattr(memory, "resident_bytes", lambda: 0)
    monkeypatch.setattr(plan, "scratch_has_room", lambda where, nbytes: True)  # a large read-only disk
    disk = small_disk("readonly", "ro,size=1m")
    out = tmp_path / "out"
    assert main(_fit_args(scratch_input, out, disk)) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--scratch" in err[0] and "cannot be written" in err[0], err
    assert ran == [] and not out.exists() and _left_behind(tmp_path, disk) == []


def test_output_on_a_read_only_file_system_is_refused_before_the_fit(cohort_h5, small_disk, capsys, monkeypatch):
    """--out in (and nested under) a read-only place: one line, exit 2, before any pass."""
    from axiscope.core import passes

    ran = []
    monkeypatch.setattr(passes.PassRunner, "run", lambda *a, **k: ran.append(1))
    path, _ = cohort_h5
    disk = small_disk("readonly", "ro,size=1m")
    for out in (disk / "out", disk / "deeper" / "still" / "out"):
        assert main(["fit", str(path), "--out", str(out), "-q"]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "Read-only file system" in err[0] and "--out" in err[0], err
    assert ran == [] and os.listdir(disk) == []


def test_output_moved_aside_by_a_killed_run_is_restored(cohort_h5, tmp_path, capsys, monkeypatch):
    """kill -9 between moving the old output aside and moving the new one in: the next run
    puts the old one back (and says so) before deciding anything about the target."""
    from axiscope.core import memory
    from axiscope.io.output import owner_tag

    monkeypatch.setattr(memory, "resident_bytes", lambda: 0)
    path, _ = cohort_h5
    out = tmp_path / "out"
    assert main(["fit", str(path), "--out", str(out), "-k", "2", "-q"]) == 0
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, check=True)
    host = owner_tag().rsplit("-", 1)[0]
    aside = tmp_path / f".out.old-{host}-{dead.stdout.strip()}-x"
    os.replace(out, aside)
    capsys.readouterr()
    assert main(["fit", str(path), "--out", str(out), "-k", "2", "-q"]) == 2  # exists, no --overwrite
    err = capsys.readouterr().err
    assert "restored" in err and "already exists" in err
    assert (out / "sample_scores.tsv").is_file() and not aside.exists()
