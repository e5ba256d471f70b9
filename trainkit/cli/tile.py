"""`trainkit tile`: cut photos into patches in a workspace."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import click

from trainkit.cli.options import (
    FiniteFloatRange,
    classes_option,
    engine_option,
    gather,
    scale_options,
    scheduler_option,
    tile_px_option,
    workers_option,
)
from trainkit.cli.output import EXIT_SKIPPED, EXIT_USAGE, Ctx, fail, progress_bar, user_errors, warn
from trainkit.intake.scale import ScaleOptions
from trainkit.learning.config import recipe_patch_px

__all__ = ["tile", "TileSettings"]


@dataclass(frozen=True)
class TileSettings:
    """How photos are cut and queued (the tiling options of `trainkit tile`)."""

    tile_px: int
    tile_mm: float | None
    overlap: float
    group_by: str
    group_pattern: str | None
    skip_flagged: bool
    crop_format: str | None
    workers: int | None
    engine: str
    scheduler: str | None
    max_megapixels: float


@click.command(
    epilog="Example: trainkit tile photos/ --workspace ws --sidecar photos/scale.csv "
    "--group-by photo | trainkit tile photos/ -w ws --import-masks masks/"
)
@click.argument("photos", nargs=-1, required=True, type=click.Path(exists=True, path_type=Path))
@click.option(
    "--workspace",
    "-w",
    "ws_dir",
    required=True,
    type=click.Path(file_okay=False, path_type=Path),
    help="Workspace folder (created if missing).",
)
@tile_px_option(
    "Patch size in pixels; the network runs at this size (default: the default recipe's patch_px).",
    default=recipe_patch_px("default"),
)
@click.option(
    "--tile-mm",
    type=FiniteFloatRange(min=0, min_open=True),
    default=None,
    help="Cut patches covering this many mm of surface (needs scale), resampled to --tile-px.",
)
@click.option(
    "--overlap",
    type=FiniteFloatRange(0, 0.9),
    default=0.0,
    show_default=True,
    help="Overlap between neighbouring patches as a fraction.",
)
@click.option(
    "--sidecar",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="CSV: photo plus any of gsd_mm; distance_m,focal_mm,sensor_width_mm; structure; date; roi.",
)
@scale_options
@click.option(
    "--group-by",
    type=click.Choice(["sidecar", "photo"]),
    default="sidecar",
    show_default=True,
    help="Split groups: the sidecar's structure column or --group-pattern (photo when absent), "
    "or each photo.",
)
@click.option(
    "--group-pattern",
    default=None,
    metavar="REGEX",
    help="Regex on the photo's relative path with named groups 'group' and 'date', e.g. "
    "'^(?P<group>[^/]+)/(?P<date>[0-9-]{10})/'.",
)
@click.option(
    "--skip-flagged", is_flag=True, help="Leave patches with quality flags out of the review queue."
)
@click.option(  # deprecated: tiling writes no crops; accepted so that scripts keep working
    "--crop-format", type=click.Choice(["tiff", "png"]), default=None, hidden=True
)
@classes_option("Class set of a new workspace: orientation, presence or a YAML file.")
@click.option(
    "--import-labels",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="CSV photo,x0,y0,x1,y1,label of existing labels to load (a class name or 'unsure'; "
    "rows with an empty label are skipped and counted; loading the same file again adds nothing).",
)
@click.option(
    "--import-masks",
    type=click.Path(exists=True, file_okay=False, path_type=Path),
    help="Folder of crack masks, one per photo named as the photo (any lossless suffix: PNG, "
    "TIFF...), single channel, non-zero = crack, at the photo's size: each patch labelled by "
    "the patch label rule (origin drawing), with crack length and width.",
)
@click.option(
    "--import-centrelines",
    type=click.Path(exists=True, path_type=Path),
    help="Traced crack centrelines in the photos' pixels: a CSV photo,crack_id,x,y[,width_px], "
    "an SVG file named as its photo, or a folder of them; labelled like --import-masks.",
)
@workers_option("Parallel processes (default: all cores).")
@engine_option("Decode here, or on a Dask distributed cluster.")
@scheduler_option()
@click.option(
    "--max-megapixels",
    type=FiniteFloatRange(min=1),
    default=250.0,
    show_default=True,
    help="Refuse larger images (decompression-bomb guard); raise it for trusted huge files.",
)
@click.pass_obj
@gather(TileSettings, "settings")
def tile(
    ctx: Ctx,
    photos: tuple[Path, ...],
    ws_dir: Path,
    sidecar: Path | None,
    classes: str,
    import_labels: Path | None,
    import_masks: Path | None,
    import_centrelines: Path | None,
    scale: ScaleOptions,
    settings: TileSettings,
) -> None:
    """Cut photos into patches in a workspace, with scale, quality flags and provenance.

    A patch is a row (photo, box, scale, quality); no pixels are copied: they are cut
    from the photo when a patch is reviewed or learned from, so keep the photos where
    they are. Scale per photo, first found wins: sidecar gsd_mm; sidecar camera geometry;
    --gsd-mm; --distance-m with --focal-mm and --sensor-width-mm; EXIF focal length
    with a distance. Re-running on the same photos adds only what is new; a stopped
    run continues from its last stored photo. --import-masks and --import-centrelines turn
    a firm's crack drawings into patch labels (the rule the kit's generator labels its
    own photos by), storing each patch's crack length and width; all or nothing.
    """
    from trainkit.core.decode import find_images, skipped_files_line
    from trainkit.core.taxonomy import load_class_set
    from trainkit.intake.sidecar import read_sidecar
    from trainkit.intake.tiling import check_engine, tile_into_workspace
    from trainkit.labels.labels_io import import_csv
    from trainkit.store.workspace import Workspace

    with user_errors(ctx):
        check_engine(settings.engine, settings.scheduler)  # before anything is written
        others: list[Path] = []
        found = find_images(list(photos), skipped=others)
        if not found:
            fail(f"no image files found in {', '.join(map(str, photos))}")
        if others:
            warn(skipped_files_line(others))
        side = read_sidecar(sidecar) if sidecar else {}
        if settings.crop_format is not None:
            warn(
                "--crop-format is ignored: tiling no longer writes crops (patches are cut "
                "from the photos when needed)"
            )
        ws = Workspace.create(ws_dir, class_set=load_class_set(classes), tile_px=settings.tile_px)
        with progress_bar(ctx, "tiling photos", len(found)) as bar:
            res = tile_into_workspace(
                [p for p, _ in found],
                ws,
                overlap=settings.overlap,
                tile_mm=settings.tile_mm,
                sidecar=side,
                scale=scale,
                group_by=settings.group_by,
                group_pattern=settings.group_pattern,
                skip_flagged=settings.skip_flagged,
                workers=settings.workers,
                engine=settings.engine,
                scheduler=settings.scheduler,
                max_pixels=int(settings.max_megapixels * 1e6),
                roots={p: r for p, r in found if r is not None},
                progress=lambda i, n, name: bar.update(i, n),
            )
        for p in [*res["problems"], *res["notes"]]:
            warn(p)
        ctx.console.print(_summary(res, settings.skip_flagged, ws.root))
        if import_labels:
            ctx.console.print(import_csv(ws, import_labels).describe(import_labels))
        for source, kind in ((import_masks, "masks"), (import_centrelines, "centrelines")):
            if source is not None:
                _import_drawings(ctx, ws, source, kind, settings.workers)
    if res["photos_skipped"] and not (
        res["photos_added"] or res["photos_already_present"] or res["photos_moved"]
    ):
        raise SystemExit(EXIT_USAGE)  # nothing could be tiled
    if res["photos_skipped"]:
        raise SystemExit(EXIT_SKIPPED)


def _import_drawings(ctx: Ctx, ws, source: Path, kind: str, workers: int | None) -> None:
    """Import crack drawings into the tiled workspace and say what was and was not."""
    from trainkit.labels.drawings import import_centrelines, import_masks

    run = import_masks if kind == "masks" else import_centrelines
    with progress_bar(ctx, f"importing {kind}") as bar:
        res = run(ws, source, workers=workers, progress=lambda d, n: bar.update(d, n))
    for note in res.notes:
        warn(note)
    ctx.console.print(res.describe(source), soft_wrap=True)


def _summary(res: dict, skip_flagged: bool, root: Path) -> str:
    return (
        f"{res['photos_added']} photos added, {res['photos_already_present']} already present, "
        f"{res['photos_moved']} moved, {res['photos_skipped']} skipped; "
        f"{res['patches_added']} patches, {res['patches_flagged']} with quality flags"
        + (f" ({res['patches_left_out_of_review']} left out of review)" if skip_flagged else "")
        + f" -> {root}"
    )
