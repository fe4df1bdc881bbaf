"""Command-line interface: a thin typer layer over the Python API.

Each command lives in its own module and registers itself on :data:`app`. Library errors
(:class:`axiscope.errors.AxiscopeError`) become one line on standard error and exit code 2.
"""

from __future__ import annotations

import sys

# Importing the command modules registers their commands on the app.
from . import (  # noqa: E402,F401
    demo_cmd,
    explain_cmd,
    figures_cmd,
    fit_cmd,
    groups_cmd,
    inspect_cmd,
    report_cmd,
    score_cmd,
)
from ._app import app, main

__all__ = ["app", "main"]

if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
