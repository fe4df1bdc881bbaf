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
from pathlib import Path

import numpy as np
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
def test_tables_are_byte_identical_whatever_the_threads(cohort_h5, tmp_path, limit):
    """threads 1, 2 and 4: every written file but the manifest (which records the threads and
    timings) is the same byte for byte, supplementary-feature statistics included (issue 10)."""
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
