"""The two-output graph: where the ensemble taps each backbone, and the warning end to end."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from torch import nn

from trainkit.export.familiarity_graph import fit_graph, split_head, stage_ends
from trainkit.learning.models import create_model
from trainkit.learning.network import Preprocess
from trainkit.learning.steps import head_module_name, stage_module_names


def _body(name: str) -> nn.Module:
    net = nn.Sequential(Preprocess(), create_model(name, 6)).eval()
    return split_head(net, head_module_name(name))[0]


@pytest.mark.parametrize("name", ["tiny_cnn", "mobilenet_v3_small", "efficientnet_lite0"])
def test_stage_ends_match_the_libraries_own_stage_lists(name):
    """The record's stages and the automatic rule give the same taps, and they are the
    stage ends the libraries name themselves: timm's ``feature_info`` for Lite0;
    for torchvision's MobileNetV3 the block before each stride-2 block (its ``_is_cn`` flag,
    which torchvision's detection backbones split stages on) and the last; for the tiny CNN
    the layer before each max-pooling and the last."""
    body = _body(name)
    taps = stage_ends(body, 128, stage_module_names(name))
    assert taps == stage_ends(body, 128, None)
    net = body[1]
    if name == "efficientnet_lite0":
        want = [f["module"] for f in net.feature_info]
    elif name == "mobilenet_v3_small":
        cn = [i for i, b in enumerate(net.features) if getattr(b, "_is_cn", False)]
        want = [f"features.{i - 1}" for i in cn] + [f"features.{len(net.features) - 1}"]
    else:
        layers = list(net.features)
        pools = [i for i, m in enumerate(layers) if isinstance(m, nn.MaxPool2d)]
        want = [f"features.{i - 1}" for i in pools] + [f"features.{len(layers) - 1}"]
    assert taps == ["1." + w for w in want]


def _concrete(rng, n: int, s: int, cast=(0, 0, 0)) -> np.ndarray:
    """Grey mottled patches (a photo-wide tint, smoothed noise), optionally colour-cast."""
    tint = rng.normal(0, 6, size=(1, 1, 1, 3))
    noise = rng.normal(0, 14, size=(n, s // 4, s // 4, 3)).repeat(4, 1).repeat(4, 2)
    x = np.array([128, 126, 120]) + tint + noise + rng.normal(0, 5, size=(n, s, s, 3))
    return np.clip(x + np.array(cast), 0, 255).astype(np.uint8)


def test_a_colour_cast_frame_is_warned_and_a_familiar_one_is_not(tmp_path):
    """Small synthetic case, tiny CNN (seeded random weights): fitted on grey patches of 14
    photos, calibrated on 19 others; a new grey frame stays quiet, the same frame with a
    colour cast is warned about. The metadata survives encode / decode and the Screener.
    (Measured outside the test with this fit: 0 of 40 new grey frames and 40 of 40 cast
    ones warned; 4 of 60 grey 16-cell photos, near the 5 % bound.)"""
    import onnx

    from trainkit.core.contract import ModelInfo, decode_metadata, encode_metadata
    from trainkit.export.onnx_file import network_to_onnx
    from trainkit.screener.model import Screener

    s = 32
    torch.manual_seed(0)
    net = nn.Sequential(Preprocess(), create_model("tiny_cnn", 2)).eval()
    rng = np.random.default_rng(3)
    train = np.concatenate([_concrete(rng, 16, s) for _ in range(14)])
    labels = rng.integers(0, 2, len(train))
    val = np.concatenate([_concrete(rng, 8, s) for _ in range(19)])
    photos = np.repeat([f"p{i}" for i in range(19)], 8)
    graph, fam = fit_graph(
        net, head_module_name("tiny_cnn"), train, labels, val, val_photos=photos,
        stages=stage_module_names("tiny_cnn"),
    )  # fmt: skip
    # 19 photos: the largest median is the conformal threshold at alpha 0.05 (1 / 20).
    assert fam["calibration_frames"] == 19 and fam["false_warning_bound"] == 0.05
    info = ModelInfo(class_names=["none", "crack"], patch_px=s, threshold=0.5, familiarity=fam)
    meta = encode_metadata(info)
    assert decode_metadata(meta).familiarity == json.loads(json.dumps(fam))
    proto = network_to_onnx(graph, s)
    onnx.helper.set_model_props(proto, meta)
    onnx.save(proto, tmp_path / "m.onnx")
    frame = _concrete(np.random.default_rng(99), 48, s).reshape(6, 8, s, s, 3)
    frame = frame.transpose(0, 2, 1, 3, 4).reshape(6 * s, 8 * s, 3)  # 6 x 8 cells
    cast = np.clip(frame.astype(int) + [40, 0, -30], 0, 255).astype(np.uint8)
    with Screener(tmp_path / "m.onnx") as screener:
        assert screener.info.familiarity == decode_metadata(meta).familiarity
        quiet, warned = screener.crack_map(frame), screener.crack_map(cast)
    assert quiet.unfamiliar is False and warned.unfamiliar is True
    assert quiet.familiarity_score <= fam["threshold"] < warned.familiarity_score
