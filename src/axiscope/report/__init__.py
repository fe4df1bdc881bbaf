"""Pictures of a fit: static figures (:mod:`.figures`, look in :mod:`.style`) and the
self-contained, interactive HTML report (:mod:`.html`, charts in :mod:`.interactive`).

:func:`write_figures` and :func:`build_report` are re-exported lazily, so that importing this
package loads no numerical library until a picture is asked for.
"""

from __future__ import annotations

from typing import Any

__all__ = ["write_figures", "build_report"]


def __getattr__(name: str) -> Any:
    if name == "write_figures":
        from .figures import write_figures

        return write_figures
    if name == "build_report":
        from .html import build_report

        return build_report
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
