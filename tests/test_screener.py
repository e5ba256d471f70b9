"""The ONNX-only Screener: cell grid, thresholds, metadata checks, and no torch import."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from trainkit.screener.crackmap import CrackMap
from trainkit.screener.model import Screener, ScreenerError

S = 32


def brightness_model(
    path, *, patch_px=S, threshold=0.5, patch_mm=None, meta_extra=None, drop=(), familiarity=None
):
    """A hand-built ONNX graph: darker patches get a higher crack probability.

    logits = [(mean - 128) / 10, (128 - mean) / 10] over the patch's mean grey, softmax.
    With ``familiarity`` (a threshold), a contract-2 model whose second output is
    |mean - 128| / 10: grey near 128 is "familiar", very bright or dark is not.
    """
    image = helper.make_tensor_value_info("image", TensorProto.UINT8, ["N", patch_px, patch_px, 3])
    probs = helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", 2])
    nodes = [
        helper.make_node("Cast", ["image"], ["x"], to=TensorProto.FLOAT),
        helper.make_node("ReduceMean", ["x", "axes"], ["m"], keepdims=0),
        helper.make_node("Sub", ["m", "c128"], ["d"]),
        helper.make_node("Div", ["d", "c10"], ["l0"]),
        helper.make_node("Neg", ["l0"], ["l1"]),
        helper.make_node("Unsqueeze", ["l0", "ax1"], ["u0"]),
        helper.make_node("Unsqueeze", ["l1", "ax1"], ["u1"]),
        helper.make_node("Concat", ["u0", "u1"], ["logits"], axis=1),
        helper.make_node("Softmax", ["logits"], ["probabilities"], axis=1),
    ]
    inits = [
        helper.make_tensor("axes", TensorProto.INT64, [3], [1, 2, 3]),
        helper.make_tensor("c128", TensorProto.FLOAT, [], [128.0]),
        helper.make_tensor("c10", TensorProto.FLOAT, [], [10.0]),
        helper.make_tensor("ax1", TensorProto.INT64, [1], [1]),
    ]
    outputs = [probs]
    if familiarity is not None:
        nodes += [
            helper.make_node("Abs", ["l0"], ["familiarity"]),
        ]
        outputs.append(helper.make_tensor_value_info("familiarity", TensorProto.FLOAT, ["N"]))
    graph = helper.make_graph(nodes, "brightness", [image], outputs, initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)])
    model.ir_version = 9
    meta = {
        "trainkit.format": "trainkit-screener-1" if familiarity is None else "trainkit-screener-2",
        "class_names": json.dumps(["none", "crack"]),
        "patch_px": str(patch_px),
        "threshold": json.dumps(threshold),
        "patch_mm": json.dumps(patch_mm),
        **({} if familiarity is None else {"familiarity": json.dumps({"threshold": familiarity})}),
        **(meta_extra or {}),
    }
    onnx.helper.set_model_props(model, {k: v for k, v in meta.items() if k not in drop})
    onnx.checker.check_model(model, full_check=True)
    onnx.save(model, path)
    return path


def test_cells_cover_the_whole_frame_including_the_border(tmp_path):
    scr = Screener(brightness_model(tmp_path / "m.onnx"))
    frame = np.full((70, 100, 3), 200, np.uint8)  # not a multiple of 32
    cm = scr.crack_map(frame)
    assert cm.probabilities.shape == (3, 4) and cm.boxes.shape == (3, 4, 4)
    covered = np.zeros((70, 100), bool)
    for x0, y0, x1, y1 in cm.boxes.reshape(-1, 4):
        assert x1 - x0 == S and y1 - y0 == S
        covered[y0:y1, x0:x1] = True
    assert covered.all()
    assert cm.boxes[0, -1].tolist() == [68, 0, 100, 32]  # last column shifted inward
    assert cm.boxes[-1, 0].tolist() == [0, 38, 32, 70]


def test_flagged_cells_are_the_dark_ones_and_match_onnxruntime(tmp_path):
    import onnxruntime as ort

    path = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    frame = np.full((64, 96, 3), 200, np.uint8)
    frame[32:64, 64:96] = 40  # one dark cell
    cm = Screener(path).crack_map(frame)
    assert cm.flagged.tolist() == [[False, False, False], [False, False, True]]
    assert cm.labels[1, 2] == 1 and cm.class_names == ["none", "crack"]
    # reference: ONNX Runtime directly on the same crop
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    p = sess.run(None, {"image": frame[None, 32:64, 64:96]})[0]
    assert cm.probabilities[1, 2] == pytest.approx(1 - p[0, 0], abs=1e-6)
    d = json.loads(cm.to_json())
    assert d["flagged_cells"] == 1 and d["rows"] == 2 and d["cols"] == 3
    img = np.asarray(cm.overlay(frame))
    assert img.shape[1:] == (96, 3) and img.shape[0] > 64  # frame plus the legend strip
    # the flagged cell is tinted blue (bluer, not redder, than the grey it was); the others
    # are untouched
    inside, was = img[40:56, 70:90].astype(float), frame[40:56, 70:90].astype(float)
    assert inside[..., 2].mean() > inside[..., 0].mean() + 20
    assert inside[..., 2].mean() > was[..., 2].mean() + 20
    np.testing.assert_array_equal(img[:32, :32], frame[:32, :32])


def test_stride_gives_overlapping_cells(tmp_path):
    cm = Screener(brightness_model(tmp_path / "m.onnx")).crack_map(
        np.zeros((64, 64, 3), np.uint8), stride=16
    )
    assert cm.probabilities.shape == (3, 3)


def test_scale_resamples_cells_to_the_model_patch_size_in_mm(tmp_path):
    # model patch: 32 px covering 16 mm; frame at 0.25 mm/px -> one cell is 64 frame pixels
    scr = Screener(brightness_model(tmp_path / "m.onnx", patch_mm=16.0))
    cm = scr.crack_map(np.zeros((128, 192, 3), np.uint8), gsd_mm=0.25)
    assert cm.probabilities.shape == (2, 3)
    assert cm.boxes[1, 2].tolist() == [128, 64, 192, 128]
    assert json.loads(cm.to_json())["boxes_mm"][1][2] == [32.0, 16.0, 48.0, 32.0]


def test_tiny_frame_is_padded_to_one_cell(tmp_path):
    cm = Screener(brightness_model(tmp_path / "m.onnx")).crack_map(np.zeros((5, 7, 3), np.uint8))
    assert cm.probabilities.shape == (1, 1) and cm.boxes[0, 0].tolist() == [0, 0, 7, 5]


def test_bad_inputs_and_models(tmp_path):
    scr = Screener(brightness_model(tmp_path / "m.onnx"))
    with pytest.raises(
        ScreenerError, match=r"expected an \(H, W, 3\) uint8 RGB frame, got float64"
    ):
        scr.crack_map(np.zeros((40, 40, 3)))
    with pytest.raises(ScreenerError, match="stride must be between 1 and 32"):
        scr.crack_map(np.zeros((40, 40, 3), np.uint8), stride=40)
    with pytest.raises(ScreenerError, match="lacks trainkit metadata"):
        Screener(brightness_model(tmp_path / "n.onnx", drop=("threshold",)))
    (tmp_path / "junk.onnx").write_bytes(b"junk")
    with pytest.raises(ScreenerError, match="not a loadable ONNX model"):
        Screener(tmp_path / "junk.onnx")
    with pytest.raises(ScreenerError, match="does not exist"):
        Screener(tmp_path / "missing.onnx")


def test_contract_version_is_checked(tmp_path):
    path = brightness_model(
        tmp_path / "v9.onnx", meta_extra={"trainkit.format": "trainkit-screener-9"}
    )
    with pytest.raises(ScreenerError, match="uses contract 'trainkit-screener-9'"):
        Screener(path)


def test_scale_warning_flagged_cells_raster_and_overlay(tmp_path):
    import json as _json

    path = brightness_model(
        tmp_path / "m.onnx",
        threshold=0.9,
        patch_mm=16.0,
        meta_extra={"gsd_mm_range": _json.dumps([0.4, 0.6])},
    )
    scr = Screener(path)
    frame = np.full((64, 96, 3), 200, np.uint8)
    frame[:32, 64:] = 30
    inside = scr.crack_map(frame, gsd_mm=0.5)  # 16 mm / 0.5 = 32 px: no resampling needed
    assert inside.warnings == []
    cells = inside.flagged_cells()
    assert len(cells) == 1 and cells[0]["box"] == [64, 0, 96, 32] and cells[0]["class"] == "crack"
    assert cells[0]["box_mm"] == [32.0, 0.0, 48.0, 16.0]
    far = scr.crack_map(np.zeros((200, 200, 3), np.uint8), gsd_mm=2.0)
    assert any("outside the training range" in w for w in far.warnings)
    ov = scr.crack_map(frame, stride=16)
    raster = ov.probability_raster(64, 96)
    # pixel (0, 95) is covered by exactly the cells whose boxes contain it: average them
    covering = [
        p
        for b, p in zip(ov.boxes.reshape(-1, 4), ov.probabilities.ravel(), strict=True)
        if b[0] <= 95 < b[2] and b[1] <= 0 < b[3]
    ]
    assert raster[0, 95] == pytest.approx(np.mean(covering), abs=1e-6)
    img = inside.overlay(frame)
    assert img.size[0] == 96 and img.size[1] > 64  # the legend strip below the frame


def test_screener_module_does_not_import_torch():
    code = (
        "import sys; import trainkit; from trainkit import Screener, CrackMap; import trainkit.screener.scan; "
        "bad = [m for m in ('torch', 'torchvision', 'sklearn', 'albumentations', 'cv2') if m in sys.modules]; "
        "print(bad); sys.exit(1 if bad else 0)"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0, res.stdout + res.stderr


def test_crackmap_is_reexported():
    import trainkit

    assert trainkit.CrackMap is CrackMap and trainkit.Screener is Screener


@pytest.mark.parametrize("threads", [1, 2, 3])
def test_concurrent_batches_give_onnxruntimes_answer_in_input_order(tmp_path, threads):
    """Batches run on several threads come back in order, equal to one plain ONNX Runtime run."""
    import onnxruntime as ort

    path = brightness_model(tmp_path / "m.onnx")
    rng = np.random.default_rng(threads)
    patches = rng.integers(0, 256, (37, S, S, 3), dtype=np.uint8)  # 37: a ragged last batch
    scr = Screener(path, threads=threads)
    assert scr.workers == threads
    got = scr.predict(patches, batch_size=4)
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    want = sess.run(None, {"image": patches})[0]
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6)
    assert got.shape == (37, 2) and scr.predict(patches[:0]).shape == (0, 2)


def _lab_hue_and_lightness(rgb):
    """CIELAB lightness L* and hue angle h_ab in degrees (scikit-image's rgb2lab, sRGB D65)."""
    from skimage.color import rgb2lab

    lab = rgb2lab(np.asarray([rgb], dtype=float) / 255.0)[0]
    return lab[:, 0], np.degrees(np.arctan2(lab[:, 2], lab[:, 1])) % 360


@pytest.mark.parametrize("threshold", [0.5, 0.9])
def test_overlay_palette_is_one_blue_hue_not_a_warm_severity_ramp(tmp_path, threshold):
    """The legend's colour steps, threshold to 1: CIELAB lightness falls strictly as the
    probability rises (a sequential ramp), and every hue angle is blue (h_ab 220-300 deg);
    none is red, amber or yellow (h_ab below ~110 deg). Hue angles of sRGB red ~40 deg,
    yellow ~100 deg, blue ~306 deg are textbook CIELAB values, quoted from memory."""
    cm = Screener(brightness_model(tmp_path / "m.onnx", threshold=threshold)).crack_map(
        np.full((64, 320, 3), 40, np.uint8)
    )
    steps = cm.legend_swatches()
    assert [p for p, _ in steps] == pytest.approx(np.linspace(threshold, 1.0, 6).tolist())
    lightness, hue = _lab_hue_and_lightness([c for _, c in steps])
    assert np.all(np.diff(lightness) < -3)
    assert np.all((hue > 220) & (hue < 300))
    # reference points for the check itself: the old amber and red ends fall outside it
    _, warm = _lab_hue_and_lightness([(250, 190, 40), (215, 40, 30)])
    assert np.all(warm < 110)
    # the legend is drawn with these colours, below the frame
    img = np.asarray(cm.overlay(np.full((64, 320, 3), 40, np.uint8)))
    legend = {tuple(int(v) for v in px) for px in img[64:].reshape(-1, 3)}
    assert {c for _, c in steps} <= legend


def test_overlay_legend_says_what_it_shows(tmp_path):
    frame = np.full((64, 96, 3), 200, np.uint8)
    frame[:32, :32] = 30
    cm = Screener(brightness_model(tmp_path / "m.onnx", threshold=0.9)).crack_map(frame)
    text = cm.legend_text()
    assert "screening probability 0.90 (light) to 1.00 (dark)" in text
    assert "not a severity" in text
    assert "Line = crack direction, star = crossing cracks" in text
    assert "1 of 6 cells flagged" in text
    assert text.endswith("Triage aid, not an inspection.")
    assert not any(w in text.lower() for w in ("red", "amber", "yellow", "green"))
    assert "below the threshold" in cm.legend_text(show_all=True)
    # nothing is cut off at the right edge: the strip's right margin stays background grey,
    # on a narrow frame (text below the colour steps) and a wide one (text beside them)
    for width in (96, 640):
        img = np.asarray(cm.overlay(np.full((64, width, 3), 200, np.uint8)))
        strip = img[64:]
        assert strip.shape[0] >= 34 and (strip[:, -5:] == 30).all()
        assert (strip[:, :-5] != 30).any()  # and something is written in it


def test_contract_2_model_warns_on_unfamiliar_frames_and_version_1_says_once(tmp_path):
    """A frame whose cells' median familiarity exceeds the model's threshold is flagged as
    unlike the training data; a version-1 model loads and says once that it cannot tell."""
    v2 = Screener(brightness_model(tmp_path / "v2.onnx", familiarity=5.0))
    assert v2.notes == [] and v2.info.familiarity == {"threshold": 5.0}
    familiar = np.full((2 * S, 3 * S, 3), 131, np.uint8)  # |131 - 128| / 10 = 0.3 per cell
    strange = np.full((2 * S, 3 * S, 3), 200, np.uint8)  # 7.2 per cell
    strange[:S, :S] = 131  # a minority of familiar cells does not change the median
    cm = v2.crack_map(familiar)
    assert cm.unfamiliar is False and cm.familiarity.shape == (2, 3)
    assert cm.familiarity_score == pytest.approx(0.3, abs=1e-4)
    cm = v2.crack_map(strange)
    assert cm.unfamiliar is True and cm.familiarity_score == pytest.approx(7.2, abs=1e-4)
    assert any("unlike the model's training data" in w for w in cm.warnings)
    assert cm.to_dict()["unfamiliar"] is True
    v1 = Screener(brightness_model(tmp_path / "v1.onnx"))
    assert len(v1.notes) == 1 and "no familiarity output" in v1.notes[0]
    cm = v1.crack_map(strange)
    assert cm.familiarity is None and cm.unfamiliar is None and cm.familiarity_score is None


def test_contract_2_needs_its_familiarity_threshold(tmp_path):
    path = brightness_model(
        tmp_path / "bad.onnx", meta_extra={"trainkit.format": "trainkit-screener-2"}
    )
    with pytest.raises(ScreenerError, match="needs metadata familiarity.threshold"):
        Screener(path)


def _cascade_model(tmp_path, pass_threshold, *, meta_cascade=True):
    """A contract-3 cascade joined from two brightness graphs: the first stage (with
    familiarity) passes dark cells; the main network gives their probabilities."""
    from trainkit.export.cascade_graph import cascade_to_onnx

    first = onnx.load(brightness_model(tmp_path / "s1.onnx", familiarity=5.0))
    main = onnx.load(brightness_model(tmp_path / "s2.onnx"))
    proto = cascade_to_onnx(first, main, S, pass_threshold)
    meta = {p.key: p.value for p in first.metadata_props}
    meta["trainkit.format"] = "trainkit-screener-3"
    if meta_cascade:
        meta["cascade"] = json.dumps({"pass_threshold": pass_threshold})
    onnx.helper.set_model_props(proto, meta)
    onnx.save(proto, tmp_path / "cascade.onnx")
    return tmp_path / "cascade.onnx"


def test_cascade_model_reports_the_cells_that_reached_the_main_network(tmp_path):
    """Contract 3: ``reached`` per cell equals the first stage's own decision (its graph run
    alone in ONNX Runtime); unpassed cells get P(none) = 1; contract 2 still loads."""
    import onnxruntime as ort

    path = _cascade_model(tmp_path, 0.5)
    frame = np.full((2 * S, 4 * S, 3), 160, np.uint8)
    frame[:S, :S] = 40  # dark: crack probability above 0.5, passed
    frame[S:, 2 * S : 3 * S] = 90
    with Screener(path) as sc:
        assert sc.info.cascade == {"pass_threshold": 0.5} and sc.notes == []
        fp = sc.cut(frame)
        cm = sc.crack_map_from_patches(fp)
    alone = ort.InferenceSession(str(tmp_path / "s1.onnx"), providers=["CPUExecutionProvider"])
    p1 = alone.run(None, {"image": fp.patches})[0]
    expected = (1 - p1[:, 0] >= 0.5).reshape(2, 4)
    assert expected.sum() == 2 and np.array_equal(cm.reached, expected)
    assert cm.main_model_cells == 2 and cm.to_dict()["main_model_cells"] == 2
    assert np.all(cm.class_probabilities[~cm.reached] == [1.0, 0.0])
    assert cm.familiarity.shape == (2, 4)  # every cell, passed or not
    v2 = Screener(brightness_model(tmp_path / "v2.onnx", familiarity=5.0))
    cm2 = v2.crack_map(frame)
    assert cm2.reached is None and cm2.main_model_cells == 8  # the main network saw every cell
    with pytest.raises(ScreenerError, match="needs metadata cascade.pass_threshold"):
        Screener(_cascade_model(tmp_path, 0.5, meta_cascade=False))


# ----- metadata range checks (issue 27, item 5) ------------------------------------------

#: (metadata overrides, regex the one-line refusal must match): each field named with the bad
#: value and the valid range. The ranges follow the fields' meaning (DESIGN.md, ONNX model).
BAD_METADATA = {
    "threshold NaN": ({"threshold": "NaN"}, r"threshold is NaN; .*0 < threshold < 1"),
    "threshold 5": ({"threshold": "5"}, r"threshold is 5; .*0 < threshold < 1"),
    "threshold -1": ({"threshold": "-1"}, r"threshold is -1; .*0 < threshold < 1"),
    "threshold 0": ({"threshold": "0"}, r"threshold is 0; .*0 < threshold < 1"),
    "threshold 1": ({"threshold": "1.0"}, r"threshold is 1.0; .*0 < threshold < 1"),
    "threshold inf": ({"threshold": "Infinity"}, r"threshold is Infinity; "),
    "threshold text": ({"threshold": '"high"'}, r"threshold is \"high\"; .*a number"),
    "patch_mm -50": ({"patch_mm": "-50"}, r"patch_mm is -50; .*finite number above 0"),
    "patch_mm 0": ({"patch_mm": "0"}, r"patch_mm is 0; .*finite number above 0"),
    "patch_mm NaN": ({"patch_mm": "NaN"}, r"patch_mm is NaN; .*finite number above 0"),
    "patch_mm inf": ({"patch_mm": "Infinity"}, r"patch_mm is Infinity; "),
    "patch_px 100000": ({"patch_px": "100000"}, r"patch_px is 100000; .*16 to 1024"),
    "patch_px 0": ({"patch_px": "0"}, r"patch_px is 0; .*16 to 1024"),
    "patch_px 8": ({"patch_px": "8"}, r"patch_px is 8; .*16 to 1024"),
    "patch_px 32.5": ({"patch_px": "32.5"}, r"patch_px is 32.5; .*whole number"),
    "familiarity NaN": (
        {"trainkit.format": "trainkit-screener-2", "familiarity": '{"threshold": NaN}'},
        r"familiarity.threshold is NaN; .*finite number above 0",
    ),
    "familiarity inf": (
        {"trainkit.format": "trainkit-screener-2", "familiarity": '{"threshold": Infinity}'},
        r"familiarity.threshold is Infinity; .*finite number above 0",
    ),
    "familiarity -1": (
        {"trainkit.format": "trainkit-screener-2", "familiarity": '{"threshold": -1}'},
        r"familiarity.threshold is -1; .*finite number above 0",
    ),
    "one class": ({"class_names": '["none"]'}, r"class_names is \[\"none\"\]; .*at least 2"),
    "repeated class": (
        {"class_names": '["none", "crack", "crack"]', "angle_centres": "[null, null, null]"},
        r"class_names .*repeats 'crack'",
    ),
    "empty class name": ({"class_names": '["none", ""]'}, r"class_names .*empty name"),
    "angle 200": ({"angle_centres": "[null, 200]"}, r"angle_centres is \[null, 200\]; .*0, 180"),
    "angle NaN": ({"angle_centres": "[null, NaN]"}, r"angle_centres is \[null, NaN\]; .*0, 180"),
    "gsd range reversed": (
        {"gsd_mm_range": "[0.6, 0.4]"},
        r"gsd_mm_range is \[0.6, 0.4\]; .*0 < low <= high",
    ),
    "gsd range negative": ({"gsd_mm_range": "[-1, 2]"}, r"gsd_mm_range is \[-1, 2\]; "),
    "gsd range NaN": ({"gsd_mm_range": "[NaN, 1]"}, r"gsd_mm_range is \[NaN, 1\]; "),
    "patch_mm range inf": (
        {"patch_mm_range": "[10, Infinity]"},
        r"patch_mm_range is \[10, Infinity\]; .*finite",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD_METADATA))
def test_metadata_out_of_range_is_refused_in_one_line_naming_the_field(tmp_path, case):
    """A threshold of NaN or 5 flagged nothing, -1 everything; a familiarity threshold of NaN
    or infinity switched the warning off; patch_mm -50 made the frame one cell; patch_px
    100000 ended in a 27.9 GiB allocation. Each is refused at load, naming field and range."""
    extra, message = BAD_METADATA[case]
    path = brightness_model(tmp_path / "bad.onnx", meta_extra=extra)
    with pytest.raises(ScreenerError, match=message) as err:
        Screener(path)
    text = str(err.value)
    assert text.startswith("bad.onnx: metadata ") and "\n" not in text


@pytest.mark.parametrize(
    "kwargs",
    [
        {"threshold": 0.001},
        {"threshold": 0.999},
        {"meta_extra": {"gsd_mm_range": "[0.2, 0.2]", "patch_mm_range": "[12, 40]"}},
        {"meta_extra": {"angle_centres": "[null, 179.9]"}},
        {"patch_mm": 0.5, "familiarity": 0.01},
    ],
)
def test_metadata_inside_the_ranges_loads(tmp_path, kwargs):
    Screener(brightness_model(tmp_path / "ok.onnx", **kwargs))


@pytest.mark.parametrize("patch_px", [16, 1024])
def test_patch_size_limits_are_inclusive(tmp_path, patch_px):
    assert Screener(brightness_model(tmp_path / "m.onnx", patch_px=patch_px)).patch_px == patch_px


def test_metadata_that_disagrees_with_the_graph_is_refused(tmp_path):
    """Three class names for a two-column output, and a patch_px unlike the graph's input."""
    path = brightness_model(
        tmp_path / "c.onnx",
        meta_extra={"class_names": '["none", "a", "b"]', "angle_centres": "[null, 0, 90]"},
    )
    with pytest.raises(ScreenerError, match=r"3 class names .* 2 columns"):
        Screener(path)
    path = brightness_model(tmp_path / "p.onnx", meta_extra={"patch_px": "64"})
    with pytest.raises(ScreenerError, match=r"patch_px is 64 .* input is 32 x 32"):
        Screener(path)


def constant_model(path, probabilities, *, familiarity=None, threshold=0.5):
    """A graph whose every patch gets the same output row ``probabilities`` (and, with
    ``familiarity``, that familiarity), for outputs a broken model could give."""
    image = helper.make_tensor_value_info("image", TensorProto.UINT8, ["N", S, S, 3])
    probs = helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", 2])
    nodes = [
        helper.make_node("Cast", ["image"], ["x"], to=TensorProto.FLOAT),
        helper.make_node("ReduceMean", ["x", "axes"], ["m"], keepdims=0),
        helper.make_node("Mul", ["m", "zero"], ["z"]),  # (N,) zeros
        helper.make_node("Unsqueeze", ["z", "ax1"], ["u"]),  # (N, 1)
        helper.make_node("Add", ["u", "row"], ["probabilities"]),  # (N, 2)
    ]
    inits = [
        helper.make_tensor("axes", TensorProto.INT64, [3], [1, 2, 3]),
        helper.make_tensor("zero", TensorProto.FLOAT, [], [0.0]),
        helper.make_tensor("ax1", TensorProto.INT64, [1], [1]),
        helper.make_tensor("row", TensorProto.FLOAT, [1, 2], list(probabilities)),
    ]
    outputs = [probs]
    if familiarity is not None:
        nodes.append(helper.make_node("Add", ["z", "fam"], ["familiarity"]))
        inits.append(helper.make_tensor("fam", TensorProto.FLOAT, [], [familiarity]))
        outputs.append(helper.make_tensor_value_info("familiarity", TensorProto.FLOAT, ["N"]))
    graph = helper.make_graph(nodes, "constant", [image], outputs, initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)])
    model.ir_version = 9
    meta = {
        "trainkit.format": "trainkit-screener-1" if familiarity is None else "trainkit-screener-2",
        "class_names": json.dumps(["none", "crack"]),
        "patch_px": str(S),
        "threshold": json.dumps(threshold),
        **({} if familiarity is None else {"familiarity": json.dumps({"threshold": 2.0})}),
    }
    onnx.helper.set_model_props(model, meta)
    onnx.save(model, path)
    return path


