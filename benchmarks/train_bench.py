"""Training throughput: ``trainkit.learning.training.train`` against a plain torchvision loop, side by side.

Both train MobileNetV3-Small from random initialisation at 224 px, batch 32, with
torch's default thread count, on the same labelled patches of a synthetic
workspace (the generator and steps of ``trainkit demo``, tiled at 224 px; 112 px in
the ``quick`` smoke run, whose figures mean nothing):

- kit: ``train()`` with the default recipe, batch size and epochs overridden; its
  throughput is read from the experiment's ``history.csv`` (training loop only,
  validation excluded), its held-out accuracy from the best-validation checkpoint;
- reference, "the usual way": the training patches exported as one PNG folder per
  class, ``torchvision.datasets.ImageFolder`` (PIL decode per step), torchvision
  transforms per step, ``DataLoader(shuffle=True)`` with 2 workers and with 0,
  ``mobilenet_v3_small(weights=None, num_classes=6)``, AdamW, CrossEntropyLoss;
  each reference run gets the wall time the kit's run of the same round took;
- model-only bound: the training step alone (forward, backward, AdamW) on a batch
  already in memory, for the kit's network (uint8 input through
  ``build_network``) and for the reference network (float NCHW input, what the
  DataLoader hands over).

Rounds are interleaved (bound, kit, then the two reference loops in alternating
order); the headline is the best round of each, every round is listed too.
Held-out accuracy is measured on the test subset of the same split (whole photos
the training never saw), with the majority-class share beside it for scale.
"""

from __future__ import annotations

import csv
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

BATCH_SIZE = 32
NUM_CLASSES = 6  # the default orientation class set
SEED = 0

#: name -> settings; "full" is what `make bench` runs. Photos are 3 x 2 tiles.
SIZES = {
    # 60 photos -> 360 patches of 224 px before unsure ones are left out.
    "full": {"n_photos": 60, "tile_px": 224, "epochs": 3, "rounds": 2, "bound_steps": 5},
    # A smoke run of the machinery, not a measurement: 10 photos (the fewest the kit's
    # default 20 % / 15 % grouped split accepts), 112-px tiles so that it finishes quickly.
    "quick": {"n_photos": 10, "tile_px": 112, "epochs": 1, "rounds": 1, "bound_steps": 1},
}

#: Throughput column of history.csv: the current name first, then the earlier one.
THROUGHPUT_COLUMNS = ("train_images_per_s", "images_per_second")

MEAN = (0.485, 0.456, 0.406)  # ImageNet statistics, as a torchvision user writes them
STD = (0.229, 0.224, 0.225)


def _log(msg: str) -> None:
    print(f"[training] {msg}", file=sys.stderr, flush=True)


# ----- data ---------------------------------------------------------------------------


def build_workspace(root: Path, *, n_photos: int, tile_px: int = 224):
    """A labelled, split workspace of synthetic photos of 3 x 2 tiles, made as the demo makes one."""
    from trainkit.core.taxonomy import load_class_set
    from trainkit.intake.sidecar import read_sidecar
    from trainkit.labels.build import build_workspace as build
    from trainkit.synth import SynthOptions, write_dataset

    class_set = load_class_set("orientation")
    data = root / "synth"
    write_dataset(
        data,
        n_photos=n_photos,
        seed=2026,
        tile_px=tile_px,
        options=SynthOptions(height=2 * tile_px, width=3 * tile_px),
        class_set=class_set,
    )
    return build(
        sorted((data / "photos").glob("*.jpg")),
        root / "workspace",
        class_set=class_set,
        tile_px=tile_px,
        sidecar=read_sidecar(data / "scale.csv"),
        group_by="photo",
        labels_csv=data / "labels.csv",
        reviewer="synth-ground-truth",
        split={"test_fraction": 0.2, "val_fraction": 0.15, "seed": 0},
    ).workspace


