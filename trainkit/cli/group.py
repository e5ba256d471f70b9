"""The `trainkit` command group: global options, and every command registered in workflow order."""

from __future__ import annotations

import click

from trainkit import __version__
from trainkit.cli.codes import EXIT_CODES
from trainkit.cli.demo import demo
from trainkit.cli.evaluate import evaluate
from trainkit.cli.export import export
from trainkit.cli.output import Ctx
from trainkit.cli.pick import pick
from trainkit.cli.review import review
from trainkit.cli.sample import sample
from trainkit.cli.scan import scan
from trainkit.cli.split import split
from trainkit.cli.status import status
from trainkit.cli.synth import synth
from trainkit.cli.tile import tile
from trainkit.cli.train import train
from trainkit.cli.verify import verify
from trainkit.core.caution import SHORT_CAUTION

__all__ = ["cli"]


@click.group(
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


for _command in (
    synth, tile, pick, split, train, evaluate, export, scan, sample, verify, review, status, demo
):  # fmt: skip
    cli.add_command(_command)
