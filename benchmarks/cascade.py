"""The two-stage cascade against the main network alone, side by side in one run.

1. A screener is trained on synthetic photos (the default recipe, whose ``cascade:`` block adds
   the distilled first stage; the seconds the extra phase takes are reported beside the main
   training's), evaluated (thresholds on validation, the cascade gate on the test photos) and
   exported twice: ``model.onnx`` (the cascade, when the gate passed) and ``main.onnx`` (the
   main network alone).
2. Frames of about 12 megapixels (4096 x 3072, a mosaic of 4 x 4 synthetic photos so every
   128-px cell has exact truth) with about 5 % and about 30 % crack cells (the share measured
   from the generator's truth is reported).
3. Per crack share, alternating over the rounds, each keeping its best: the whole
   `trainkit scan` command with the cascade (and with the main network alone), the main
   network's own ONNX Runtime bound (patches in memory, best configuration and batch; from
   benchmarks/run.py) and the usual PyTorch loop (PIL decode, crop, torchvision transforms,
   eager model) with the same main network; peak memory of each scan command (VmHWM).
4. Recall and false alarms on the frames' cells, cascade against main network alone, and the
   evaluation's test-patch figures and gate verdict.
5. The unfamiliar-surface warning of each model on frames of the training family and of a
   reserved surface (:func:`warning_check`).

Usage: python benchmarks/cascade.py OUT [--quick] [--photos 120] [--epochs 12] [--frames 12]
       [--warning-only]
(--quick: a smoke test of a minute or two on a tiny network and small frames; its figures
say nothing about speed.)
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from job_trust import CRACK, build_workspace, cell_truth
from run import _model_only_bound

TILE_H, TILE_W = 768, 1024  # whole 128-px cells, so no cell straddles two photos
_SCENES = ("single", "multi", "map")


@dataclass(frozen=True)
class Plan:
    photos: int
    recipe: str
    overrides: dict
    grid: tuple[int, int]  # tiles per frame (rows, cols)
    frames: int  # per crack share
    rounds: int
    reference_frames: int


FULL = Plan(120, "default", {}, (4, 4), 12, 3, 2)  # 12 frames: start-up spread thin
QUICK = Plan(
    12, "demo",
    {"backbone": "tiny_cnn", "weights": None, "epochs": 1, "head_epochs": 0,
     "cascade": {"input_px": 32, "epochs": 1}},
    (2, 2), 1, 1, 1,
)  # fmt: skip


def train_and_export(out: Path, plan: Plan, seed: int) -> dict:
    """Train with the recipe's cascade block, evaluate, export the cascade and the main alone."""
    from trainkit.export.onnx_file import export_experiment
    from trainkit.judging.evaluation import evaluate_experiment
    from trainkit.learning.config import TrainConfig, load_train_config
    from trainkit.learning.training import train

    ws = build_workspace(out, plan.photos, seed)
    # merged by hand: load_train_config's overrides skip None (weights: null here)
    cfg = TrainConfig.model_validate(
        {**load_train_config(plan.recipe).model_dump(), **plan.overrides}
    )
    if cfg.cascade is None:
        raise SystemExit(f"recipe {plan.recipe} has no cascade block")
    t0 = time.perf_counter()
    summary = train(ws, out / "run", cfg, resume=False)
    seconds = time.perf_counter() - t0
    metrics = evaluate_experiment(out / "run")
    cascade = export_experiment(out / "run", cascade=True)
    main = export_experiment(out / "run", out=out / "main.onnx", cascade=False)
    c = metrics["cascade"]
    return {
        "recipe": plan.recipe,
        "backbone": cfg.backbone,
        "first_stage": cfg.cascade.model_dump(),
        "training_seconds_total": round(seconds, 1),
        "cascade_phase_seconds": summary["cascade_seconds"],
        "cascade_share_of_training_time": round(summary["cascade_seconds"] / seconds, 3),
        "test_patches": {
            "main_recall": c["main"]["recall"],
            "main_false_alarm_rate": c["main"]["false_alarm_rate"],
            "cascade_recall": (c.get("cascade") or {}).get("recall"),
            "cascade_false_alarm_rate": (c.get("cascade") or {}).get("false_alarm_rate"),
            "passed_share": c.get("passed_share"),
            "pass_threshold": c["pass_threshold"],
            "gate": c["gate"]["verdict"],
        },
        "cascade_model": cascade["model"] if cascade["cascade"] else None,
        "cascade_skipped": cascade["cascade_skipped"],
        "main_model": main["model"],
    }


