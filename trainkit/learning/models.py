"""Backbone registry: build a compact classifier by name, with pretrained weights from a local file.

The registry is a plain dict of name -> builder. Every builder returns a
``torch.nn.Module`` that maps float images (N, 3, S, S), normalised with the
ImageNet mean and standard deviation, to class logits (N, C).

Weights: ``weights=None`` starts from random initialisation; ``weights="imagenet"``
reads torchvision's published ImageNet weights from torch's hub cache and never
touches the network (a missing file is an error naming where to put it);
``weights="torchvision"`` does the same but downloads a missing file on a connected
machine; ``weights=PATH`` loads a backbone state dict saved with
``torch.save(model.state_dict(), PATH)``. The classification head is always new.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Callable
from pathlib import Path

import torch
from torch import nn

__all__ = ["BACKBONES", "create_model", "load_backbone_weights", "IMAGENET_MEAN", "IMAGENET_STD"]

IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)


class TinyCNN(nn.Module):
    """A small plain CNN (about 0.2 M parameters) that trains quickly from scratch on CPU.

    A stride-2 5x5 stem keeps hairline detail while halving the resolution, then four
    conv-BN-ReLU stages with max-pooling and global average pooling.
    """

    def __init__(self, num_classes: int, widths: tuple[int, ...] = (24, 32, 64, 96, 128)) -> None:
        super().__init__()

        def stage(cin: int, cout: int, pool: bool) -> list[nn.Module]:
            layers: list[nn.Module] = [
                nn.Conv2d(cin, cout, 3, padding=1, bias=False),
                nn.BatchNorm2d(cout),
                nn.ReLU(inplace=True),
            ]
            return [*layers, nn.MaxPool2d(2)] if pool else layers

        w = widths
        layers: list[nn.Module] = [
            nn.Conv2d(3, w[0], 5, stride=2, padding=2, bias=False),
            nn.BatchNorm2d(w[0]),
            nn.ReLU(inplace=True),
        ]
        for i in range(1, len(w)):
            layers += stage(w[i - 1], w[i], pool=i < len(w) - 1)
        self.features = nn.Sequential(*layers)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.classifier = nn.Sequential(
            nn.Flatten(), nn.Dropout(0.2), nn.Linear(w[-1], num_classes)
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.classifier(self.pool(self.features(x)))


def _tiny_cnn(num_classes: int) -> nn.Module:
    return TinyCNN(num_classes)


def _mobilenet_v3_small(num_classes: int) -> nn.Module:
    from torchvision.models import mobilenet_v3_small

    m = mobilenet_v3_small(weights=None)
    m.classifier[-1] = nn.Linear(m.classifier[-1].in_features, num_classes)
    return m


def _mobilenet_v3_large(num_classes: int) -> nn.Module:
    from torchvision.models import mobilenet_v3_large

    m = mobilenet_v3_large(weights=None)
    m.classifier[-1] = nn.Linear(m.classifier[-1].in_features, num_classes)
    return m


def _resnet18(num_classes: int) -> nn.Module:
    from torchvision.models import resnet18

    m = resnet18(weights=None)
    m.fc = nn.Linear(m.fc.in_features, num_classes)
    return m


def _efficientnet_b0(num_classes: int) -> nn.Module:
    from torchvision.models import efficientnet_b0

    m = efficientnet_b0(weights=None)
    m.classifier[-1] = nn.Linear(m.classifier[-1].in_features, num_classes)
    return m


def _shufflenet_v2_x1_0(num_classes: int) -> nn.Module:
    from torchvision.models import shufflenet_v2_x1_0

    m = shufflenet_v2_x1_0(weights=None)
    m.fc = nn.Linear(m.fc.in_features, num_classes)
    return m


def _regnet_x_400mf(num_classes: int) -> nn.Module:
    from torchvision.models import regnet_x_400mf

    m = regnet_x_400mf(weights=None)
    m.fc = nn.Linear(m.fc.in_features, num_classes)
    return m


#: name -> builder(num_classes). Head parameter names per backbone are in HEADS.
BACKBONES: dict[str, Callable[[int], nn.Module]] = {
    "tiny_cnn": _tiny_cnn,
    "mobilenet_v3_small": _mobilenet_v3_small,
    "mobilenet_v3_large": _mobilenet_v3_large,
    "resnet18": _resnet18,
    "efficientnet_b0": _efficientnet_b0,
    "shufflenet_v2_x1_0": _shufflenet_v2_x1_0,
    "regnet_x_400mf": _regnet_x_400mf,
}

#: Prefix of the classification head's parameters (never loaded from pretrained weights).
HEADS: dict[str, str] = {
    "tiny_cnn": "classifier.",
    "mobilenet_v3_small": "classifier.3.",
    "mobilenet_v3_large": "classifier.3.",
    "resnet18": "fc.",
    "efficientnet_b0": "classifier.1.",
    "shufflenet_v2_x1_0": "fc.",
    "regnet_x_400mf": "fc.",
}

#: torchvision's weight enum names for weights="torchvision".
_TORCHVISION_WEIGHTS = {
    "mobilenet_v3_small": "MobileNet_V3_Small_Weights",
    "mobilenet_v3_large": "MobileNet_V3_Large_Weights",
    "resnet18": "ResNet18_Weights",
    "efficientnet_b0": "EfficientNet_B0_Weights",
    "shufflenet_v2_x1_0": "ShuffleNet_V2_X1_0_Weights",
    "regnet_x_400mf": "RegNet_X_400MF_Weights",
}


def create_model(name: str, num_classes: int, *, weights: str | Path | None = None) -> nn.Module:
    """Build a registered backbone with a fresh ``num_classes`` head.

    Raises:
        ValueError: unknown backbone name (the message lists the valid names) or
            unusable weights.
    """
    if name not in BACKBONES:
        raise ValueError(
            f"unknown backbone {name!r}; choose one of: {', '.join(sorted(BACKBONES))}"
        )
    if num_classes < 2:
        raise ValueError(f"num_classes must be at least 2, got {num_classes}")
    model = BACKBONES[name](num_classes)
    if weights is not None:
        load_backbone_weights(model, name, weights)
    return model


def _torchvision_weights(name: str):
    import torchvision.models as tvm

    enum_name = _TORCHVISION_WEIGHTS.get(name)
    if enum_name is None:
        raise ValueError(
            f"backbone {name!r} has no ImageNet weights in torchvision; use a weights file"
        )
    return enum_name, getattr(tvm, enum_name).DEFAULT


def imagenet_weights_path(name: str) -> Path:
    """Where torch's hub cache keeps torchvision's ImageNet weights for a backbone."""
    _, weights = _torchvision_weights(name)
    return Path(torch.hub.get_dir()) / "checkpoints" / Path(weights.url).name


_HASH_IN_NAME = re.compile(r"-([a-f0-9]{6,})\.")


def _check_name_hash(path: Path) -> None:
    """If the file name carries a hash prefix (name-<hex>.pth), the SHA-256 must start with it."""
    m = _HASH_IN_NAME.search(path.name)
    if not m:
        return
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    if not h.hexdigest().startswith(m.group(1)):
        raise ValueError(
            f"weights file {path.name} is damaged or not the published file: its SHA-256 does not "
            f"start with {m.group(1)} as its name says"
        )


def _state_dict_from_source(name: str, weights: str | Path) -> tuple[dict, str]:
    """Resolve a weight source to a state dict; 'imagenet' and paths never touch the network."""
    if str(weights) == "torchvision":  # may download, on a connected machine
        enum_name, w = _torchvision_weights(name)
        try:
            return w.get_state_dict(progress=False), f"torchvision {enum_name}.DEFAULT"
        except Exception as exc:
            raise ValueError(
                f"could not get torchvision's {enum_name}.DEFAULT ({type(exc).__name__}); on an offline "
                f"machine copy the file to {imagenet_weights_path(name)} and use weights: imagenet"
            ) from None
    if str(weights) == "imagenet":
        path = imagenet_weights_path(name)
        if not path.is_file():
            raise ValueError(
                f"ImageNet weights for {name!r} not found: expected {path}. Copy the file "
                f"{path.name} there from a machine with network (torchvision saves it in the same "
                "place), or set TORCH_HOME to the folder that holds checkpoints/"
            )
        source = f"imagenet ({path.name})"
    else:
        path = Path(weights)
        if not path.is_file():
            raise ValueError(f"weights file {path} does not exist")
        source = f"file {path.name}"
    _check_name_hash(path)
    try:
        # weights_only=True: a weights file never runs code when loaded.
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:
        raise ValueError(f"weights file {path.name} is not a loadable state dict ({exc})") from None
    if isinstance(state, dict) and isinstance(state.get("state_dict"), dict):
        state = state["state_dict"]
    if not isinstance(state, dict):
        raise ValueError(f"weights file {path.name} does not hold a state dict")
    return state, source


def load_backbone_weights(model: nn.Module, name: str, weights: str | Path) -> dict:
    """Load pretrained backbone weights into ``model``, skipping the classification head.

    Sources: ``"imagenet"`` (torchvision's published ImageNet weights, read from torch's
    hub cache only: :func:`imagenet_weights_path` says where), ``"torchvision"`` (the
    same, downloaded when missing), or a path to a state dict (its SHA-256 is checked
    when the file name carries a hash prefix, as torchvision's files do).

    Returns a summary: how many tensors were loaded, how many head tensors were skipped,
    and the source.

    Raises:
        ValueError: missing or damaged file, not a state dict, or weights of another model.
    """
    state, source = _state_dict_from_source(name, weights)
    head = HEADS[name]
    own = model.state_dict()
    to_load, skipped_head, mismatched = {}, [], []
    for k, v in state.items():
        if k.startswith(head):
            skipped_head.append(k)
        elif k in own and own[k].shape == v.shape:
            to_load[k] = v
        else:
            mismatched.append(k)
    backbone_keys = [k for k in own if not k.startswith(head)]
    missing = [k for k in backbone_keys if k not in to_load]
    if not to_load or mismatched or missing:
        raise ValueError(
            f"weights do not fit backbone {name!r}: {len(to_load)} tensors match, "
            f"{len(mismatched)} unexpected or of another shape (e.g. {mismatched[:2]}), "
            f"{len(missing)} missing (e.g. {missing[:2]})"
        )
    model.load_state_dict(to_load, strict=False)
    return {"loaded": len(to_load), "skipped_head": len(skipped_head), "source": source}