def export_image_folders(
    workspace, out_dir: Path, subsets: tuple[str, ...] = ("train", "test")
) -> dict[str, dict[str, int]]:
    """Write each subset's labelled crops as ``out_dir/<subset>/<class>/<patch id>.png``.

    Unsure patches are left out, as the kit leaves them out of training; PNG keeps
    the pixels the kit reads. Returns subset -> class name -> files written.
    """
    from PIL import Image

    from trainkit.store.pixels import PatchPixels

    counts: dict[str, dict[str, int]] = {s: {} for s in subsets}
    recs = [r for r in workspace.patches(labelled=True) if r.subset in subsets and r.label]
    with PatchPixels(workspace) as pixels:
        for r, rgb in zip(recs, pixels.get(recs), strict=True):
            folder = out_dir / r.subset / r.label
            folder.mkdir(parents=True, exist_ok=True)
            Image.fromarray(rgb).save(folder / f"{r.id:06d}.png")
            counts[r.subset][r.label] = counts[r.subset].get(r.label, 0) + 1
    return counts


def load_held_out(folder: Path) -> tuple[list, list[str]]:
    """The held-out PIL images and their class names, read through ImageFolder."""
    from torchvision.datasets import ImageFolder

    ds = ImageFolder(folder)
    images = [ds.loader(path) for path, _ in ds.samples]
    return images, [ds.classes[t] for _, t in ds.samples]


def read_history(exp_dir: Path) -> list[dict]:
    """history.csv rows with the throughput under ``images_per_s`` whatever the column is called."""
    with (Path(exp_dir) / "history.csv").open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        column = next((c for c in THROUGHPUT_COLUMNS if c in (reader.fieldnames or [])), None)
        if column is None:
            raise ValueError(
                f"{exp_dir}/history.csv has no throughput column; expected one of "
                f"{', '.join(THROUGHPUT_COLUMNS)}, got {reader.fieldnames}"
            )
        rows = []
        for row in reader:
            rows.append(
                {
                    "epoch": int(row["epoch"]),
                    "stage": row.get("stage") or "full",
                    "images_per_s": float(row[column]),
                    "seconds": float(row["seconds"]) if row.get("seconds") else None,
                }
            )
    return rows


# ----- the three loops ------------------------------------------------------------------


def _accuracy(pred_names: list[str], true_names: list[str]) -> float:
    return float(np.mean([p == t for p, t in zip(pred_names, true_names, strict=True)]))


def run_kit(workspace, exp_dir: Path, cfg, held_out: tuple[list, list[str]]) -> dict:
    """trainkit.learning.training.train as a user calls it; wall time, throughput, held-out accuracy."""
    from trainkit.learning.network import load_checkpoint
    from trainkit.learning.training import train

    t0 = time.perf_counter()
    summary = train(workspace, exp_dir, cfg, resume=False)
    wall = time.perf_counter() - t0
    history = read_history(exp_dir)
    full = [h for h in history if h["stage"] == "full" and h["images_per_s"] > 0]
    if history and all(h["seconds"] is not None for h in history):
        images = sum(h["images_per_s"] * h["seconds"] for h in history)
    else:
        images = summary["training_patches"] * len(history)

    model, _, class_set = load_checkpoint(exp_dir)
    images_pil, names = held_out
    x = np.stack([np.asarray(im) for im in images_pil])
    with torch.no_grad():
        pred = torch.cat([model(torch.from_numpy(x[i : i + 64])) for i in range(0, len(x), 64)])
    pred_names = [class_set.names[i] for i in pred.argmax(1).tolist()]
    return {
        "wall_seconds": wall,
        "images_per_second": statistics.median(h["images_per_s"] for h in full) if full else None,
        "epochs": len(history),
        "epochs_head_only": sum(h["stage"] != "full" for h in history),
        "images_trained": round(images),
        "held_out_accuracy": _accuracy(pred_names, names),
    }


