"""Checkpoints of a randomized fit: the iteration's state after each completed pass.

A :class:`Checkpoint` keeps, in one folder, the state the engine hands over after each
completed pass over the data (the Krylov basis ``K``, its images ``X̃·K`` and ``X̃ᵀX̃·K``, the
next block, the probes, the per-sample squared distances, the convergence record and the
state of the random generator), together with a *fingerprint* of what determines the result:
the input's identity (size and hash), the options, the block partition and the samples and
features used. The state file is replaced atomically (written beside it, flushed to disk,
then renamed), so a fit killed at any moment, even with SIGKILL, leaves the state of its last
completed pass or none.

The feature statistics (centre and inverse scale) are saved with it. A fit given the same
folder with ``resume=True`` checks the fingerprint (another input or
other options are refused, naming what differs) and continues after that pass; since the
state is kept exactly (``.npy`` arrays, float64) and the passes are deterministic, the result
is the same, byte for byte, as that of an uninterrupted fit. Before continuing, a resumed fit
reads the input once to compute the feature statistics again and to refill its block cache
(the cache lives in memory or in a scratch file that dies with the process); statistics that
differ from the saved ones, bit for bit, mean the input changed, and the state is refused.
"""

from __future__ import annotations

import errno
import hashlib
import io
import json
import os
from pathlib import Path

import numpy as np

from ..errors import InputError, OptionError, ResourceError

__all__ = ["Checkpoint", "fingerprint_of", "STATE_FILE"]

#: The state file inside a checkpoint folder.
STATE_FILE = "fit-state.npz"
#: Version of the state file's layout.
STATE_VERSION = 1


def fingerprint_of(**parts) -> dict:
    """A JSON-able record of what determines a fit's result (arrays are replaced by a hash)."""
    def plain(value):
        if isinstance(value, np.ndarray):
            return hashlib.blake2b(np.ascontiguousarray(value).tobytes(), digest_size=16).hexdigest()
        if isinstance(value, dict):
            return {str(k): plain(v) for k, v in value.items()}
        if isinstance(value, (list, tuple)):
            return [plain(v) for v in value]
        if isinstance(value, (np.generic,)):
            return value.item()
        return value
    return json.loads(json.dumps(plain(parts), sort_keys=True, default=str))


class Checkpoint:
    """A checkpoint folder of one fit.

    Parameters
    ----------
    directory : path
        Made if missing.
    fingerprint : dict
        What determines the result (:func:`fingerprint_of`); a saved state is used only when
        its fingerprint is the same.
    resume : bool, default=False
        Continue from the saved state (when there is one); otherwise a saved state is replaced
        by this fit's.
    """

    def __init__(self, directory: str | os.PathLike, fingerprint: dict, *, resume: bool = False) -> None:
        self.directory = Path(directory)
        self.fingerprint = fingerprint
        self.resume = resume
        self.resumed_after: int | None = None
        self.state: dict | None = None
        self.saved_passes = 0
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OptionError(f"checkpoint={str(self.directory)!r} cannot be made ({exc.strerror}); "
                              "choose a writable folder") from None

    @property
    def path(self) -> Path:
        return self.directory / STATE_FILE

    def load(self) -> dict | None:
        """The saved state, when resuming and there is one; a state of another fit is refused."""
        if not self.resume or not self.path.is_file():
            return None
        try:
            with np.load(self.path, allow_pickle=False) as saved:
                state = {name: saved[name] for name in saved.files}
            meta = json.loads(str(state.pop("_meta")))
        except (OSError, ValueError, KeyError, json.JSONDecodeError) as exc:
            raise InputError(f"{self.path}: not a readable checkpoint ({exc}); remove it, or leave out "
                             "resume=True to start afresh") from None
        if meta.get("version") != STATE_VERSION:
            raise InputError(f"{self.path}: checkpoint of layout version {meta.get('version')}, this axiscope "
                             f"reads version {STATE_VERSION}; leave out resume=True to start afresh")
        differ = _differences(meta.get("fingerprint", {}), self.fingerprint)
        if differ:
            raise OptionError(
                f"{self.path}: this checkpoint belongs to a fit of other inputs or options (differs in: "
                f"{', '.join(differ)}); rerun with the same ones, leave out resume=True to start afresh, "
                "or pass another folder as checkpoint=...")
        state["scalars"] = meta["scalars"]
        self.resumed_after = int(meta["pass"])
        return state

    def check_statistics(self, statistics: dict) -> None:
        """The feature statistics computed again must equal the saved ones, bit for bit."""
        for name, value in statistics.items():
            saved = self.state.get(name) if self.state is not None else None
            if saved is not None and not np.array_equal(saved, np.asarray(value)):
                raise InputError(
                    f"{self.path}: the input's feature statistics ({name.replace('_', ' ')}) differ from those "
                    "saved with the checkpoint: the input changed since; leave out resume=True to start afresh")

    def save(self, state: dict) -> None:
        """Replace the saved state by ``state`` (arrays, plus JSON-able ``scalars``), atomically."""
        arrays = {name: np.asarray(value) for name, value in state.items() if name != "scalars"}
        meta = {"version": STATE_VERSION, "pass": int(state["scalars"]["passes_done"]),
                "fingerprint": self.fingerprint, "scalars": state["scalars"]}
        buffer = io.BytesIO()
        np.savez(buffer, _meta=np.asarray(json.dumps(meta)), **arrays)
        tmp = self.path.with_name(f".{STATE_FILE}.{os.getpid()}.tmp")
        try:
            with tmp.open("wb") as handle:
                handle.write(buffer.getbuffer())
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp, self.path)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            kind = ResourceError if exc.errno in (errno.ENOSPC, errno.EDQUOT) else InputError
            raise kind(f"{self.path}: the checkpoint cannot be written ({exc.strerror}); free space "
                       "there or pass another checkpoint folder") from None
        self.saved_passes += 1

    def clear(self) -> None:
        """Remove the saved state (after the fit's outputs are in place)."""
        self.path.unlink(missing_ok=True)
        for leftover in self.directory.glob(f".{STATE_FILE}.*.tmp"):
            leftover.unlink(missing_ok=True)

    def record(self) -> dict:
        """What the manifest says about the checkpoint."""
        return {"directory": str(self.directory), "resumed_after_pass": self.resumed_after,
                "states_saved": self.saved_passes}


def _differences(saved: dict, now: dict, prefix: str = "") -> list[str]:
    names = []
    for key in sorted(set(saved) | set(now)):
        a, b = saved.get(key), now.get(key)
        if isinstance(a, dict) and isinstance(b, dict):
            names += _differences(a, b, f"{prefix}{key}.")
        elif a != b:
            names.append(prefix + key)
    return names
