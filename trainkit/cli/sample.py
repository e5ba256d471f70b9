"""`trainkit sample`: draw a job's acceptance sample from a finished scan into a workspace."""

from __future__ import annotations

import json
from pathlib import Path

import click

from trainkit.cli.options import json_option, scan_argument, seed_option, workspace_option
from trainkit.cli.output import Ctx, user_errors

__all__ = ["sample"]


@click.command(
    epilog="Example: trainkit sample scan-results --workspace ws --cells 300 --seed 1\n\n"
    "Then label the cells (trainkit review ws --reviewer NAME, they come first) or fill "
    "the label column of SCAN/sample.csv and load it (trainkit review ws --reviewer NAME "
    "--import-csv SCAN/sample.csv), and run trainkit verify SCAN --workspace ws."
)
@scan_argument
@workspace_option("The workspace that receives the cells (the one the model was trained from).")
@click.option(
    "--cells",
    type=click.IntRange(1, 1_000_000),
    default=300,
    show_default=True,
    help="How many cells to draw.",
)
@seed_option("Seed of the sample (same scan, cells and seed: same sample).", default=None)
@click.option("--job", default=None, help="The job's name (default: the scan folder's name).")
@json_option("Print the summary as JSON to stdout.")
@click.pass_obj
def sample(ctx: Ctx, scan_dir: Path, ws_dir: Path, cells: int, seed, job, as_json: bool) -> None:
    """Draw N cells of a finished scan at random within strata of the screening probability.

    The cells become unlabelled patches of the workspace (they never join a split and come
    first in `trainkit review`) and are listed in SCAN/sample.csv with their frame, box,
    stratum and inclusion probability.
    """
    from trainkit.jobs.sample import sample_scan
    from trainkit.labels.workspace import Workspace

    with user_errors(ctx):
        if seed is None:
            raise click.UsageError("--seed is required: write it down, it makes the sample")
        res = sample_scan(scan_dir, Workspace.open(ws_dir), cells=cells, seed=seed, job=job)
    if as_json:
        click.echo(json.dumps(res, indent=2))
        return
    strata = ", ".join(f"{s['stratum']} {s['sampled']} of {s['cells']}" for s in res["strata"])
    ctx.console.print(
        f"job {res['job']}: {res['cells']} cells drawn from {res['frames_sampled']} of "
        f"{res['frames_in_scan']} frames ({strata}) -> {res['sample_csv']}"
    )
    if res["frames_learned_from_left_out"]:
        ctx.console.print(
            f"{res['frames_learned_from_left_out']} frames of the scan were left out: the "
            "scan's model learned from them (trainkit train --from)"
        )
    ctx.console.print(
        f"label them: trainkit review {ws_dir} --reviewer NAME; then: "
        f"trainkit verify {scan_dir} --workspace {ws_dir}"
    )
