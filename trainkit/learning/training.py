"""The training loop: fine-tune a backbone on a workspace's split, with checkpoints and resume.

An experiment folder (see :mod:`trainkit.core.experiment`) receives ``recipe.yaml`` (the resolved recipe),
``experiment.json`` (which workspace and split it used), ``history.csv`` (one row
per epoch, with throughput in images per second), ``resume.pt`` (for resuming after
a crash) and ``checkpoint.pt`` (the epoch with the best validation score).
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import queue
import threading
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch
import yaml
from torch import nn

from trainkit.core.contract import screening_probability
from trainkit.core.cores import usable_cores
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path, atomic_write_text
from trainkit.core.taxonomy import apply_d4, load_class_set
from trainkit.labels.splits import check_no_leak
from trainkit.labels.workspace import Workspace
from trainkit.learning.config import TrainConfig
from trainkit.learning.data import Augmenter, PatchSet, batches, load_patch_set
from trainkit.learning.models import HEADS
from trainkit.learning.network import TrainingError, build_network
from trainkit.metrics import recall_at_false_alarm

__all__ = ["build_network", "train", "predict_proba", "TrainingError", "HISTORY_FIELDS"]

HISTORY_FIELDS = (
    "epoch",
    "stage",
    "lr",
    "train_loss",
    "train_accuracy",
    "val_loss",
    "val_accuracy",
    "val_balanced_accuracy",
    "val_crack_recall",
    "val_recall_at_fa",
    "train_images_per_s",
    "seconds",
)


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


def lr_schedule(cfg: TrainConfig, steps_per_epoch: int) -> Callable[[int], float]:
    """Learning rate per optimiser step over the whole run.

    Each stage (head-only, then full) has its own linear warm-up and cosine decay
    (:func:`get_lr`), so unfreezing the backbone starts gently again.
    """
    warmup_steps = int(round(cfg.warmup_epochs * steps_per_epoch))
    head_steps = steps_per_epoch * cfg.head_epochs
    full_steps = steps_per_epoch * (cfg.epochs - cfg.head_epochs)

    def lr_at(step: int) -> float:
        if step < head_steps:
            return get_lr(
                step,
                total_steps=head_steps,
                warmup_steps=min(warmup_steps, head_steps // 2),
                peak_lr=cfg.lr,
            )
        return get_lr(
            step - head_steps, total_steps=full_steps, warmup_steps=warmup_steps, peak_lr=cfg.lr
        )

    return lr_at


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


def cpu_threads() -> int:
    """Threads to use: OMP_NUM_THREADS when set, else the cores this process may run on."""
    env = os.environ.get("OMP_NUM_THREADS", "")
    if env.isdigit() and int(env) > 0:
        return int(env)
    return usable_cores()


def epoch_seed(seed: int, epoch: int) -> int:
    """The seed of one epoch's randomness (order, sampling, augmentation, dropout).

    Deriving every epoch's generators from (seed, epoch) makes a resumed run draw
    exactly what an uninterrupted run draws, with no generator state to save.
    """
    return int(np.random.SeedSequence([seed % 2**32, epoch]).generate_state(1)[0])


def epoch_order(labels: np.ndarray, rng: np.random.Generator, sampling: str) -> np.ndarray:
    """Sample indices for one epoch: a permutation, or class-balanced draws with replacement.

    Balanced: ``len(labels)`` draws, each class equally likely, patches within a class
    uniformly (what torch's WeightedRandomSampler does with weights 1 / class count).
    """
    n = len(labels)
    if sampling == "shuffle":
        return rng.permutation(n)
    counts = np.bincount(labels)
    w = 1.0 / counts[labels]
    return rng.choice(n, size=n, replace=True, p=w / w.sum())


def stage_of(epoch: int, cfg: TrainConfig) -> str:
    """'head' while only the classification head trains, then 'full'."""
    return "head" if epoch <= cfg.head_epochs else "full"


def head_module_name(backbone: str) -> str:
    """Dotted name of the classification head inside the network (Preprocess is module 0)."""
    return "1." + HEADS[backbone].rstrip(".")


def set_stage(model: nn.Module, backbone: str, stage: str) -> None:
    """Freeze all but the head ('head') or unfreeze all ('full'); frozen BatchNorm keeps its statistics."""
    head = head_module_name(backbone)
    for name, p in model.named_parameters():
        p.requires_grad = stage == "full" or name.startswith(head + ".")
    model.train()
    if stage == "head":
        model.eval()
        model.get_submodule(head).train()


class _Prefetcher:
    """Builds the next batches (augment + stack) in a thread while the model runs on this one."""

    _DONE = object()

    def __init__(self, make_batches, depth: int = 2) -> None:
        self._q: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, args=(make_batches,), daemon=True)
        self._thread.start()

    def _put(self, item) -> bool:
        while not self._stop.is_set():
            try:
                self._q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def _run(self, make_batches) -> None:
        try:
            for item in make_batches():
                if not self._put(item):
                    return
        except BaseException as exc:  # handed to the consumer, raised there
            self._put(exc)
            return
        self._put(self._DONE)

    def __iter__(self):
        try:
            while True:
                item = self._q.get()
                if item is self._DONE:
                    return
                if isinstance(item, BaseException):
                    raise item
                yield item
        finally:
            self._stop.set()
            self._thread.join(timeout=5)


def _augmented_batches(data: PatchSet, order: np.ndarray, augment: Augmenter, rng, batch_size: int):
    for idx in batches(order, batch_size):
        if len(idx) < 2:  # BatchNorm cannot train on a batch of one
            continue
        pairs = [augment(data.images[i], int(data.labels[i]), rng) for i in idx]
        x = torch.from_numpy(np.stack([p[0] for p in pairs]))
        y = torch.tensor([p[1] for p in pairs], dtype=torch.long)
        yield x, y


def _fit(
    pairs,
    forward: Callable[[torch.Tensor], torch.Tensor],
    *,
    optimizer: torch.optim.Optimizer,
    loss_fn: nn.Module,
    lr_at: Callable[[int], float],
    step: int,
    bf16: bool = False,
    on_batch: Callable[[int], None] | None = None,
) -> tuple[dict, int]:
    """Optimiser steps over (x, y) batches; returns the epoch's stats and the next step."""
    total_loss = correct = seen = 0
    lr = 0.0
    t0 = time.perf_counter()
    for x, y in pairs:
        lr = lr_at(step)
        for group in optimizer.param_groups:
            group["lr"] = lr
        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=bf16):
            logits = forward(x)
        loss = loss_fn(logits.float(), y)
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()
        total_loss += float(loss.detach()) * len(y)
        correct += int((logits.argmax(1) == y).sum())
        seen += len(y)
        step += 1
        if on_batch:
            on_batch(len(y))
    seconds = time.perf_counter() - t0
    return {
        "lr": lr,
        "train_loss": total_loss / max(1, seen),
        "train_accuracy": correct / max(1, seen),
        "train_images_per_s": seen / seconds if seconds > 0 else 0.0,
        "seconds": seconds,
    }, step


