"""The `trainkit` command line: the entry point, which first checks that the train extra is installed.

Each command is a short module of this package (parse, call one library function,
print); shared options are in :mod:`~trainkit.cli.options`, the console, progress
bars, errors and exit codes in :mod:`~trainkit.cli.output`.

Exit codes (the same for every command): 0 all done; 1 done but some inputs were
skipped; 2 usage error or nothing could be done; 3 an acceptance gate failed.
"""

from __future__ import annotations

import importlib
import sys

from trainkit.cli.codes import EXIT_GATE, EXIT_OK, EXIT_SKIPPED, EXIT_USAGE

__all__ = ["main", "cli", "EXIT_OK", "EXIT_SKIPPED", "EXIT_USAGE", "EXIT_GATE"]

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

    try:
        cli.main(args=argv, prog_name="trainkit", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("trainkit: aborted", err=True)
        return EXIT_USAGE
    except click.exceptions.ClickException as exc:
        exc.show()
        return EXIT_USAGE
    except SystemExit as exc:
        return int(exc.code or 0) if not isinstance(exc.code, str) else EXIT_USAGE
    return EXIT_OK


def __getattr__(name: str):
    if name == "cli":  # the click group, imported on first use (it needs click and rich)
        from trainkit.cli.group import cli

        return cli
    raise AttributeError(f"module 'trainkit.cli' has no attribute {name!r}")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
