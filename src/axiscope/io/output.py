"""Atomic output directories and table writers."""

from __future__ import annotations

import contextlib
import errno
import fcntl
import logging
import os
import re
import shutil
import socket
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..defaults import DEFAULT_TOP_FEATURES  # noqa: F401  (re-exported)
from ..errors import InputError, OptionError, ResourceError

__all__ = ["atomic_directory", "check_target", "lock_target", "release_target", "release_targets",
           "TargetBusyError", "owner_tag", "owned_temporary_folder", "remove_leftovers", "write_table", "write_json", "write_zarr_matrix",
           "read_result_table", "check_result_table", "REFIT_HINT", "ZARR_FEATURE_THRESHOLD"]


logger = logging.getLogger(__name__)

#: Above this many features, per-feature tables are also written as Zarr arrays with ids.
ZARR_FEATURE_THRESHOLD = 200_000


# ------------------------------------------------------------- owned temporary names
#
# Every temporary file or folder a run makes (scratch folders, the temporary output folder,
# the previous output while it is replaced, the lock file's contents) carries the host and
# the process id of its owner, so that a later run can tell leftovers of a killed process
# (kill -9 leaves no chance to clean up) from files of a run still going, and remove them.


def owner_tag() -> str:
    """``host-pid`` of this process, as written into the names of its temporary files."""
    host = re.sub(r"[^A-Za-z0-9.]", "_", socket.gethostname()) or "localhost"
    return f"{host}-{os.getpid()}"


#: ``<anything>-<host>-<pid>-<random>``: the tail of an owned temporary name (see :func:`owner_tag`).
_OWNED = re.compile(r"-(?P<host>[A-Za-z0-9._]+)-(?P<pid>\d+)-(?P<rest>[A-Za-z0-9_]*)$")


