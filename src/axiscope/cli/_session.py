"""Options every command shares (``--config``, ``--log-format``, ``--verbose``, ``--debug``) and logging.

The options are declared once, on a function of their own, and added to each command when
the command list is built (:func:`with_shared_options`), so a command added later gets them
without a line of its own. The command's own function never sees them: a wrapper takes them
out, sets up the session (logging, the manifest's record of the configuration) and calls it.

Typer and the standard library only, so that ``axiscope --help`` stays fast.
"""

from __future__ import annotations

import contextlib
import json
import logging
import sys
import time
from enum import Enum
from pathlib import Path
from typing import Annotated, Any, Callable

import typer

from ._config import ConfigError, defaults_from_config, read_config_file, resolved_configuration

__all__ = ["SHARED", "LogFormat", "with_shared_options", "session", "configure_logging", "EXIT_CODES"]

#: Exit codes of every command, as the help and the README list them.
EXIT_CODES = (
    (0, "success"),
    (1, "internal error (a bug: rerun with --debug for a traceback)"),
    (2, "bad input or usage (one line on standard error says what to change)"),
    (3, "resource limit: the memory or disk space needed cannot be had"),
    (130, "interrupted (Ctrl-C, SIGINT)"),
    (143, "terminated (SIGTERM, as sent by schedulers and workflow managers)"),
)


class LogFormat(str, Enum):
    text = "text"
    json = "json"


class _Session:
    """What the running command was given through the shared options."""

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        self.command: str | None = None
        self.ctx: Any = None
        self.config: Path | None = None
        self.log_format = LogFormat.text
        self.verbose = False
        self.debug = False
        self.started = time.perf_counter()


session = _Session()


def _load_config(ctx: typer.Context, value: Path | None) -> Path | None:
    """Eager: read the file before the other options, and hand its values to the parser as defaults."""
    session.ctx = ctx
    if value is None or ctx.resilient_parsing:
        return value
    try:
        loaded = read_config_file(value)
        commands = set(getattr(ctx.parent.command, "commands", {})) if ctx.parent is not None else set()
        defaults = defaults_from_config(loaded, ctx.command, ctx.info_name or "", commands, value)
    except ConfigError as exc:
        raise typer.BadParameter(str(exc)) from None
    ctx.default_map = {**(ctx.default_map or {}), **defaults}
    return value


def _shared(
    config: Annotated[Path | None, typer.Option(
        "--config", metavar="FILE", is_eager=True, callback=_load_config,
        help="TOML (or YAML) file of this command's options, keyed by long option name without dashes "
             "(components = 20), at the top level or under a table named after the command ([fit]); "
             "the command line overrides it. The values used are recorded in the manifest.")] = None,
    log_format: Annotated[LogFormat, typer.Option(
        "--log-format",
        help="text: one human line per message on standard error; json: one JSON object per line "
             "(time, level, command, stage, pass, seconds, message), progress lines included.")] = LogFormat.text,
    verbose: Annotated[bool, typer.Option(
        "--verbose", "-v", show_default="off",
        help="Also log each pass over the data (what it read, how long it took) and other progress notes.")] = False,
    debug: Annotated[bool, typer.Option(
        "--debug", show_default="off",
        help="On an internal error (exit code 1), print the whole traceback.")] = False,
) -> None:
    """(holds the declarations of the shared options)"""


#: Names of the shared parameters, as the command's callback receives them.
SHARED = ("config", "log_format", "verbose", "debug")


def _shared_params() -> list:
    holder = typer.Typer(add_completion=False)
    holder.command()(_shared)
    return list(typer.main.get_command(holder).params)


def with_shared_options(command: Any, command_name: str) -> Any:
    """Add the shared options to ``command`` (once) and wrap its callback to take them out."""
    if command is None or getattr(command, "_axiscope_shared", False) or command.callback is None:
        return command
    own_names = {p.name for p in command.params}
    own_opts = {opt for p in command.params for opt in (*p.opts, *getattr(p, "secondary_opts", ()))}
    # a command that declares an option of the same name or spelling keeps its own
    added = [p for p in _shared_params()
             if p.name not in own_names and not own_opts & {*p.opts, *getattr(p, "secondary_opts", ())}]
    command.params.extend(added)
    taken = {p.name for p in added}
    original: Callable[..., Any] = command.callback

    def callback(**kwargs: Any) -> Any:
        settings = {name: kwargs.pop(name) for name in SHARED if name in taken}
        return _run(command_name, settings, original, kwargs)

    command.callback = callback
    command._axiscope_shared = True
    return command


def _run(command_name: str, settings: dict, original: Callable[..., Any], kwargs: dict) -> Any:
    session.command = command_name
    session.config = settings.get("config")
    session.log_format = LogFormat(settings.get("log_format") or "text")
    session.verbose = bool(settings.get("verbose"))
    session.debug = bool(settings.get("debug"))
    session.started = time.perf_counter()
    configuration = resolved_configuration(session.ctx, session.config) if session.ctx is not None else None
    with _manifest_record(configuration):
        result = original(**kwargs)
    seconds = time.perf_counter() - session.started
    logging.getLogger("axiscope.cli").info("%s done in %.2f s", command_name, seconds,
                                           extra={"stage": "done", "seconds": round(seconds, 3)})
    return result


@contextlib.contextmanager
def _manifest_record(configuration: dict | None):
    """While the command runs, output folders it writes get ``configuration`` in their manifest."""
    if configuration is None:
        yield
        return
    from ..io import output  # the library is loaded only once a command runs

    with output.manifest_additions(configuration=configuration):
        yield


# ----------------------------------------------------------------------------- logging


class _JsonLines(logging.Formatter):
    """One JSON object per record: time, level, command, stage, pass, seconds, message."""

    def __init__(self, rewrite: Callable[[str], str]) -> None:
        super().__init__()
        self.rewrite = rewrite

    def format(self, record: logging.LogRecord) -> str:
        entry = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
                    + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "command": session.command,
            "stage": getattr(record, "stage", record.name.rsplit(".", 1)[-1]),
            "pass": getattr(record, "pass_number", None),
            "seconds": getattr(record, "seconds", None),
            "elapsed": round(time.perf_counter() - session.started, 3),
            "message": self.rewrite(record.getMessage()),
        }
        for key in ("read_from", "blocks"):
            if hasattr(record, key):
                entry[key] = getattr(record, key)
        return json.dumps(entry, allow_nan=False, default=str)


def configure_logging(quiet: bool, one_line: logging.Formatter, rewrite: Callable[[str], str]) -> None:
    """Route the library's log records to standard error as the shared options ask.

    Warnings always; with ``--verbose`` (or ``--log-format json`` unless quiet) the progress
    notes too (each pass over the data, files written).
    """
    logger = logging.getLogger("axiscope")
    logger.handlers.clear()
    handler = logging.StreamHandler(sys.stderr)
    json_lines = session.log_format is LogFormat.json
    handler.setFormatter(_JsonLines(rewrite) if json_lines else one_line)
    logger.addHandler(handler)
    notes = session.verbose or (json_lines and not quiet)
    logger.setLevel(logging.INFO if notes else logging.WARNING)
    logger.propagate = False
