"""`trainkit train`: train a screener on a workspace's train subset."""

from __future__ import annotations

from pathlib import Path

import click

from trainkit.cli.options import epochs_option, seed_option, workspace_argument
from trainkit.cli.output import Ctx, ProgressHandle, progress_bar, user_errors, warn
from trainkit.cli.tables import epoch_line

__all__ = ["train"]


@click.command(
    epilog="Examples: trainkit train ws --out experiments/first --config default --epochs 10\n\n"
    "trainkit train ws --from experiments/first --out experiments/first-deck7 (after "
    "trainkit sample and review of a job)"
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
    default=None,
    help="Recipe name (default, demo, presence, frozen, scratch) or a YAML file  [default: default].",
)
@click.option(
    "--from",
    "source",
    default=None,
    type=click.Path(file_okay=False, exists=True, path_type=Path),
    help="Adapt this trained experiment to the workspace's job cells (its recipe, a few epochs).",
)
@click.option(
    "--job",
    "jobs",
    multiple=True,
    help="With --from: the job whose answered cells to learn from (repeatable; default: all).",
)
@click.option("--backbone", default=None, help="Override the recipe's backbone.")
@click.option(
    "--weights",
    default=None,
    help="imagenet (efficientnet_lite0: its packaged file; torchvision backbones: torch's hub "
    "cache; no network), torchvision (downloads a missing file), or a .pth state dict.",
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
    config: str | None,
    source: Path | None,
    jobs: tuple[str, ...],
    restart: bool,
    **overrides: int | str | None,
) -> None:
    """Train a screener on the workspace's train subset, selecting on val.

    With --from, adapt a trained experiment instead: start from its weights and recipe and
    learn from the answered cells of the workspace's jobs too (split by frame into training
    and validation; the frames are recorded so `trainkit sample` and `verify` keep them out
    of the next check). Resumes from EXP/resume.pt after an interruption unless --restart is given.
    """
    from trainkit.learning.config import load_train_config
    from trainkit.store.workspace import Workspace

    with user_errors(ctx):
        adaptation = None
        if source is None:
            if jobs:
                raise click.UsageError("--job needs --from EXP (the experiment to adapt)")
            cfg = load_train_config(config or "default", overrides)
            ws = Workspace.open(ws_dir)
        else:
            from trainkit.learning.adapt import adapt_recipe, plan_adaptation

            if config is not None:
                raise click.UsageError("--config and --from exclude each other: --from uses "
                                       "the source experiment's recipe")  # fmt: skip
            if Path(exp_dir).resolve() == Path(source).resolve():
                raise click.UsageError("--out must differ from --from (the source is kept)")
            cfg = adapt_recipe(source, overrides)
            ws = Workspace.open(ws_dir)
            adaptation = plan_adaptation(ws, source, list(jobs) or None, seed=cfg.seed)
            ctx.console.print(_adaptation_line(adaptation))
        if cfg.patch_px and ws.tile_px != cfg.patch_px:
            warn(_patch_size_note(ws.tile_px, cfg.patch_px))
        with progress_bar(ctx, "training") as bar:
            res = _train_with_progress(
                bar, ws, exp_dir, cfg, resume=not restart, adaptation=adaptation
            )
        bv = res["best_val"]
        ctx.console.print(
            f"best epoch {res['best_epoch']} (selected on {cfg.select_on}: val crack recall at "
            f"{cfg.false_alarm_budget:.0%} false alarms {bv['val_recall_at_fa']:.3f}, macro recall "
            f"{bv['val_balanced_accuracy']:.3f}); {res['median_images_per_second']:.0f} images/s; "
            f"checkpoint in {exp_dir}"
        )
        if adaptation is not None:
            from trainkit.core.experiment import Experiment

            ctx.console.print(
                f"next: trainkit evaluate {exp_dir}; trainkit export {exp_dir}; scan the job "
                f"again with {Experiment(exp_dir).model_path}; then trainkit sample + review + verify that "
                "scan (frames learned from are left out)"
            )
        if res.get("cascade_seconds") is not None:
            ctx.console.print(
                f"cascade first stage ({cfg.cascade.backbone} at {cfg.cascade.input_px} px) "
                f"distilled in {res['cascade_seconds']:.0f} s; `trainkit evaluate` chooses its "
                "pass threshold and checks it"
            )


def _patch_size_note(tile_px: int, patch_px: int) -> str:
    """Why a workspace whose patches differ from the recipe's size deserves a second look."""
    return (
        f"the workspace's patches are {tile_px} px but the recipe is made for {patch_px} px; "
        f"the network runs at the patch size, so each patch costs about "
        f"({tile_px}/{patch_px})^2 = {(tile_px / patch_px) ** 2:.1f}x the recipe's compute "
        f"(to train at {patch_px} px, tile into a new workspace with --tile-px {patch_px})"
    )


def _adaptation_line(a) -> str:
    """What an adaptation learns from, in one line."""
    frames = {k: sum(f["subset"] == k for f in a.frames) for k in ("train", "val")}
    left = ", ".join(f"{n} {k}" for k, n in a.left_out.items() if n)
    return (
        f"adapting {a.source}: {len(a.cells['train'])} job cells from {frames['train']} frames "
        f"train, {len(a.cells['val'])} from {frames['val']} other frames validate"
        + (f" ({left} cells left out)" if left else "")
        + "; these frames will be kept out of later job checks"
    )


def _train_with_progress(
    bar: ProgressHandle, ws, exp_dir: Path, cfg, *, resume: bool, adaptation=None
) -> dict:
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
        adaptation=adaptation,
    )
