"""`trainkit evaluate`: evaluate a trained screener and optionally gate on recall."""

from __future__ import annotations

import json
from pathlib import Path

import click

from trainkit.cli.options import FiniteFloatRange, experiment_argument, json_option
from trainkit.cli.output import EXIT_GATE, Ctx, user_errors
from trainkit.cli.tables import print_evaluation
from trainkit.core.experiment import Experiment

__all__ = ["evaluate"]


@click.command(epilog="Example: trainkit evaluate experiments/first --require-recall 0.9")
@experiment_argument
@click.option(
    "--split", "subset", type=click.Choice(["test", "val"]), default="test", show_default=True
)
@click.option(
    "--target-recall",
    type=FiniteFloatRange(0, 1, min_open=True, max_open=True),
    default=0.95,
    show_default=True,
    help="Screening recall the threshold must keep on photos like the validation photos.",
)
@click.option(
    "--threshold-confidence",
    type=FiniteFloatRange(0.5, 1, max_open=True),
    default=0.9,
    show_default=True,
    help="Confidence with which the threshold keeps --target-recall, given the number of "
    "validation cracks (too few: said in the report, no promise).",
)
@click.option(
    "--max-false-alarms",
    type=FiniteFloatRange(0, 1, max_open=True),
    default=None,
    help="Instead of --target-recall: the lowest threshold whose validation false-alarm rate "
    "is at most this.",
)
@click.option(
    "--require-recall",
    type=FiniteFloatRange(0, 1),
    default=None,
    help="Gate: exit 3 unless the lower confidence bound of screening recall is at least this.",
)
@click.option(
    "--confidence", type=FiniteFloatRange(0.5, 1, max_open=True), default=0.95, show_default=True
)
@click.option(
    "--interval",
    "interval_method",
    type=click.Choice(["wilson", "clopper-pearson"]),
    default="wilson",
    show_default=True,
    help="Confidence interval method for recall.",
)
@click.option(
    "--workspace",
    type=click.Path(exists=True, file_okay=False, path_type=Path),
    default=None,
    help="Workspace folder if it moved since training.",
)
@click.option(
    "--against",
    type=click.Path(exists=True, file_okay=False, path_type=Path),
    default=None,
    help="Second experiment to compare with on the same patches (McNemar's test).",
)
@click.option(
    "--temperature-scaling",
    is_flag=True,
    help="Fit one temperature on validation; report calibration before and after (report only).",
)
@json_option("Print metrics.json to stdout.")
@click.pass_obj
def evaluate(ctx: Ctx, exp_dir: Path, subset: str, as_json: bool, **settings) -> None:
    """Evaluate a trained screener: confusion matrix, per-class recall with intervals, threshold, report.

    Writes EXP/evaluation/: predictions.csv, metrics.json, report.html and plots
    (with --against also disagreements.csv). With --require-recall the exit code is
    3 unless the lower confidence bound of screening recall reaches the value.
    """
    from trainkit.judging.evaluation import evaluate_experiment

    with user_errors(ctx):
        res = evaluate_experiment(exp_dir, split=subset, **settings)
    if as_json:
        click.echo(json.dumps(res, indent=2))
    else:
        print_evaluation(ctx.console, res, Experiment(exp_dir).evaluation_dir)
    if res["gate"] and not res["gate"]["passed"]:
        raise SystemExit(EXIT_GATE)