def _boot_time() -> float | None:
    try:
        with open("/proc/stat", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("btime "):
                    return float(line.split()[1])
    except OSError:
        pass
    return None


def _started(pid: int) -> float | None:
    """When process ``pid`` started (seconds since the epoch), from /proc; None if unknown."""
    boot = _boot_time()
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as handle:
            fields = handle.read().rsplit(")", 1)[1].split()
        return None if boot is None else boot + int(fields[19]) / os.sysconf("SC_CLK_TCK")
    except (OSError, IndexError, ValueError):
        return None


def owner_is_gone(host: str, pid: int, made: float) -> bool:
    """Whether the process that made a file at time ``made`` (``host``, ``pid``) has ended.

    Only files of this host are judged. A process id in use by a process started after the
    file was made is a later process that reused the id: the owner is gone.
    """
    if host != owner_tag().rsplit("-", 1)[0]:
        return False
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:  # alive, someone else's
        pass
    started = _started(pid)
    return started is not None and started > made + 1.0


def remove_leftovers(folder: Path, prefix: str, what: str) -> list[Path]:
    """Remove entries of ``folder`` named ``prefix<host>-<pid>-…`` whose owner process has ended.

    Each removal is logged as a warning naming the path and the process. Entries of live
    processes, of other hosts, or that cannot be judged are left alone.
    """
    removed: list[Path] = []
    try:
        entries = list(Path(folder).iterdir())
    except OSError:
        return removed
    for entry in entries:
        if not entry.name.startswith(prefix):
            continue
        match = _OWNED.search(entry.name[len(prefix) - 1:])
        if match is None:
            continue
        try:
            made = entry.lstat().st_mtime
        except OSError:
            continue
        if not owner_is_gone(match["host"], int(match["pid"]), made):
            continue
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
        else:
            with contextlib.suppress(OSError):
                entry.unlink()
        if not entry.exists():
            removed.append(entry)
            logger.warning("removed %s %s left by process %s, which is no longer running",
                           what, entry, match["pid"])
    return removed


def owned_temporary_folder(parent: Path, prefix: str) -> Path:
    """A new folder ``parent/<prefix><host>-<pid>-<random>`` (see :func:`remove_leftovers`)."""
    return Path(tempfile.mkdtemp(prefix=f"{prefix}{owner_tag()}-", dir=parent))


# -------------------------------------------------------------------- the output lock


class TargetBusyError(OptionError):
    """Another process is writing the same output directory."""


@dataclass
class _Lock:
    path: Path
    fd: int
    made: list[Path]  # parent folders this run created for the target (removed on failure)


#: Output locks held by this process, by target.
_locks: dict[Path, _Lock] = {}


def _lock_path(out: Path) -> Path:
    return out.parent / f".{out.name}.lock"


def lock_target(out: Path, *, wait: bool = False) -> None:
    """Take the lock on the output directory ``out`` (a file ``.<name>.lock`` beside it).

    The lock is an exclusive ``flock`` on that file, which the kernel releases when the
    process ends however it ends, so a killed writer never blocks the next one; the file
    holds the host and process id of the holder for the message. Missing parent folders are
    made (and removed again by :func:`release_targets` if nothing was written). Taking a lock
    this process already holds does nothing.

    Raises
    ------
    TargetBusyError
        Another process holds the lock (unless ``wait``: then wait for it).
    OptionError
        The output's folder cannot be made or written.
    """
    out = Path(os.path.abspath(out))
    if out in _locks:
        return
    made = _make_parents(out.parent)
    path = _lock_path(out)
    while True:
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            _remove_made(made)
            raise OptionError(f"{out}: cannot write in {out.parent} ({exc.strerror}); "
                              "choose another place for out=...") from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fd)
            if not wait:
                os.close(fd)
                _remove_made(made)
                raise TargetBusyError(
                    f"{out}: another axiscope run ({holder}) is writing it; wait for it to end, "
                    "pass wait=True to queue behind it, or choose another directory") from None
            logger.warning("%s: waiting for %s, which is writing it", out, holder)
            fcntl.flock(fd, fcntl.LOCK_EX)
        # the holder before us may have removed the file while we waited: lock the file that is there
        try:
            same = os.path.samestat(os.fstat(fd), os.stat(path))
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)
    os.ftruncate(fd, 0)
    os.pwrite(fd, f"process {os.getpid()} on {socket.gethostname()}\n".encode(), 0)
    _locks[out] = _Lock(path, fd, made)


def _read_holder(fd: int) -> str:
    try:
        text = os.pread(fd, 200, 0).decode("utf-8", "replace").strip()
    except OSError:
        text = ""
    return text or "process unknown"


def _make_parents(folder: Path) -> list[Path]:
    """Make ``folder`` and missing parents; the ones made, outermost first."""
    missing = []
    where = folder
    while not where.exists() and where.parent != where:
        missing.append(where)
        where = where.parent
    for path in reversed(missing):
        try:
            path.mkdir()
        except FileExistsError:
            pass
        except OSError as exc:
            _remove_made(list(reversed(missing)))
            raise OptionError(f"{folder}: cannot be made ({exc.strerror}); choose another place "
                              "for out=...") from exc
    return list(reversed(missing))


def _remove_made(made: list[Path]) -> None:
    for path in reversed(made):
        with contextlib.suppress(OSError):
            path.rmdir()


def release_target(out: Path) -> None:
    """Release the lock on ``out`` (removing the lock file); parents made for it go if empty."""
    out = Path(os.path.abspath(out))
    lock = _locks.pop(out, None)
    if lock is None:
        return
    with contextlib.suppress(OSError):
        os.unlink(lock.path)  # while still holding it: a waiter re-checks the file it locked
    os.close(lock.fd)
    if not out.exists():
        _remove_made(lock.made)


def release_targets() -> None:
    """Release every output lock this process holds (the command line calls this at the end)."""
    for out in list(_locks):
        release_target(out)


