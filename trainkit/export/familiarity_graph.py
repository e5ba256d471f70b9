"""The exported screener's two outputs: class probabilities and the unfamiliar-surface score.

At export the network is split at its classification head: the body gives the
penultimate features, the head the logits. Forward hooks tap the body at the end of each
stage (:func:`stage_ends`: the last module to finish at each spatial resolution of its
feature maps), whose maps are global-average-pooled. The feature ensemble of
:mod:`trainkit.core.familiarity` (Lee et al., NeurIPS 2018: per layer the smallest
Mahalanobis distance to a class mean, tied covariance; layers combined as the mean of
distance / its median on the training patches) is fitted on the training patches, and
the frame threshold on the validation photos (split-conformal, 5 % by default). :class:`ScreenerGraph`
computes the probabilities and the per-cell score inside one graph, so a downstream tool
gets the score without knowing the method.
"""

from __future__ import annotations

import copy
from collections.abc import Sequence

import numpy as np
import torch
from torch import nn

from trainkit.core import familiarity as F

__all__ = [
    "split_head",
    "stage_ends",
    "TappedBody",
    "tapped_features",
    "FamiliarityScore",
    "EnsembleScore",
    "ScreenerGraph",
    "fit_graph",
]

#: Training patches used to fit the summary at most (a seeded random subset beyond it).
MAX_FIT_PATCHES = 4000
#: Name of the penultimate features among the ensemble's layers.
PENULTIMATE = "penultimate"


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
def stage_ends(body: nn.Module, patch_px: int, stages: Sequence[str] | None = None) -> list[str]:
    """The modules tapped for the ensemble: the end of each stage of the body.

    Candidates are the stages: the direct children of the containers named in ``stages``
    (a name that is not an ``nn.Sequential`` or ``nn.ModuleList`` is a stage itself); with
    None, of the body's container with the most children that output 4-D maps (timm's
    ``blocks``, torchvision's ``features``). One forward pass on a blank batch records each
    candidate's output; for each spatial resolution between the input's and 1 x 1, the
    last candidate to finish at it is tapped: the end of a stage, as Lee et al. tap a ResNet
    or DenseNet at the end of each block.

    Args:
        body: the network without its head (:func:`split_head`).
        patch_px: the input size S.
        stages: dotted names inside ``body`` (see above), or None.

    Returns:
        Dotted module names, from the finest resolution to the coarsest.
    """
    finished: list[tuple[str, int]] = []
    handles = []

    def hook_all(modules) -> None:
        for name, module in modules:

            def hook(_m, _i, out, name=name) -> None:
                if isinstance(out, torch.Tensor) and out.ndim == 4:
                    finished.append((name, int(out.shape[2])))

            handles.append(module.register_forward_hook(hook))

    if stages is None:
        hook_all((n, m) for n, m in body.named_modules() if n)
    else:
        hook_all(_stage_modules(body, stages))
    try:
        body(torch.zeros((2, patch_px, patch_px, 3), dtype=torch.uint8))
    finally:
        for h in handles:
            h.remove()
    if stages is None:
        counts: dict[str, int] = {}
        for name, _ in finished:
            parent = name.rpartition(".")[0]
            if parent and isinstance(body.get_submodule(parent), nn.Sequential | nn.ModuleList):
                counts[parent] = counts.get(parent, 0) + 1
        best = max(counts, key=counts.get, default=None)
        finished = [(n, r) for n, r in finished if n.rpartition(".")[0] == best]
    last: dict[int, str] = {}
    for name, res in finished:
        if 1 < res < patch_px:
            last[res] = name
    return [last[r] for r in sorted(last, reverse=True)]


def _stage_modules(body: nn.Module, stages: Sequence[str]) -> list[tuple[str, nn.Module]]:
    out = []
    for name in stages:
        module = body.get_submodule(name)
        if isinstance(module, nn.Sequential | nn.ModuleList):
            out += [(f"{name}.{child}", m) for child, m in module.named_children()]
        else:
            out.append((name, module))
    return out