def train_one_epoch(
    model: nn.Module,
    data: PatchSet,
    *,
    augment: Augmenter,
    optimizer: torch.optim.Optimizer,
    loss_fn: nn.Module,
    cfg: TrainConfig,
    rng: np.random.Generator,
    lr_at: Callable[[int], float],
    step: int,
    forward: Callable[[torch.Tensor], torch.Tensor] | None = None,
    on_batch: Callable[[int], None] | None = None,
) -> tuple[dict, int]:
    """One pass over the training patches (order from ``cfg.sampling``); returns stats and the next step."""
    order = epoch_order(data.labels, rng, cfg.sampling)
    source = lambda: _augmented_batches(data, order, augment, rng, cfg.batch_size)  # noqa: E731
    return _fit(
        _Prefetcher(source) if cfg.prefetch else source(),
        forward or model,
        optimizer=optimizer,
        loss_fn=loss_fn,
        lr_at=lr_at,
        step=step,
        bf16=cfg.bf16,
        on_batch=on_batch,
    )


@torch.no_grad()
def frozen_features(
    model: nn.Module, backbone: str, data: PatchSet, elements, batch_size: int = 64
) -> torch.Tensor:
    """Inputs of the head for every patch under every symmetry: (len(elements), N, ...).

    The network runs in eval mode with a hook on the head that records its input,
    so this works for every registered backbone without knowing its layout.
    """
    head = model.get_submodule(head_module_name(backbone))
    captured: list[torch.Tensor] = []
    hook = head.register_forward_pre_hook(
        lambda _m, args: captured.append(args[0].detach().clone())
    )
    model.eval()
    try:
        per_element = []
        for k, flip in elements:
            captured.clear()
            for idx in batches(np.arange(len(data)), batch_size):
                x = np.stack([apply_d4(data.images[i], k, flip) for i in idx])
                model(torch.from_numpy(np.ascontiguousarray(x)))
            per_element.append(torch.cat(captured))
    finally:
        hook.remove()
    return torch.stack(per_element)


