"""Exception hierarchy.

Every error that a user can fix by changing the input or the options derives from
:class:`AxiscopeError`. Its message is one line that already names the file or location
and says what to do; the command-line layer prints it and exits with code 2.
"""

from __future__ import annotations

__all__ = ["AxiscopeError", "InputError", "ModelError", "OptionError"]


class AxiscopeError(Exception):
    """Base class of the errors a user can act on (bad input, bad options, bad model)."""


class InputError(AxiscopeError):
    """The input file or an annotation table cannot be used as it is."""


class OptionError(AxiscopeError):
    """An option value is out of range or inconsistent with the data."""


class ModelError(AxiscopeError):
    """A saved model directory is missing, incomplete, tampered with or of another format."""
