"""The typer application, error handling, logging and progress display shared by commands.

Kept light: importing this module (and so ``axiscope --help``) loads typer and the
standard library only. Command modules import the library inside their functions.
"""

from __future__ import annotations

import contextlib
import logging
import re
import sys
from collections.abc import Callable, Iterator
from typing import Annotated, Any

import typer
from typer.core import TyperGroup

from ..errors import AxiscopeError
from ._session import EXIT_CODES, configure_logging, session, with_shared_options

__all__ = ["app", "main", "fail", "Terminated", "signal_handlers", "RESOURCE_EXIT", "say", "setup_logging", "progress_display", "user_errors",
           "to_option_spellings", "COMMAND_ORDER"]

#: The commands in the order of the work. A command not named here (the explanation of
#: the axes, and any stage added later) is listed after ``fit`` and before ``score``,
#: in the order of :data:`_AFTER_FIT`, then in the order they were registered.
COMMAND_ORDER = ("inspect", "fit", "score", "demo", "simulate")
_UNLISTED_AFTER = "fit"
_AFTER_FIT = ("explain", "groups", "figures", "report")

_HELP = "Principal component analysis of large, wide numeric tables, out of core."


class _CommandList(TyperGroup):
    """Lists commands in the order of the work, each with its whole first sentence."""

    def list_commands(self, ctx: Any) -> list[str]:
        after = COMMAND_ORDER.index(_UNLISTED_AFTER)
        names = list(self.commands)

        def position(name: str) -> tuple[float, int]:
            if name in COMMAND_ORDER:
                return COMMAND_ORDER.index(name), 0
            return after + 0.5, _AFTER_FIT.index(name) if name in _AFTER_FIT else len(_AFTER_FIT)

        return sorted(names, key=position)

    def get_command(self, ctx: Any, cmd_name: str) -> Any:
        # every command gets the shared options (--config, --log-format, --verbose, --debug)
        return with_shared_options(super().get_command(ctx, cmd_name), cmd_name)

    def format_commands(self, ctx: Any, formatter: Any) -> None:
        # A command's short_help, or its help up to the end of the first sentence; never
        # cut to the terminal width with "...": long lines are wrapped instead.
        rows = []
        for name in self.list_commands(ctx):
            command = self.get_command(ctx, name)
            if command is not None and not command.hidden:
                rows.append((name, command.get_short_help_str(limit=sys.maxsize)))
        if rows:
            with formatter.section("Commands"):
                formatter.write_dl(rows)


#: The exit codes, at the end of ``axiscope --help`` (``\b``: lines kept as written).
EPILOG = "\b\nExit codes:\n" + "\n".join(f"  {code:>3}  {meaning}" for code, meaning in EXIT_CODES)