def train_head_on_features(
    head: nn.Module,
    features: torch.Tensor,
    labels: np.ndarray,
    *,
    optimizer: torch.optim.Optimizer,
    loss_fn: nn.Module,
    cfg: TrainConfig,
    rng: np.random.Generator,
    lr_at: Callable[[int], float],
    step: int,
    on_batch: Callable[[int], None] | None = None,
) -> tuple[dict, int]:
    """One epoch of the head alone on cached features, one random symmetry per patch."""
    head.train()
    order = epoch_order(labels[0], rng, cfg.sampling)
    elem = rng.integers(features.shape[0], size=len(order))

    def pairs():
        for sl in batches(np.arange(len(order)), cfg.batch_size):
            if len(sl) < 2:
                continue
            idx, e = order[sl], elem[sl]
            yield (
                features[torch.from_numpy(e), torch.from_numpy(idx)],
                torch.from_numpy(labels[e, idx]),
            )

    return _fit(
        pairs(),
        head,
        optimizer=optimizer,
        loss_fn=loss_fn,
        lr_at=lr_at,
        step=step,
        on_batch=on_batch,
    )


def evaluate_split(
    model: nn.Module,
    data: PatchSet,
    loss_fn: nn.Module,
    num_classes: int,
    *,
    false_alarm_budget: float = 0.05,
    probs: np.ndarray | None = None,
) -> dict:
    """Validation loss, accuracy, balanced accuracy (= macro recall), crack recall at argmax
    and the best crack recall whose false-alarm rate stays within ``false_alarm_budget``.

    ``probs`` (N, C), when given, are used instead of running ``model`` on the images
    (the head-only stage on cached features computes them from cached inputs).
    """
    keys = (
        "val_loss",
        "val_accuracy",
        "val_balanced_accuracy",
        "val_crack_recall",
        "val_recall_at_fa",
    )
    if len(data) == 0:
        return dict.fromkeys(keys, float("nan"))
    if probs is None:
        probs = predict_proba(model, data.images, num_classes=num_classes)
    y = data.labels
    pred = probs.argmax(1)
    loss = float(loss_fn(torch.log(torch.from_numpy(probs).clamp_min(1e-12)), torch.from_numpy(y)))
    recalls = [float(np.mean(pred[y == c] == c)) for c in range(num_classes) if np.any(y == c)]
    crack = y != 0
    crack_recall = float(np.mean(pred[crack] != 0)) if crack.any() else float("nan")
    p_crack = screening_probability(probs.astype(np.float64))
    return {
        "val_loss": loss,
        "val_accuracy": float(np.mean(pred == y)),
        "val_balanced_accuracy": float(np.mean(recalls)),
        "val_crack_recall": crack_recall,
        "val_recall_at_fa": recall_at_false_alarm(crack, p_crack, budget=false_alarm_budget),
    }


def selection_score(row: dict, cfg: TrainConfig, has_val: bool) -> list[float]:
    """Checkpoint-selection key, compared lexicographically (higher is better).

    recall_at_fa: validation crack recall at the false-alarm budget, ties broken by macro
    recall then by lower validation loss; macro_recall: the other way round. Without a
    validation subset, the lowest training loss wins. A nan (e.g. no crack in val) ranks lowest.
    """
    if not has_val:
        return [-row["train_loss"]]
    a, b = row["val_recall_at_fa"], row["val_balanced_accuracy"]
    first, second = (a, b) if cfg.select_on == "recall_at_fa" else (b, a)
    return [v if v == v else -math.inf for v in (first, second, -row["val_loss"])]


# ----- the run ------------------------------------------------------------------------


def _save_atomic(obj: dict, path: Path) -> None:
    with atomic_path(path) as tmp:
        torch.save(obj, tmp)


def native_bf16() -> bool:
    """Whether this CPU does bfloat16 arithmetic natively (oneDNN's own check)."""
    return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())


def _check_bf16(cfg: TrainConfig) -> None:
    if cfg.bf16 and not native_bf16():
        raise TrainingError(
            "bf16: this CPU has no native bfloat16 arithmetic (AVX512-BF16 or AMX), so autocast "
            "would emulate it and run several times slower (measured in benchmarks/run.py); "
            "set bf16: false"
        )


