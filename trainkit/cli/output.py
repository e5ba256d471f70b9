"""What every command shares for talking to the user: the console, progress bars, errors, exit codes."""

from __future__ import annotations

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

from trainkit.cli.codes import EXIT_GATE, EXIT_OK, EXIT_SKIPPED, EXIT_USAGE

__all__ = [
    "EXIT_OK",
    "EXIT_SKIPPED",
    "EXIT_USAGE",
    "EXIT_GATE",
    "Ctx",
    "ProgressHandle",
    "fail",
    "warn",
    "user_errors",
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
    """Turn the kit's ValueErrors into one `trainkit:` line (a traceback only with --debug)."""
    try:
        yield
    except (ValueError, OSError) as exc:
        if ctx.debug:
            traceback.print_exc()
        fail(str(exc))
    except sqlite3.DatabaseError as exc:
        if ctx.debug:
            traceback.print_exc()
        fail(
            f"the workspace database could not be used ({exc}); if it is damaged, restore it "
            "from a copy (workspace.sqlite with its -wal file)"
        )
    except KeyboardInterrupt:
        fail(
            "interrupted; finished work is saved, run the same command again to continue",
            EXIT_USAGE,
        )


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
