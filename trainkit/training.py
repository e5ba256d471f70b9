"""The training loop: fine-tune a backbone on a workspace's split, with checkpoints and resume.

An experiment folder receives ``config.yaml`` (the resolved config),
``experiment.json`` (which workspace and split it used), ``history.csv`` (one row
per epoch, with throughput in images per second), ``last.pt`` (for resuming after
a crash) and ``checkpoint.pt`` (the epoch with the best validation score).
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch
import yaml
from torch import nn

from .config import TrainConfig
from .data import Augmenter, PatchSet, batches, load_patch_set
from .fsutil import atomic_write_text
from .models import IMAGENET_MEAN, IMAGENET_STD, create_model
from .splits import check_no_leak
from .taxonomy import ClassSet, class_set_from_dict, load_class_set
from .workspace import Workspace

__all__ = [
    "Preprocess",
    "build_network",
    "train",
    "load_checkpoint",
    "predict_proba",
    "TrainingError",
    "HISTORY_FIELDS",
]

HISTORY_FIELDS = (
    "epoch",
    "lr",
    "train_loss",
    "train_accuracy",
    "val_loss",
    "val_accuracy",
    "val_balanced_accuracy",
    "val_crack_recall",
    "images_per_second",
    "seconds",
)


class TrainingError(ValueError):
    """Training cannot start or continue; the message says why and what to do."""


class Preprocess(nn.Module):
    """uint8 (N, S, S, 3) RGB -> float (N, 3, S, S) normalised with the ImageNet statistics.

    It is the first layer of every network, so the exported ONNX graph takes raw
    uint8 pixels and nobody downstream has to know the normalisation.
    """

    def __init__(self) -> None:
        super().__init__()
        mean = torch.tensor(IMAGENET_MEAN, dtype=torch.float32).view(1, 3, 1, 1) * 255.0
        std = torch.tensor(IMAGENET_STD, dtype=torch.float32).view(1, 3, 1, 1) * 255.0
        self.register_buffer("mean", mean)
        self.register_buffer("inv_std", 1.0 / std)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        # The permuted view is channels-last in memory; measured in benchmarks/run.py,
        # it trains as fast as or faster than a contiguous copy on CPU, so no copy is made.
        x = x.permute(0, 3, 1, 2).to(torch.float32)
        return (x - self.mean) * self.inv_std


def build_network(
    cfg: TrainConfig, num_classes: int, *, load_weights: bool = True
) -> nn.Sequential:
    """Preprocess + backbone, the module that is trained, evaluated and exported."""
    backbone = create_model(
        cfg.backbone, num_classes, weights=cfg.weights if load_weights else None
    )
    return nn.Sequential(Preprocess(), backbone)


# ----- small named helpers ---------------------------------------------------------


def get_lr(step: int, *, total_steps: int, warmup_steps: int, peak_lr: float) -> float:
    """Learning rate at an optimiser step.

    1) linear warm-up from 0 to ``peak_lr`` over ``warmup_steps``;
    2) cosine decay from ``peak_lr`` to 1 % of it at ``total_steps``.
    """
    if warmup_steps > 0 and step < warmup_steps:
        return peak_lr * (step + 1) / warmup_steps
    progress = min(1.0, (step - warmup_steps) / max(1, total_steps - warmup_steps))
    floor = 0.01 * peak_lr
    return floor + 0.5 * (peak_lr - floor) * (1.0 + math.cos(math.pi * progress))


def class_weights(labels: np.ndarray, num_classes: int, mode: str) -> torch.Tensor | None:
    """Loss weights per class: none, balanced (1/count) or sqrt (1/sqrt(count)), mean 1 over present classes."""
    if mode == "none":
        return None
    counts = np.bincount(labels, minlength=num_classes).astype(float)
    w = np.zeros(num_classes)
    present = counts > 0
    w[present] = 1.0 / (counts[present] if mode == "balanced" else np.sqrt(counts[present]))
    w[present] /= w[present].mean()
    return torch.tensor(w, dtype=torch.float32)


def data_digest(workspace: Workspace, subsets: tuple[str, ...] = ("train", "val")) -> str:
    """SHA-256 over the (photo, box, label) of the patches in the given subsets."""
    h = hashlib.sha256()
    for r in workspace.patches():
        if r.subset in subsets and r.label is not None:
            h.update(f"{r.photo}|{r.box}|{r.label}|{r.subset}\n".encode())
    return h.hexdigest()


@torch.no_grad()
def predict_proba(
    model: nn.Module, images: np.ndarray, *, num_classes: int, batch_size: int = 64
) -> np.ndarray:
    """Softmax probabilities (N, C) for uint8 (N, S, S, 3) images."""
    model.eval()
    out = [np.zeros((0, num_classes), dtype=np.float32)]
    for idx in batches(np.arange(len(images)), batch_size):
        logits = model(torch.from_numpy(images[idx]))
        out.append(torch.softmax(logits, dim=1).numpy())
    return np.concatenate(out).astype(np.float32)


def train_one_epoch(
    model: nn.Module,
    data: PatchSet,
    *,
    augment: Augmenter,
    optimizer: torch.optim.Optimizer,
    loss_fn: nn.Module,
    cfg: TrainConfig,
    rng: np.random.Generator,
    step: int,
    total_steps: int,
    warmup_steps: int,
    on_batch: Callable[[int], None] | None = None,
) -> tuple[dict, int]:
    """One pass over the training patches in random order; returns stats and the next step."""
    model.train()
    order = rng.permutation(len(data))
    total_loss = correct = seen = 0
    t0 = time.perf_counter()
    for idx in batches(order, cfg.batch_size):
        if len(idx) < 2:  # BatchNorm cannot train on a batch of one
            continue
        pairs = [augment(data.images[i], int(data.labels[i]), rng) for i in idx]
        x = torch.from_numpy(np.stack([p[0] for p in pairs]))
        y = torch.tensor([p[1] for p in pairs], dtype=torch.long)
        lr = get_lr(step, total_steps=total_steps, warmup_steps=warmup_steps, peak_lr=cfg.lr)
        for group in optimizer.param_groups:
            group["lr"] = lr
        logits = model(x)
        loss = loss_fn(logits, y)
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()
        total_loss += float(loss.detach()) * len(idx)
        correct += int((logits.argmax(1) == y).sum())
        seen += len(idx)
        step += 1
        if on_batch:
            on_batch(len(idx))
    seconds = time.perf_counter() - t0
    return {
        "lr": lr if seen else 0.0,
        "train_loss": total_loss / max(1, seen),
        "train_accuracy": correct / max(1, seen),
        "images_per_second": seen / seconds if seconds > 0 else 0.0,
        "seconds": seconds,
    }, step


def evaluate_split(model: nn.Module, data: PatchSet, loss_fn: nn.Module, num_classes: int) -> dict:
    """Validation loss, accuracy, balanced accuracy and crack (non-zero class) recall."""
    if len(data) == 0:
        return {
            "val_loss": float("nan"),
            "val_accuracy": float("nan"),
            "val_balanced_accuracy": float("nan"),
            "val_crack_recall": float("nan"),
        }
    probs = predict_proba(model, data.images, num_classes=num_classes)
    y = data.labels
    pred = probs.argmax(1)
    loss = float(loss_fn(torch.log(torch.from_numpy(probs).clamp_min(1e-12)), torch.from_numpy(y)))
    recalls = [float(np.mean(pred[y == c] == c)) for c in range(num_classes) if np.any(y == c)]
    crack = y != 0
    crack_recall = float(np.mean(pred[crack] != 0)) if crack.any() else float("nan")
    return {
        "val_loss": loss,
        "val_accuracy": float(np.mean(pred == y)),
        "val_balanced_accuracy": float(np.mean(recalls)),
        "val_crack_recall": crack_recall,
    }


# ----- the run ------------------------------------------------------------------------


def _save_atomic(obj: dict, path: Path) -> None:
    tmp = path.with_suffix(path.suffix + ".tmp")
    torch.save(obj, tmp)
    os.replace(tmp, path)


def train(
    workspace: Workspace,
    exp_dir: str | Path,
    cfg: TrainConfig,
    *,
    resume: bool = True,
    on_epoch: Callable[[dict], None] | None = None,
    on_batch: Callable[[int], None] | None = None,
    on_start: Callable[[int, int], None] | None = None,
) -> dict:
    """Train on the workspace's train subset, select on val, write the experiment folder.

    Args:
        workspace: the workspace with labels and a split.
        exp_dir: experiment folder (created).
        cfg: the resolved training config.
        resume: continue from ``last.pt`` if it exists and matches the config.
        on_epoch: called with each history row.
        on_batch: called with the batch size after every optimiser step.
        on_start: called with (total epochs, training patches per epoch) before training.

    Returns:
        A summary: best epoch and its validation scores, paths, throughput.
    """
    exp = Path(exp_dir)
    exp.mkdir(parents=True, exist_ok=True)
    class_set = load_class_set(cfg.class_set)
    ws_classes = workspace.class_set
    if ws_classes.names != class_set.names:
        raise TrainingError(
            f"config class set {cfg.class_set!r} {list(class_set.names)} differs from the workspace's "
            f"{list(ws_classes.names)}"
        )
    records = workspace.patches()
    check_no_leak(records)
    if not any(r.subset for r in records):
        raise TrainingError(
            f"workspace {workspace.root} has no split; run `trainkit split {workspace.root}` first"
        )
    if cfg.threads:
        torch.set_num_threads(cfg.threads)
    torch.manual_seed(cfg.seed)
    rng = np.random.default_rng(cfg.seed)

    train_set = load_patch_set(workspace, "train", class_set)
    val_set = load_patch_set(workspace, "val", class_set)
    if len(train_set) < 2:
        raise TrainingError(
            f"only {len(train_set)} labelled training patches; label more before training"
        )
    num_classes = class_set.num_classes
    input_px = workspace.tile_px

    model = build_network(cfg, num_classes)
    optimizer = torch.optim.AdamW(model.parameters(), lr=cfg.lr, weight_decay=cfg.weight_decay)
    loss_fn = nn.CrossEntropyLoss(
        weight=class_weights(train_set.labels, num_classes, cfg.class_weighting),
        label_smoothing=cfg.label_smoothing,
    )
    val_loss_fn = nn.NLLLoss()
    augment = Augmenter(class_set, cfg.augment, seed=cfg.seed)
    steps_per_epoch = max(
        1, len(train_set) // cfg.batch_size + (len(train_set) % cfg.batch_size >= 2)
    )
    total_steps = steps_per_epoch * cfg.epochs
    warmup_steps = int(round(cfg.warmup_epochs * steps_per_epoch))

    cfg_dict = cfg.model_dump(mode="json")
    atomic_write_text(exp / "config.yaml", yaml.safe_dump(cfg_dict, sort_keys=False))
    gsds = [r.gsd_mm for r in records if r.subset == "train" and r.gsd_mm is not None]
    mms = [r.patch_mm for r in records if r.subset == "train" and r.patch_mm is not None]
    experiment = {
        "workspace": str(Path(workspace.root).resolve()),
        "class_set": class_set.to_dict(),
        "input_px": input_px,
        "split": workspace.split_info(),
        "training_patches": len(train_set),
        "validation_patches": len(val_set),
        "data_digest": data_digest(workspace),
        "gsd_mm_range": [min(gsds), max(gsds)] if gsds else None,
        "patch_mm_range": [min(mms), max(mms)] if mms else None,
    }
    atomic_write_text(exp / "experiment.json", json.dumps(experiment, indent=2))

    history: list[dict] = []
    start_epoch, step = 1, 0
    best = {"score": -math.inf, "epoch": 0, "state": None, "row": None}
    last_path = exp / "last.pt"
    if resume and last_path.exists():
        try:
            state = torch.load(last_path, map_location="cpu", weights_only=True)
        except Exception:  # a damaged last.pt (e.g. disk full): start over rather than fail
            state = {}
        if (
            state.get("config") == cfg_dict
            and state.get("data_digest") == experiment["data_digest"]
        ):
            model.load_state_dict(state["model"])
            optimizer.load_state_dict(state["optimizer"])
            rng.bit_generator.state = state["rng"]
            torch.set_rng_state(state["torch_rng"])
            start_epoch, step, history = state["epoch"] + 1, state["step"], state["history"]
            best = state["best"]
    if on_start:
        on_start(cfg.epochs, len(train_set))

    patience_left = cfg.early_stop_patience
    for epoch in range(start_epoch, cfg.epochs + 1):
        stats, step = train_one_epoch(
            model,
            train_set,
            augment=augment,
            optimizer=optimizer,
            loss_fn=loss_fn,
            cfg=cfg,
            rng=rng,
            step=step,
            total_steps=total_steps,
            warmup_steps=warmup_steps,
            on_batch=on_batch,
        )
        val = evaluate_split(model, val_set, val_loss_fn, num_classes)
        row = {"epoch": epoch, **stats, **val}
        history.append(row)
        score = val["val_balanced_accuracy"] if len(val_set) else -row["train_loss"]
        if score > best["score"]:
            best = {
                "score": score,
                "epoch": epoch,
                "state": {k: v.clone() for k, v in model.state_dict().items()},
                "row": row,
            }
            patience_left = cfg.early_stop_patience
        else:
            patience_left -= 1
        _write_history(exp / "history.csv", history)
        _save_atomic(
            {
                "model": model.state_dict(),
                "optimizer": optimizer.state_dict(),
                "epoch": epoch,
                "step": step,
                "history": history,
                "best": best,
                "rng": rng.bit_generator.state,
                "torch_rng": torch.get_rng_state(),
                "config": cfg_dict,
                "data_digest": experiment["data_digest"],
            },
            last_path,
        )
        if on_epoch:
            on_epoch(row)
        if cfg.early_stop_patience and patience_left <= 0:
            break

    checkpoint = {
        "format": "trainkit-checkpoint-1",
        "model": best["state"],
        "config": cfg_dict,
        "class_set": class_set.to_dict(),
        "input_px": input_px,
        "best_epoch": best["epoch"],
        "best_val": best["row"],
        "experiment": experiment,
    }
    _save_atomic(checkpoint, exp / "checkpoint.pt")
    ips = [h["images_per_second"] for h in history if h["images_per_second"] > 0]
    return {
        "experiment": str(exp),
        "epochs_run": len(history),
        "best_epoch": best["epoch"],
        "best_val": best["row"],
        "median_images_per_second": float(np.median(ips)) if ips else 0.0,
        "training_patches": len(train_set),
        "validation_patches": len(val_set),
    }


def _write_history(path: Path, history: list[dict]) -> None:
    tmp = path.with_suffix(".csv.tmp")
    with tmp.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=HISTORY_FIELDS, extrasaction="ignore")
        w.writeheader()
        for row in history:
            w.writerow({k: (f"{v:.6g}" if isinstance(v, float) else v) for k, v in row.items()})
    os.replace(tmp, path)


def load_checkpoint(exp_or_file: str | Path) -> tuple[nn.Sequential, dict, ClassSet]:
    """Load an experiment's best checkpoint; returns (network in eval mode, checkpoint dict, class set)."""
    path = Path(exp_or_file)
    if path.is_dir():
        path = path / "checkpoint.pt"
    if not path.is_file():
        raise TrainingError(f"no checkpoint at {path}; run `trainkit train` first")
    # The checkpoint holds tensors and plain containers only: weights_only loading runs no code.
    try:
        ckpt = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # refused pickle, truncated zip, not a torch file
        raise TrainingError(
            f"{path} cannot be loaded as a trainkit checkpoint ({type(exc).__name__}); "
            "it may be damaged or not made by trainkit"
        ) from None
    if not isinstance(ckpt, dict) or ckpt.get("format") != "trainkit-checkpoint-1":
        raise TrainingError(f"{path} is not a trainkit checkpoint")
    cfg = TrainConfig.model_validate(ckpt["config"])
    class_set = class_set_from_dict(ckpt["class_set"])
    model = build_network(cfg, class_set.num_classes, load_weights=False)
    model.load_state_dict(ckpt["model"])
    model.eval()
    return model, ckpt, class_set
