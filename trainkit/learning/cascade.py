"""The cascade's first stage: a cheap network distilled from the trained main network, as an extra training phase.

The first stage answers one question per cell, "could the main network flag this?",
so it has two outputs (none, crack). It sees the patch averaged down to
``cascade.input_px`` (an exact area mean inside the network, so the exported graph takes
the same uint8 patch as the main network).

Loss (documented for the model card): soft cross-entropy of the first stage's two-class
softmax against the target ``q = w * p_main + (1 - w) * y``, where ``p_main`` is the main
network's screening probability ``1 - P(none)`` on the un-augmented training patch (eval
mode), ``y`` is 1 for a true crack patch and ``w`` is ``cascade.teacher_weight``.
Cross-entropy is linear in its target, so this equals ``w`` times the distillation loss plus
``1 - w`` times the usual loss on the true labels. Augmentation: a random symmetry of the
square per patch (the screening question does not change under it) and, with
``cascade.jitter``, a random contrast (x0.6-1.4 about the patch mean) and brightness (+-40
levels) per patch. That simple jitter, not the main network's albumentations block: with
the block's shadows and blur the first stage scored clean cells much higher at similar crack
scores (benchmarks/results/lab_notes.md). The pass threshold
is not chosen here: evaluation chooses it on validation, beside the main network's own
threshold (:func:`trainkit.judging.scoring.cascade_pass_threshold`).
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
import torch
from torch import nn

from trainkit.core.taxonomy import apply_d4
from trainkit.learning.config import CascadeConfig
from trainkit.learning.models import backbone_record, create_model_with_weights
from trainkit.learning.network import Preprocess, TrainingError
from trainkit.learning.steps import get_lr, head_module_name, predict_proba

__all__ = [
    "CASCADE_FORMAT",
    "build_stage1",
    "stage1_head_name",
    "distillation_loss",
    "train_stage1",
    "load_stage1",
]

#: The ``format`` of the first stage's record inside ``checkpoint.pt``.
CASCADE_FORMAT = "trainkit-cascade-1"


def build_stage1(cfg: CascadeConfig, patch_px: int, *, load_weights: bool = True) -> nn.Sequential:
    """Preprocess + area mean down to ``cfg.input_px`` + a two-class backbone.

    Raises:
        TrainingError: ``patch_px`` is not a whole multiple of ``cfg.input_px``.
    """
    return _stage1(cfg, patch_px, cfg.weights if load_weights else None)[0]


def _stage1(cfg: CascadeConfig, patch_px: int, weights: str | None) -> tuple[nn.Sequential, dict]:
    """:func:`build_stage1` starting from ``weights``, and their provenance record (the
    weights file read once for both)."""
    if patch_px % cfg.input_px:
        raise TrainingError(
            f"cascade.input_px {cfg.input_px} does not divide the patch size {patch_px}; "
            f"choose one of: {', '.join(str(d) for d in _divisors(patch_px))}"
        )
    record = backbone_record(cfg.backbone)
    factor = patch_px // cfg.input_px
    pool = nn.AvgPool2d(factor) if factor > 1 else nn.Identity()
    backbone, provenance = create_model_with_weights(cfg.backbone, 2, weights)
    return nn.Sequential(Preprocess(record.mean, record.std), pool, backbone), provenance


def _divisors(n: int) -> list[int]:
    return [d for d in range(16, n + 1) if n % d == 0]


def stage1_head_name(cfg: CascadeConfig) -> str:
    """Dotted name of the first stage's head (the backbone is module 2, after the pooling)."""
    return "2." + head_module_name(cfg.backbone).split(".", 1)[1]


def distillation_loss(
    logits: torch.Tensor, p_main: torch.Tensor, is_crack: torch.Tensor, teacher_weight: float
) -> torch.Tensor:
    """Mean soft cross-entropy of two-class ``logits`` against ``q = w * p_main + (1 - w) * y``.

    Args:
        logits: (n, 2) first-stage logits (none, crack).
        p_main: (n,) the main network's screening probability.
        is_crack: (n,) 1.0 for a true crack patch, else 0.0.
        teacher_weight: w in [0, 1].
    """
    q = teacher_weight * p_main + (1.0 - teacher_weight) * is_crack
    target = torch.stack([1.0 - q, q], dim=1)
    return -(target * torch.log_softmax(logits, dim=1)).sum(1).mean()


