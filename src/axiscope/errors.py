"""Exception hierarchy, and the wording helpers its messages share.

Every error that a user can fix by changing the input or the options derives from
:class:`AxiscopeError`. Its message is one line that already names the file or location
and says what to do; the command-line layer prints it and exits with code 2, or 3 for a
:class:`ResourceError` (memory, disk space).

Messages name the arguments of the Python API, never command-line options, and the
command line rewrites them into its option spellings
(:func:`axiscope.cli._app.to_option_spellings`). Write them so that the rewriting finds them:

* a name with an underscore stands bare anywhere: ``"check feature_ids and samples_in"``
  (→ ``check --feature-ids and --samples-in``);
* a one-word name is also plain English (``out``, ``missing``, ``dataset``), so it is
  rewritten only as ``name=value``: ``"confidence=1.5 is out of range"``
  (→ ``--confidence 1.5 is out of range``), ``"choose one with dataset=..."``;
* flags as ``name=True`` / ``name=False`` (``adjust_q=False`` → ``--no-adjust-q``);
* ids, dataset names, column names and values are quoted (``'sample_ids'``) and are never
  rewritten; neither are names inside paths or file names.
"""

from __future__ import annotations

__all__ = ["AxiscopeError", "InputError", "ModelError", "OptionError", "ResourceError", "agree", "counted", "one_line", "reason"]


class AxiscopeError(Exception):
    """Base class of the errors a user can act on (bad input, bad options, bad model)."""


class InputError(AxiscopeError):
    """The input file or an annotation table cannot be used as it is."""


class OptionError(AxiscopeError):
    """An option value is out of range or inconsistent with the data."""


class ModelError(AxiscopeError):
    """A saved model directory is missing, incomplete, tampered with or of another format."""


class ResourceError(AxiscopeError):
    """The machine lacks what the work needs: memory within the limit, disk space, inodes.

    The message says how much would be needed and where; the command line exits with
    code 3 (not 2: the input and the options are fine, the resources are not).
    """


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
