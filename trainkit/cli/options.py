"""Options and arguments used by several commands, each declared once as a reusable decorator.

Options whose help differs between commands are factories taking the help text; a
group of related options reaches the command as one dataclass (see :func:`gather`).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import click

from trainkit.core.errors import TrainkitError
from trainkit.intake.scale import ScaleOptions

__all__ = [
    "FiniteFloatRange",
    "POSITIVE",
    "gather",
    "json_option",
    "seed_option",
    "epochs_option",
    "workers_option",
    "engine_option",
    "scheduler_option",
    "gsd_mm_option",
    "tile_px_option",
    "classes_option",
    "workspace_argument",
    "experiment_argument",
    "scale_options",
    "parse_size",
]

F = TypeVar("F", bound=Callable[..., Any])


class FiniteFloatRange(click.FloatRange):
    """click's FloatRange, refusing NaN and infinity (which compare False with every bound)."""

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None):
        rv = super().convert(value, param, ctx)
        if not math.isfinite(rv):
            self.fail(f"{value!r} is not a finite number", param, ctx)
        return rv


#: Positive lengths, scales and distances.
POSITIVE = FiniteFloatRange(min=0, min_open=True)


def gather(cls: type, name: str) -> Callable[[F], F]:
    """Collect the keyword arguments named like the fields of dataclass ``cls`` into one ``name``.

    Apply it below (closer to the function than) the options it gathers.
    """
    fields = [f.name for f in dataclasses.fields(cls)]

    def decorate(func: F) -> F:
        @functools.wraps(func)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            kwargs[name] = cls(**{f: kwargs.pop(f) for f in fields})
            return func(*args, **kwargs)

        return wrapper  # type: ignore[return-value]

    return decorate


def _stack(func: F, decorators: list[Callable[[F], F]]) -> F:
    """Apply decorators so that they show in ``--help`` in the order listed."""
    for deco in reversed(decorators):
        func = deco(func)
    return func


def json_option(help: str) -> Callable[[F], F]:
    """``--json``: machine output on stdout, passed as ``as_json``."""
    return click.option("--json", "as_json", is_flag=True, help=help)


def seed_option(help: str, default: int | None = 0) -> Callable[[F], F]:
    """``--seed``: an integer random seed."""
    return click.option(
        "--seed", type=int, default=default, show_default=default is not None, help=help
    )


def epochs_option(help: str) -> Callable[[F], F]:
    """``--epochs``: override the recipe's number of epochs."""
    return click.option("--epochs", type=click.IntRange(1, 1000), default=None, help=help)


def workers_option(help: str, default: int | None = None) -> Callable[[F], F]:
    """``--workers``: how many processes."""
    return click.option(
        "--workers",
        type=click.IntRange(1, 256),
        default=default,
        show_default=default is not None,
        help=help,
    )


def engine_option(help: str) -> Callable[[F], F]:
    """``--engine``: run here, or on a Dask distributed cluster (with ``--scheduler``)."""
    return click.option(
        "--engine",
        type=click.Choice(["local", "dask"]),
        default="local",
        show_default=True,
        help=help,
    )


def scheduler_option() -> Callable[[F], F]:
    """``--scheduler``: the Dask scheduler's address for ``--engine dask``."""
    return click.option(
        "--scheduler",
        default=None,
        metavar="ADDRESS",
        help="Dask scheduler address for --engine dask, e.g. tcp://scheduler-host:8786.",
    )


def gsd_mm_option(help: str) -> Callable[[F], F]:
    """``--gsd-mm``: scale in mm per pixel."""
    return click.option("--gsd-mm", type=POSITIVE, default=None, help=help)


def tile_px_option(help: str, default: int) -> Callable[[F], F]:
    """``--tile-px``: patch size in pixels."""
    return click.option(
        "--tile-px", type=click.IntRange(16, 2048), default=default, show_default=True, help=help
    )


def classes_option(help: str) -> Callable[[F], F]:
    """``--classes``: a built-in class set name or a YAML file."""
    return click.option("--classes", default="orientation", show_default=True, help=help)


def workspace_argument(must_exist: bool = True) -> Callable[[F], F]:
    """WORKSPACE: a workspace folder, passed as ``ws_dir``."""
    return click.argument(
        "ws_dir",
        metavar="WORKSPACE",
        type=click.Path(exists=must_exist, file_okay=False, path_type=Path),
    )


def workspace_option(help: str) -> Callable[[F], F]:
    """``--workspace WS``: an existing workspace folder, passed as ``ws_dir``."""
    return click.option(
        "--workspace",
        "ws_dir",
        required=True,
        type=click.Path(exists=True, file_okay=False, path_type=Path),
        help=help,
    )


#: SCAN: a scan's output folder (holding frames.jsonl), passed as ``scan_dir``.
scan_argument = click.argument(
    "scan_dir", metavar="SCAN", type=click.Path(exists=True, file_okay=False, path_type=Path)
)

#: EXP: an existing experiment folder, passed as ``exp_dir``.
experiment_argument = click.argument(
    "exp_dir", metavar="EXP", type=click.Path(exists=True, file_okay=False, path_type=Path)
)


def scale_options(func: F) -> F:
    """``--gsd-mm``, ``--distance-m``, ``--focal-mm``, ``--sensor-width-mm`` as one ``scale``."""
    return _stack(
        gather(ScaleOptions, "scale")(func),
        [
            gsd_mm_option("Scale in mm per pixel for photos the sidecar does not cover."),
            click.option(
                "--distance-m",
                type=POSITIVE,
                default=None,
                help="Camera-to-surface distance in m (with EXIF focal length, or --focal-mm "
                "and --sensor-width-mm).",
            ),
            click.option("--focal-mm", type=POSITIVE, default=None, help="Lens focal length, mm."),
            click.option(
                "--sensor-width-mm",
                type=POSITIVE,
                default=None,
                help="Sensor width, mm (without it, EXIF's 35 mm-equivalent focal length and "
                "36 mm are used).",
            ),
        ],
    )


def parse_size(
    text: str, option: str, example: str, *, bounds: tuple[int, int] | None = None
) -> tuple[int, int]:
    """Parse ``AxB`` into two integers, each within ``bounds`` (inclusive) when given.

    Raises:
        TrainkitError: naming the option, the expected form and what came.
    """
    try:
        a, b = (int(v) for v in text.lower().split("x"))
    except ValueError:
        a = b = None
    if a is None or (bounds and not all(bounds[0] <= v <= bounds[1] for v in (a, b))):
        each = f" ({bounds[0]}-{bounds[1]} each)" if bounds else ""
        raise TrainkitError(f"{option} must look like {example}{each}, got {text!r}")
    return a, b