class TappedBody(nn.Module):
    """The body with forward hooks: uint8 patches -> list of pooled features, one per layer.

    The list holds the global-average-pooled output of each module in ``taps`` (N, c_l),
    then the penultimate features (N, d).
    """

    def __init__(self, body: nn.Module, taps: Sequence[str]) -> None:
        super().__init__()
        self.body = body
        self.taps = list(taps)
        self._pooled: dict[str, torch.Tensor] = {}
        for name in self.taps:
            body.get_submodule(name).register_forward_hook(self._keeper(name))

    def _keeper(self, name: str):
        def hook(_m, _i, out: torch.Tensor) -> None:
            self._pooled[name] = out.float().mean(dim=(2, 3))

        return hook

    def forward(self, image: torch.Tensor) -> list[torch.Tensor]:
        self._pooled.clear()
        f = self.body(image).float().flatten(1)
        # Popped, not read: no tensor stays on the module after a call (torch.export
        # warns about tensor attributes assigned during export).
        return [self._pooled.pop(name) for name in self.taps] + [f]


@torch.no_grad()
def tapped_features(
    tapped: TappedBody, images: np.ndarray, batch_size: int = 64
) -> list[np.ndarray]:
    """Per layer, the (n, c_l) float32 pooled features of uint8 patches (n, S, S, 3)."""
    parts = [tapped(torch.from_numpy(np.ascontiguousarray(images[i : i + batch_size])))
             for i in range(0, len(images), batch_size)]  # fmt: skip
    return [torch.cat([p[j] for p in parts]).numpy() for j in range(len(parts[0]))]


class FamiliarityScore(nn.Module):
    """Smallest Mahalanobis distance of one layer's features to a class mean, as graph operations."""

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


class EnsembleScore(nn.Module):
    """Per layer distance / scale, averaged over layers (:func:`trainkit.core.familiarity.ensemble_scores`)."""

    def __init__(self, summaries: Sequence[F.FamiliaritySummary], scales: Sequence[float]) -> None:
        super().__init__()
        self.layers = nn.ModuleList(FamiliarityScore(s) for s in summaries)
        self.register_buffer("inv_scales", torch.tensor([1.0 / s for s in scales]))

    def forward(self, features: list[torch.Tensor]) -> torch.Tensor:
        d = torch.stack([layer(f) for layer, f in zip(self.layers, features, strict=True)], 1)
        return (d * self.inv_scales).mean(dim=1)


