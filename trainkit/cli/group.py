"""The `trainkit` command group: global options, and every command registered in workflow order."""

from __future__ import annotations

import importlib

import click

from trainkit import __version__
from trainkit.cli.codes import EXIT_CODES
from trainkit.cli.output import Ctx
from trainkit.core.caution import SHORT_CAUTION

__all__ = ["cli"]


#: Every command: name -> the module defining it (a function of the same name), in workflow
#: order. A command's module is imported only when that command runs (or help lists them),
#: so `trainkit status` does not pay for the training side's imports.
COMMANDS = {
    name: f"trainkit.cli.{name}"
    for name in (
        "synth", "tile", "pick", "split", "train", "evaluate", "export", "scan", "sample", "verify",
        "review", "status", "demo",
    )
}  # fmt: skip


class _LazyGroup(click.Group):
    """A group whose commands are imported on first use (click's documented lazy-loading
    pattern: ``list_commands`` and ``get_command`` overridden)."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted({*super().list_commands(ctx), *COMMANDS})

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name in COMMANDS and cmd_name not in self.commands:
            command = getattr(importlib.import_module(COMMANDS[cmd_name]), cmd_name)
            self.add_command(command)
        return super().get_command(ctx, cmd_name)


@click.group(
    cls=_LazyGroup,
    context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
    epilog="\b\nExit codes:\n"
    + "\n".join(f"  {code:<4d} {meaning}" for code, meaning in EXIT_CODES.items())
    + "\n\n"
    + SHORT_CAUTION,
)
@click.option("-q", "--quiet", is_flag=True, help="No progress bars or chatter (for scripts).")
@click.option("--debug", is_flag=True, help="Show the full traceback on errors.")
@click.version_option(version=__version__, prog_name="trainkit")
@click.pass_context
def cli(click_ctx: click.Context, quiet: bool, debug: bool) -> None:
    """trainkit: build, check and export a concrete-crack patch screener on CPU.

    \b
    Workflow:  synth/photos -> tile -> pick -> review -> split -> train -> evaluate -> export -> scan
    Each job:  scan -> sample -> review -> verify
    Try it:    trainkit demo --out demo-output
    """
    click_ctx.obj = Ctx(quiet, debug)
