"""The typer application, error handling, logging and progress display shared by commands."""

from __future__ import annotations

import contextlib
import logging
import sys
from collections.abc import Callable, Iterator

import typer

from ..errors import AxiscopeError

app = typer.Typer(
    name="axiscope",
    help="Principal component analysis of large, wide numeric tables, out of core.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


class _OneLine(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        return f"{record.levelname.lower()}: {record.getMessage()}"


def setup_logging(quiet: bool) -> None:
    """Send the library's warnings to standard error, one line each."""
    logger = logging.getLogger("axiscope")
    logger.handlers.clear()
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(_OneLine())
    logger.addHandler(handler)
    logger.setLevel(logging.WARNING)
    logger.propagate = False


def fail(message: str) -> typer.Exit:
    """Print one error line and return the exit (code 2) to raise."""
    typer.echo(f"error: {message}", err=True)
    return typer.Exit(code=2)


@contextlib.contextmanager
def user_errors() -> Iterator[None]:
    """Turn library errors into one line on standard error and exit code 2."""
    try:
        yield
    except AxiscopeError as exc:
        raise fail(str(exc)) from None
    except KeyboardInterrupt:
        typer.echo("error: interrupted; nothing was written", err=True)
        raise typer.Exit(code=130) from None


def say(message: str, quiet: bool) -> None:
    """Print a line of the summary on standard output unless quiet."""
    if not quiet:
        typer.echo(message)


@contextlib.contextmanager
def progress_display(quiet: bool) -> Iterator[Callable[[str, int, int], None] | None]:
    """A progress callback with one bar per pass on a terminal; None in pipelines or quiet."""
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


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``axiscope`` console script.

    Usage errors of the command line (an unknown option, a value out of range) are shown
    like every other error: one line on standard error, exit code 2.
    """
    try:
        result = app(args=argv, prog_name="axiscope", standalone_mode=False)
    except SystemExit as exc:
        return int(exc.code or 0)
    except Exception as exc:  # the parser's own exceptions, recognised by their interface
        if type(exc).__name__ == "NoArgsIsHelpError" and hasattr(exc, "show"):
            exc.show()
            return 0
        if type(exc).__name__ == "Abort":
            typer.echo("error: interrupted; nothing was written", err=True)
            return 130
        if hasattr(exc, "format_message") and hasattr(exc, "exit_code"):
            ctx = getattr(exc, "ctx", None)
            where = ctx.command_path if ctx is not None else "axiscope"
            message = " ".join(exc.format_message().split())
            typer.echo(f"error: {message} (see '{where} --help')", err=True)
            return int(exc.exit_code)
        raise
    return result if isinstance(result, int) else 0
