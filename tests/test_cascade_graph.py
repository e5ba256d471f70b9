"""The one-graph ONNX cascade: equal to its two stages run apart (ONNX Runtime and PyTorch),
with zero, some and all cells passed."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from PIL import Image

from trainkit.core.contract import FAMILIARITY_NAME, INPUT_NAME, OUTPUT_NAME, REACHED_NAME
from trainkit.export.cascade_graph import cascade_to_onnx, clean_vector, run_cascade_torch
from trainkit.export.familiarity_graph import fit_graph
from trainkit.export.onnx_file import network_to_onnx
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
    assert (
        got_r.dtype == np.bool_ and np.array_equal(got_r, ref_r) and np.array_equal(got_r, torch_r)
    )
    np.testing.assert_allclose(got_p, ref_p, atol=1e-6)
    np.testing.assert_allclose(got_p, torch_p, atol=1e-5)
    np.testing.assert_allclose(got_f, ref_f, rtol=1e-6)
    np.testing.assert_allclose(got_f, torch_f, rtol=1e-4)
    # cells not passed carry exactly P(none) = 1 (written out here, not taken from the module);
    # familiarity covers every cell
    clean = np.array([1, 0, 0, 0, 0, 0], np.float32)
    assert np.array_equal(got_p[~got_r], np.tile(clean, (int((~got_r).sum()), 1)))
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


# ----- end to end: the demo's checkpoint with a first stage, evaluated, exported, scanned


@pytest.fixture(scope="module")
def cascade_experiment(demo_run, tmp_path_factory):
    """The demo's experiment with a first stage distilled from it (tiny_cnn at 32 px)."""
    import shutil

    from trainkit.learning.cascade import train_stage1
    from trainkit.learning.data import load_patch_set
    from trainkit.learning.network import load_checkpoint
    from trainkit.store.workspace import Workspace

    out, _ = demo_run
    exp = tmp_path_factory.mktemp("cascade") / "exp"
    exp.mkdir()
    for name in ("checkpoint.pt", "experiment.json", "recipe.yaml"):
        shutil.copy2(out / name, exp / name)
    model, ckpt, cs = load_checkpoint(exp)
    train = load_patch_set(Workspace.open(out / "workspace"), "train", cs, input_px=128)
    cfg = CascadeConfig(input_px=32, epochs=2)
    ckpt["cascade"] = train_stage1(
        model, train.images, train.labels, cfg, num_classes=cs.num_classes
    )
    torch.save(ckpt, exp / "checkpoint.pt")
    return exp, out


def _evaluate_and_export(exp, monkeypatch, max_drop):
    from trainkit.export.onnx_file import export_experiment
    from trainkit.judging import scoring
    from trainkit.judging.evaluation import evaluate_experiment

    monkeypatch.setattr(scoring, "CASCADE_MAX_RECALL_DROP", max_drop)
    metrics = evaluate_experiment(exp)
    return metrics, export_experiment(exp, cascade=True)


