"""`trainkit scan`: pre-filter frames with an exported screener."""

from __future__ import annotations

from pathlib import Path

import click

from trainkit.cli.options import FiniteFloatRange, gsd_mm_option, json_option, workers_option
from trainkit.cli.output import Ctx, progress_bar, user_errors, warn
from trainkit.core.experiment import Experiment
from trainkit.core.jsonsafe import dumps
from trainkit.screener.scan import SCAN_MAX_PIXELS

__all__ = ["scan"]


@click.command(
    epilog="Example: trainkit scan drone-frames/ --model experiments/first/model.onnx "
    "--out scan-results"
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
@workers_option(
    "Local processes (1: decoding overlapped with inference in this process).", default=1
)
@click.option(
    "--overlays",
    type=click.Choice(["flagged", "all", "none"]),
    default="flagged",
    show_default=True,
    help="Overlay pictures to write.",
)
@gsd_mm_option("Frames' scale in mm per pixel (cells then cover the model's patch size in mm).")
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
@click.option(
    "--max-megapixels",
    type=FiniteFloatRange(min=1),
    default=SCAN_MAX_PIXELS / 1e6,
    show_default=True,
    help="Record larger frames as too large (a frame takes up to 7 bytes a pixel while it is "
    "decoded); raise it for trusted huge frames on a machine with the memory.",
)
@json_option("Print the summary as JSON to stdout.")
@click.pass_obj
def scan(
    ctx: Ctx,
    frames: tuple[Path, ...],
    model: Path,
    out_dir: Path,
    as_json: bool,
    max_megapixels: float,
    **settings: str | int | None,
) -> None:
    """Pre-filter frames with an exported screener: one JSON line per frame in OUT/frames.jsonl.

    Unreadable frames are named on stderr (and recorded) and the scan goes on; files in the
    folders that are not photos are counted on stderr. Exits 1 while any frame of FRAMES is
    recorded as unreadable, by this run or an earlier one; 2 when FRAMES holds no image file.
    """
    from trainkit.screener.scan import exit_code, recorded_line, scan_frames

    if model.is_dir():
        model = Experiment(model).model_path
    with user_errors(ctx):
        # machine output: only the JSON goes to stdout
        with progress_bar(Ctx(ctx.quiet or as_json, ctx.debug), "scanning frames") as bar:
            res = scan_frames(
                model,
                list(frames),
                out_dir,
                progress=lambda d, n: bar.update(d, n),
                report=warn,
                max_pixels=int(max_megapixels * 1e6),
                **settings,
            )
    if as_json:
        click.echo(dumps(res, indent=2))
    else:
        ctx.console.print(
            f"{res['scanned']} frames scanned ({res['resumed_skip']} already done) at "
            f"{res['frames_per_second']:.2f} frames/s; {res['flagged']} flagged, "
            f"{res['errors']} unreadable in this run -> {res['frames_file']}"
        )
        ctx.console.print(recorded_line(res))
        if res["cells"] and res["main_model_cells"] < res["cells"]:  # a cascade model
            ctx.console.print(
                f"the main network scored {res['main_model_cells']} of {res['cells']} cells "
                f"({res['main_model_cells'] / res['cells']:.1%}); the cascade's first stage "
                "passed no others"
            )
        if res.get("unfamiliar_recorded"):
            ctx.console.print(
                f"{res['unfamiliar_recorded']} frames look unlike the model's training data: "
                "its recall figures do not apply to them; check this job with "
                f"`trainkit sample {out_dir} --workspace WS --cells 300 --seed S`"
            )
        for note in res.get("notes", []):
            ctx.console.print(f"note: {note}")
    if exit_code(res):
        raise SystemExit(exit_code(res))