def _random_symmetry(batch: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A random rotation and flip of each patch (the first stage's label, crack or not, keeps)."""
    out = np.empty_like(batch)
    for i, img in enumerate(batch):
        k = int(rng.integers(4))  # drawn before the flip, as the stored seeds expect
        out[i] = apply_d4(img, k, bool(rng.integers(2)))
    return out


def _jitter(batch: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Random contrast (x0.6-1.4 about each patch's mean) and brightness (+-40 levels) per patch."""
    n = len(batch)
    contrast = rng.uniform(0.6, 1.4, (n, 1, 1, 1))
    shift = rng.uniform(-40.0, 40.0, (n, 1, 1, 1))
    x = batch.astype(np.float32)
    mean = x.mean(axis=(1, 2, 3), keepdims=True)
    return np.clip((x - mean) * contrast + mean + shift, 0, 255).astype(np.uint8)


def train_stage1(
    main: nn.Module,
    train_images: np.ndarray,
    train_labels: np.ndarray,
    cfg: CascadeConfig,
    *,
    num_classes: int,
    seed: int = 0,
    note: Callable[[str], None] | None = None,
) -> dict:
    """Distil the first stage from ``main``; returns its checkpoint record.

    Args:
        main: the trained main network (put in eval mode here).
        train_images, train_labels: the training patches (uint8) and their classes.
        cfg: the recipe's ``cascade`` block.
        num_classes: the main network's class count.
        seed: seeds initialisation, order and augmentation.
        note: called with a line of text.

    Returns:
        ``format``, ``model`` (state dict), ``config``, ``patch_px``, ``weights``, ``loss``,
        ``history`` (loss per epoch) and ``seconds`` (the phase's wall time, teacher included).
    """
    t0 = time.perf_counter()
    patch_px = int(train_images.shape[1])
    torch.manual_seed(seed)
    rng = np.random.default_rng(seed)
    net, weights = _stage1(cfg, patch_px, cfg.weights)
    if note:
        note(f"cascade: scoring {len(train_images)} training patches with the main network")
    with torch.no_grad():
        p_main = 1.0 - predict_proba(main.eval(), train_images, num_classes=num_classes)[:, 0]
    p_main = torch.from_numpy(p_main.astype(np.float32))
    y = torch.from_numpy((np.asarray(train_labels) != 0).astype(np.float32))
    optimizer = torch.optim.AdamW(net.parameters(), lr=cfg.lr, weight_decay=1e-4)
    steps_per_epoch = max(1, len(train_images) // cfg.batch_size)
    total, step, history = steps_per_epoch * cfg.epochs, 0, []
    for epoch in range(1, cfg.epochs + 1):
        net.train()
        order = rng.permutation(len(train_images))
        losses = []
        for b in range(steps_per_epoch):
            idx = np.sort(order[b * cfg.batch_size : (b + 1) * cfg.batch_size])
            x = _random_symmetry(train_images[idx], rng)
            x = torch.from_numpy(_jitter(x, rng) if cfg.jitter else x)
            lr = get_lr(step, total_steps=total, warmup_steps=steps_per_epoch, peak_lr=cfg.lr)
            for group in optimizer.param_groups:
                group["lr"] = lr
            loss = distillation_loss(net(x), p_main[idx], y[idx], cfg.teacher_weight)
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            optimizer.step()
            losses.append(float(loss.detach()))
            step += 1
        history.append({"epoch": epoch, "loss": float(np.mean(losses))})
        if note:
            note(f"cascade: epoch {epoch}/{cfg.epochs}, loss {history[-1]['loss']:.4f}")
    net.eval()
    return {
        "format": CASCADE_FORMAT,
        "model": {k: v.clone() for k, v in net.state_dict().items()},
        "config": cfg.model_dump(mode="json"),
        "patch_px": patch_px,
        "weights": weights,
        "loss": "soft cross-entropy against w * main screening probability + (1 - w) * true "
        f"crack, w = {cfg.teacher_weight:g}",
        "history": history,
        "seconds": round(time.perf_counter() - t0, 2),
    }


def load_stage1(record: dict) -> nn.Sequential:
    """The first stage of a checkpoint's ``cascade`` record, in eval mode.

    Raises:
        TrainingError: the record is not a first stage this kit wrote.
    """
    if not isinstance(record, dict) or record.get("format") != CASCADE_FORMAT:
        raise TrainingError(f"the checkpoint's cascade record is not {CASCADE_FORMAT}")
    cfg = CascadeConfig.model_validate(record["config"])
    net = build_stage1(cfg, int(record["patch_px"]), load_weights=False)
    net.load_state_dict(record["model"])
    return net.eval()
