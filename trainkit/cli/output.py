"""What every command shares for talking to the user: the console, progress bars, errors, exit codes."""

from __future__ import annotations

import errno
import sqlite3
import traceback
from collections.abc import Iterator
from contextlib import contextmanager
from typing import NoReturn

import click
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TaskID,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)

from trainkit.cli.codes import (
    EXIT_CRASH,
    EXIT_GATE,
    EXIT_INTERRUPTED,
    EXIT_OK,
    EXIT_SKIPPED,
    EXIT_USAGE,
)
from trainkit.core.errors import TrainkitError

__all__ = [
    "EXIT_OK",
    "EXIT_SKIPPED",
    "EXIT_USAGE",
    "EXIT_GATE",
    "EXIT_CRASH",
    "EXIT_INTERRUPTED",
    "Ctx",
    "ProgressHandle",
    "fail",
    "warn",
    "user_errors",
    "user_message",
    "report_crash",
    "progress_bar",
]


class Ctx:
    """Options shared by all commands (the click context object).

    Args:
        quiet: no progress bars or chatter.
        debug: show the full traceback on errors.
    """

    def __init__(self, quiet: bool, debug: bool) -> None:
        self.quiet = quiet
        self.debug = debug

    @property
    def console(self) -> Console:
        """A console that prints nothing under --quiet."""
        return Console(stderr=False, quiet=self.quiet, highlight=False)


def fail(message: str, code: int = EXIT_USAGE) -> NoReturn:
    """Print one ``trainkit: message`` line on stderr and exit with ``code``."""
    click.echo(f"trainkit: {message}", err=True)
    raise SystemExit(code)


def warn(message: str) -> None:
    """Print one ``trainkit: message`` line on stderr and carry on."""
    click.echo(f"trainkit: {message}", err=True)


@contextmanager
def user_errors(ctx: Ctx) -> Iterator[None]:
    """Turn a user's error into one `trainkit:` line and exit; show anything else as a bug.

    The kit's own errors (:class:`~trainkit.core.errors.TrainkitError`), errors of the
    operating system about a file (missing, no permission, disk full) and an unusable
    workspace database are one line (the traceback only with ``--debug``), exit code 2;
    Ctrl-C exits 130 (:data:`EXIT_INTERRUPTED`). Any other exception is a bug in the kit:
    its traceback is shown with a line asking to report it, exit code 70
    (:data:`EXIT_CRASH`).
    """
    try:
        yield
    except (click.exceptions.ClickException, click.exceptions.Exit, click.exceptions.Abort):
        raise  # usage errors and click's own exits are main()'s business
    except KeyboardInterrupt:
        fail(INTERRUPTED, EXIT_INTERRUPTED)
    except Exception as exc:
        message = user_message(exc)
        if message is None:
            raise SystemExit(report_crash(exc)) from None
        if ctx.debug:
            traceback.print_exc()
        fail(message)


#: What an interrupted command says (finished work is kept by every command).
INTERRUPTED = "interrupted; finished work is saved, run the same command again to continue"


def user_message(exc: BaseException) -> str | None:
    """The one-line message for an error the user can act on, or None for a bug in the kit."""
    if isinstance(exc, TrainkitError):
        return str(exc)
    if isinstance(exc, OSError):
        return _os_error_message(exc)
    if isinstance(exc, sqlite3.DatabaseError):
        return _database_message(exc)
    return None


#: errno values that mean "no space left" (a full disk, or a full quota).
_DISK_FULL = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC)}


def _os_error_message(exc: OSError) -> str:
    """An operating-system error with the file it is about (when the system said which)."""
    what = exc.strerror or str(exc) or type(exc).__name__
    if exc.errno in _DISK_FULL:
        what += " (the disk is full: free some space and run the same command again)"
    if exc.filename is None:
        return what
    where = str(exc.filename) + (f" -> {exc.filename2}" if exc.filename2 is not None else "")
    return f"{where}: {what}"


def _database_message(exc: sqlite3.DatabaseError) -> str | None:
    """A workspace database that cannot be used, said for what it is; None for a bug."""
    if isinstance(
        exc,
        sqlite3.IntegrityError
        | sqlite3.ProgrammingError
        | sqlite3.InterfaceError
        | sqlite3.InternalError
        | sqlite3.NotSupportedError
        | sqlite3.DataError,
    ):
        return None  # the database works and refused what the kit asked: the kit's fault
    head = f"the workspace database could not be used ({exc})"
    if isinstance(exc, sqlite3.OperationalError):
        if "locked" in str(exc) or "busy" in str(exc):
            return head + ": another trainkit run held it for 30 s; run again when it has finished"
        return head + "; check that its folder exists, is writable and has free space"
    return head + (
        ": the file is damaged or not a workspace database; restore it from a copy "
        "(workspace.sqlite with its -wal file)"
    )


def report_crash(exc: BaseException) -> int:
    """Show the traceback of an unexpected exception and ask for a report; returns :data:`EXIT_CRASH`."""
    traceback.print_exception(exc)
    click.echo(
        f"trainkit: this is a bug in trainkit ({type(exc).__name__}); please report it with "
        "the traceback above",
        err=True,
    )
    return EXIT_CRASH


class ProgressHandle:
    """One task of a rich progress bar: advance it, set its count and total, log a line above it."""

    def __init__(self, progress: Progress, task: TaskID, quiet: bool) -> None:
        self._progress = progress
        self._task = task
        self._quiet = quiet

    def advance(self, n: int = 1) -> None:
        """Count ``n`` more items done."""
        self._progress.advance(self._task, n)

    def update(
        self, completed: int, total: int | None = None, description: str | None = None
    ) -> None:
        """Set the count done, and optionally the total and the description."""
        kw: dict = {"completed": completed}
        if total is not None:
            kw["total"] = total
        if description is not None:
            kw["description"] = description
        self._progress.update(self._task, **kw)

    def log(self, text: str) -> None:
        """Print a line above the bar (nothing under --quiet)."""
        if not self._quiet:
            self._progress.console.print(text, highlight=False)


@contextmanager
def progress_bar(ctx: Ctx, description: str, total: int | None = None) -> Iterator[ProgressHandle]:
    """A rich progress bar with ETA, hidden under --quiet; yields a :class:`ProgressHandle`."""
    prog = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        TextColumn("eta"),
        TimeRemainingColumn(),
        disable=ctx.quiet,
        transient=False,
    )
    with prog:
        yield ProgressHandle(prog, prog.add_task(description, total=total), ctx.quiet)
