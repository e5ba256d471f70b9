"""The one-graph ONNX cascade: equal to its two stages run apart (ONNX Runtime and PyTorch),
with zero, some and all cells passed."""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch

from trainkit.core.contract import FAMILIARITY_NAME, INPUT_NAME, OUTPUT_NAME, REACHED_NAME
from trainkit.judging.cascade_graph import cascade_to_onnx, clean_vector, run_cascade_torch
from trainkit.judging.export import network_to_onnx
from trainkit.judging.familiarity_graph import fit_graph
from trainkit.learning.cascade import build_stage1, stage1_head_name
from trainkit.learning.config import CascadeConfig, TrainConfig
from trainkit.learning.network import build_network

PX = 32


@pytest.fixture(scope="module")
def stages():
    """A random-init main network (6 classes) and a first stage with its familiarity, tiny."""
    torch.manual_seed(0)
    rng = np.random.default_rng(0)
    main = build_network(TrainConfig(backbone="tiny_cnn"), 6, load_weights=False).eval()
    cfg = CascadeConfig(input_px=16)
    first = build_stage1(cfg, PX, load_weights=False).eval()
    images = rng.integers(0, 256, (48, PX, PX, 3), dtype=np.uint8)
    images[:24] //= 3  # two kinds of patches, so the first stage's scores spread
    graph, _ = fit_graph(first, stage1_head_name(cfg), images, rng.integers(0, 6, 48), images[:8])
    s1_onnx = network_to_onnx(graph, PX)
    main_onnx = network_to_onnx(main, PX)
    with torch.no_grad():
        scores = 1 - graph(torch.from_numpy(images))[0][:, 0].numpy()
    return main, graph, s1_onnx, main_onnx, images, scores


def _session(proto):
    return ort.InferenceSession(proto.SerializeToString(), providers=["CPUExecutionProvider"])


def _apart_in_onnxruntime(s1_onnx, main_onnx, images, t):
    """The two stages as separate ONNX Runtime sessions, glued in numpy."""
    p1, fam = _session(s1_onnx).run(None, {INPUT_NAME: images})
    passed = (1.0 - p1[:, 0]) >= np.float32(t)
    out = np.tile(clean_vector(6), (len(images), 1))
    if passed.any():
        out[passed] = _session(main_onnx).run(None, {INPUT_NAME: images[passed]})[0]
    return out, fam, passed


@pytest.mark.parametrize("which", ["none", "some", "all"])
def test_one_graph_equals_the_stages_run_apart(stages, which):
    main, graph, s1_onnx, main_onnx, images, scores = stages
    t = {"none": 1.0, "some": float(np.median(scores)), "all": 0.0}[which]
    proto = cascade_to_onnx(s1_onnx, main_onnx, PX, t)
    onnx.checker.check_model(proto, full_check=True)
    sess = _session(proto)
    assert [o.name for o in sess.get_outputs()] == [OUTPUT_NAME, FAMILIARITY_NAME, REACHED_NAME]
    got_p, got_f, got_r = sess.run(None, {INPUT_NAME: images})
    ref_p, ref_f, ref_r = _apart_in_onnxruntime(s1_onnx, main_onnx, images, t)
    torch_p, torch_f, torch_r = run_cascade_torch(graph, main, images, t, batch=16)
    expected_passed = {"none": 0, "some": None, "all": len(images)}[which]
    if expected_passed is not None:
        assert got_r.sum() == expected_passed
    else:
        assert 0 < got_r.sum() < len(images)
    assert got_r.dtype == np.bool_ and np.array_equal(got_r, ref_r) and np.array_equal(got_r, torch_r)
    np.testing.assert_allclose(got_p, ref_p, atol=1e-6)
    np.testing.assert_allclose(got_p, torch_p, atol=1e-5)
    np.testing.assert_allclose(got_f, ref_f, rtol=1e-6)
    np.testing.assert_allclose(got_f, torch_f, rtol=1e-4)
    # cells not passed carry exactly the fixed clean vector; familiarity covers every cell
    assert np.array_equal(got_p[~got_r], np.tile(clean_vector(6), (int((~got_r).sum()), 1)))
    assert got_f.shape == (len(images),) and np.isfinite(got_f).all()


def test_batches_of_one_and_a_threshold_outside_zero_one(stages):
    main, graph, s1_onnx, main_onnx, images, scores = stages
    t = float(np.median(scores))
    sess = _session(cascade_to_onnx(s1_onnx, main_onnx, PX, t))
    for i in range(4):
        p, _, r = sess.run(None, {INPUT_NAME: images[i : i + 1]})
        ref_p, _, ref_r = _apart_in_onnxruntime(s1_onnx, main_onnx, images[i : i + 1], t)
        assert np.array_equal(r, ref_r) and np.allclose(p, ref_p, atol=1e-6)
    with pytest.raises(ValueError, match=r"pass_threshold must be in \[0, 1\], got 1.5"):
        cascade_to_onnx(s1_onnx, main_onnx, PX, 1.5)