def check_target(out: Path, overwrite: bool, *, wait: bool = False) -> None:
    """Check that ``out`` can be written, before any work, and lock it for this process.

    Refuses an existing output directory unless ``overwrite``, and a target that is a file.
    Makes missing parent folders, takes the lock (:func:`lock_target`), checks that a file
    can be created beside the target, and removes leftovers of killed runs beside it
    (temporary output folders of processes that have ended). The lock is released by
    :func:`atomic_directory` when it is done, or by :func:`release_target`.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OptionError(f"{out}: exists and is not a directory; choose another directory")
    lock_target(out, wait=wait)
    try:
        folder = Path(os.path.abspath(out)).parent
        _restore_previous(out, folder)
        if out.exists() and not overwrite:
            raise OptionError(f"{out}: already exists; choose another directory or pass overwrite=True")
        remove_leftovers(folder, f".{out.name}.tmp-", "temporary output folder")
        remove_leftovers(folder, f".{out.name}.old-", "previous output folder")
        probe = owned_temporary_folder(folder, f".{out.name}.tmp-")
        probe.rmdir()
    except OSError as exc:
        release_target(out)
        raise OptionError(f"{out}: cannot write in {out.parent} ({exc.strerror}); "
                          "choose another place for out=...") from exc
    except BaseException:
        release_target(out)
        raise


def _restore_previous(out: Path, folder: Path) -> None:
    """Put back an output a killed run had moved aside to replace it (``kill -9`` between the
    two renames of :func:`atomic_directory`), when nothing has taken its place."""
    if out.exists():
        return
    for entry in sorted(folder.glob(f".{out.name}.old-*")):
        match = _OWNED.search(entry.name[len(f".{out.name}.old-") - 1:])
        if match and entry.is_dir() and owner_is_gone(match["host"], int(match["pid"]), entry.lstat().st_mtime):
            os.replace(entry, out)
            logger.warning("restored %s from %s, left by process %s while it replaced it",
                           out, entry.name, match["pid"])
            return


@contextlib.contextmanager
def _signals_held() -> Iterator[None]:
    """Hold SIGINT and SIGTERM back (main thread only) while the output is swapped into place."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield
        return
    held = {signal.SIGINT, signal.SIGTERM}
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, held)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


@contextlib.contextmanager
def atomic_directory(out: Path, *, overwrite: bool = False, wait: bool = False) -> Iterator[Path]:
    """Yield a temporary directory beside ``out``; move it to ``out`` only on success.

    The target is locked from :func:`check_target` (called here if it was not yet) until
    the directory is in place. A failed or interrupted run leaves neither ``out`` nor the
    temporary directory; a killed one (``kill -9``) leaves a temporary directory named with
    its host and process id, which the next run writing there removes. A full disk or an
    exhausted inode table while writing is a :class:`~axiscope.errors.ResourceError`.
    """
    out = Path(out)
    check_target(out, overwrite, wait=wait)
    try:
        tmp = owned_temporary_folder(Path(os.path.abspath(out)).parent, f".{out.name}.tmp-")
        try:
            yield tmp
            _add_to_manifest(tmp)
            with _signals_held():
                if out.exists():
                    old = out.with_name(f".{out.name}.old-{owner_tag()}-x")
                    os.replace(out, old)
                    os.replace(tmp, out)
                    shutil.rmtree(old, ignore_errors=True)
                else:
                    os.replace(tmp, out)
        except OSError as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                raise ResourceError(f"{out}: no space left while writing in {out.parent} "
                                    f"({exc.strerror}); free space there or choose another place "
                                    "for out=...; nothing was written") from exc
            raise
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
    finally:
        release_target(out)


#: Records added to the manifest of every output folder written while they are set
#: (:func:`manifest_additions`): the command line records its resolved configuration here.
_MANIFEST_ADDITIONS: dict = {}


@contextlib.contextmanager
def manifest_additions(**records) -> Iterator[None]:
    """Within this context, ``manifest.json`` of each folder written by :func:`atomic_directory`
    gets ``records`` as top-level keys (added just before the folder is moved into place)."""
    saved = dict(_MANIFEST_ADDITIONS)
    _MANIFEST_ADDITIONS.update(records)
    try:
        yield
    finally:
        _MANIFEST_ADDITIONS.clear()
        _MANIFEST_ADDITIONS.update(saved)


