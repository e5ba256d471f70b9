"""One epoch's building blocks: learning-rate schedule, sampling, stages, the optimiser loop, validation.

:mod:`trainkit.learning.training` runs them in order; each is small and testable alone.
"""

from __future__ import annotations

import math
import os
import queue
import threading
import time
from collections.abc import Callable

import numpy as np
import torch
from torch import nn

from trainkit.core.contract import screening_probability
from trainkit.core.cores import usable_cores
from trainkit.core.taxonomy import apply_d4
from trainkit.learning.config import TrainConfig
from trainkit.learning.data import Augmenter, PatchSet, batches
from trainkit.learning.models import HEADS, backbone_record
from trainkit.metrics import recall_at_false_alarm

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


def stage_module_names(backbone: str) -> list[str]:
    """Dotted names inside the network of the backbone record's ``stages`` (Preprocess is module 0)."""
    return ["1." + name for name in backbone_record(backbone).stages]


def set_stage(
    model: nn.Module, backbone: str, stage: str, *, freeze_bn_stats: bool = False
) -> None:
    """Freeze all but the head ('head') or unfreeze all ('full').

    Frozen layers run in eval mode, so their BatchNorm keeps its statistics. With
    ``freeze_bn_stats`` the backbone's BatchNorm layers stay in eval mode in the full
    stage too: their running mean and variance (from pretraining) are used and kept,
    while their scale and shift still learn; small batches then cannot disturb them.
    """
    head = head_module_name(backbone)
    for name, p in model.named_parameters():
        p.requires_grad = stage == "full" or name.startswith(head + ".")
    model.train()
    if stage == "head":
        model.eval()
        model.get_submodule(head).train()
    elif freeze_bn_stats:
        for name, m in model.named_modules():
            if isinstance(m, nn.modules.batchnorm._BatchNorm) and not name.startswith(head):
                m.eval()


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
            group["lr"] = lr * group.get("lr_scale", 1.0)
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
