"""`trainkit split`: split labelled patches into train/val/test and report near-duplicates."""

from __future__ import annotations

from pathlib import Path

import click

from trainkit.cli.options import seed_option, workspace_argument
from trainkit.cli.output import Ctx, progress_bar, user_errors
from trainkit.cli.tables import print_split

__all__ = ["split"]


@click.command(epilog="Example: trainkit split ws --test 0.2 --val 0.15 --seed 1")
@workspace_argument()
@click.option(
    "--test",
    "test_fraction",
    type=float,
    default=0.2,
    show_default=True,
    help="Share held out for testing.",
)
@click.option(
    "--val",
    "val_fraction",
    type=float,
    default=0.15,
    show_default=True,
    help="Share held out for validation.",
)
@seed_option("Random seed of the split.")
@click.option(
    "--near-duplicate-bits",
    type=click.IntRange(0, 64),
    default=6,
    show_default=True,
    help="Crops whose 64-bit perceptual hashes differ in at most this many bits are "
    "near-duplicates.",
)
@click.option(
    "--drop-near-duplicates",
    is_flag=True,
    help="Take the val/test member of each near-duplicate pair across subsets out of the split.",
)
@click.pass_obj
def split(
    ctx: Ctx,
    ws_dir: Path,
    test_fraction: float,
    val_fraction: float,
    seed: int,
    near_duplicate_bits: int,
    drop_near_duplicates: bool,
) -> None:
    """Split labelled patches into train/val/test by photo or structure, stratified by class.

    Then report patches in different subsets whose crops look alike (the same surface in
    two photos); --drop-near-duplicates leaves their val/test member out.
    """
    from trainkit.labels.splits import find_near_duplicates, near_duplicate_lines, split_workspace
    from trainkit.store.workspace import Workspace

    with user_errors(ctx):
        ws = Workspace.open(ws_dir)
        split_workspace(ws, test_fraction=test_fraction, val_fraction=val_fraction, seed=seed)
        with progress_bar(ctx, "near-duplicate check") as bar:
            near = find_near_duplicates(
                ws,
                max_distance=near_duplicate_bits,
                drop=drop_near_duplicates,
                progress=lambda done, total: bar.update(done, total),
            )
        console = ctx.console
        print_split(console, ws.split_info())  # counts after any drop
        for line in near_duplicate_lines(near):
            console.print(line, markup=False, soft_wrap=True)