def make_frames(folder: Path, plan: Plan, target: float, seed: int) -> dict[str, np.ndarray]:
    """Mosaic frames whose crack-cell share reaches ``target``; returns name -> cell truth."""
    from PIL import Image

    from trainkit.core.grid import axis_starts
    from trainkit.synth import SynthOptions, generate_photo

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    rows, cols = plan.grid
    ys, xs = axis_starts(TILE_H, 128, 128), axis_starts(TILE_W, 128, 128)
    boxes = np.array([(x, y, x + 128, y + 128) for y in ys for x in xs])
    truth = {}
    for f in range(plan.frames):
        tiles = [["none"] * cols for _ in range(rows)]
        images, codes = {}, {}
        order = rng.permutation(rows * cols)
        crack_cells, k = 0, 0
        while crack_cells < target * rows * cols * len(boxes) and k < len(order):
            r, c = divmod(int(order[k]), cols)
            tiles[r][c] = _SCENES[int(rng.integers(len(_SCENES)))] if target > 0.1 else "single"
            ph = generate_photo(
                int(rng.integers(1 << 30)), SynthOptions(TILE_H, TILE_W, tiles[r][c])
            )
            images[r, c], codes[r, c] = ph.image, cell_truth(ph.cracks, boxes)[0]
            crack_cells += int(np.sum(codes[r, c] == CRACK))
            k += 1
        frame = np.empty((rows * TILE_H, cols * TILE_W, 3), np.uint8)
        grid = np.empty((rows * len(ys), cols * len(xs)), np.int8)
        for r in range(rows):
            for c in range(cols):
                if (r, c) not in images:
                    ph = generate_photo(
                        int(rng.integers(1 << 30)), SynthOptions(TILE_H, TILE_W, "none")
                    )
                    images[r, c], codes[r, c] = ph.image, np.zeros(len(boxes), np.int8)
                frame[r * TILE_H : (r + 1) * TILE_H, c * TILE_W : (c + 1) * TILE_W] = images[r, c]
                grid[r * len(ys) : (r + 1) * len(ys), c * len(xs) : (c + 1) * len(xs)] = codes[
                    r, c
                ].reshape(len(ys), len(xs))
        name = f"frame-{int(target * 100):02d}-{f}.jpg"
        Image.fromarray(frame).save(folder / name, quality=92)
        truth[name] = grid
    return truth


_WRAPPER = (
    "import sys; from trainkit.cli import main; code = main(sys.argv[1:]); "
    "hwm = [ln for ln in open('/proc/self/status') if ln.startswith('VmHWM')][0]; "
    "print(hwm.split()[1], file=sys.stderr); sys.exit(code)"
)


def scan_command(model: Path, frames: Path, out: Path) -> tuple[float, float, dict]:
    """The whole `trainkit scan` in a child process: (frames/s, peak MB, summary JSON)."""
    n = len(list(frames.glob("*.jpg")))
    t0 = time.perf_counter()
    child = subprocess.run(
        [sys.executable, "-c", _WRAPPER, "scan", str(frames), "--model", str(model),
         "--out", str(out), "--overlays", "none", "--json"],
        check=True, capture_output=True, text=True,
    )  # fmt: skip
    fps = n / (time.perf_counter() - t0)
    return fps, int(child.stderr.strip().splitlines()[-1]) / 1024, json.loads(child.stdout)


