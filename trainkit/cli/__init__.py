"""The `trainkit` command line: the entry point, which first checks that the train extra is installed.

Each command is a short module of this package (parse, call one library function,
print); shared options are in :mod:`~trainkit.cli.options`, the console, progress
bars, errors and exit codes in :mod:`~trainkit.cli.output`.

Exit codes (the same for every command, see :mod:`~trainkit.cli.codes`): 0 all done;
1 done but some inputs were skipped; 2 usage error or nothing could be done; 3 an
acceptance gate failed; 70 the kit crashed (a bug, shown with its traceback); 130
interrupted by Ctrl-C.
"""

from __future__ import annotations

import importlib
import sys

from trainkit.cli.codes import (
    EXIT_CRASH,
    EXIT_GATE,
    EXIT_INTERRUPTED,
    EXIT_OK,
    EXIT_SKIPPED,
    EXIT_USAGE,
)

__all__ = [
    "main",
    "cli",
    "EXIT_OK",
    "EXIT_SKIPPED",
    "EXIT_USAGE",
    "EXIT_GATE",
    "EXIT_CRASH",
    "EXIT_INTERRUPTED",
]

#: Packages of the ``train`` extra the command line itself needs.
CLI_PACKAGES = ("click", "rich")
INSTALL_HINT = "pip install 'trainkit-concrete[train]'"


def missing_package() -> str | None:
    """The first package of :data:`CLI_PACKAGES` that cannot be imported, or None."""
    for name in CLI_PACKAGES:
        try:
            importlib.import_module(name)
        except ImportError:
            return name
    return None


def main(argv: list[str] | None = None) -> int:
    """Console-script entry point; returns the exit code."""
    missing = missing_package()
    if missing:
        print(
            f"trainkit: the command line needs {missing}, which is not installed; "
            f"install the train extra: {INSTALL_HINT}",
            file=sys.stderr,
        )
        return EXIT_USAGE
    import click

    from trainkit.cli.group import cli
    from trainkit.cli.output import INTERRUPTED, report_crash, user_message

    _show_notes()
    try:
        cli.main(args=argv, prog_name="trainkit", standalone_mode=False)
    except click.exceptions.Abort as exc:
        if isinstance(exc.__cause__ or exc.__context__, KeyboardInterrupt):
            click.echo(f"trainkit: {INTERRUPTED}", err=True)
            return EXIT_INTERRUPTED
        click.echo("trainkit: aborted", err=True)
        return EXIT_USAGE
    except click.exceptions.ClickException as exc:
        # `trainkit` alone: the help, as click shows it (NoArgsIsHelpError: click 8.2 and later)
        if isinstance(exc, getattr(click.exceptions, "NoArgsIsHelpError", ())):
            exc.show()
        else:
            click.echo(f"trainkit: {usage_line(exc)}", err=True)
        return EXIT_USAGE
    except SystemExit as exc:
        return int(exc.code or 0) if not isinstance(exc.code, str) else EXIT_USAGE
    except KeyboardInterrupt:
        click.echo(f"trainkit: {INTERRUPTED}", err=True)
        return EXIT_INTERRUPTED
    except Exception as exc:  # raised outside a command's user_errors block
        message = user_message(exc)
        if message is None:
            return report_crash(exc)
        click.echo(f"trainkit: {message}", err=True)
        return EXIT_USAGE
    return EXIT_OK


def _show_notes() -> None:
    """Print the kit's notes (:class:`~trainkit.core.errors.TrainkitNote`) as one line each."""
    import warnings

    import click

    from trainkit.core.errors import TrainkitNote

    shown = warnings.showwarning

    def show(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, TrainkitNote):
            click.echo(f"trainkit: note: {message}", err=True)
        else:
            shown(message, category, filename, lineno, file, line)

    warnings.showwarning = show
    warnings.simplefilter("always", TrainkitNote)


def usage_line(exc) -> str:
    """A click error as the one line every error is: the message, then where help is."""
    text = exc.format_message().strip().rstrip(".")
    text = text[:1].lower() + text[1:]
    ctx = getattr(exc, "ctx", None)
    if ctx is not None:
        text += f"; see {ctx.command_path} --help"
    return " ".join(text.split())  # click's suggestions ("Did you mean ...") come on new lines


def __getattr__(name: str):
    if name == "cli":  # the click group, imported on first use (it needs click and rich)
        from trainkit.cli.group import cli

        return cli
    raise AttributeError(f"module 'trainkit.cli' has no attribute {name!r}")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