def _add_to_manifest(folder: Path) -> None:
    import json

    path = Path(folder) / "manifest.json"
    if not _MANIFEST_ADDITIONS or not path.is_file():
        return
    manifest = json.loads(path.read_text(encoding="utf-8"))
    manifest.update(_MANIFEST_ADDITIONS)
    write_json(manifest, path)


def write_table(df: pd.DataFrame, path: Path, *, parquet: bool = False, header: Sequence[str] = ()) -> None:
    """Write a tab-separated table that any CSV reader splits into the right cells (and a Parquet copy).

    Numbers are written with 8 significant digits and missing values as empty cells;
    true/false flags as ``true``/``false``; text cells are quoted (``"…"``, inner quotes
    doubled, RFC 4180 style) when they hold a tab, a line break (``\\n`` or ``\\r``), a quote,
    a ``#``, or leading/trailing white space, so that such ids cannot break a row. The
    ``header`` lines are written first, each prefixed with ``# ``.
    """
    flags = {c: df[c].map(lambda v: "" if v is None or v is pd.NA else ("true" if v else "false"))
             for c in df.columns if pd.api.types.is_bool_dtype(df[c].dtype)}
    plain = df.assign(**flags) if flags else df
    if any(_awkward(plain[c]) for c in plain.columns if not pd.api.types.is_numeric_dtype(plain[c].dtype)) or any(
            _QUOTE_IF.search(str(c)) for c in plain.columns):
        _write_quoted(df, path, header)  # rare: cells the csv module would not quote
    else:
        with Path(path).open("w", encoding="utf-8", newline="") as handle:
            for line in header:
                handle.write(f"# {line}\n" if line else "#\n")
            plain.to_csv(handle, sep="\t", index=False, float_format="%.8g", lineterminator="\n")
    if parquet:
        df.to_parquet(Path(path).with_suffix(".parquet"), index=False)


def _awkward(values: pd.Series) -> bool:
    """Whether a text column holds a cell that the csv module's minimal quoting would leave broken."""
    text = values[values.map(lambda v: isinstance(v, str))]
    return bool(len(text)) and bool(text.str.contains(r'[\r#]|^\s|\s$', regex=True).any())


#: Text cells holding one of these characters are quoted: the separator, line breaks, the
#: quote itself, and ``#`` (so that readers told to skip ``#`` comments keep the cell whole).
_QUOTE_IF = re.compile(r'[\t\n\r"#]|^\s|\s$')


def _write_quoted(df: pd.DataFrame, path: Path, header: Sequence[str]) -> None:
    """Write a tab-separated table that any CSV reader splits into the right cells (and a Parquet copy).

    Numbers are written with 8 significant digits and missing values as empty cells;
    true/false flags as ``true``/``false``; text cells are quoted (``"…"``, inner quotes
    doubled, RFC 4180 style) when they hold a tab, a line break (``\\n`` or ``\\r``), a quote,
    a ``#``, or leading/trailing white space, so that such ids cannot break a row. The
    ``header`` lines are written first, each prefixed with ``# ``.
    """
    columns = [_tsv_cells(df[c]) for c in df.columns]
    with Path(path).open("w", encoding="utf-8", newline="") as handle:
        for line in header:
            handle.write(f"# {line}\n" if line else "#\n")
        handle.write("\t".join(_quote(str(c)) for c in df.columns) + "\n")
        for row in zip(*columns):
            handle.write("\t".join(row) + "\n")


def _quote(text: str) -> str:
    return '"' + text.replace('"', '""') + '"' if _QUOTE_IF.search(text) else text