@pytest.mark.parametrize(
    "row, message",
    [
        ((float("nan"), float("nan")), r"non-finite"),
        ((-0.5, 1.5), r"outside \[0, 1\]"),
        ((0.3, 0.3), r"do not sum to 1"),
    ],
)
def test_model_outputs_that_are_not_probabilities_are_refused(tmp_path, row, message):
    """NaN scored every cell 'not flagged'; a broken graph must not pass as a clean frame."""
    scr = Screener(constant_model(tmp_path / "m.onnx", row))
    with pytest.raises(ScreenerError, match=rf"m.onnx gave .*{message}"):
        scr.crack_map(np.zeros((64, 64, 3), np.uint8))


def test_familiarity_that_cannot_be_computed_warns_instead_of_passing(tmp_path):
    """A NaN familiarity compared as 'not above the threshold' (no warning): the frame cannot
    be vouched for, so it is said to be unfamiliar (DESIGN.md, promises)."""
    scr = Screener(constant_model(tmp_path / "m.onnx", (0.9, 0.1), familiarity=float("nan")))
    cm = scr.crack_map(np.zeros((64, 64, 3), np.uint8))
    assert cm.unfamiliar is True
    assert any("could not be computed" in w for w in cm.warnings)
    d = json.loads(cm.to_json(), parse_constant=lambda c: pytest.fail(f"{c} in the JSON"))
    assert d["familiarity_score"] is None and d["unfamiliar"] is True


