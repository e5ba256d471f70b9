"""The pure helpers of benchmarks/job_trust.py (per-cell truth, the census figures) and the
reserved surface family of benchmarks/reserved.py that its frames use.

The benchmark itself (training, scans, 200 repetitions) stays out of the suite: even its
--quick run takes about a minute on 2 cores.
"""

from __future__ import annotations

import json
from dataclasses import replace

import cv2
import numpy as np
import pytest
from conftest import benchmark_module
from sklearn.metrics import confusion_matrix, recall_score, roc_auc_score

from trainkit.core.grid import grid_boxes
from trainkit.core.taxonomy import load_class_set
from trainkit.synth import Crack, SynthOptions, generate_photo, write_dataset


@pytest.fixture(scope="module")
def jt():
    with benchmark_module("job_trust") as module:
        yield module


@pytest.fixture(scope="module")
def broom():
    with benchmark_module("reserved") as module:
        yield module.BROOM


def line(p0, p1, width=1.0, crack_id=0) -> Crack:
    return Crack(np.array([p0, p1], float), np.full(2, width), kind="main", crack_id=crack_id)


def test_cell_truth_follows_the_label_rules_on_hand_geometry(jt):
    """Hand-worked on a 4 x 3 grid of 64 px cells (rules: LabelRules defaults, a crack counts
    inside the box shrunk by 0.05 * 64 = 3.2 px and needs 0.15 * 64 = 9.6 px there; a
    crack within half its width + 1 px = 1.5 px outside a box makes the box ambiguous)."""
    boxes = np.array([tuple(int(v) for v in b) for b in grid_boxes(192, 256, 64, 64)])
    cracks = [
        line((0.0, 96.5), (150.0, 96.5), crack_id=0),  # row 1: 64, 64, 18.8 px counted
        line((200.0, 160.0), (205.0, 160.0), crack_id=1),  # row 2, col 3: a 5 px stub
        line((70.0, 129.0), (120.0, 129.0), crack_id=2),  # 1 px below row 1, col 1
    ]
    codes, reasons = jt.cell_truth(cracks, boxes)
    grid = {(int(b[1]) // 64, int(b[0]) // 64): int(c) for b, c in zip(boxes, codes, strict=True)}
    C, N, A = jt.CRACK, jt.CLEAN, jt.AMBIGUOUS
    expected = {
        (0, 0): N, (0, 1): N, (0, 2): N, (0, 3): N,
        (1, 0): C, (1, 1): C, (1, 2): C, (1, 3): N,
        # row 2, col 1: the y = 129 crack lies inside but within the 3.2 px margin: a stub.
        (2, 0): N, (2, 1): A, (2, 2): N, (2, 3): A,
    }  # fmt: skip
    assert grid == expected
    assert reasons == {"crack stub too short": 2}
    # Without the row-1 crack, the y = 129 line is 1 px outside cell (1, 1): its edge shows.
    codes, reasons = jt.cell_truth(cracks[2:], boxes)
    assert codes[1 * 4 + 1] == A and reasons["crack edge just outside the cell"] == 1


def test_true_figures_match_scikit_learn(jt):
    rng = np.random.default_rng(3)
    truth = rng.choice([jt.CLEAN, jt.CRACK, jt.AMBIGUOUS], size=500, p=[0.8, 0.15, 0.05])
    p = np.clip(rng.normal(0.3 + 0.4 * (truth == jt.CRACK), 0.2), 0, 1)
    f = jt.true_figures(p, truth, 0.5)
    keep = truth != jt.AMBIGUOUS
    y, pred = truth[keep] == jt.CRACK, p[keep] >= 0.5
    tn, fp, fn, tp = confusion_matrix(y, pred).ravel()  # scikit-learn's order for 0/1
    assert f["recall"] == pytest.approx(recall_score(y, pred))
    assert f["false_alarm_rate"] == pytest.approx(fp / (fp + tn))
    assert f["recall_k_n"] == [tp, tp + fn] and f["false_alarm_k_n"] == [fp, fp + tn]
    assert f["roc_auc"] == pytest.approx(roc_auc_score(y, p[keep]))
    assert f["ambiguous_cells"] == int((~keep).sum())
    assert f["flagged_share_all_cells"] == pytest.approx(np.mean(p >= 0.5))


def test_familiarity_summary_reports_the_export_and_the_frame_auc(jt):
    # Frame AUC by hand (Mann-Whitney count): of the 2 x 3 (default, reserved) pairs, the
    # reserved frame scores higher in 5 and ties in none, so AUC = 5 / 6.
    scans = {
        "default": {"frame_scores": np.array([1.0, 2.5])},
        "broom": {"frame_scores": np.array([2.0, 3.0, 4.0])},
    }
    exported = {
        "threshold": 1.9,
        "threshold_rule": "split-conformal",
        "calibration_frames": 19,
        "false_warning_bound": 0.05,
        "layers": [{"name": "1.blocks.0"}, {"name": "penultimate"}],
    }
    f = jt.familiarity_summary(exported, scans)
    assert f["frame_auc_reserved_vs_default"] == pytest.approx(5 / 6)
    assert f["layers"] == ["1.blocks.0", "penultimate"] and f["threshold"] == 1.9
    assert "no familiarity" in jt.familiarity_summary(None, scans)["note"]


def test_frames_are_reproducible_and_the_families_differ(jt, tmp_path):
    plan = jt.Plan(1, "demo", 1, 0.0, 2, 96, 128, (10,), 1, 10)
    a = jt.make_frames(tmp_path / "a", plan, "broom", 5)
    jt.make_frames(tmp_path / "b", plan, "broom", 5)
    d = jt.make_frames(tmp_path / "d", plan, "default", 5)
    for name in a:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
    # Same plan, other surface: the same cracks (truth), other pixels.
    for (na, ca), (nd, cd) in zip(sorted(a.items()), sorted(d.items()), strict=True):
        assert na.replace("broom-", "") == nd.replace("default-", "")
        assert all(np.array_equal(x.points, y.points) for x, y in zip(ca, cd, strict=True))
        assert (tmp_path / "a" / na).read_bytes() != (tmp_path / "d" / nd).read_bytes()


def test_job_adapt_oracle_recall_is_the_best_recall_within_the_budget(jt):
    """benchmarks/job_adapt.py's reference figure: the best recall at any threshold whose
    false-alarm rate stays within 10 %, checked by trying every threshold by hand."""
    with benchmark_module("job_adapt") as ja:
        recall_within = ja.recall_within
    rng = np.random.default_rng(4)
    truth = rng.choice([jt.CLEAN, jt.CRACK, jt.AMBIGUOUS], 300, p=[0.6, 0.3, 0.1]).astype(np.int8)
    p = np.clip(0.35 * (truth == jt.CRACK) + rng.random(300) * 0.7, 0, 1)
    keep = truth != jt.AMBIGUOUS
    crack, clean = truth[keep] == jt.CRACK, truth[keep] == jt.CLEAN
    best = 0.0
    for t in np.unique(np.r_[p[keep], 1.1]):
        flagged = p[keep] >= t
        if flagged[clean].mean() <= 0.10:
            best = max(best, flagged[crack].mean())
    assert recall_within(p, truth, 0.10) == pytest.approx(best)


# ----- the reserved surface family (benchmarks/reserved.py) ---------------------------------


def test_broom_surface_changes_pixels_not_cracks_and_is_reproducible(broom) -> None:
    opts = SynthOptions(height=160, width=224, scene="multi")
    reserved = replace(opts, surface=broom)
    a, b = generate_photo(21, reserved), generate_photo(21, reserved)
    assert np.array_equal(a.image, b.image)  # same seed, same pixels
    assert not np.array_equal(a.image, generate_photo(22, reserved).image)
    d = generate_photo(21, opts)
    # Another surface, the same crack truth (the geometry has its own random stream).
    assert np.array_equal(a.mask, d.mask) and a.to_json_dict() == d.to_json_dict()
    diff = np.abs(a.image.astype(float) - d.image.astype(float))
    assert diff.mean() > 10.0  # not a nudge: a different palette, texture, light and camera
    # The default surface draws no broom stream: the explicit default is the implicit one.
    assert np.array_equal(d.image, generate_photo(21, replace(opts, surface="default")).image)


def test_broom_surface_is_warmer_and_noisier_than_the_default(broom) -> None:
    """Colour and grain measured with OpenCV on crack-free, distractor-free frames: the
    reserved paste is warmer (mean red over mean blue, numpy) and its camera leaves more
    fine noise (residual of a 5x5 median filter, cv2.medianBlur)."""
    red_blue, grain = {}, {}
    for name, surface in (("default", "default"), ("broom", broom)):
        rb, gr = [], []
        for seed in range(6):
            img = generate_photo(
                seed,
                SynthOptions(
                    height=128, width=128, scene="none", distractors=False, surface=surface
                ),
            ).image
            rgb = img.astype(float)
            rb.append(rgb[:, :, 0].mean() / rgb[:, :, 2].mean())
            grey = cv2.cvtColor(img, cv2.COLOR_RGB2GRAY)
            gr.append(np.abs(grey.astype(float) - cv2.medianBlur(grey, 5)).mean())
        red_blue[name], grain[name] = np.mean(rb), np.mean(gr)
    assert red_blue["broom"] > red_blue["default"] + 0.03
    assert grain["broom"] > grain["default"]


def test_a_dataset_of_the_reserved_family_names_it_in_its_manifest(broom, tmp_path) -> None:
    write_dataset(
        tmp_path / "d",
        n_photos=1,
        seed=3,
        tile_px=64,
        options=SynthOptions(height=64, width=64, surface=broom),
        class_set=load_class_set("presence"),
    )
    manifest = json.loads((tmp_path / "d" / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["options"]["surface"] == "broom"