def _tsv_cells(values: pd.Series) -> list[str]:
    """The cells of one column as text."""
    dtype = values.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return ["" if v is pd.NA or v is None else ("true" if v else "false") for v in values.tolist()]
    if pd.api.types.is_integer_dtype(dtype):
        return ["" if v is pd.NA or v is None else str(int(v)) for v in values.tolist()]
    if pd.api.types.is_float_dtype(dtype):
        return [f"{v:.8g}" if v == v else "" for v in values.to_numpy(dtype=np.float64, na_value=np.nan).tolist()]
    out = []
    for v in values.tolist():
        if v is None or v is pd.NA or (isinstance(v, float) and v != v):
            out.append("")
        elif isinstance(v, (bool, np.bool_)):
            out.append("true" if v else "false")
        elif isinstance(v, (float, np.floating)):
            out.append(f"{v:.8g}")
        elif isinstance(v, (int, np.integer)):
            out.append(str(int(v)))
        else:
            out.append(_quote(str(v)))
    return out



def write_json(obj: dict, path: Path) -> None:
    """Write strict JSON (RFC 8259): NaN and infinities become ``null``, never bare ``NaN``."""
    import json

    text = json.dumps(_strict(obj), indent=2, allow_nan=False)
    Path(path).write_text(text + "\n", encoding="utf-8")


def _strict(value):
    """``value`` with numpy scalars and arrays, paths and tuples made plain; non-finite floats → None."""
    if isinstance(value, dict):
        return {str(k): _strict(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_strict(v) for v in value]
    if isinstance(value, np.ndarray):
        return _strict(value.tolist())
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if isinstance(value, Path):
        return str(value)
    if value is None or isinstance(value, (str, int, float, bool)):
        return value
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def write_zarr_matrix(path: Path, values: np.ndarray, row_ids: np.ndarray, columns: list[str]) -> None:
    """A 2-D Zarr array ``values`` with row ids and column names, as a Zarr v3 group."""
    import zarr

    group = zarr.open_group(str(path), mode="w")
    arr = group.create_array("values", shape=values.shape, dtype=values.dtype,
                             chunks=(min(values.shape[0], 65536), values.shape[1]))
    arr[:] = values
    ids = group.create_array("row_ids", shape=(len(row_ids),), dtype=str)
    ids[:] = np.asarray(row_ids, dtype=str)
    group.attrs["columns"] = list(columns)


#: Appended to messages about damaged result files.
REFIT_HINT = "restore the file written by 'axiscope fit' or refit"


def read_result_table(path: Path, *, required: Sequence[str], numeric: Sequence[str] = ()) -> pd.DataFrame:
    """Read a TSV table written by ``axiscope fit``, checking its columns.

    Parameters
    ----------
    path : path
    required : sequence of str
        Columns that must be present.
    numeric : sequence of str
        Columns (among ``required``) that must hold numbers; converted to float64.

    Raises
    ------
    InputError
        The file is not a readable table, lacks a column, or holds text in a numeric column.
    """
    path = Path(path)
    try:
        table = pd.read_csv(path, sep="\t", dtype={"sample_id": str, "feature_id": str})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError, OSError) as exc:
        first = str(exc).strip().splitlines()
        reason = first[0] if first else exc.__class__.__name__
        raise InputError(f"{path}: not a readable table ({reason}); {REFIT_HINT}") from exc
    return check_result_table(table, path, required=required, numeric=numeric)


def check_result_table(table: pd.DataFrame, path: Path, *, required: Sequence[str],
                       numeric: Sequence[str] = ()) -> pd.DataFrame:
    """Check that ``table`` (read from ``path``) has the ``required`` columns and numbers in ``numeric``."""
    lacking = [c for c in required if c not in table.columns]
    if lacking:
        raise InputError(f"{path}: missing column(s) {', '.join(lacking)}; {REFIT_HINT}")
    for column in numeric:
        try:
            table[column] = table[column].astype(np.float64)
        except (ValueError, TypeError) as exc:
            raise InputError(f"{path}: column {column} holds values that are not numbers; {REFIT_HINT}") from exc
    return table
