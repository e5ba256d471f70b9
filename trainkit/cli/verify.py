"""`trainkit verify`: a job's recall and false-alarm rate from its answered sample, with a verdict."""

from __future__ import annotations

import json
from pathlib import Path

import click

from trainkit.cli.codes import EXIT_GATE
from trainkit.cli.options import FiniteFloatRange, json_option, scan_argument, workspace_option
from trainkit.cli.output import Ctx, user_errors

__all__ = ["verify"]


@click.command(epilog="Example: trainkit verify scan-results --workspace ws --require-recall 0.9")
@scan_argument
@workspace_option("The workspace holding the job's sample and its answers.")
@click.option(
    "--job", default=None, help="The job's name (default: the latest job sampled from SCAN)."
)
@click.option(
    "--require-recall",
    type=FiniteFloatRange(0.0, 1.0),
    default=None,
    help="Refuse (exit 3) unless the 95% lower bound of the job's recall is at least this.",
)
@click.option(
    "--target-recall",
    type=FiniteFloatRange(0.0, 1.0, min_open=True),
    default=0.95,
    show_default=True,
    help="Recall the suggested job threshold should reach.",
)
@json_option("Print the job's verification.json to stdout.")
@click.pass_obj
def verify(ctx: Ctx, scan_dir: Path, ws_dir: Path, job, require_recall, target_recall, as_json):
    """Estimate this job's crack recall, false-alarm rate and flagged share at the model's
    threshold, with 95% intervals for stratified sampling, from the answered sample.

    Writes SCAN/jobs/JOB/verification.json and verification.html and keeps every check of
    the job (a refusal stays on record beside a later acceptance). Unsure and unanswered
    cells are reported and listed, not counted. Exits 3 when --require-recall is not met.
    """
    from trainkit.jobs.verify import verdict_line, verify_scan
    from trainkit.store.workspace import Workspace

    with user_errors(ctx):
        res = verify_scan(
            scan_dir, Workspace.open(ws_dir), job=job, require_recall=require_recall,
            target_recall=target_recall,
        )  # fmt: skip
    if as_json:
        click.echo(json.dumps(res, indent=2))
    else:
        ctx.console.print(verdict_line(res), highlight=False)
        sug = res.get("suggested_threshold")
        if not sug:
            ctx.console.print(f"report: {res['report']}", highlight=False)
        else:
            ctx.console.print(
                f"threshold for recall {sug['target_recall']:g} on this job: "
                f"{sug['threshold']:.3f} (flags {sug['flagged_share']:.1%} of cells); "
                f"report: {res['report']}",
                highlight=False,
            )
        ctx.console.print(res["caution"], style="dim")
    if res["gate"] and not res["gate"]["passed"]:
        raise SystemExit(EXIT_GATE)