def torch_loop(exp: Path, frames: list[Path]) -> float:
    """Frames/s of the usual PyTorch loop with the main network (PIL, crops, transforms)."""
    import torch
    from PIL import Image
    from torchvision import transforms

    from trainkit.core.grid import axis_starts
    from trainkit.learning.network import load_checkpoint

    model, ckpt, _ = load_checkpoint(exp)
    net, pre = model[1].eval(), ckpt["preprocess"]
    tf = transforms.Compose([transforms.ToTensor(), transforms.Normalize(pre["mean"], pre["std"])])
    t0 = time.perf_counter()
    for f in frames:
        im = Image.open(f).convert("RGB")
        w, h = im.size
        crops = [tf(im.crop((x, y, x + 128, y + 128)))
                 for y in axis_starts(h, 128, 128) for x in axis_starts(w, 128, 128)]  # fmt: skip
        with torch.no_grad():
            torch.softmax(net(torch.stack(crops)), 1)
    return len(frames) / (time.perf_counter() - t0)


def cell_figures(scan_dir: Path, truth: dict[str, np.ndarray]) -> dict:
    """Recall and false alarms on the frames' cells (ambiguous cells left out)."""
    tp = fn = fp = tn = reached = cells = 0
    for line in (scan_dir / "frames.jsonl").read_text().splitlines():
        rec = json.loads(line)
        t = truth[Path(rec["frame"]).name].ravel()
        flagged = np.asarray(rec["cell_probabilities"]).ravel() >= rec["threshold"]
        crack, clean = t == CRACK, t == 0
        tp, fn = tp + int(np.sum(flagged & crack)), fn + int(np.sum(~flagged & crack))
        fp, tn = fp + int(np.sum(flagged & clean)), tn + int(np.sum(~flagged & clean))
        reached, cells = reached + rec["main_model_cells"], cells + rec["cells"]
    return {
        "recall": round(tp / max(1, tp + fn), 4), "recall_k_n": [tp, tp + fn],
        "false_alarm_rate": round(fp / max(1, fp + tn), 4), "false_alarms_k_n": [fp, fp + tn],
        "main_model_cells_share": round(reached / max(1, cells), 4),
    }  # fmt: skip


def bench_share(out: Path, facts: dict, plan: Plan, target: float, seed: int) -> dict:
    frames = out / f"frames-{int(target * 100):02d}"
    truth = make_frames(frames, plan, target, seed)
    share = np.mean([np.mean(t == CRACK) for t in truth.values()])
    per_frame = next(iter(truth.values())).size
    rng = np.random.default_rng(0)
    patches = rng.integers(0, 256, (per_frame * 2, 128, 128, 3), dtype=np.uint8)
    models = {"cascade": facts["cascade_model"], "main alone": facts["main_model"]}
    models = {k: Path(v) for k, v in models.items() if v}
    best: dict[str, float] = {}
    peak: dict[str, float] = {}
    scans: dict[str, Path] = {}
    bound: dict[str, float] = {}
    for r in range(plan.rounds):
        for name, model in models.items():
            scans[name] = out / f"scan-{int(target * 100):02d}-{name.replace(' ', '-')}-{r}"
            fps, mb, _ = scan_command(model, frames, scans[name])
            best[name] = max(best.get(name, 0.0), fps)
            peak[name] = max(peak.get(name, 0.0), mb)
        for cfg, fps in _model_only_bound(Path(facts["main_model"]), patches, per_frame).items():
            bound[cfg] = max(bound.get(cfg, 0.0), fps)
    ref = torch_loop(out / "run", sorted(frames.glob("*.jpg"))[: plan.reference_frames])
    top = max(bound, key=bound.get)
    result = {
        "crack_cell_share_measured": round(float(share), 4),
        "frames": len(truth), "cells_per_frame": int(per_frame),
        "scan_frames_per_second": {k: round(v, 3) for k, v in best.items()},
        "main_bound_frames_per_second": round(bound[top], 3), "bound_configuration": top,
        "pytorch_loop_frames_per_second": round(ref, 3),
        "scan_peak_memory_mb": {k: round(v, 1) for k, v in peak.items()},
        "cells": {k: cell_figures(v, truth) for k, v in scans.items()},
    }  # fmt: skip
    if "cascade" in best:
        result["cascade_over_bound"] = round(best["cascade"] / bound[top], 2)
        result["cascade_over_pytorch_loop"] = round(best["cascade"] / ref, 2)
    result["main_scan_share_of_bound"] = round(best["main alone"] / bound[top], 3)
    return result