@pytest.mark.parametrize("gsd", [float("nan"), float("inf"), 0.0, -1.0])
def test_frame_scale_must_be_finite_and_positive(tmp_path, gsd):
    scr = Screener(brightness_model(tmp_path / "m.onnx", patch_mm=16.0))
    with pytest.raises(ScreenerError, match=r"gsd_mm must be a finite number above 0"):
        scr.crack_map(np.zeros((64, 64, 3), np.uint8), gsd_mm=gsd)


def test_resampling_is_bounded(tmp_path):
    """patch_mm 0.001 at 1 mm/px would resample a 64 x 64 frame to 2 million px per side."""
    scr = Screener(brightness_model(tmp_path / "m.onnx", patch_mm=0.001))
    with pytest.raises(ScreenerError, match=r"would resample .* pixels, above the limit"):
        scr.crack_map(np.zeros((64, 64, 3), np.uint8), gsd_mm=1.0)


def test_lazy_patches_equal_the_cut_patches(tmp_path):
    """Patches are cut batch by batch (no frame-sized patch array); the batches put together
    equal FramePatches.patches, and the crack map is the same as ONNX Runtime on them."""
    import onnxruntime as ort

    path = brightness_model(tmp_path / "m.onnx")
    rng = np.random.default_rng(4)
    frame = rng.integers(0, 256, (100, 150, 3), dtype=np.uint8)
    with Screener(path, threads=2) as scr:
        fp = scr.cut(frame, stride=20)
        cm = scr.crack_map_from_patches(fp)
    whole = fp.patches
    assert whole.shape == (len(fp), S, S, 3)
    np.testing.assert_array_equal(
        np.concatenate([fp.batch(i, i + 7) for i in range(0, len(fp), 7)]), whole
    )
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    want = 1 - sess.run(None, {"image": whole})[0][:, 0]
    np.testing.assert_allclose(cm.probabilities.ravel(), want, atol=1e-6)
