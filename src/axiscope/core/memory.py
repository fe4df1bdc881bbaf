"""Memory budgets: parsing sizes such as ``512MB``, and what the process itself holds.

On the command line ``--memory-limit`` is a limit for the whole process: the interpreter,
the libraries and whatever else is resident when the work is planned count against it
(:func:`process_baseline`), and the plan shares out the rest. From Python, ``memory_limit``
is the budget of the fit's own data unless :func:`count_whole_process` was switched on.
"""

from __future__ import annotations

import contextlib
import math
import os
import re
from collections.abc import Iterator

from ..errors import OptionError

__all__ = ["parse_memory", "default_memory_limit", "format_bytes", "resident_bytes", "process_baseline",
           "count_whole_process", "MAX_MEMORY"]

#: Largest memory size accepted (1 EiB): anything above is a typo, not a machine.
MAX_MEMORY = 2**60

_UNITS = {
    "": 1,
    "B": 1,
    "KB": 10**3,
    "MB": 10**6,
    "GB": 10**9,
    "TB": 10**12,
    "KIB": 2**10,
    "MIB": 2**20,
    "GIB": 2**30,
    "TIB": 2**40,
    "K": 10**3,
    "M": 10**6,
    "G": 10**9,
    "T": 10**12,
}
_PATTERN = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-z]*)\s*$")


def parse_memory(text: str | int | float) -> int:
    """Parse a memory size such as ``"512MB"``, ``"4GB"``, ``"1.5GiB"`` or a number of bytes.

    Decimal units (KB, MB, GB, TB) are powers of 1000, binary units (KiB, MiB, GiB, TiB)
    powers of 1024.
    """
    if isinstance(text, (int, float)):
        value, unit = float(text), ""
        if not math.isfinite(value) or value < 0:
            raise OptionError(f"memory_limit={text!r} is not a size; write it like 512MB, 4GB or 1.5GiB")
    else:
        match = _PATTERN.match(text)
        if match is None or match.group(2).upper() not in _UNITS:
            raise OptionError(
                f"memory_limit={text!r} is not a size; write it like 512MB, 4GB or 1.5GiB"
            )
        value, unit = float(match.group(1)), match.group(2).upper()
    total = value * _UNITS[unit]
    if not math.isfinite(total) or total > MAX_MEMORY:
        raise OptionError(f"memory_limit={text!r} is larger than any machine (more than 1 EiB); "
                          "write the size of this one's memory, like 512MB or 4GB")
    size = int(total)
    if size < 16 * 10**6:
        raise OptionError(f"memory_limit={text!r} is below the minimum of 16MB; raise it")
    return size


def total_memory() -> int:
    """Physical memory of this machine in bytes."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        return 8 * 2**30


def default_memory_limit() -> int:
    """Half of the physical memory: room for the operating system's page cache and other work."""
    return total_memory() // 2


def format_bytes(n: float) -> str:
    """Human-readable size with decimal units (``1.2 GB``)."""
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"  # pragma: no cover


def resident_bytes() -> int:
    """Resident memory of this process now, in bytes (``/proc/self/statm``; 0 if unknown)."""
    try:
        with open("/proc/self/statm", encoding="ascii") as handle:
            pages = int(handle.read().split()[1])
        return pages * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):  # pragma: no cover - non-Linux
        return 0


_whole_process = [False]


@contextlib.contextmanager
def count_whole_process(enabled: bool = True) -> Iterator[None]:
    """Within this context, memory limits are for the whole process (the command line's rule)."""
    previous = _whole_process[0]
    _whole_process[0] = enabled
    try:
        yield
    finally:
        _whole_process[0] = previous


def process_baseline() -> int:
    """What the process holds before the work (counted against the limit): its resident
    memory now when the limit is for the whole process, else 0."""
    return resident_bytes() if _whole_process[0] else 0
