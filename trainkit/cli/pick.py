"""`trainkit pick`: choose which patches of a workspace to label next, and cache their crops."""

from __future__ import annotations

import json
from pathlib import Path

import click
from rich.table import Table

from trainkit.cli.options import json_option, seed_option, workspace_argument
from trainkit.cli.output import Ctx, progress_bar, user_errors

__all__ = ["pick"]

#: Groups listed in the printed table (``--json`` lists them all).
SHOWN_GROUPS = 25


@click.command(
    epilog="Examples: trainkit pick ws --patches 2000 --seed 1 | trainkit pick ws --patches "
    "500 --seed 2 --model experiments/first\n\n"
    "Then label them: trainkit review ws --reviewer NAME (picked patches come first) or "
    "trainkit review ws --queue picked --reviewer NAME."
)
@workspace_argument()
@click.option(
    "--patches",
    "n",
    type=click.IntRange(1, 10_000_000),
    required=True,
    help="How many patches to pick.",
)
@seed_option("Seed of the draw (same workspace and seed: same pick); recorded with the pick.")
@click.option(
    "--model",
    type=click.Path(exists=True, path_type=Path),
    default=None,
    help="A trained experiment folder (or a model.onnx): in groups the split puts in train, "
    "pick what it is least sure of (smallest margin), kept diverse by k-center on its "
    "features. Groups in val, test or no split get spread picks only, so estimates made on "
    "them stay unbiased.",
)
@click.option(
    "--pool",
    type=click.IntRange(1, 100),
    default=5,
    show_default=True,
    help="With --model: spread candidates scored per patch to pick (more: more choice, slower).",
)
@json_option("Print the summary as JSON to stdout.")
@click.pass_obj
def pick(
    ctx: Ctx, ws_dir: Path, n: int, seed: int, model: Path | None, pool: int, as_json: bool
) -> None:
    """Pick N patches to label, spread over structures, photos, scales and quality.

    \b
    Equal quotas per photo group (structure); within a group, per scale (an octave of
    the patch width in mm), per photo, per quality (flagged or clean); then at random by
    --seed. Patches already labelled, picked, left out of review or of a job are never
    picked; each pick is recorded and adds to the earlier ones. With --model, picks in
    the split's train groups favour the patches the model is least sure of (margin,
    Scheffer et al. 2001) and stay diverse (greedy k-center, Gonzalez 1985); patches
    chosen because a model finds them hard would bias validation and test figures, so
    groups in val, test or no split get spread picks only. The picked patches' crops are
    cut from the photos and cached at once.
    """
    from trainkit.labels.picking import pick_patches
    from trainkit.store.workspace import Workspace

    with user_errors(ctx):
        ws = Workspace.open(ws_dir)
        scorer = None
        if model is not None:
            from trainkit.learning.features import model_scorer

            scorer = model_scorer(model)
        try:
            with progress_bar(Ctx(ctx.quiet or as_json, ctx.debug), "picking") as bar:
                res = pick_patches(
                    ws, n, seed=seed, scorer=scorer, pool=pool,
                    progress=lambda stage, d, t: bar.update(d, t, description=stage),
                )  # fmt: skip
        finally:
            if scorer is not None:
                scorer.close()
    if as_json:
        click.echo(json.dumps(res, indent=2))
        return
    _print(ctx, ws_dir, res)


def _print(ctx: Ctx, ws_dir: Path, res: dict) -> None:
    console = ctx.console
    reasons = ", ".join(f"{r} {k}" for r, k in res["by_reason"].items() if k)
    console.print(
        f"pick {res['pick']} of {ws_dir}: {res['picked']} patches ({reasons}), seed "
        f"{res['seed']}, from {res['candidates']} that could be picked",
        highlight=False,
        soft_wrap=True,
    )
    if res["model"]:
        guided = sum(g["guided"] for g in res["groups"].values())
        console.print(
            f"model {res['model']} ({res['features']} features): guided picks in {guided} "
            f"train groups from a spread pool of {res['pool_size']} candidates",
            highlight=False,
            soft_wrap=True,
        )
    t = Table(title="Picked per group")
    for col in ("group", "picked", "could be picked", "rule"):
        t.add_column(col, justify="left" if col in ("group", "rule") else "right")
    groups = sorted(res["groups"].items())
    for g, row in groups[:SHOWN_GROUPS]:
        rule = "model-guided" if row["guided"] else "spread"
        t.add_row(g, str(row["picked"]), str(row["candidates"]), rule)
    console.print(t)
    if len(groups) > SHOWN_GROUPS:
        console.print(
            f"... and {len(groups) - SHOWN_GROUPS} more groups (--json lists them all)",
            soft_wrap=True,
        )
    crops = res["crops"]
    if crops["store"]:
        console.print(
            f"crops: {crops['cached']} cut from their photos and cached in {crops['store']}; "
            f"{res['picked'] - crops['cached']} were stored already",
            highlight=False,
            soft_wrap=True,
        )
    if res["note"]:
        console.print(res["note"], highlight=False, soft_wrap=True)
    console.print(
        f"label them: trainkit review {ws_dir} --reviewer NAME (picked patches come first; "
        "--queue picked shows only them)",
        highlight=False,
        soft_wrap=True,
    )
