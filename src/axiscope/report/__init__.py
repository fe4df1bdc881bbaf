"""Figures of a fit and of a scoring run (and, beside them, the report).

:func:`write_figures` is re-exported lazily, so that importing this package loads no
numerical library until a figure is asked for.
"""

from __future__ import annotations

from typing import Any

__all__ = ["write_figures"]


def __getattr__(name: str) -> Any:
    if name == "write_figures":
        from .figures import write_figures

        return write_figures
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
