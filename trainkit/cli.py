"""Command-line interface: parse options, call one function per command, print results.

Exit codes (the same for every command): 0 all done; 1 done but some inputs were
skipped; 2 usage error or nothing could be done; 3 an acceptance gate failed.
"""

from __future__ import annotations

import json
import sqlite3
import sys
import traceback
from contextlib import contextmanager
from pathlib import Path

import click

__all__ = ["main", "cli"]

EXIT_OK, EXIT_SKIPPED, EXIT_USAGE, EXIT_GATE = 0, 1, 2, 3


class Ctx:
    """Options shared by all commands."""

    def __init__(self, quiet: bool, debug: bool) -> None:
        self.quiet = quiet
        self.debug = debug

    @property
    def console(self):
        from rich.console import Console

        return Console(stderr=False, quiet=self.quiet, highlight=False)


def _fail(message: str, code: int = EXIT_USAGE) -> None:
    click.echo(f"trainkit: {message}", err=True)
    raise SystemExit(code)


@contextmanager
def user_errors(ctx: Ctx):
    """Turn the kit's ValueErrors into one `trainkit:` line (a traceback only with --debug)."""
    try:
        yield
    except (ValueError, OSError) as exc:
        if ctx.debug:
            traceback.print_exc()
        _fail(str(exc))
    except sqlite3.DatabaseError as exc:
        if ctx.debug:
            traceback.print_exc()
        _fail(
            f"the workspace database could not be used ({exc}); if it is damaged, restore it "
            "from a copy (workspace.sqlite with its -wal file)"
        )
    except KeyboardInterrupt:
        _fail(
            "interrupted; finished work is saved, run the same command again to continue",
            EXIT_USAGE,
        )


@contextmanager
def progress_bar(ctx: Ctx, description: str, total: int | None = None):
    """A rich progress bar with ETA; yields advance(n=1) and set_total(total) callables."""
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    prog = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        TextColumn("eta"),
        TimeRemainingColumn(),
        disable=ctx.quiet,
        transient=False,
    )
    with prog:
        task = prog.add_task(description, total=total)

        class Handle:
            def advance(self, n: int = 1) -> None:
                prog.advance(task, n)

            def update(
                self, completed: int, total: int | None = None, description: str | None = None
            ) -> None:
                kw = {"completed": completed}
                if total is not None:
                    kw["total"] = total
                if description is not None:
                    kw["description"] = description
                prog.update(task, **kw)

            def log(self, text: str) -> None:
                if not ctx.quiet:
                    prog.console.print(text, highlight=False)

        yield Handle()


EPILOG_CAUTION = (
    "The screener is a triage aid, not an inspection; its figures hold only for photos "
    "like its test set. Defer to local codes and licensed engineers."
)


@click.group(
    context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
    epilog=EPILOG_CAUTION,
)
@click.option("-q", "--quiet", is_flag=True, help="No progress bars or chatter (for scripts).")
@click.option("--debug", is_flag=True, help="Show the full traceback on errors.")
@click.version_option(package_name="trainkit")
@click.pass_context
def cli(click_ctx: click.Context, quiet: bool, debug: bool) -> None:
    """trainkit: build, check and export a concrete-crack patch screener on CPU.

    \b
    Workflow:  synth/photos -> tile -> review -> split -> train -> evaluate -> export -> scan
    Try it:    trainkit demo --out demo-output
    """
    click_ctx.obj = Ctx(quiet, debug)


# ----- synth ---------------------------------------------------------------------------


@cli.command(epilog="Example: trainkit synth my-synthetic --photos 12 --seed 7")
@click.argument("out", type=click.Path(file_okay=False, path_type=Path))
@click.option(
    "--photos",
    "n_photos",
    type=click.IntRange(1, 100000),
    default=32,
    show_default=True,
    help="Number of photos to generate.",
)
@click.option(
    "--seed", type=int, default=2026, show_default=True, help="Random seed; same seed, same files."
)
@click.option(
    "--size", default="768x512", show_default=True, help="Photo size WIDTHxHEIGHT in pixels."
)
@click.option(
    "--tile-px",
    type=click.IntRange(16, 2048),
    default=128,
    show_default=True,
    help="Patch size of the labels.csv grid, pixels.",
)
@click.option(
    "--classes",
    default="orientation",
    show_default=True,
    help="Class set for the labels: orientation, presence or a YAML file.",
)
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
        try:
            w, h = (int(v) for v in size.lower().split("x"))
        except ValueError:
            _fail(f"--size must look like 768x512, got {size!r}")
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


# ----- tile ----------------------------------------------------------------------------