def run_reference(
    train_dir: Path, held_out: tuple[list, list[str]], *, num_workers: int, budget_s: float
) -> dict:
    """A plain torchvision training loop, stopped once ``budget_s`` of wall time has passed."""
    from torch.utils.data import DataLoader
    from torchvision import datasets, transforms
    from torchvision.models import mobilenet_v3_small

    t_start = time.perf_counter()
    torch.manual_seed(SEED)
    train_tf = transforms.Compose(
        [
            transforms.RandomHorizontalFlip(),
            transforms.RandomVerticalFlip(),
            transforms.ColorJitter(brightness=0.25, contrast=0.25, saturation=0.1, hue=0.02),
            transforms.ToTensor(),
            transforms.Normalize(MEAN, STD),
        ]
    )
    eval_tf = transforms.Compose([transforms.ToTensor(), transforms.Normalize(MEAN, STD)])
    dataset = datasets.ImageFolder(train_dir, transform=train_tf)
    loader = DataLoader(dataset, batch_size=BATCH_SIZE, shuffle=True, num_workers=num_workers)
    model = mobilenet_v3_small(weights=None, num_classes=NUM_CLASSES)
    optimizer = torch.optim.AdamW(model.parameters())
    loss_fn = torch.nn.CrossEntropyLoss()

    epochs: list[tuple[int, float, bool]] = []  # (images, seconds, complete)
    out_of_time = False
    while not out_of_time:
        model.train()
        seen, t0 = 0, time.perf_counter()
        for x, y in loader:
            loss = loss_fn(model(x), y)
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()
            seen += len(y)
            if time.perf_counter() - t_start >= budget_s:
                out_of_time = True
                break
        epochs.append((seen, time.perf_counter() - t0, seen == len(dataset)))
    wall = time.perf_counter() - t_start

    complete = [n / s for n, s, done in epochs if done] or [
        sum(n for n, _, _ in epochs) / sum(s for _, s, _ in epochs)
    ]
    images_pil, names = held_out
    model.eval()
    with torch.no_grad():
        x = torch.stack([eval_tf(im) for im in images_pil])
        pred = torch.cat([model(x[i : i + 64]) for i in range(0, len(x), 64)]).argmax(1)
    pred_names = [
        dataset.classes[i] if i < len(dataset.classes) else "<class absent from training>"
        for i in pred.tolist()
    ]
    return {
        "wall_seconds": wall,
        "images_per_second": statistics.median(complete),
        "epochs_completed": sum(done for _, _, done in epochs),
        "images_trained": sum(n for n, _, _ in epochs),
        "held_out_accuracy": _accuracy(pred_names, names),
    }


def model_only_bound(cfg, *, tile_px: int, steps: int) -> dict[str, float]:
    """Images/s of the training step alone, batch in memory, kit and reference networks alternately."""
    from torchvision.models import mobilenet_v3_small

    from trainkit.learning.network import build_network

    torch.manual_seed(SEED)
    rng = np.random.default_rng(SEED)
    x_u8 = torch.from_numpy(rng.integers(0, 256, (BATCH_SIZE, tile_px, tile_px, 3), dtype=np.uint8))
    mean = torch.tensor(MEAN).view(1, 3, 1, 1)
    std = torch.tensor(STD).view(1, 3, 1, 1)
    x_f = ((x_u8.permute(0, 3, 1, 2).float() / 255 - mean) / std).contiguous()
    y = torch.from_numpy(rng.integers(0, NUM_CLASSES, BATCH_SIZE))

    def stepper(model, x):
        model.train()
        optimizer = torch.optim.AdamW(model.parameters())

        def step() -> None:
            loss = torch.nn.functional.cross_entropy(model(x), y)
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()

        return step

    fns = {
        "kit_network": stepper(build_network(cfg, NUM_CLASSES, load_weights=False), x_u8),
        "reference_network": stepper(mobilenet_v3_small(num_classes=NUM_CLASSES), x_f),
    }
    for f in fns.values():  # warm-up: first-call allocations and kernel selection
        f()
    times: dict[str, list[float]] = {k: [] for k in fns}
    for _ in range(steps):
        for k, f in fns.items():
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    return {k: BATCH_SIZE / statistics.median(v) for k, v in times.items()}


# ----- the benchmark ---------------------------------------------------------------------


