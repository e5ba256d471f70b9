"""A trained network's penultimate features and class probabilities, for choosing what to label.

The features are the input of the classification head (the backbone record's ``head``):
the pooled features after the last stage, what timm calls ``forward_head(x,
pre_logits=True)``. A pick (:mod:`trainkit.labels.picking`) measures distances between
patches there for its k-center diversity step; an exported ONNX model exposes only its
probabilities, so :func:`model_scorer` prefers the experiment's checkpoint.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch
from torch import nn

from trainkit.core.experiment import Experiment
from trainkit.learning.config import TrainConfig
from trainkit.learning.models import backbone_record
from trainkit.learning.network import TrainingError, load_checkpoint

__all__ = ["CheckpointScorer", "head_of", "logits_and_features", "model_scorer"]


def head_of(network: nn.Sequential, backbone: str) -> nn.Module:
    """The classification head of ``network`` (Preprocess + backbone), from the registry."""
    return network[1].get_submodule(backbone_record(backbone).head.rstrip("."))


def logits_and_features(
    network: nn.Sequential, backbone: str, images: np.ndarray, *, batch_size: int = 64
) -> tuple[np.ndarray, np.ndarray]:
    """Logits (N, C) and the head's input flattened (N, D) of uint8 patches (N, S, S, 3)."""
    captured: list[torch.Tensor] = []
    hook = head_of(network, backbone).register_forward_pre_hook(
        lambda _module, args: captured.append(args[0].detach().flatten(1))
    )
    logits = []
    try:
        network.eval()
        with torch.no_grad():
            for i in range(0, len(images), batch_size):
                logits.append(
                    network(torch.from_numpy(np.ascontiguousarray(images[i : i + batch_size])))
                )
    finally:
        hook.remove()
    if not logits:
        return np.zeros((0, 0), np.float32), np.zeros((0, 0), np.float32)
    return torch.cat(logits).numpy(), torch.cat(captured).numpy()


class CheckpointScorer:
    """An experiment's trained checkpoint as a pick's scorer (:class:`trainkit.labels.picking.
    Scorer`): softmax probabilities, as evaluation computes them, and penultimate features.

    Args:
        exp_or_file: an experiment folder or its checkpoint file.
    """

    features_kind = "penultimate"

    def __init__(self, exp_or_file: str | Path) -> None:
        self.source = str(exp_or_file)
        self.network, ckpt, class_set = load_checkpoint(exp_or_file)
        self.backbone = TrainConfig.model_validate(ckpt["config"]).backbone
        self.input_px = int(ckpt["input_px"])
        self.class_names = tuple(class_set.names)

    def __call__(self, images: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        logits, feats = logits_and_features(self.network, self.backbone, images)
        probs = torch.softmax(torch.from_numpy(logits), dim=1).numpy().astype(np.float64)
        return probs, feats

    def close(self) -> None:
        """Nothing to release (the network is freed with the object)."""


def model_scorer(path: str | Path):
    """The scorer of ``--model PATH``: an experiment folder's checkpoint (penultimate
    features), else an exported ``model.onnx`` (its probabilities serve as features).

    Raises:
        TrainingError: neither a checkpoint nor an ONNX model at ``path``.
    """
    from trainkit.labels.picking import ScreenerScorer

    p = Path(path)
    if p.is_dir():
        exp = Experiment(p)
        if exp.checkpoint_path.is_file():
            return CheckpointScorer(p)
        if exp.model_path.is_file():
            return ScreenerScorer(exp.model_path)
        raise TrainingError(
            f"{p} holds neither a checkpoint nor an exported model; pass an experiment folder "
            "after `trainkit train`, or a model.onnx"
        )
    if p.suffix.lower() == ".onnx":
        return ScreenerScorer(p)
    return CheckpointScorer(p)