class ScreenerGraph(nn.Module):
    """uint8 patches -> (softmax probabilities (N, C), familiarity (N,))."""

    def __init__(self, tapped: TappedBody, head: nn.Module, score: EnsembleScore) -> None:
        super().__init__()
        self.tapped, self.head, self.score = tapped, head, score

    def forward(self, image: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        feats = self.tapped(image)
        logits = self.head(feats[-1])
        return torch.softmax(logits, dim=1), self.score(feats)


def fit_graph(
    network: nn.Module,
    head_name: str,
    train_images: np.ndarray,
    train_labels: np.ndarray,
    val_images: np.ndarray,
    *,
    val_photos: Sequence[str] | None = None,
    stages: Sequence[str] | None = None,
    k: int = 64,
    alpha: float = 0.05,
    seed: int = 0,
) -> tuple[ScreenerGraph, dict]:
    """Fit the familiarity ensemble and the frame threshold; build the two-output graph.

    Args:
        network: the trained network in eval mode.
        head_name: its classification head's dotted name.
        train_images, train_labels: training patches (uint8) and classes.
        val_images: validation patches: the medians of their photos' scores set the frame
            threshold.
        val_photos: the photo of each validation patch; None treats every patch as a
            frame of its own.
        stages: where the network's stages end (:func:`stage_ends`; the backbone record's
            ``stages``, prefixed as inside ``network``); None finds them.
        k: principal components kept per layer (see :func:`trainkit.core.familiarity.fit`).
        alpha: tolerated share of false warnings on frames like the validation photos
            (:func:`trainkit.core.familiarity.frame_threshold`).
        seed: picks the training subset when there are more than :data:`MAX_FIT_PATCHES`.

    Returns:
        The graph and the ``familiarity`` metadata: threshold, rule, method, layers, counts.

    Raises:
        ValueError: fewer than two training patches, no validation patch, or a photo list
            of another length.
    """
    if len(train_images) < 2 or len(val_images) == 0:
        raise ValueError(
            f"the familiarity summary needs training and validation patches, got "
            f"{len(train_images)} and {len(val_images)}"
        )
    photos = np.arange(len(val_images)) if val_photos is None else np.asarray(val_photos)
    if len(photos) != len(val_images):
        raise ValueError(
            f"expected one photo per validation patch, got {len(photos)} for {len(val_images)}"
        )
    if len(train_images) > MAX_FIT_PATCHES:
        pick = np.sort(np.random.default_rng(seed).permutation(len(train_images))[:MAX_FIT_PATCHES])
        train_images, train_labels = train_images[pick], train_labels[pick]
    body, head = split_head(network, head_name)
    taps = stage_ends(body, int(train_images.shape[1]), stages)
    probe = tapped_features(TappedBody(copy.deepcopy(body), taps), train_images)
    # A stage whose pooled map is the penultimate vector itself (global pooling then the
    # head) would count twice: keep the penultimate one.
    keep = [i for i in range(len(taps)) if not any(_same(probe[i], p) for p in probe[i + 1 :])]
    taps = [taps[i] for i in keep]
    train_feats = [probe[i] for i in keep] + [probe[-1]]
    tapped = TappedBody(body, taps)
    val_feats = tapped_features(tapped, val_images)
    labels = np.asarray(train_labels)
    summaries = [F.fit(f, labels, k=k) for f in train_feats]
    # Scales from the training patches: the validation photos stay untouched by the score,
    # so the conformal threshold below keeps its guarantee (scales from the validation
    # photos broke it: benchmarks/results/lab_notes.md).
    scales = [F.layer_scale(F.scores(s, f)) for s, f in zip(summaries, train_feats, strict=True)]
    val_dist = [F.scores(s, f) for s, f in zip(summaries, val_feats, strict=True)]
    val_cells = F.ensemble_scores(val_dist, scales)
    frames = F.group_medians(val_cells, photos)
    threshold, bound = F.frame_threshold(frames, alpha)
    names = [*taps, PENULTIMATE]
    info = {
        "threshold": round(float(threshold), 4),
        "rule": "a frame is unfamiliar when the median of its cells' familiarity exceeds the threshold",
        "score": "per cell, the mean over layers of the layer's Mahalanobis distance divided by "
        "its median on the training patches (about 1 for a typical training patch)",
        "method": "feature ensemble of Lee et al. 2018: smallest Mahalanobis distance of "
        "globally pooled stage ends and penultimate features to a training class mean, "
        "tied covariance with Ledoit-Wolf shrinkage",
        "threshold_rule": f"split-conformal quantile of the validation photos' medians, "
        f"alpha {alpha}",
        "alpha": alpha,
        "false_warning_bound": round(float(bound), 4),
        "calibration_frames": int(frames.size),
        "calibration_frame_scores_min_median_max": [
            round(float(v), 4) for v in (frames.min(), np.median(frames), frames.max())
        ],
        "layers": [
            {
                "name": n,
                "dim": s.dim,
                "components": int(s.class_means.shape[1]),
                "scale": round(float(c), 4),
            }
            for n, s, c in zip(names, summaries, scales, strict=True)
        ],
        "fitted_on_patches": int(len(train_images)),
        "threshold_from_patches": int(len(val_images)),
    }
    graph = ScreenerGraph(tapped, head, EnsembleScore(summaries, scales))
    return graph.eval(), info


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    return a.shape == b.shape and bool(np.allclose(a, b, rtol=1e-5, atol=1e-6))
