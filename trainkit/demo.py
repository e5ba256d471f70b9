"""The end-to-end demo: the same functions the commands call, run in order on the tiny dataset.

The demo folder is itself an experiment folder (checkpoint, history, evaluation,
model.onnx); the workspace, the fresh frames and the scan results are subfolders.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

from trainkit.core.fsutil import atomic_path, atomic_write_text

__all__ = ["run_demo", "TINY_DATASET", "tiny_dataset_dir"]

#: How tiny_dataset/ was made: `trainkit synth tiny_dataset --photos 40 --seed 2026 --size 768x512 --tile-px 128`.
TINY_DATASET = {"n_photos": 40, "seed": 2026, "width": 768, "height": 512, "tile_px": 128}
#: Seeds of the fresh frames the demo scans (never used for the tiny dataset's photos).
FRAME_SEEDS = (900_001, 900_002, 900_003, 900_004, 900_005, 900_006)


def tiny_dataset_dir() -> Path | None:
    """The repository's tiny_dataset/ folder when running from a checkout, else None."""
    here = Path(__file__).resolve().parents[1] / "tiny_dataset"
    return here if (here / "labels.csv").is_file() else None


def _ensure_dataset(ctx, out: Path) -> Path:
    found = tiny_dataset_dir()
    if found is not None:
        return found
    from trainkit.core.taxonomy import load_class_set
    from trainkit.synth import SynthOptions, write_dataset

    target = out / "tiny_dataset"
    if not (target / "labels.csv").is_file():
        ctx.console.print(
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


def _step(ctx, n: int, text: str) -> None:
    ctx.console.rule(f"[bold]{n}/7 {text}")


def run_demo(
    ctx, out_dir: str | Path, *, epochs: int | None = None, photos: int | None = None
) -> dict:
    """Run tile -> labels -> split -> train -> evaluate -> export -> scan; returns the headline figures."""
    from PIL import Image

    from trainkit.core.decode import list_images
    from trainkit.core.taxonomy import load_class_set
    from trainkit.intake.sidecar import read_sidecar
    from trainkit.intake.tiling import tile_into_workspace
    from trainkit.judging.evaluation import evaluate_experiment
    from trainkit.judging.export import export_experiment
    from trainkit.labels.labels_io import import_csv
    from trainkit.labels.splits import split_workspace
    from trainkit.labels.workspace import Workspace
    from trainkit.learning.config import load_train_config
    from trainkit.screener.scan import scan_frames
    from trainkit.synth import SynthOptions, generate_photo

    from .cli import print_evaluation, progress_bar, run_training

    t_start = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    data = _ensure_dataset(ctx, out)
    ctx.console.print(
        "[bold]trainkit demo[/bold]: an invented scenario on synthetic concrete photos. The network is "
        "trained from random initialisation (no pretrained weights are downloaded), so its figures show "
        "the workflow, not what a fine-tuned backbone reaches."
    )

    _step(ctx, 1, "tile photos into a workspace")
    files = list_images([data / "photos"])
    if photos:
        files = files[:photos]
    ws = Workspace.create(
        out / "workspace", class_set=load_class_set("orientation"), tile_px=TINY_DATASET["tile_px"]
    )
    with progress_bar(ctx, "tiling photos", len(files)) as bar:
        tiled = tile_into_workspace(
            files,
            ws,
            sidecar=read_sidecar(data / "scale.csv"),
            group_by="photo",
            progress=lambda i, n, name: bar.update(i, n),
        )
    ctx.console.print(
        f"{tiled['photos_added']} photos, {tiled['patches_added']} patches "
        f"({tiled['patches_flagged']} with quality flags)"
    )

    _step(ctx, 2, "load the shipped labels")
    labels_csv = data / "labels.csv"
    if photos:  # keep only the rows of the photos in use
        keep = {f.name for f in files}
        lines = labels_csv.read_text(encoding="utf-8").splitlines()
        labels_csv = out / "labels-subset.csv"
        labels_csv.write_text(
            "\n".join([lines[0], *[ln for ln in lines[1:] if ln.split(",")[0] in keep]]) + "\n",
            encoding="utf-8",
        )
    if not any(r.labelled for r in ws.patches()):
        n = import_csv(ws, labels_csv, reviewer="synth-ground-truth")
        ctx.console.print(
            f"{n} labels loaded (ambiguous patches are stored as 'unsure' and kept out of training)"
        )
    else:
        ctx.console.print("labels already loaded (resumed demo)")

    _step(ctx, 3, "split by photo")
    rep = split_workspace(ws, test_fraction=0.2, val_fraction=0.15, seed=0)
    from .cli import _print_split

    _print_split(ctx, rep)

    _step(ctx, 4, "train (random initialisation, CPU)")
    cfg = load_train_config("demo", {"epochs": epochs})
    trained = run_training(ctx, ws, out, cfg, resume=True)

    _step(ctx, 5, "evaluate on held-out photos")
    metrics = evaluate_experiment(out, split="test")
    print_evaluation(ctx, metrics, out / "evaluation")

    _step(ctx, 6, "export ONNX")
    exported = export_experiment(out)
    ctx.console.print(f"{exported['model']}: parity max |dp| {exported['parity_max_abs_diff']:.1e}")

    _step(ctx, 7, "scan fresh synthetic frames")
    frames_dir = out / "frames"
    frames_dir.mkdir(exist_ok=True)
    scenes = ("single", "none", "map", "multi", "single", "none")
    for seed, scene in zip(FRAME_SEEDS, scenes, strict=True):
        path = frames_dir / f"frame-{seed}-{scene}.jpg"
        if not path.exists():
            ph = generate_photo(seed, SynthOptions(height=512, width=768, scene=scene))
            with atomic_path(path) as tmp:
                Image.fromarray(ph.image).save(tmp, quality=90)
    with progress_bar(ctx, "scanning frames", len(FRAME_SEEDS)) as bar:
        scanned = scan_frames(
            exported["model"], [frames_dir], out / "scan", progress=lambda d, n: bar.update(d, n)
        )

    seconds = time.perf_counter() - t_start
    s = metrics["screening"]
    headline = {
        "seconds": round(seconds, 1),
        "test_patches": metrics["patches"],
        "screening_recall": s["recall"],
        "screening_recall_interval": [s["recall_interval"]["low"], s["recall_interval"]["high"]],
        "false_alarm_rate": s["false_alarm_rate"],
        "threshold": s["threshold"],
        "accuracy": metrics["accuracy"],
        "train_images_per_second": trained["median_images_per_second"],
        "frames_flagged": f"{scanned['flagged']}/{scanned['frames']}",
    }
    atomic_write_text(out / "demo-summary.json", json.dumps(headline, indent=2))
    ctx.console.rule("[bold]done")

    def f3(v) -> str:  # metrics.json writes undefined values as null
        return "n/a" if v is None else f"{v:.3f}"

    ctx.console.print(
        f"finished in {seconds / 60:.1f} min. Test screening recall {f3(s['recall'])} "
        f"[{f3(s['recall_interval']['low'])}, {f3(s['recall_interval']['high'])}] (Wilson 95%), false-alarm rate "
        f"{f3(s['false_alarm_rate'])}, 6-class accuracy {metrics['accuracy']:.3f}; "
        f"{trained['median_images_per_second']:.0f} training images/s."
    )
    ctx.console.print(f"  model         {out / 'model.onnx'}")
    ctx.console.print(f"  metrics       {out / 'evaluation' / 'metrics.json'}")
    ctx.console.print(f"  report        {out / 'evaluation' / 'report.html'}")
    ctx.console.print(
        f"  scan results  {out / 'scan' / 'frames.jsonl'} (overlays in {out / 'scan' / 'overlays'})"
    )
    ctx.console.print(f"  workspace     {out / 'workspace'}")
    ctx.console.print(f"[dim]{metrics['caution']}[/dim]")
    return headline
