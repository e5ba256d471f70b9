"""The network that is trained, evaluated and exported: preprocessing layer + backbone, and checkpoint loading."""

from __future__ import annotations

from pathlib import Path

import torch
from torch import nn

from trainkit.core.errors import TrainkitError
from trainkit.core.experiment import Experiment
from trainkit.core.taxonomy import ClassSet, class_set_from_dict
from trainkit.learning.config import TrainConfig
from trainkit.learning.models import (
    IMAGENET_MEAN,
    IMAGENET_STD,
    backbone_record,
    create_model,
    create_model_with_weights,
)


class TrainingError(TrainkitError):
    """Training cannot start or continue; the message says why and what to do."""


class Preprocess(nn.Module):
    """uint8 (N, S, S, 3) RGB -> float (N, 3, S, S) normalised as the backbone's weights expect.

    It is the first layer of every network, so the exported ONNX graph takes raw
    uint8 pixels and nobody downstream has to know the normalisation. ``mean`` and
    ``std`` are per channel of [0, 1] RGB (the registry record's; ImageNet's by default).
    """

    def __init__(
        self,
        mean: tuple[float, float, float] = IMAGENET_MEAN,
        std: tuple[float, float, float] = IMAGENET_STD,
    ) -> None:
        super().__init__()
        mean = torch.tensor(mean, dtype=torch.float32).view(1, 3, 1, 1) * 255.0
        std = torch.tensor(std, dtype=torch.float32).view(1, 3, 1, 1) * 255.0
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
    """Preprocess (the backbone record's mean/std) + backbone: trained, evaluated and exported."""
    if load_weights:
        return start_network(cfg, num_classes)[0]
    record = backbone_record(cfg.backbone)
    return nn.Sequential(
        Preprocess(record.mean, record.std), create_model(cfg.backbone, num_classes)
    )


def start_network(cfg: TrainConfig, num_classes: int) -> tuple[nn.Sequential, dict]:
    """:func:`build_network` with the recipe's weights, and the provenance record of those
    weights (:func:`~trainkit.learning.models.weights_provenance`), the file read once."""
    record = backbone_record(cfg.backbone)
    backbone, weights = create_model_with_weights(cfg.backbone, num_classes, cfg.weights)
    return nn.Sequential(Preprocess(record.mean, record.std), backbone), weights


def load_checkpoint(exp_or_file: str | Path) -> tuple[nn.Sequential, dict, ClassSet]:
    """Load an experiment's best checkpoint; returns (network in eval mode, checkpoint dict, class set)."""
    path = Path(exp_or_file)
    if path.is_dir():
        path = Experiment(path).checkpoint_path
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