def bench_training(size: str = "full") -> dict:
    """Run the rounds and return the JSON-ready result (see the module docstring)."""
    from trainkit.learning.config import load_train_config

    if size not in SIZES:
        raise ValueError(f"unknown size {size!r}; choose one of: {', '.join(SIZES)}")
    s = SIZES[size]
    cfg = load_train_config("default", {"batch_size": BATCH_SIZE, "epochs": s["epochs"]})
    variants = ("kit", "reference_workers_2", "reference_workers_0")
    runs: dict[str, list[dict]] = {v: [] for v in (*variants, "bound")}
    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        t0 = time.perf_counter()
        ws = build_workspace(root, n_photos=s["n_photos"], tile_px=s["tile_px"])
        counts = export_image_folders(ws, root / "reference")
        held_out = load_held_out(root / "reference" / "test")
        split = ws.split_info() or {}
        _log(f"data ready in {time.perf_counter() - t0:.0f} s: {split.get('patches')}")

        for r in range(s["rounds"]):
            runs["bound"].append(
                model_only_bound(cfg, tile_px=s["tile_px"], steps=s["bound_steps"])
            )
            _log(f"round {r + 1}: model-only bound {runs['bound'][-1]}")
            kit = run_kit(ws, root / f"exp-{r}", cfg, held_out)
            runs["kit"].append(kit)
            _log(f"round {r + 1}: kit {kit}")
            for workers in (2, 0) if r % 2 == 0 else (0, 2):
                ref = run_reference(
                    root / "reference" / "train",
                    held_out,
                    num_workers=workers,
                    budget_s=kit["wall_seconds"],
                )
                runs[f"reference_workers_{workers}"].append(ref)
                _log(f"round {r + 1}: reference, {workers} workers: {ref}")

    def best(variant: str) -> float:
        return max(run["images_per_second"] or 0.0 for run in runs[variant])

    bound = {k: max(b[k] for b in runs["bound"]) for k in runs["bound"][0]}
    ips = {v: best(v) for v in variants}
    test_counts = counts["test"]
    return {
        "what": (
            f"MobileNetV3-Small from random init at {s['tile_px']} px, batch {BATCH_SIZE}, "
            f"{torch.get_num_threads()} torch threads; kit train() vs an ImageFolder/DataLoader "
            f"loop on the same patches; {s['rounds']} interleaved round(s), best of each"
        ),
        "size": size,
        "patches": {
            "train": sum(counts["train"].values()),
            "test": sum(test_counts.values()),
            "train_per_class": counts["train"],
        },
        "kit_config": {k: v for k, v in cfg.model_dump().items() if k != "augment"},
        "images_per_second": {
            "model_only_kit_network": round(bound["kit_network"], 1),
            "model_only_reference_network": round(bound["reference_network"], 1),
            **{v: round(x, 1) for v, x in ips.items()},
        },
        "ratio_kit_over_reference_workers_2": round(ips["kit"] / ips["reference_workers_2"], 2),
        "ratio_kit_over_reference_workers_0": round(ips["kit"] / ips["reference_workers_0"], 2),
        "share_of_model_only_bound": {
            "kit": round(ips["kit"] / bound["kit_network"], 2),
            "reference_workers_2": round(
                ips["reference_workers_2"] / bound["reference_network"], 2
            ),
            "reference_workers_0": round(
                ips["reference_workers_0"] / bound["reference_network"], 2
            ),
        },
        "held_out_accuracy_same_wall_time": {
            v: round(statistics.median(run["held_out_accuracy"] for run in runs[v]), 3)
            for v in variants
        },
        "held_out_majority_class_share": round(
            max(test_counts.values()) / sum(test_counts.values()), 3
        ),
        "rounds": {
            v: [
                {k: (round(x, 3) if isinstance(x, float) else x) for k, x in run.items()}
                for run in runs[v]
            ]
            for v in runs
        },
        "note": (
            "kit images/s is its training loop only (history.csv), reference images/s is per "
            "epoch including DataLoader start-up; each reference run gets the wall time of the "
            "kit's run in its round (the kit's includes loading patches, validation each epoch "
            "and checkpoints). The reference flips images without remapping orientation labels "
            "(a flip swaps the two diagonal classes), as the usual torchvision recipe does."
        ),
    }