app = typer.Typer(
    name="axiscope",
    cls=_CommandList,
    help=_HELP,
    epilog=EPILOG,
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


# -------------------------------------------------------------- --version, running command


def _print_version(value: bool) -> None:
    if value:
        from .. import __version__

        typer.echo(f"axiscope {__version__}")
        raise typer.Exit()


#: Option spellings of the running command's parameters (see :func:`user_errors`).
_running: dict[str, Any] = {}


@app.callback()
def _root(
    ctx: typer.Context,
    version: Annotated[bool, typer.Option("--version", callback=_print_version, is_eager=True,
                                          help="Print the version of axiscope and exit.")] = False,
) -> None:
    """Principal component analysis of large, wide numeric tables, out of core."""
    command = ctx.command.get_command(ctx, ctx.invoked_subcommand) if ctx.invoked_subcommand else None
    _running.clear()
    if command is not None:
        _running.update({param.name: param for param in command.params
                         if param.param_type_name == "option" and param.name})
        ctx.call_on_close(_running.clear)


# ----------------------------------------------------------------------- error messages


def _spelling(param: Any, value: str | None) -> str:
    """How a parameter is written on the command line (``value``: a ``True``/``False`` after ``=``)."""
    long = [opt for opt in param.opts if opt.startswith("--")]
    primary = long[0] if long else param.opts[0]
    if value == "False" and getattr(param, "is_flag", False):
        off = [opt for opt in param.secondary_opts if opt.startswith("--")]
        return off[0] if off else f"without {primary}"
    return primary


def to_option_spellings(message: str, params: dict[str, Any]) -> str:
    """Rewrite the Python argument names in ``message`` into the option spellings of ``params``.

    ``params`` maps each argument name to its click parameter (``opts``, ``secondary_opts``,
    ``is_flag``). A name is rewritten where it stands as a word of its own, not inside
    quotes, a path or a file name, and

    * anywhere when it holds an underscore (``memory_limit`` → ``--memory-limit``);
    * only when followed by ``=`` otherwise, since one-word names (``out``, ``missing``,
      ``dataset``) are also plain English.

    ``name=value`` becomes ``--option value`` (``confidence=1.5`` → ``--confidence 1.5``,
    ``missing='mean'`` → ``--missing mean``);
    ``flag=True`` becomes the flag and ``flag=False`` its negative form
    (``adjust_q=False`` → ``--no-adjust-q``).
    """
    if not params:
        return message
    names = "|".join(re.escape(name) for name in sorted(params, key=len, reverse=True))
    pattern = re.compile(
        rf"(?<![\w'\"/.-])(?P<name>{names})(?![\w'\"/-]|\.\w)"
        rf"(?P<eq>=(?:(?P<bool>(?:True|False)\b)|'(?P<word>[\w.+-]+)'(?![\w']))?)?"
    )

    def replace(match: re.Match[str]) -> str:
        name, param = match["name"], params[match["name"]]
        if "_" not in name and match["eq"] is None:
            return match.group(0)
        if match["bool"] is not None and getattr(param, "is_flag", False):
            return _spelling(param, match["bool"])
        if match["eq"] is not None:
            return _spelling(param, None) + " " + (match["bool"] or match["word"] or "")
        return _spelling(param, None)

    return pattern.sub(replace, message)


#: Exit code of a run refused for want of resources (memory, disk space, inodes).
RESOURCE_EXIT = 3


def fail(message: str, code: int = 2) -> typer.Exit:
    """Print one error line and return the exit (code 2 unless told) to raise."""
    typer.echo(f"error: {message}", err=True)
    return typer.Exit(code=code)


class Terminated(KeyboardInterrupt):
    """SIGTERM (what workflow managers and schedulers send) arrived: stop like Ctrl-C.

    A subclass of KeyboardInterrupt, so every clean-up path of an interrupt (scratch
    files, temporary output folders, locks) runs for it too.
    """

    signum = 15


def _on_sigterm(signum: int, frame: Any) -> None:
    import signal

    signal.signal(signal.SIGTERM, signal.SIG_IGN)  # a second SIGTERM must not cut the clean-up short
    raise Terminated()


@contextlib.contextmanager
def signal_handlers() -> Iterator[None]:
    """Within this context SIGTERM raises :class:`Terminated` in the main thread (the command
    line's entry); the previous handler is put back afterwards."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def interrupted_exit(exc: BaseException) -> int:
    """Print the interruption line and give the exit code: 128 + the signal (130, 143)."""
    signum = getattr(exc, "signum", 2)
    what = "terminated" if signum == 15 else "interrupted"
    typer.echo(f"error: {what}; nothing was written", err=True)
    return 128 + signum


def _release_outputs() -> None:
    """Release output locks still held (the output module is loaded only if a command used it)."""
    output = sys.modules.get("axiscope.io.output")
    if output is not None:
        output.release_targets()


@contextlib.contextmanager
def user_errors() -> Iterator[None]:
    """Turn library errors into one line on standard error and exit code 2 (3: resources).

    The library's messages name Python arguments; the line printed names the running
    command's options instead (:func:`to_option_spellings`), so the message tells a
    command-line user what to type. Interrupts (Ctrl-C, SIGTERM) exit with 130 and 143.
    Output locks taken inside are released on the way out, however it ends.
    """
    from ..errors import ResourceError

    try:
        yield
    except AxiscopeError as exc:
        code = RESOURCE_EXIT if isinstance(exc, ResourceError) else 2
        raise fail(to_option_spellings(str(exc), dict(_running)), code) from None
    except KeyboardInterrupt as exc:
        raise typer.Exit(code=interrupted_exit(exc)) from None
    finally:
        _release_outputs()


# ------------------------------------------------------------------------ output helpers


class _OneLine(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        return f"{record.levelname.lower()}: {to_option_spellings(record.getMessage(), dict(_running))}"


def setup_logging(quiet: bool) -> None:
    """Send the library's warnings to standard error, one line each, in option spellings.

    ``--verbose`` adds the progress notes (each pass over the data); ``--log-format json``
    writes one JSON object per line instead (see :mod:`axiscope.cli._session`).
    """
    configure_logging(quiet, _OneLine(), lambda message: to_option_spellings(message, dict(_running)))


def say(message: str, quiet: bool) -> None:
    """Print a line of the summary on standard output unless quiet."""
    if not quiet:
        typer.echo(message)


@contextlib.contextmanager
def progress_display(quiet: bool) -> Iterator[Callable[[str, int, int], None] | None]:
    """A progress callback with one bar per pass on a terminal; None in pipelines or quiet.

    rich is imported here, only when bars are drawn.
    """
    if quiet or not sys.stderr.isatty():
        yield None
        return
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
    )

    bars = Progress(
        TextColumn("{task.description:<22}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        console=Console(stderr=True),
        transient=False,
    )
    tasks: dict[str, int] = {}

    def update(name: str, done: int, total: int) -> None:
        if name not in tasks:
            tasks[name] = bars.add_task(name, total=total)
        bars.update(tasks[name], completed=done)

    with bars:
        yield update


# ---------------------------------------------------------------------------- entry point


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``axiscope`` console script.

    Usage errors of the command line (an unknown option, a value out of range) are shown
    like every other error: one line on standard error, exit code 2. SIGTERM stops a run
    like Ctrl-C (clean-up included) and exits with 143.
    """
    from ..core.memory import count_whole_process

    try:
        with signal_handlers(), count_whole_process():  # --memory-limit is for the whole process
            result = app(args=argv, prog_name="axiscope", standalone_mode=False)
    except SystemExit as exc:
        return int(exc.code or 0)
    except KeyboardInterrupt as exc:  # before or after a command's own handling
        return interrupted_exit(exc)
    except Exception as exc:  # the parser's own exceptions, recognised by their interface
        if type(exc).__name__ == "NoArgsIsHelpError" and hasattr(exc, "show"):
            exc.show()
            return 0
        if type(exc).__name__ == "Abort":
            return interrupted_exit(exc.__cause__ or exc)
        if hasattr(exc, "format_message") and hasattr(exc, "exit_code"):
            ctx = getattr(exc, "ctx", None)
            where = ctx.command_path if ctx is not None else "axiscope"
            message = " ".join(exc.format_message().split())
            typer.echo(f"error: {message} (see '{where} --help')", err=True)
            return int(exc.exit_code)
        return internal_error(exc, debug=session.debug or "--debug" in (sys.argv[1:] if argv is None else argv))
    finally:
        session.reset()
    return result if isinstance(result, int) else 0


#: Exit code of an internal error (a bug of axiscope, not of the input).
INTERNAL_EXIT = 1


def internal_error(exc: BaseException, *, debug: bool) -> int:
    """One line naming the error and the way to see more (``--debug``: the whole traceback)."""
    if debug:
        import traceback

        traceback.print_exception(exc, file=sys.stderr)
    what = " ".join(f"{type(exc).__name__}: {exc}".split())
    hint = "the traceback is above; please report it" if debug else \
        "rerun with --debug for a traceback, and please report it"
    typer.echo(f"error: internal error ({what}); {hint}", err=True)
    return INTERNAL_EXIT
