"""Identity of an input file (or folder, such as a Zarr store), for manifests and models.

:func:`file_identity` records the size, the modification time and a hash: by default a
fast hash of sampled pieces (at most ``SAMPLED_PIECES`` pieces of ``PIECE_BYTES`` bytes per
file, first and last included, and at most ``SAMPLED_FILES`` files of a folder, with the
names and sizes of all of them), or with ``checksum="full"`` a hash of every byte.
:func:`compare_identity` says whether a file is the one a record describes. The sampled hash
catches another file, a truncated or extended one and most rewrites; only the full hash
catches a change of a few bytes between the sampled pieces.

Hash: BLAKE2b with a 16-byte digest (``hashlib``; RFC 7693).
"""

from __future__ import annotations

import hashlib
import os
import time
from pathlib import Path

from ..errors import OptionError

__all__ = ["CHECKSUMS", "file_identity", "compare_identity", "PIECE_BYTES", "SAMPLED_PIECES", "SAMPLED_FILES"]

#: Kinds of ``checksum``.
CHECKSUMS = ("sampled", "full")
#: Bytes of each sampled piece of a file.
PIECE_BYTES = 64 * 1024
#: Pieces read from each sampled file (evenly spaced, the first and last included).
SAMPLED_PIECES = 16
#: Files of a folder whose content is sampled (evenly spaced in name order); the names and
#: sizes of all files are hashed.
SAMPLED_FILES = 64
_READ = 1 << 20


def _files(path: Path) -> list[tuple[str, Path]]:
    if path.is_dir():
        found = []
        for root, dirs, names in os.walk(path):
            dirs.sort()
            for name in sorted(names):
                full = Path(root) / name
                found.append((full.relative_to(path).as_posix(), full))
        return sorted(found)
    return [(path.name, path)]


def file_identity(path: str | os.PathLike, *, checksum: str = "sampled") -> dict:
    """Size, modification time and hash of ``path`` (a file or a folder of files).

    Parameters
    ----------
    path : path
    checksum : {"sampled", "full"}, default="sampled"
        ``sampled`` reads at most ``SAMPLED_PIECES · PIECE_BYTES`` bytes of at most
        ``SAMPLED_FILES`` files; ``full`` reads everything once.

    Returns
    -------
    dict
        ``path`` (absolute), ``size`` (bytes, all files of a folder), ``files``, ``modified``
        (latest, UTC ISO 8601), ``checksum`` (the kind) and ``hash`` (hex).
    """
    if checksum not in CHECKSUMS:
        raise OptionError(f"checksum={checksum!r} is not valid; use one of: {', '.join(CHECKSUMS)}")
    path = Path(path)
    files = _files(path)
    digest = hashlib.blake2b(digest_size=16)
    size, latest = 0, 0.0
    for name, full in files:
        stat = full.stat()
        size += stat.st_size
        latest = max(latest, stat.st_mtime)
        digest.update(f"{name}\0{stat.st_size}\0".encode())
    if checksum == "full":
        chosen = files
    else:
        step = max(1, len(files) // SAMPLED_FILES) if len(files) > SAMPLED_FILES else 1
        chosen = files[::step][:SAMPLED_FILES]
        if files and chosen[-1] != files[-1]:
            chosen.append(files[-1])
    for _, full in chosen:
        _hash_content(full, digest, sampled=checksum == "sampled")
    return {
        "path": str(path.absolute()),
        "size": size,
        "files": len(files),
        "modified": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(latest)),
        "checksum": checksum,
        "hash": digest.hexdigest(),
    }


def _hash_content(path: Path, digest, *, sampled: bool) -> None:
    size = path.stat().st_size
    with path.open("rb") as handle:
        if not sampled or size <= SAMPLED_PIECES * PIECE_BYTES:
            while chunk := handle.read(_READ):
                digest.update(chunk)
            return
        last = size - PIECE_BYTES
        for i in range(SAMPLED_PIECES):
            handle.seek(last * i // (SAMPLED_PIECES - 1))
            digest.update(handle.read(PIECE_BYTES))


def compare_identity(record: dict, path: str | os.PathLike) -> str | None:
    """None when ``path`` matches ``record`` (size and hash, of the record's kind); else what differs.

    The path and the modification time alone do not count (files are moved and copied).
    """
    try:
        now = file_identity(path, checksum=record.get("checksum", "sampled"))
    except OSError as exc:
        return f"it cannot be read ({exc.strerror or exc})"
    if now["size"] != record.get("size"):
        return f"its size is {now['size']:,} bytes, not {record.get('size', 0):,}"
    if now["hash"] != record.get("hash"):
        return f"its {now['checksum']} hash differs"
    return None
