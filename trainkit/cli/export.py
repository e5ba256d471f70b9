"""`trainkit export`: export an experiment's screener to ONNX, optionally quantized."""

from __future__ import annotations

from pathlib import Path

import click

from trainkit.cli.options import experiment_argument
from trainkit.cli.output import Ctx, user_errors

__all__ = ["export"]


@click.command(epilog="Example: trainkit export experiments/first --quantize int8")
@experiment_argument
@click.option(
    "--opset", type=click.IntRange(18, 23), default=18, show_default=True, help="ONNX opset."
)
@click.option(
    "--quantize",
    type=click.Choice(["int8"]),
    default=None,
    help="Also write EXP/model-int8.onnx, kept only if test recall holds and it is faster.",
)
@click.option(
    "--cascade",
    is_flag=True,
    help="Write the two-stage cascade (faster scans) when the experiment has one that passed "
    "its gate. Its unfamiliar-surface warning comes from the cheap first stage and misses new "
    "surfaces: use it only where the surface is known.",
)
@click.pass_obj
def export(ctx: Ctx, exp_dir: Path, opset: int, quantize: str | None, cascade: bool) -> None:
    """Export EXP/model.onnx (uint8 RGB in, probabilities out, metadata inside) and check parity."""
    from trainkit.export.onnx_file import export_experiment
    from trainkit.export.quantize import quantize_experiment

    console = ctx.console
    with user_errors(ctx):
        with console.status("exporting to ONNX and checking parity"):
            res = export_experiment(exp_dir, opset=opset, cascade=cascade)
        console.print(
            f"wrote {res['model']} ({res['bytes'] / 1e6:.2f} MB, {res['exporter']}); parity max "
            f"|dp| {res['parity_max_abs_diff']:.1e} on {res['parity_patches']} patches; "
            f"threshold {res['threshold']:.3f}"
            + (
                ""
                if res["evaluated"]
                else " (not evaluated yet: run `trainkit evaluate` first for a tuned threshold)"
            )
        )
        fam = res.get("familiarity")
        console.print(
            f"contract {res['contract']}: a frame unlike the training data gets an "
            f"unfamiliar-surface warning when its cells' median familiarity exceeds "
            f"{fam['threshold']:.2f} (calibrated on {fam['calibration_frames']} validation "
            f"photos: at most {fam['false_warning_bound']:.0%} of frames like them are warned "
            "about)"
            if fam
            else f"contract {res['contract']}: no familiarity output ("
            + (
                res.get("familiarity_skipped")
                or "the workspace's training and validation patches were not found"
            )
            + "), so no unfamiliar-surface warning"
        )
        cas = res.get("cascade")
        if cas:
            t = cas["test"]
            console.print(
                f"cascade: a {cas['stage1']['backbone']} first stage at {cas['stage1']['input_px']} px "
                f"passes cells scoring at least {cas['pass_threshold']:.4f} to the main network "
                f"({t['passed_share']:.1%} of test patches); test recall {t['recall']:.3f} "
                f"(main network alone {t['main_recall']:.3f})"
            )
            from trainkit.core.caution import CASCADE_WARNING_CAVEAT

            console.print(f"caution: {CASCADE_WARNING_CAVEAT}; check each new surface by sampling")
        elif res.get("cascade_skipped"):
            console.print(f"no cascade: {res['cascade_skipped']}")
        if quantize and cas:
            from trainkit.export.quantize import INT8_CASCADE_SKIP

            console.print(INT8_CASCADE_SKIP)
        elif quantize:
            with console.status("quantizing to int8 and checking recall and speed"):
                q = quantize_experiment(exp_dir)
            console.print(
                f"wrote {q['model']} ({'per-channel' if q['per_channel'] else 'per-tensor'}): "
                f"test crack recall {q['recall']:.3f} (float {q['float_recall']:.3f}), "
                f"{q['speedup']:.2f}x faster"
            )
