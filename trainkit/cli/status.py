"""`trainkit status`: summarise a workspace or an experiment folder."""

from __future__ import annotations

import json
from pathlib import Path

import click

from trainkit.cli.options import json_option
from trainkit.cli.output import Ctx, fail, user_errors

__all__ = ["status"]


@click.command(epilog="Example: trainkit status ws --json")
@click.argument("path", type=click.Path(exists=True, file_okay=False, path_type=Path))
@json_option("Machine-readable output.")
@click.pass_obj
def status(ctx: Ctx, path: Path, as_json: bool) -> None:
    """Summarise a workspace (photos, patches, labels, split) or an experiment folder."""
    from trainkit.core.experiment import Experiment
    from trainkit.store.workspace import DB_NAME, Workspace

    with user_errors(ctx):
        if (path / DB_NAME).exists():
            info = Workspace.open(path).summary()
        elif Experiment(path).is_experiment():
            info = Experiment(path).status()
        else:
            fail(f"{path} is neither a workspace nor an experiment folder")
    if as_json:
        click.echo(json.dumps(info, indent=2))
    else:
        console = ctx.console
        for k, v in info.items():
            console.print(f"{k:>22}: {v}")
