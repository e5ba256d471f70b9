"""`trainkit train`: train a screener on a workspace's train subset."""

from __future__ import annotations

from pathlib import Path

import click

from trainkit.cli.options import epochs_option, seed_option, workspace_argument
from trainkit.cli.output import Ctx, ProgressHandle, progress_bar, user_errors
from trainkit.cli.tables import epoch_line

__all__ = ["train"]


@click.command(
    epilog="Example: trainkit train ws --out experiments/first --config default --epochs 10"
)
@workspace_argument()
@click.option(
    "--out",
    "exp_dir",
    required=True,
    type=click.Path(file_okay=False, path_type=Path),
    help="Experiment folder to write.",
)
@click.option(
    "--config",
    "config",
    default="default",
    show_default=True,
    help="Recipe name (default, demo, presence, frozen) or a YAML file.",
)
@click.option("--backbone", default=None, help="Override the recipe's backbone.")
@click.option(
    "--weights",
    default=None,
    help="imagenet (torch hub cache, no network), torchvision, or a .pth state dict.",
)
@epochs_option("Override the number of epochs.")
@click.option(
    "--batch-size", type=click.IntRange(1, 4096), default=None, help="Override the batch size."
)
@seed_option("Override the seed.", default=None)
@click.option(
    "--threads", type=click.IntRange(1, 512), default=None, help="CPU threads for PyTorch."
)
@click.option("--restart", is_flag=True, help="Ignore resume.pt and start from epoch 1.")
@click.pass_obj
def train(
    ctx: Ctx,
    ws_dir: Path,
    exp_dir: Path,
    config: str,
    restart: bool,
    **overrides: int | str | None,
) -> None:
    """Train a screener on the workspace's train subset, selecting on val.

    Resumes from EXP/resume.pt after an interruption unless --restart is given.
    """
    from trainkit.labels.workspace import Workspace
    from trainkit.learning.config import load_train_config

    with user_errors(ctx):
        cfg = load_train_config(config, overrides)
        with progress_bar(ctx, "training") as bar:
            res = _train_with_progress(
                bar, Workspace.open(ws_dir), exp_dir, cfg, resume=not restart
            )
        bv = res["best_val"]
        ctx.console.print(
            f"best epoch {res['best_epoch']} (selected on {cfg.select_on}: val crack recall at "
            f"{cfg.false_alarm_budget:.0%} false alarms {bv['val_recall_at_fa']:.3f}, macro recall "
            f"{bv['val_balanced_accuracy']:.3f}); {res['median_images_per_second']:.0f} images/s; "
            f"checkpoint in {exp_dir}"
        )
        if res.get("cascade_seconds") is not None:
            ctx.console.print(
                f"cascade first stage ({cfg.cascade.backbone} at {cfg.cascade.input_px} px) "
                f"distilled in {res['cascade_seconds']:.0f} s; `trainkit evaluate` chooses its "
                "pass threshold and checks it"
            )


def _train_with_progress(bar: ProgressHandle, ws, exp_dir: Path, cfg, *, resume: bool) -> dict:
    """Train, advancing ``bar`` per batch and logging one line per epoch; returns the result."""
    from trainkit.learning.training import train as train_fn

    def on_start(epochs: int, n: int) -> None:
        bar.update(0, epochs * n, f"training ({epochs} epochs x {n} patches)")

    return train_fn(
        ws,
        exp_dir,
        cfg,
        resume=resume,
        on_start=on_start,
        on_epoch=lambda row: bar.log(epoch_line(row, cfg.false_alarm_budget)),
        on_batch=lambda n: bar.advance(n),
        on_note=bar.log,
    )
