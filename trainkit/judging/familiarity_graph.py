"""The exported screener's two outputs: class probabilities and the unfamiliar-surface score.

At export the network is split at its classification head: the body gives the
penultimate features, the head the logits. The detector of :mod:`trainkit.core.familiarity`
(Lee et al., NeurIPS 2018: smallest Mahalanobis distance to a class mean, tied covariance)
is fitted on the training patches' features and its threshold set on the validation
patches (their 99th percentile by default). :class:`ScreenerGraph` computes both outputs
inside one graph, so a downstream tool gets the score without knowing the method.
"""

from __future__ import annotations

import copy

import numpy as np
import torch
from torch import nn

from trainkit.core import familiarity as F

__all__ = ["split_head", "penultimate_features", "FamiliarityScore", "ScreenerGraph", "fit_graph"]

#: Training patches used to fit the summary at most (a seeded random subset beyond it).
MAX_FIT_PATCHES = 4000


def split_head(network: nn.Module, head_name: str) -> tuple[nn.Module, nn.Module]:
    """(body, head): a copy of ``network`` whose head is an identity, and the head itself.

    Args:
        network: Preprocess + backbone (``trainkit.learning.network.build_network``).
        head_name: dotted name of the head module inside ``network``.
    """
    body = copy.deepcopy(network).eval()
    parent_name, _, leaf = head_name.rpartition(".")
    parent = body.get_submodule(parent_name) if parent_name else body
    head = getattr(parent, leaf)
    setattr(parent, leaf, nn.Identity())
    return body, copy.deepcopy(head).eval()


@torch.no_grad()
def penultimate_features(body: nn.Module, images: np.ndarray, batch_size: int = 64) -> np.ndarray:
    """(n, d) float32 features of uint8 patches (n, S, S, 3)."""
    out = [body(torch.from_numpy(np.ascontiguousarray(images[i : i + batch_size]))).float()
           for i in range(0, len(images), batch_size)]  # fmt: skip
    return torch.cat(out).flatten(1).numpy() if out else np.zeros((0, 0), np.float32)


class FamiliarityScore(nn.Module):
    """Smallest Mahalanobis distance of features to a class mean, as graph operations."""

    def __init__(self, summary: F.FamiliaritySummary) -> None:
        super().__init__()
        comp = summary.components
        if comp is None:
            comp = np.eye(summary.dim, dtype=np.float32)
        self.register_buffer("mean", torch.from_numpy(summary.mean.astype(np.float32)))
        self.register_buffer("components", torch.from_numpy(comp.astype(np.float32)))
        self.register_buffer(
            "class_means", torch.from_numpy(summary.class_means.astype(np.float32))
        )
        self.register_buffer("precision", torch.from_numpy(summary.precision.astype(np.float32)))

    def forward(self, features: torch.Tensor) -> torch.Tensor:
        z = (features.flatten(1) - self.mean) @ self.components.T  # (N, k)
        diff = z.unsqueeze(1) - self.class_means.unsqueeze(0)  # (N, C, k)
        d2 = ((diff @ self.precision) * diff).sum(-1)  # (N, C)
        return torch.sqrt(torch.clamp(d2.min(dim=1).values, min=0.0))


class ScreenerGraph(nn.Module):
    """uint8 patches -> (softmax probabilities (N, C), familiarity (N,))."""

    def __init__(self, body: nn.Module, head: nn.Module, score: FamiliarityScore) -> None:
        super().__init__()
        self.body, self.head, self.score = body, head, score

    def forward(self, image: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        f = self.body(image)
        return torch.softmax(self.head(f), dim=1), self.score(f)


def fit_graph(
    network: nn.Module,
    head_name: str,
    train_images: np.ndarray,
    train_labels: np.ndarray,
    val_images: np.ndarray,
    *,
    k: int = 64,
    quantile: float = 0.99,
    seed: int = 0,
) -> tuple[ScreenerGraph, dict]:
    """Fit the familiarity summary and build the two-output graph.

    Args:
        network: the trained network in eval mode.
        head_name: its classification head's dotted name.
        train_images, train_labels: training patches (uint8) and classes.
        val_images: validation patches; their scores set the threshold.
        k: principal components kept (see :func:`trainkit.core.familiarity.fit`).
        quantile: of the validation cells' scores, the threshold.
        seed: picks the training subset when there are more than :data:`MAX_FIT_PATCHES`.

    Returns:
        The graph and the ``familiarity`` metadata: threshold, rule, method, counts.

    Raises:
        ValueError: fewer than two training patches or no validation patch.
    """
    if len(train_images) < 2 or len(val_images) == 0:
        raise ValueError(
            f"the familiarity summary needs training and validation patches, got "
            f"{len(train_images)} and {len(val_images)}"
        )
    if len(train_images) > MAX_FIT_PATCHES:
        pick = np.sort(np.random.default_rng(seed).permutation(len(train_images))[:MAX_FIT_PATCHES])
        train_images, train_labels = train_images[pick], train_labels[pick]
    body, head = split_head(network, head_name)
    summary = F.fit(penultimate_features(body, train_images), np.asarray(train_labels), k=k)
    val_scores = F.scores(summary, penultimate_features(body, val_images))
    threshold = F.threshold_from_validation(val_scores, quantile)
    info = {
        "threshold": round(float(threshold), 4),
        "rule": "a frame is unfamiliar when the median of its cells' familiarity exceeds the threshold",
        "quantile": quantile,
        "method": "smallest Mahalanobis distance of penultimate features to a training class "
        "mean, tied covariance with Ledoit-Wolf shrinkage (Lee et al. 2018)",
        "components": int(summary.class_means.shape[1]),
        "feature_dim": summary.dim,
        "fitted_on_patches": int(len(train_images)),
        "threshold_from_patches": int(len(val_images)),
    }
    return ScreenerGraph(body, head, FamiliarityScore(summary)).eval(), info