def train(
    workspace: Workspace,
    exp_dir: str | Path,
    cfg: TrainConfig,
    *,
    resume: bool = True,
    on_epoch: Callable[[dict], None] | None = None,
    on_batch: Callable[[int], None] | None = None,
    on_start: Callable[[int, int], None] | None = None,
    on_note: Callable[[str], None] | None = None,
) -> dict:
    """Train on the workspace's train subset, select on val, write the experiment folder.

    Args:
        workspace: the workspace with labels and a split.
        exp_dir: experiment folder (created).
        cfg: the resolved training config.
        resume: continue from ``resume.pt`` if it exists and matches the config and data.
        on_epoch: called with each history row.
        on_batch: called with the batch size after every optimiser step.
        on_start: called with (epochs still to run, training patches per epoch) before training.
        on_note: called with a line of text about slow preparation steps.

    Returns:
        A summary: best epoch and its validation scores, paths, throughput.
    """
    experiment_folder = Experiment(exp_dir)
    exp = experiment_folder.path
    exp.mkdir(parents=True, exist_ok=True)
    experiment_folder.migrate()  # folders from before the rename keep resuming
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
    _check_bf16(cfg)
    note = on_note or (lambda _msg: None)
    torch.set_num_threads(cfg.threads or cpu_threads())
    torch.manual_seed(cfg.seed)

    train_set = load_patch_set(workspace, "train", class_set)
    val_set = load_patch_set(workspace, "val", class_set)
    if len(train_set) < 2:
        raise TrainingError(
            f"only {len(train_set)} labelled training patches; label more before training"
        )
    num_classes = class_set.num_classes
    input_px = workspace.tile_px

    model = build_network(cfg, num_classes)
    if cfg.weights is None and cfg.head_epochs:
        note(
            "note: head_epochs with weights: null trains a head on a randomly initialised "
            "backbone; it is meant for pretrained weights"
        )
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
    lr_at = lr_schedule(cfg, steps_per_epoch)

    forward = torch.compile(model) if cfg.compile else model

    cfg_dict = cfg.model_dump(mode="json")
    atomic_write_text(experiment_folder.recipe_path, yaml.safe_dump(cfg_dict, sort_keys=False))
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
    atomic_write_text(experiment_folder.provenance_path, json.dumps(experiment, indent=2))

    history: list[dict] = []
    start_epoch, step = 1, 0
    best: dict = {"score": None, "epoch": 0, "state": None, "row": None}
    # Early stopping counts full-network epochs only: a plateau while only the head
    # trains never ends the run, and unfreezing starts with the whole patience.
    patience_left = cfg.early_stop_patience
    last_path = experiment_folder.resume_path
    if resume and last_path.exists():
        try:
            state = torch.load(last_path, map_location="cpu", weights_only=True)
        except Exception:  # a damaged resume.pt (e.g. disk full): start over rather than fail
            state = {}
        if (
            state.get("format") == "trainkit-last-3"
            and state.get("config") == cfg_dict
            and state.get("data_digest") == experiment["data_digest"]
        ):
            model.load_state_dict(state["model"])
            optimizer.load_state_dict(state["optimizer"])
            start_epoch, step, history = state["epoch"] + 1, state["step"], state["history"]
            best = state["best"]
            patience_left = int(state["patience_left"])
            if state["stopped_early"]:
                start_epoch = cfg.epochs + 1  # the run had ended: rewrite its checkpoint only
                note(f"{last_path} is a run that stopped early at epoch {state['epoch']}")
            elif start_epoch > cfg.epochs:
                note(
                    f"{last_path} is a finished run of {state['epoch']} epochs "
                    "(--restart trains again from epoch 1)"
                )
            else:
                note(f"resuming after epoch {state['epoch']} from {last_path}")
        else:
            note(
                f"{last_path} cannot be resumed (another config, data set or kit version, "
                "or a damaged file); starting from epoch 1"
            )
    if on_start:  # the epochs still to run (all of them unless resuming)
        on_start(max(0, cfg.epochs - start_epoch + 1), len(train_set))

    has_val = len(val_set) > 0
    features = feature_labels = val_features = None
    cv2_threads = _cv2_threads(1)  # augmentation runs beside torch's threads: keep OpenCV to one
    try:
        for epoch in range(start_epoch, cfg.epochs + 1):
            stage = stage_of(epoch, cfg)
            seed = epoch_seed(cfg.seed, epoch)
            rng = np.random.default_rng(seed)
            torch.manual_seed(seed)
            augment.reseed(seed)
            set_stage(model, cfg.backbone, stage)
            if stage == "head" and cfg.cached_features:
                if features is None:
                    note(
                        f"computing frozen backbone features once: {len(train_set)} patches x "
                        f"{len(augment.elements)} symmetries"
                    )
                    features = frozen_features(model, cfg.backbone, train_set, augment.elements)
                    feature_labels = np.stack(
                        [augment.perms[e][train_set.labels] for e in augment.elements]
                    )
                head = model.get_submodule(head_module_name(cfg.backbone))
                stats, step = train_head_on_features(
                    head,
                    features,
                    feature_labels,
                    optimizer=optimizer,
                    loss_fn=loss_fn,
                    cfg=cfg,
                    rng=rng,
                    lr_at=lr_at,
                    step=step,
                    on_batch=on_batch,
                )
            else:
                features = val_features = None  # free the caches once the whole network trains
                stats, step = train_one_epoch(
                    model,
                    train_set,
                    augment=augment,
                    optimizer=optimizer,
                    loss_fn=loss_fn,
                    cfg=cfg,
                    rng=rng,
                    lr_at=lr_at,
                    step=step,
                    forward=forward,
                    on_batch=on_batch,
                )
            val_probs = None
            if stage == "head" and cfg.cached_features and has_val:
                # The frozen backbone gives the same head inputs every epoch: run the head only.
                if val_features is None:
                    val_features = frozen_features(model, cfg.backbone, val_set, [(0, False)])[0]
                head = model.get_submodule(head_module_name(cfg.backbone)).eval()
                with torch.no_grad():
                    val_probs = torch.softmax(head(val_features), dim=1).numpy()
            val = evaluate_split(
                model,
                val_set,
                val_loss_fn,
                num_classes,
                false_alarm_budget=cfg.false_alarm_budget,
                probs=val_probs,
            )
            row = {"epoch": epoch, "stage": stage, **stats, **val}
            history.append(row)
            score = selection_score(row, cfg, has_val)
            improved = best["score"] is None or score > best["score"]
            if improved:
                best = {
                    "score": score,
                    "epoch": epoch,
                    "state": {k: v.clone() for k, v in model.state_dict().items()},
                    "row": row,
                }
            if stage == "head" or epoch == cfg.head_epochs + 1 or improved:
                patience_left = cfg.early_stop_patience
            else:
                patience_left -= 1
            stop = bool(cfg.early_stop_patience) and patience_left <= 0
            _write_history(experiment_folder.history_path, history)
            _save_atomic(
                {
                    "format": "trainkit-last-3",
                    "model": model.state_dict(),
                    "optimizer": optimizer.state_dict(),
                    "epoch": epoch,
                    "step": step,
                    "history": history,
                    "best": best,
                    "patience_left": patience_left,
                    "stopped_early": stop,
                    "config": cfg_dict,
                    "data_digest": experiment["data_digest"],
                },
                last_path,
            )
            if on_epoch:
                on_epoch(row)
            if stop:
                break
    finally:
        _cv2_threads(cv2_threads)

    checkpoint = {
        "format": "trainkit-checkpoint-1",
        "model": best["state"],
        "config": cfg_dict,
        "class_set": class_set.to_dict(),
        "input_px": input_px,
        "best_epoch": best["epoch"],
        "best_val": best["row"],
        "selected_on": cfg.select_on if has_val else "train_loss",
        "experiment": experiment,
    }
    _save_atomic(checkpoint, experiment_folder.checkpoint_path)
    ips = [h["train_images_per_s"] for h in history if h["train_images_per_s"] > 0]
    return {
        "experiment": str(exp),
        "epochs_run": len(history),
        "best_epoch": best["epoch"],
        "best_val": best["row"],
        "median_images_per_second": float(np.median(ips)) if ips else 0.0,
        "training_patches": len(train_set),
        "validation_patches": len(val_set),
    }


def _cv2_threads(n: int) -> int:
    """Set OpenCV's thread count; returns the previous one."""
    import cv2

    old = cv2.getNumThreads()
    cv2.setNumThreads(n)
    return old


def _write_history(path: Path, history: list[dict]) -> None:
    with atomic_path(path) as tmp:
        with tmp.open("w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=HISTORY_FIELDS, extrasaction="ignore")
            w.writeheader()
            for row in history:
                w.writerow({k: (f"{v:.6g}" if isinstance(v, float) else v) for k, v in row.items()})
