"""Exception hierarchy, and the wording helpers its messages share.

Every error that a user can fix by changing the input or the options derives from
:class:`AxiscopeError`. Its message is one line that already names the file or location
and says what to do; the command-line layer prints it and exits with code 2.

Messages name the arguments of the Python API (``n_components``, ``memory_limit``), written
bare, never quoted, so that the command line can rewrite each of them into its option
spelling (``--components``, ``--memory-limit``); see :func:`axiscope.cli._app.user_errors`.
Ids, dataset names and values in a message are quoted and are never rewritten.
"""

from __future__ import annotations

__all__ = ["AxiscopeError", "InputError", "ModelError", "OptionError", "agree", "counted", "one_line", "reason"]


class AxiscopeError(Exception):
    """Base class of the errors a user can act on (bad input, bad options, bad model)."""


class InputError(AxiscopeError):
    """The input file or an annotation table cannot be used as it is."""


class OptionError(AxiscopeError):
    """An option value is out of range or inconsistent with the data."""


class ModelError(AxiscopeError):
    """A saved model directory is missing, incomplete, tampered with or of another format."""


# ------------------------------------------------------------------ wording of messages


def counted(n: int, singular: str, plural: str | None = None) -> str:
    """``n`` followed by the noun in the form that agrees with it.

    Examples
    --------
    >>> counted(1, "feature"), counted(13, "feature"), counted(0, "sample")
    ('1 feature', '13 features', '0 samples')
    >>> counted(2, "axis", "axes")
    '2 axes'
    """
    return f"{n} {singular if n == 1 else (plural or singular + 's')}"


def agree(n: int, singular: str, plural: str) -> str:
    """The word (usually a verb) that agrees with a count: ``agree(1, "is", "are") == "is"``."""
    return singular if n == 1 else plural


def one_line(text: str, limit: int = 160) -> str:
    """``text`` collapsed to a single line of at most ``limit`` characters."""
    flat = " ".join(str(text).split())
    return flat if len(flat) <= limit else flat[: limit - 3] + "..."


def reason(exc: BaseException) -> str:
    """A short one-line description of an exception: its type and first words."""
    message = one_line(str(exc))
    return f"{type(exc).__name__}: {message}" if message else type(exc).__name__
