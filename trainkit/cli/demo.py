"""`trainkit demo`: run the whole chain on the tiny dataset, printing each step with rich."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import click
from rich.console import Console

from trainkit.cli.options import epochs_option
from trainkit.cli.output import Ctx, ProgressHandle, progress_bar, user_errors
from trainkit.cli.tables import epoch_line, print_evaluation, print_split
from trainkit.demo import MIN_PHOTOS, DemoProgress, too_few_photos

__all__ = ["demo", "ConsoleDemoProgress"]


class ConsoleDemoProgress(DemoProgress):
    """Shows the demo's steps as rules, its long tasks as progress bars, its results as tables."""

    def __init__(self, ctx: Ctx) -> None:
        self._ctx = ctx
        self._console: Console = ctx.console
        self._bar: ProgressHandle | None = None

    def section(self, title: str) -> None:
        self._console.rule(f"[bold]{title}")

    def line(self, text: str, *, caution: bool = False) -> None:
        self._console.print(text, markup=False, style="dim" if caution else None)

    @contextmanager
    def task(self, description: str, total: int | None = None) -> Iterator[ProgressHandle]:
        with progress_bar(self._ctx, description, total) as bar:
            self._bar = bar
            try:
                yield bar
            finally:
                self._bar = None

    def epoch_done(self, row: dict[str, Any], false_alarm_budget: float) -> None:
        text = epoch_line(row, false_alarm_budget)
        if self._bar is not None:
            self._bar.log(text)
        else:
            self._console.print(text)

    def split_done(self, report: dict[str, Any]) -> None:
        print_split(self._console, report)

    def evaluated(self, metrics: dict[str, Any], folder: Path) -> None:
        print_evaluation(self._console, metrics, folder)


def _check_photos(_ctx: click.Context, _param: click.Parameter, value: int | None) -> int | None:
    if value is not None and value < MIN_PHOTOS:
        raise click.BadParameter(too_few_photos(value))
    return value


@click.command(epilog="Example: trainkit demo --out demo-output")
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("demo-output"),
    show_default=True,
    help="Experiment folder for everything the demo makes.",
)
@epochs_option("Override the demo recipe's epochs.")
@click.option(
    "--photos",
    type=int,
    callback=_check_photos,
    default=None,
    help=f"Use only the first N photos of the tiny dataset (quicker, noisier; N >= {MIN_PHOTOS}).",
)
@click.pass_obj
def demo(ctx: Ctx, out_dir: Path, epochs: int | None, photos: int | None) -> None:
    """Run the whole chain on the shipped synthetic tiny dataset, end to end, on CPU.

    Tiles the photos, loads their labels, splits by photo, fine-tunes the demo recipe
    from the packaged ImageNet weights (EfficientNet-Lite0; nothing is downloaded),
    evaluates on held-out photos, exports ONNX and scans fresh synthetic frames.
    """
    from trainkit.demo import run_demo

    with user_errors(ctx):
        run_demo(out_dir, epochs=epochs, photos=photos, progress=ConsoleDemoProgress(ctx))