def warning_check(out: Path, facts: dict, n_frames: int, seed: int) -> dict:
    """The unfamiliar-surface warning, cascade against main network alone, on the same frames.

    A cascade's familiarity comes from its first stage's features (contract 3 gives every
    cell one), the main network's from its own. Frames of the training family and of the
    reserved family (surface "broom", never in training; benchmarks/job_trust.py) are scanned
    with each model; the share of frames warned and the frame-level ROC AUC (scikit-learn's
    ``roc_auc_score``, reserved frames as positives) are reported.
    """
    from job_trust import FULL as TRUST
    from job_trust import make_frames as family_frames
    from job_trust import scan_set
    from sklearn.metrics import roc_auc_score

    plan = replace(TRUST, frames=n_frames)
    sets = {"default": seed, "broom": seed + 1}
    folders = {surface: out / f"warning-frames-{surface}" for surface in sets}
    cracks = {
        surface: family_frames(folders[surface], plan, surface, s) for surface, s in sets.items()
    }
    models = {"cascade": facts["cascade_model"], "main alone": facts["main_model"]}
    result = {}
    for name, model in models.items():
        if not model:
            continue
        scans = {
            surface: scan_set(
                Path(model), folder, out / f"warning-scan-{surface}-{name.replace(' ', '-')}",
                cracks[surface],
            )
            for surface, folder in folders.items()
        }  # fmt: skip
        d, r = (scans[k]["frame_scores"] for k in ("default", "broom"))
        auc = roc_auc_score(np.r_[np.zeros(d.size), np.ones(r.size)], np.r_[d, r])
        warned = {
            k: f"{v['summary']['unfamiliar_frames']}/{v['summary']['frames']}"
            for k, v in scans.items()
        }
        result[name] = {
            "warned_training_family": warned["default"],
            "warned_reserved_family": warned["broom"],
            "frame_auc_reserved_vs_training_family": round(float(auc), 3),
        }
    return result


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("out", type=Path)
    ap.add_argument("--quick", action="store_true", help="smoke test: tiny network, small frames")
    ap.add_argument("--photos", type=int, help="training photos (full: 120)")
    ap.add_argument("--epochs", type=int, help="main network epochs (full: the recipe's)")
    ap.add_argument("--frames", type=int, help="frames per crack share (full: 12)")
    ap.add_argument("--seed", type=int, default=7001)
    ap.add_argument(
        "--warning-only", action="store_true",
        help="only the unfamiliar-surface warning check, on the models an earlier run left in OUT",
    )  # fmt: skip
    args = ap.parse_args(argv)
    plan = QUICK if args.quick else FULL
    overrides = dict(plan.overrides, **({"epochs": args.epochs} if args.epochs else {}))
    plan = Plan(args.photos or plan.photos, plan.recipe, overrides, plan.grid,
                args.frames or plan.frames, plan.rounds, plan.reference_frames)  # fmt: skip
    args.out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    n_warn = 4 if args.quick else 20
    if args.warning_only:
        bench = json.loads((args.out / "cascade-bench.json").read_text())
        bench["warning"] = warning_check(args.out, bench["training"], n_warn, 640_017)
        (args.out / "cascade-bench.json").write_text(json.dumps(bench, indent=2))
        print(json.dumps(bench["warning"], indent=2))
        return 0
    facts = train_and_export(args.out, plan, args.seed)
    print(json.dumps(facts, indent=2), flush=True)
    result = {"quick": args.quick, "training": facts}
    for target, seed in ((0.05, 501), (0.30, 530)):
        result[f"crack_cells_{int(target * 100)}pct"] = bench_share(
            args.out, facts, plan, target, seed
        )
        print(json.dumps(result[f"crack_cells_{int(target * 100)}pct"], indent=2), flush=True)
    result["warning"] = warning_check(args.out, facts, n_warn, 640_017)
    print(json.dumps(result["warning"], indent=2), flush=True)
    result["minutes"] = round((time.perf_counter() - t0) / 60, 1)
    (args.out / "cascade-bench.json").write_text(json.dumps(result, indent=2))
    print(f"wrote {args.out / 'cascade-bench.json'} ({result['minutes']} min)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