def test_an_accepted_cascade_is_exported_as_one_graph_and_the_screener_counts(
    cascade_experiment, monkeypatch, tmp_path
):
    from trainkit.core.contract import CASCADE_VERSION
    from trainkit.export.onnx_file import ExportError, read_metadata
    from trainkit.export.quantize import quantize_experiment
    from trainkit.screener.model import Screener
    from trainkit.screener.scan import scan_frames

    exp, demo = cascade_experiment
    metrics, res = _evaluate_and_export(exp, monkeypatch, 1.0)  # the gate lets any cascade by
    block = metrics["cascade"]
    assert block["gate"]["passed"] and res["contract"] == CASCADE_VERSION
    assert res["cascade"]["pass_threshold"] == pytest.approx(block["pass_threshold"], abs=1e-6)
    meta = read_metadata(exp / "model.onnx")
    headline = json.loads(meta["test_metrics"])
    assert headline["screening_recall"] == block["cascade"]["recall"]  # what the file does
    assert headline["main_network"]["screening_recall"] == metrics["screening"]["recall"]
    assert "## Cascade" in (exp / "model-card.md").read_text()
    assert "what the exported file does" in (exp / "evaluation" / "report.html").read_text()
    # the Screener: reached cells are those the first stage alone (ONNX Runtime) passes
    frame = np.asarray(Image.open(sorted((demo / "frames").glob("*.jpg"))[0]).convert("RGB"))
    with Screener(exp / "model.onnx") as screener:
        assert not screener.notes
        fp = screener.cut(frame)
        cm = screener.crack_map_from_patches(fp)
    first = _first_stage_onnx(exp)
    p1 = first.run(None, {INPUT_NAME: fp.patches})[0]
    passed = (1 - p1[:, 0]) >= np.float32(block["pass_threshold"])
    assert np.array_equal(cm.reached.ravel(), passed)
    assert cm.main_model_cells == int(passed.sum())
    assert not cm.flagged[~cm.reached].any()
    # the scan: per-frame lines and the summary count them
    summary = scan_frames(exp / "model.onnx", [demo / "frames"], tmp_path / "scan")
    lines = [json.loads(x) for x in (tmp_path / "scan" / "frames.jsonl").read_text().splitlines()]
    assert all(0 <= r["main_model_cells"] <= r["cells"] for r in lines)
    assert summary["main_model_cells"] == sum(r["main_model_cells"] for r in lines)
    assert summary["main_model_cells_recorded"] == summary["main_model_cells"]
    first_line = next(
        r
        for r in lines
        if r["frame"].endswith(Path(sorted((demo / "frames").glob("*.jpg"))[0]).name)
    )
    assert first_line["main_model_cells"] == cm.main_model_cells
    # int8 is not tried on a cascade, and the reason is given
    with pytest.raises(ExportError, match="int8 skipped: model.onnx is a two-stage cascade"):
        quantize_experiment(exp)


def _first_stage_onnx(exp):
    """The first stage exported on its own, from the checkpoint (reference for the counts)."""
    from trainkit.learning.cascade import load_stage1

    ckpt = torch.load(exp / "checkpoint.pt", weights_only=True)
    return _session(network_to_onnx(load_stage1(ckpt["cascade"]), 128))


def test_a_refused_cascade_is_exported_without_it_and_says_so(cascade_experiment, monkeypatch):
    exp, _ = cascade_experiment
    metrics, res = _evaluate_and_export(exp, monkeypatch, -1.0)  # no cascade can pass
    verdict = metrics["cascade"]["gate"]["verdict"]
    assert verdict.startswith("REFUSED") and "exported without the cascade" in verdict
    assert res["contract"] == "trainkit-screener-2" and res["cascade"] is None
    assert res["cascade_skipped"] == verdict


def test_an_accepted_cascade_is_written_only_when_asked(cascade_experiment, monkeypatch):
    """Without cascade=True (`export --cascade`) the file is the main network alone, and the
    reason names the warning's blindness and the way to ask."""
    from trainkit.core.caution import CASCADE_WARNING_CAVEAT
    from trainkit.export.onnx_file import export_experiment
    from trainkit.judging.evaluation import evaluate_experiment

    exp, _ = cascade_experiment
    monkeypatch.setattr("trainkit.judging.scoring.CASCADE_MAX_RECALL_DROP", 1.0)
    assert evaluate_experiment(exp)["cascade"]["gate"]["passed"]
    res = export_experiment(exp)
    assert res["contract"] == "trainkit-screener-2" and res["cascade"] is None
    assert (
        "--cascade" in res["cascade_skipped"] and CASCADE_WARNING_CAVEAT in res["cascade_skipped"]
    )
    card = (exp / "model-card.md").read_text()
    assert "`model.onnx` has no cascade" in card and "--cascade" in card
