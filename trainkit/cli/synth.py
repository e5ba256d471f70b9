"""`trainkit synth`: generate synthetic concrete photos with exact ground truth."""

from __future__ import annotations

from pathlib import Path

import click

from trainkit.cli.options import classes_option, parse_size, seed_option, tile_px_option
from trainkit.cli.output import Ctx, progress_bar, user_errors
from trainkit.learning.config import recipe_patch_px

__all__ = ["synth"]


@click.command(epilog="Example: trainkit synth my-synthetic --photos 12 --seed 7")
@click.argument("out", type=click.Path(file_okay=False, path_type=Path))
@click.option(
    "--photos",
    "n_photos",
    type=click.IntRange(1, 100000),
    default=32,
    show_default=True,
    help="Number of photos to generate.",
)
@seed_option("Random seed; same seed, same files.", default=2026)
@click.option(
    "--size", default="768x512", show_default=True, help="Photo size WIDTHxHEIGHT in pixels."
)
@tile_px_option(
    "Patch size of the labels.csv grid, pixels (default: the default recipe's patch_px).",
    default=recipe_patch_px("default"),
)
@classes_option("Class set for the labels: orientation, presence or a YAML file.")
@click.pass_obj
def synth(
    ctx: Ctx, out: Path, n_photos: int, seed: int, size: str, tile_px: int, classes: str
) -> None:
    """Generate synthetic concrete photos with exact crack ground truth and patch labels.

    Writes OUT/photos/*.jpg, OUT/truth/*.json (crack polylines and widths),
    OUT/labels.csv (one row per patch of a TILE_PX grid), OUT/scale.csv and
    OUT/manifest.json. Everything is invented: no real photo is involved.
    """
    from trainkit.core.taxonomy import load_class_set
    from trainkit.synth import SynthOptions, write_dataset

    with user_errors(ctx):
        w, h = parse_size(size, "--size", "768x512")
        cs = load_class_set(classes)
        with progress_bar(ctx, "generating photos", n_photos) as bar:
            manifest = write_dataset(
                out,
                n_photos=n_photos,
                seed=seed,
                tile_px=tile_px,
                options=SynthOptions(height=h, width=w),
                class_set=cs,
                progress=lambda i, n: bar.update(i, n),
            )
        ctx.console.print(
            f"wrote {n_photos} photos to {out}; label counts: {manifest.get('counts', {})}"
        )