@cli.command(
    epilog="Example: trainkit tile photos/ --workspace ws --tile-px 224 --sidecar photos/scale.csv"
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
@click.option(
    "--tile-px",
    type=click.IntRange(16, 2048),
    default=224,
    show_default=True,
    help="Patch size in pixels (the model's input size).",
)
@click.option(
    "--tile-mm",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Cut patches covering this many mm of surface (needs scale), resampled to --tile-px.",
)
@click.option(
    "--overlap",
    type=click.FloatRange(0, 0.9),
    default=0.0,
    show_default=True,
    help="Overlap between neighbouring patches as a fraction.",
)
@click.option(
    "--sidecar",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="CSV: photo plus any of gsd_mm; distance_m,focal_mm,sensor_width_mm; structure; date; roi.",
)
@click.option(
    "--gsd-mm",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Scale in mm per pixel for photos the sidecar does not cover.",
)
@click.option(
    "--distance-m",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Camera-to-surface distance in m (with EXIF focal length, or --focal-mm and --sensor-width-mm).",
)
@click.option(
    "--focal-mm",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Lens focal length, mm.",
)
@click.option(
    "--sensor-width-mm",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Sensor width, mm (without it, EXIF's 35 mm-equivalent focal length and 36 mm are used).",
)
@click.option(
    "--group-by",
    type=click.Choice(["sidecar", "photo"]),
    default="sidecar",
    show_default=True,
    help="Split groups: the sidecar's structure column or --group-pattern (photo when absent), or each photo.",
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
@click.option(
    "--crop-format",
    type=click.Choice(["tiff", "png"]),
    default="tiff",
    show_default=True,
    help="Lossless crop files: uncompressed TIFF (fast) or PNG (smaller, slower to write).",
)
@click.option(
    "--classes",
    default="orientation",
    show_default=True,
    help="Class set of a new workspace: orientation, presence or a YAML file.",
)
@click.option(
    "--import-labels",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="CSV photo,x0,y0,x1,y1,label of existing labels to load (empty label = unsure).",
)
@click.option(
    "--workers",
    type=click.IntRange(1, 256),
    default=None,
    help="Parallel processes (default: all cores).",
)
@click.option(
    "--max-megapixels",
    type=click.FloatRange(min=1),
    default=250.0,
    show_default=True,
    help="Refuse larger images (decompression-bomb guard); raise it for trusted huge files.",
)
@click.pass_obj
def tile(
    ctx: Ctx,
    photos,
    ws_dir,
    tile_px,
    tile_mm,
    overlap,
    sidecar,
    gsd_mm,
    distance_m,
    focal_mm,
    sensor_width_mm,
    group_by,
    group_pattern,
    skip_flagged,
    crop_format,
    classes,
    import_labels,
    workers,
    max_megapixels,
) -> None:
    """Cut photos into patches in a workspace, with scale, quality flags and provenance.

    Scale per photo, first found wins: sidecar gsd_mm; sidecar camera geometry;
    --gsd-mm; --distance-m with --focal-mm and --sensor-width-mm; EXIF focal length
    with a distance. Re-running on the same photos adds only what is new.
    """
    from trainkit.core.decode import find_images
    from trainkit.core.taxonomy import load_class_set
    from trainkit.intake.scale import ScaleOptions
    from trainkit.intake.sidecar import read_sidecar
    from trainkit.intake.tiling import tile_into_workspace
    from trainkit.labels.labels_io import import_csv
    from trainkit.labels.workspace import Workspace

    with user_errors(ctx):
        found = find_images(list(photos))
        if not found:
            _fail(f"no image files found in {', '.join(map(str, photos))}")
        side = read_sidecar(sidecar) if sidecar else {}
        ws = Workspace.create(ws_dir, class_set=load_class_set(classes), tile_px=tile_px)
        with progress_bar(ctx, "tiling photos", len(found)) as bar:
            res = tile_into_workspace(
                [p for p, _ in found],
                ws,
                overlap=overlap,
                tile_mm=tile_mm,
                sidecar=side,
                scale=ScaleOptions(
                    gsd_mm=gsd_mm,
                    distance_m=distance_m,
                    focal_mm=focal_mm,
                    sensor_width_mm=sensor_width_mm,
                ),
                group_by=group_by,
                group_pattern=group_pattern,
                skip_flagged=skip_flagged,
                crop_format=crop_format,
                workers=workers,
                max_pixels=int(max_megapixels * 1e6),
                roots={p: r for p, r in found if r is not None},
                progress=lambda i, n, name: bar.update(i, n),
            )
        for p in res["problems"]:
            click.echo(f"trainkit: {p}", err=True)
        ctx.console.print(
            f"{res['photos_added']} photos added, {res['photos_already_present']} already present, "
            f"{res['photos_moved']} moved, {res['photos_skipped']} skipped; {res['patches_added']} patches, "
            f"{res['patches_flagged']} with quality flags"
            + (f" ({res['patches_left_out_of_review']} left out of review)" if skip_flagged else "")
            + f" -> {ws.root}"
        )
        if import_labels:
            n = import_csv(ws, import_labels)
            ctx.console.print(f"imported {n} labels from {import_labels}")
    if res["photos_skipped"] and not (
        res["photos_added"] or res["photos_already_present"] or res["photos_moved"]
    ):
        raise SystemExit(EXIT_USAGE)  # nothing could be tiled
    if res["photos_skipped"]:
        raise SystemExit(EXIT_SKIPPED)


# ----- split ---------------------------------------------------------------------------


@cli.command(epilog="Example: trainkit split ws --test 0.2 --val 0.15 --seed 1")
@click.argument(
    "ws_dir", metavar="WORKSPACE", type=click.Path(exists=True, file_okay=False, path_type=Path)
)
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
@click.option("--seed", type=int, default=0, show_default=True, help="Random seed of the split.")
@click.option(
    "--near-duplicate-bits",
    type=click.IntRange(0, 64),
    default=6,
    show_default=True,
    help="Crops whose 64-bit perceptual hashes differ in at most this many bits are near-duplicates.",
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
    from trainkit.labels.workspace import Workspace

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
        _print_split(ctx, ws.split_info())  # counts after any drop
        for line in near_duplicate_lines(near):
            ctx.console.print(line, markup=False, soft_wrap=True)


def _print_split(ctx: Ctx, rep: dict) -> None:
    from rich.table import Table

    t = Table(title="Split (patches per class; groups never shared)")
    t.add_column("subset")
    t.add_column("groups", justify="right")
    names = list(next(iter(rep["class_counts"].values())).keys())
    for n in names:
        t.add_column(n, justify="right")
    for s, counts in rep["class_counts"].items():
        t.add_row(s, str(rep["groups"][s]), *[str(counts[n]) for n in names])
    ctx.console.print(t)


# ----- train ---------------------------------------------------------------------------


@cli.command(epilog="Example: trainkit train ws --out runs/first --config default --epochs 10")
@click.argument(
    "ws_dir", metavar="WORKSPACE", type=click.Path(exists=True, file_okay=False, path_type=Path)
)
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
@click.option(
    "--epochs", type=click.IntRange(1, 1000), default=None, help="Override the number of epochs."
)
@click.option(
    "--batch-size", type=click.IntRange(1, 4096), default=None, help="Override the batch size."
)
@click.option("--seed", type=int, default=None, help="Override the seed.")
@click.option(
    "--threads", type=click.IntRange(1, 512), default=None, help="CPU threads for PyTorch."
)
@click.option("--restart", is_flag=True, help="Ignore resume.pt and start from epoch 1.")
@click.pass_obj
def train(
    ctx: Ctx, ws_dir, exp_dir, config, backbone, weights, epochs, batch_size, seed, threads, restart
) -> None:
    """Train a screener on the workspace's train subset, selecting on val.

    Resumes from EXP/resume.pt after an interruption unless --restart is given.
    """
    from trainkit.labels.workspace import Workspace
    from trainkit.learning.config import load_train_config

    with user_errors(ctx):
        cfg = load_train_config(
            config,
            {
                "backbone": backbone,
                "weights": weights,
                "epochs": epochs,
                "batch_size": batch_size,
                "seed": seed,
                "threads": threads,
            },
        )
        res = run_training(ctx, Workspace.open(ws_dir), exp_dir, cfg, resume=not restart)
        bv = res["best_val"]
        ctx.console.print(
            f"best epoch {res['best_epoch']} (selected on {cfg.select_on}: val crack recall at "
            f"{cfg.false_alarm_budget:.0%} false alarms {bv['val_recall_at_fa']:.3f}, macro recall "
            f"{bv['val_balanced_accuracy']:.3f}); {res['median_images_per_second']:.0f} images/s; "
            f"checkpoint in {exp_dir}"
        )


def run_training(ctx: Ctx, ws, exp_dir: Path, cfg, *, resume: bool = True) -> dict:
    """Shared by `train` and `demo`: train with a progress bar and one line per epoch."""
    from trainkit.learning.training import train as train_fn

    state = {"bar": None}
    with progress_bar(ctx, "training") as bar:

        def on_start(epochs: int, n: int) -> None:
            bar.update(0, epochs * n, f"training ({epochs} epochs x {n} patches)")

        def on_epoch(row: dict) -> None:
            bar.log(
                f"epoch {row['epoch']:3d} {row['stage']:4s}  loss {row['train_loss']:.3f}  "
                f"val acc {row['val_accuracy']:.3f}  val crack recall {row['val_crack_recall']:.3f}  "
                f"at {cfg.false_alarm_budget:.0%} false alarms {row['val_recall_at_fa']:.3f}  "
                f"{row['train_images_per_s']:.0f} img/s"
            )

        state["bar"] = bar
        return train_fn(
            ws,
            exp_dir,
            cfg,
            resume=resume,
            on_start=on_start,
            on_epoch=on_epoch,
            on_batch=lambda n: bar.advance(n),
            on_note=bar.log,
        )


# ----- evaluate ------------------------------------------------------------------------


@cli.command(epilog="Example: trainkit evaluate runs/first --require-recall 0.9")
@click.argument(
    "exp_dir", metavar="EXP", type=click.Path(exists=True, file_okay=False, path_type=Path)
)
@click.option(
    "--split", "subset", type=click.Choice(["test", "val"]), default="test", show_default=True
)
@click.option(
    "--target-recall",
    type=click.FloatRange(0, 1, min_open=True),
    default=0.95,
    show_default=True,
    help="Screening recall the threshold must reach on validation.",
)
@click.option(
    "--max-false-alarms",
    type=click.FloatRange(0, 1, max_open=True),
    default=None,
    help="Instead of --target-recall: the lowest threshold whose validation false-alarm rate is at most this.",
)
@click.option(
    "--require-recall",
    type=click.FloatRange(0, 1),
    default=None,
    help="Gate: exit 3 unless the lower confidence bound of screening recall is at least this.",
)
@click.option(
    "--confidence", type=click.FloatRange(0.5, 1, max_open=True), default=0.95, show_default=True
)
@click.option(
    "--interval",
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
@click.option("--json", "as_json", is_flag=True, help="Print metrics.json to stdout.")
@click.pass_obj
def evaluate(
    ctx: Ctx,
    exp_dir,
    subset,
    target_recall,
    max_false_alarms,
    require_recall,
    confidence,
    interval,
    workspace,
    against,
    temperature_scaling,
    as_json,
) -> None:
    """Evaluate a trained screener: confusion matrix, per-class recall with intervals, threshold, report.

    Writes EXP/evaluation/: predictions.csv, metrics.json, report.html and plots
    (with --against also disagreements.csv). With --require-recall the exit code is
    3 unless the lower confidence bound of screening recall reaches the value.
    """
    from trainkit.judging.evaluation import evaluate_experiment

    with user_errors(ctx):
        res = evaluate_experiment(
            exp_dir,
            split=subset,
            target_recall=target_recall,
            max_false_alarms=max_false_alarms,
            require_recall=require_recall,
            confidence=confidence,
            interval_method=interval,
            workspace=workspace,
            against=against,
            temperature_scaling=temperature_scaling,
        )
    if as_json:
        click.echo(json.dumps(res, indent=2))
    else:
        print_evaluation(ctx, res, Path(exp_dir) / "evaluation")
    if res["gate"] and not res["gate"]["passed"]:
        raise SystemExit(EXIT_GATE)


def print_evaluation(ctx: Ctx, res: dict, out: Path) -> None:
    """Print the evaluation: confusion matrix, per-class table, screening, breakdown, verdict."""
    from rich.table import Table

    def f3(v) -> str:
        return "n/a" if v is None else f"{v:.3f}"

    names = res["class_names"]
    t = Table(
        title=f"Confusion matrix ({res['split']}: rows true, columns predicted; count, row %)"
    )
    t.add_column("true \\ pred")
    for n in names:
        t.add_column(n[:10], justify="right")
    norm = res["confusion_matrix_row_normalised"]
    for n, row, nrow in zip(names, res["confusion_matrix"], norm, strict=True):
        t.add_row(n, *[f"{v} {p:4.0%}" for v, p in zip(row, nrow, strict=True)])
    ctx.console.print(t)
    method = res["interval_method"]
    t2 = Table(title=f"Per class (recall interval: {method}, {res['confidence']:.0%})")
    for col in ("class", "support", "precision", "recall", "interval", "F1"):
        t2.add_column(col, justify="right" if col != "class" else "left")
    for c in res["per_class"]:
        ci = c["recall_interval"]
        t2.add_row(
            c["name"],
            str(c["support"]),
            f3(c["precision"]),
            f3(c["recall"]),
            "n/a" if ci["n"] == 0 else f"{ci['low']:.3f}-{ci['high']:.3f} ({ci['k']}/{ci['n']})",
            f3(c["f1"]),
        )
    ctx.console.print(t2)
    s = res["screening"]
    ci = s["recall_interval"]
    d = s["at_default_threshold"]
    ctx.console.print(
        f"screening recall {f3(s['recall'])} [{f3(ci['low'])}, {f3(ci['high'])}] "
        f"({method} {res['confidence']:.0%}, {ci['k']}/{ci['n']}) at threshold "
        f"{s['threshold']:.3f} ({s['threshold_source']}); specificity {f3(s['specificity'])}; "
        f"false-alarm rate {f3(s['false_alarm_rate'])} ({s['fp']} of {s['fp'] + s['tn']} "
        f"clean patches; {d['fp']} at threshold 0.5)"
    )
    cal = res["calibration"]
    line = f"calibration: ECE {cal['ece']:.3f}"
    if cal.get("temperature"):
        tt = cal["temperature"]
        line += f" -> {tt['ece_after']:.3f} with temperature T = {tt['value']:.3f} (report only)"
    ctx.console.print(line)
    low = s["recall_ci_low"]
    for key, label in (("by_group", "group"), ("by_scale", "scale band"), ("by_photo", "photo")):
        weak = [
            r
            for r in res.get(key) or []
            if r["recall"] is not None and low is not None and r["recall"] < low
        ]
        if weak:
            ctx.console.print(
                f"weak {label}s (recall below {low:.3f}): "
                + ", ".join(f"{r['key']} {r['cracks_found']}/{r['cracks']}" for r in weak[:8])
            )
    comp = res.get("comparison")
    if comp:
        m = comp["mcnemar_recall"]
        ctx.console.print(
            f"against {comp['experiment_b']}: recall {f3(comp['a']['recall'])} vs "
            f"{f3(comp['b']['recall'])} (difference {f3(comp['recall_difference'])}); "
            f"McNemar {m['method']} p = {m['p_value']:.4f} ({m['b']} found only by this, "
            f"{m['c']} only by the other); {comp['disagreements']} disagreements in "
            f"{out / comp['disagreements_csv']}"
        )
    if res["gate"]:
        ctx.console.print(res["gate"]["verdict"])
    ctx.console.print(f"report: {out / 'report.html'}")
    ctx.console.print(f"[dim]{res['caution']}[/dim]")


# ----- export --------------------------------------------------------------------------


@cli.command(epilog="Example: trainkit export runs/first --quantize int8")
@click.argument(
    "exp_dir", metavar="EXP", type=click.Path(exists=True, file_okay=False, path_type=Path)
)
@click.option(
    "--opset", type=click.IntRange(18, 23), default=18, show_default=True, help="ONNX opset."
)
@click.option(
    "--quantize",
    type=click.Choice(["int8"]),
    default=None,
    help="Also write EXP/model-int8.onnx, kept only if test recall holds and it is faster.",
)
@click.pass_obj
def export(ctx: Ctx, exp_dir: Path, opset: int, quantize: str | None) -> None:
    """Export EXP/model.onnx (uint8 RGB in, probabilities out, metadata inside) and check parity."""
    from trainkit.judging.export import export_experiment, quantize_experiment

    with user_errors(ctx):
        with ctx.console.status("exporting to ONNX and checking parity"):
            res = export_experiment(exp_dir, opset=opset)
        ctx.console.print(
            f"wrote {res['model']} ({res['bytes'] / 1e6:.2f} MB, {res['exporter']}); parity max |dp| "
            f"{res['parity_max_abs_diff']:.1e} on {res['parity_patches']} patches; threshold {res['threshold']:.3f}"
            + (
                ""
                if res["evaluated"]
                else " (not evaluated yet: run `trainkit evaluate` first for a tuned threshold)"
            )
        )
        if quantize:
            with ctx.console.status("quantizing to int8 and checking recall and speed"):
                q = quantize_experiment(exp_dir)
            ctx.console.print(
                f"wrote {q['model']} ({'per-channel' if q['per_channel'] else 'per-tensor'}): test crack recall "
                f"{q['recall']:.3f} (float {q['float_recall']:.3f}), {q['speedup']:.2f}x faster"
            )


# ----- scan ----------------------------------------------------------------------------


@cli.command(
    epilog="Example: trainkit scan drone-frames/ --model runs/first/model.onnx --out scan-results"
)
@click.argument("frames", nargs=-1, required=True, type=click.Path(exists=True, path_type=Path))
@click.option(
    "--model",
    "model",
    required=True,
    type=click.Path(exists=True, path_type=Path),
    help="The exported model.onnx, or an experiment folder holding one.",
)
@click.option(
    "--out",
    "out_dir",
    required=True,
    type=click.Path(file_okay=False, path_type=Path),
    help="Output folder for frames.jsonl, flagged.txt and overlays (resumed if present).",
)
@click.option(
    "--workers",
    type=click.IntRange(1, 256),
    default=1,
    show_default=True,
    help="Local processes (1: decoding overlapped with inference in this process).",
)
@click.option(
    "--overlays",
    type=click.Choice(["flagged", "all", "none"]),
    default="flagged",
    show_default=True,
    help="Overlay pictures to write.",
)
@click.option(
    "--gsd-mm",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Frames' scale in mm per pixel (cells then cover the model's patch size in mm).",
)
@click.option(
    "--engine",
    type=click.Choice(["local", "dask"]),
    default="local",
    show_default=True,
    help="Run here, or on a Dask distributed cluster.",
)
@click.option(
    "--scheduler",
    default=None,
    metavar="ADDRESS",
    help="Dask scheduler address for --engine dask, e.g. tcp://scheduler-host:8786.",
)
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON to stdout.")
@click.pass_obj
def scan(
    ctx: Ctx,
    frames,
    model: Path,
    out_dir: Path,
    workers: int,
    overlays: str,
    gsd_mm,
    engine,
    scheduler,
    as_json: bool,
) -> None:
    """Pre-filter frames with an exported screener: one JSON line per frame in OUT/frames.jsonl.

    Exits 1 while any frame of FRAMES is recorded as unreadable, by this run or an earlier one.
    """
    from trainkit.screener.scan import exit_code, recorded_line, scan_frames

    if model.is_dir():
        model = model / "model.onnx"
    with user_errors(ctx):
        # machine output: only the JSON goes to stdout
        with progress_bar(Ctx(ctx.quiet or as_json, ctx.debug), "scanning frames") as bar:
            res = scan_frames(
                model,
                list(frames),
                out_dir,
                workers=workers,
                gsd_mm=gsd_mm,
                overlays=overlays,
                engine=engine,
                scheduler=scheduler,
                progress=lambda d, n: bar.update(d, n),
            )
    if as_json:
        click.echo(json.dumps(res, indent=2))
    else:
        ctx.console.print(
            f"{res['scanned']} frames scanned ({res['resumed_skip']} already done) at {res['frames_per_second']:.2f} "
            f"frames/s; {res['flagged']} flagged, {res['errors']} unreadable in this run -> {res['frames_file']}"
        )
        ctx.console.print(recorded_line(res))
    if exit_code(res):
        raise SystemExit(exit_code(res))


# ----- review --------------------------------------------------------------------------


def _default_reviewer() -> str:
    import getpass

    try:
        return getpass.getuser()
    except Exception:  # no user name in this environment
        return "reviewer"


@cli.command(
    epilog="Examples: trainkit review ws --reviewer ana | trainkit review ws --model runs/first "
    "| trainkit review ws --sheet --viewer xdg-open | trainkit review ws --agreement"
)
@click.argument("ws_dir", metavar="WORKSPACE", type=click.Path(file_okay=False, path_type=Path))
@click.option(
    "--reviewer",
    default=None,
    help="Your name, stored with every label (default: your login name).",
)
@click.option(
    "--queue",
    "queue_kind",
    type=click.Choice(["unlabelled", "audit", "conflicts"]),
    default="unlabelled",
    show_default=True,
    help="unlabelled patches; a random audit sample of labelled ones; or reviewer disagreements "
    "to settle.",
)
@click.option(
    "--model",
    type=click.Path(exists=True, path_type=Path),
    default=None,
    help="Exported model (EXP folder or .onnx): least certain patches first, its suggestion on "
    "Enter.",
)
@click.option(
    "--audit-size",
    type=click.IntRange(1, 1_000_000),
    default=50,
    show_default=True,
    help="Patches in the audit sample.",
)
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of the audit sample.")
@click.option("--sheet", is_flag=True, help="Contact-sheet mode: a numbered grid PNG per round.")
@click.option(
    "--grid", default="6x4", show_default=True, help="Contact sheet COLUMNSxROWS of patches."
)
@click.option(
    "--viewer",
    default=None,
    metavar="COMMAND",
    help="Program that opens images (e.g. xdg-open, feh, open); gets the PNG path.",
)
@click.option(
    "--agreement", is_flag=True, help="Report Cohen's kappa and confusion per reviewer pair."
)
@click.option("--json", "as_json", is_flag=True, help="With --agreement: JSON output.")
@click.option(
    "--import-csv",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="Import labels from CSV (patch_id,label or photo,x0,y0,x1,y1,label).",
)
@click.option(
    "--import-folder",
    type=click.Path(exists=True, file_okay=False, path_type=Path),
    help="Import labels from a folder per class of patch images.",
)
@click.option(
    "--export-csv",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Write the current labels to this CSV.",
)
@click.option(
    "--export-folder",
    type=click.Path(file_okay=False, path_type=Path),
    help="Copy labelled patches into a folder per class here.",
)
@click.pass_obj
def review(
    ctx: Ctx,
    ws_dir: Path,
    reviewer,
    queue_kind,
    model,
    audit_size,
    seed,
    sheet,
    grid,
    viewer,
    agreement,
    as_json,
    import_csv,
    import_folder,
    export_csv,
    export_folder,
) -> None:
    """Label patches in the terminal: one key per answer, undo, skip, resume any time.

    \b
    Key mode (default): the patch is drawn in colour with its estimated crack angle;
      number keys = classes in the workspace's order, Enter = accept the model's
      suggestion, x unsure, s skip, u undo, z zoom, c contact sheet, ? help, q quit.
    Sheet mode (--sheet, or when the terminal is too small): a numbered PNG grid,
      answered by a line such as 'all none except 3 7' or '5=vertical'.
    Every answer is saved at once with your name; run the same command to resume.
    With --import-*/--export-*/--agreement it does that and exits.
    """
    from trainkit.labels.workspace import Workspace

    reviewer = reviewer or _default_reviewer()
    with user_errors(ctx):
        ws = Workspace.open(ws_dir)
        if import_csv or import_folder or export_csv or export_folder or agreement:
            _review_io(ctx, ws, reviewer, import_csv, import_folder, export_csv, export_folder)
            if agreement:
                _print_agreement(ctx, ws, as_json)
            return
        try:
            cols, rows = (int(v) for v in grid.lower().split("x"))
            if not (1 <= cols <= 20 and 1 <= rows <= 20):
                raise ValueError
        except ValueError:
            _fail(f"--grid must look like 6x4 (1-20 each), got {grid!r}")
        _run_review(
            ctx, ws, reviewer, queue_kind, model, audit_size, seed, sheet, (cols, rows), viewer
        )


def _review_io(
    ctx: Ctx, ws, reviewer, import_csv, import_folder, export_csv, export_folder
) -> None:
    from trainkit.labels import labels_io

    if import_csv:
        n = labels_io.import_csv(ws, import_csv, reviewer=reviewer)
        ctx.console.print(f"imported {n} labels from {import_csv} as reviewer {reviewer}")
    if import_folder:
        n = labels_io.import_folders(ws, import_folder, reviewer=reviewer)
        ctx.console.print(f"imported {n} labels from {import_folder} as reviewer {reviewer}")
    if export_csv:
        n = labels_io.export_csv(ws, export_csv)
        ctx.console.print(f"wrote {n} current labels to {export_csv}")
    if export_folder:
        counts = labels_io.export_folders(ws, export_folder)
        ctx.console.print(f"copied {sum(counts.values())} patches to {export_folder}: {counts}")


def _print_agreement(ctx: Ctx, ws, as_json: bool) -> None:
    from rich.table import Table

    from trainkit.labels.review import agreement, find_conflicts

    events = ws.label_events()
    pairs = agreement(events, ws.class_set)
    conflicts = find_conflicts(events)
    if as_json:
        click.echo(json.dumps({"pairs": pairs, "open_conflicts": len(conflicts)}, indent=2))
        return
    if not pairs:
        ctx.console.print("fewer than two reviewers have labelled this workspace: no agreement yet")
    for p in pairs:
        a, b = p["reviewers"]
        if not p["n"]:
            ctx.console.print(f"{a} and {b}: no patch labelled by both")
            continue

        def f3(v) -> str:
            return "n/a" if v is None or v != v else f"{v:.3f}"

        ctx.console.print(
            f"{a} vs {b}: {p['n']} patches both labelled; Cohen's kappa {f3(p['kappa'])} "
            f"(crack vs none {f3(p['kappa_crack_vs_none'])}); raw agreement "
            f"{p['observed_agreement']:.1%}"
        )
        t = Table(title=f"rows: {a}, columns: {b}")
        t.add_column(f"{a} \\ {b}")
        for n in p["labels"]:
            t.add_column(n[:10], justify="right")
        for n, row in zip(p["labels"], p["confusion"], strict=True):
            t.add_row(n, *map(str, row))
        ctx.console.print(t)
    ctx.console.print(
        f"{len(conflicts)} unsettled disagreements"
        + (" (settle them with: trainkit review WS --queue conflicts)" if conflicts else "")
    )


def _run_review(
    ctx: Ctx, ws, reviewer, queue_kind, model, audit_size, seed, sheet, grid, viewer
) -> None:
    import re

    from rich.console import Console

    from trainkit.labels.review import Session, build_queue, find_conflicts, model_probabilities
    from trainkit.labels.review_ui import choose_mode, run_keys, run_sheet

    records = ws.patches()
    events = ws.label_events() if queue_kind != "unlabelled" else []
    probs = None
    if model is not None:
        todo = [
            r
            for r in records
            if not r.review_skip and (queue_kind != "unlabelled" or not r.labelled)
        ]
        with progress_bar(ctx, "model predictions", len(todo)) as bar:
            probs = model_probabilities(model, ws, todo, progress=lambda d, n: bar.update(d, n))
    queue = build_queue(
        records,
        reviewer=reviewer,
        queue=queue_kind,
        probabilities=probs if queue_kind == "unlabelled" else None,
        skipped=ws.review_skips(reviewer),
        events=events,
        audit_size=audit_size,
        seed=seed,
    )
    settles = None
    if queue_kind == "conflicts":
        settles = {pid: sorted(by) for pid, by in find_conflicts(events).items()}
    if not queue:
        ctx.console.print(f"nothing to review in the {queue_kind} queue of {ws.root}")
        return
    session = Session(
        ws,
        reviewer,
        queue,
        suggestions=probs,
        settles=settles,
        check_fresh=queue_kind == "unlabelled",
    )
    console = Console(highlight=False, soft_wrap=True)
    mode, why = choose_mode(sheet, console, num_classes=ws.class_set.num_classes)
    if why:
        console.print(f"trainkit: {why}", style="yellow", soft_wrap=True)
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "_", reviewer)
    sheet_path = ws.root / "review" / f"sheet-{safe}.png"
    outcome = "sheet" if mode == "sheet" else run_keys(session, console, viewer=viewer)
    if outcome == "sheet":
        outcome = run_sheet(session, console, sheet_path, cols=grid[0], rows=grid[1], viewer=viewer)
    p = session.progress()
    left = p["remaining"]
    console.print(
        f"{reviewer}: {p['done']} labels this session ({p['per_minute']:.1f} per min); "
        + (
            "queue finished"
            if outcome == "finished"
            else f"{left} left; run the same command to resume"
        )
    )


# ----- status --------------------------------------------------------------------------


@cli.command(epilog="Example: trainkit status ws --json")
@click.argument("path", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Machine-readable output.")
@click.pass_obj
def status(ctx: Ctx, path: Path, as_json: bool) -> None:
    """Summarise a workspace (photos, patches, labels, split) or an experiment folder."""
    from trainkit.labels.workspace import DB_NAME, Workspace

    with user_errors(ctx):
        if (path / DB_NAME).exists():
            info = Workspace.open(path).summary()
        elif (path / "experiment.json").exists() or (path / "checkpoint.pt").exists():
            info = _experiment_status(path)
        else:
            _fail(f"{path} is neither a workspace nor an experiment folder")
    if as_json:
        click.echo(json.dumps(info, indent=2))
    else:
        for k, v in info.items():
            ctx.console.print(f"{k:>22}: {v}")


def _experiment_status(path: Path) -> dict:
    info: dict = {"experiment": str(path)}
    for name in (
        "checkpoint.pt",
        "history.csv",
        "evaluation/metrics.json",
        "evaluation/report.html",
        "model.onnx",
    ):
        info[name] = "present" if (path / name).exists() else "missing"
    if (path / "experiment.json").exists():
        e = json.loads((path / "experiment.json").read_text())
        info["workspace"] = e.get("workspace")
        info["training_patches"] = e.get("training_patches")
    if (path / "evaluation/metrics.json").exists():
        m = json.loads((path / "evaluation/metrics.json").read_text())
        s = m["screening"]
        info["screening_recall"] = (
            f"{s['recall']:.3f} [{s['recall_interval']['low']:.3f}, {s['recall_interval']['high']:.3f}]"
        )
        info["threshold"] = s["threshold"]
    return info


# ----- demo ----------------------------------------------------------------------------


@cli.command(epilog="Example: trainkit demo --out demo-output")
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("demo-output"),
    show_default=True,
    help="Experiment folder for everything the demo makes.",
)
@click.option(
    "--epochs",
    type=click.IntRange(1, 1000),
    default=None,
    help="Override the demo recipe's epochs.",
)
@click.option(
    "--photos",
    type=click.IntRange(6, 100000),
    default=None,
    help="Use only the first N photos of the tiny dataset (quicker, noisier).",
)
@click.pass_obj
def demo(ctx: Ctx, out_dir: Path, epochs, photos) -> None:
    """Run the whole chain on the shipped synthetic tiny dataset, end to end, on CPU.

    Tiles the photos, loads their labels, splits by photo, trains the demo recipe
    from random initialisation (no pretrained weights are downloaded), evaluates on
    held-out photos, exports ONNX and scans fresh synthetic frames.
    """
    from .demo import run_demo

    with user_errors(ctx):
        run_demo(ctx, out_dir, epochs=epochs, photos=photos)


def main(argv: list[str] | None = None) -> int:
    """Console-script entry point."""
    try:
        cli.main(args=argv, prog_name="trainkit", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("trainkit: aborted", err=True)
        return EXIT_USAGE
    except click.exceptions.ClickException as exc:
        exc.show()
        return EXIT_USAGE
    except SystemExit as exc:
        return int(exc.code or 0) if not isinstance(exc.code, str) else EXIT_USAGE
    return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
