"""`trainkit sample`: draw a job's acceptance sample from a finished scan into a workspace."""

from __future__ import annotations

import json
from pathlib import Path

import click

from trainkit.cli.options import json_option, scan_argument, seed_option, workspace_option
from trainkit.cli.output import Ctx, user_errors

__all__ = ["sample"]


@click.command(
    epilog="Example: trainkit sample scan-results --workspace ws --cells 300 --seed 1 --job "
    "deck-7\n\n"
    "Then label the cells (trainkit review ws --reviewer NAME, they come first) or fill "
    "the label column of SCAN/jobs/JOB/sample.csv and load it (trainkit review ws --reviewer "
    "NAME --import-csv SCAN/jobs/JOB/sample.csv), and run trainkit verify SCAN --workspace ws "
    "--job JOB. Need a narrower interval? trainkit sample SCAN --workspace ws --job JOB "
    "--more 200 --seed 2 adds cells to the same sample."
)
@scan_argument
@workspace_option("The workspace that receives the cells (the one the model was trained from).")
@click.option(
    "--cells",
    type=click.IntRange(1, 1_000_000),
    default=None,
    help="How many cells to draw for a new job.  [default: 300]",
)
@click.option(
    "--more",
    type=click.IntRange(1, 1_000_000),
    default=None,
    help="Add this many cells to the job's sample (drawn from the cells not drawn yet, in "
    "the same strata), instead of starting a new one.",
)
@seed_option("Seed of the draw (same scan, cells and seed: same sample).", default=None)
@click.option(
    "--job",
    default=None,
    help="The job's name: letters, digits, '-', '_', '.', up to 64 (default: the scan "
    "folder's name).",
)
@click.option(
    "--discard-typed-answers",
    is_flag=True,
    help="Write the job's sample.csv even where the existing one holds answers typed into "
    "it that the new one would not keep.",
)
@json_option("Print the summary as JSON to stdout.")
@click.pass_obj
def sample(
    ctx: Ctx, scan_dir: Path, ws_dir: Path, cells, more, seed, job, discard_typed_answers,
    as_json: bool,
) -> None:  # fmt: skip
    """Draw N cells of a finished scan at random within strata of the screening probability.

    The cells become unlabelled patches of the workspace (they never join a split and come
    first in `trainkit review`) and are listed in SCAN/jobs/JOB/sample.csv with their frame,
    box, stratum and inclusion probability. --more N adds cells to an existing job's sample;
    verify then counts them all.
    """
    from trainkit.jobs.sample import sample_scan
    from trainkit.store.workspace import Workspace

    with user_errors(ctx):
        if seed is None:
            raise click.UsageError("--seed is required: write it down, it makes the sample")
        if cells is not None and more is not None:
            raise click.UsageError(
                "--cells starts a new sample and --more adds to one; give one of them"
            )
        res = sample_scan(
            scan_dir, Workspace.open(ws_dir), cells=300 if cells is None and more is None
            else cells, more=more, seed=seed, job=job, discard_typed_answers=discard_typed_answers,
        )  # fmt: skip
    if as_json:
        click.echo(json.dumps(res, indent=2))
        return
    strata = ", ".join(f"{s['stratum']} {s['sampled']} of {s['cells']}" for s in res["strata"])
    what = "more cells drawn" if res["added"] else "cells drawn"
    ctx.console.print(
        f"job {res['job']}: {res['cells']} {what} from {res['frames_sampled']} of "
        f"{res['frames_in_scan']} frames; the sample now holds {res['cells_in_job']} cells "
        f"({strata}) -> {res['sample_csv']}",
        highlight=False,
    )
    if res["frames_learned_from_left_out"]:
        ctx.console.print(
            f"{res['frames_learned_from_left_out']} of the scan's {res['frames_in_scan']} "
            "frames were left out: the scan's model learned from them (trainkit train --from), "
            "so they cannot check it",
            highlight=False,
        )
    if res["sample_csv_note"]:
        ctx.console.print(res["sample_csv_note"], highlight=False)
    ctx.console.print(
        f"label them: trainkit review {ws_dir} --reviewer NAME; then: "
        f"trainkit verify {scan_dir} --workspace {ws_dir} --job {res['job']}",
        highlight=False,
    )
