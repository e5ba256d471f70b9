"""Tests for trainkit.synth: crack rasters, scene geometry, patch labels and dataset files.

Every numeric check compares against an independent method named beside it
(OpenCV/numpy line fits, scikit-image measurements, hand geometry).
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
from pathlib import Path

import cv2
import numpy as np
import pytest
from PIL import Image
from skimage.feature import structure_tensor
from skimage.filters import gaussian
from skimage.measure import label as cc_label
from skimage.measure import regionprops

from trainkit.core.grid import grid_boxes
from trainkit.core.taxonomy import angle_difference, load_class_set
from trainkit.synth import (
    Crack,
    LabelRules,
    SynthOptions,
    derive_patch_label,
    generate_photo,
    render_cracks,
    write_dataset,
)

ORIENT = load_class_set("orientation")
PRESENCE = load_class_set("presence")
H, W = 200, 240


def straight(angle_deg: float, length: float, width: float, centre=(120.0, 100.0), n=9) -> Crack:
    """Hand-made straight crack through ``centre`` at an on-screen angle."""
    a = math.radians(angle_deg)
    d = np.array([math.cos(a), -math.sin(a)])
    t = np.linspace(-length / 2, length / 2, n)
    pts = np.asarray(centre)[None, :] + t[:, None] * d[None, :]
    return Crack(points=pts, widths=np.full(n, width), kind="main", crack_id=0)


def line_crack(p0, p1, width=1.0, crack_id=0, kind="main") -> Crack:
    return Crack(
        points=np.array([p0, p1], float), widths=np.full(2, width), kind=kind, crack_id=crack_id
    )


def st_angle(image: np.ndarray) -> float:
    """Line direction from skimage's structure tensor, on-screen degrees.

    With order='rc' skimage returns (A_rr, A_rc, A_cc) = (J_yy, J_xy, J_xx); the line
    (perpendicular to the dominant gradient) is at 0.5 * atan2(2 J_xy, J_yy - J_xx).
    The image is smoothed first (skimage gaussian, sigma 1.5): on sharp 1-2 px lines
    the central-difference gradients are biased by up to ~3 deg near 30/60 deg.
    """
    smooth = gaussian(image.astype(float), sigma=1.5)
    arr, arc, acc = structure_tensor(smooth, sigma=1.5, order="rc")
    return math.degrees(0.5 * math.atan2(2 * arc.sum(), arr.sum() - acc.sum())) % 180.0


def polyline_length(points: np.ndarray) -> float:
    return float(np.sum(np.linalg.norm(np.diff(points, axis=0), axis=1)))


# ----- rasterisation of hand-made cracks -----------------------------------------------------
@pytest.mark.parametrize("angle", [0.0, 30.0, 45.0, 60.0, 90.0, 120.0, 150.0])
def test_straight_crack_angle_matches_line_fit(angle: float) -> None:
    cov, mask, ang = render_cracks([straight(angle, 150.0, 2.0)], H, W)
    rows, cols = np.nonzero(mask)
    xy = np.stack([cols + 0.5, rows + 0.5], axis=1).astype(np.float32)
    # Independent: OpenCV least-squares line fit through the mask pixels (L2 distance).
    vx, vy, _, _ = cv2.fitLine(xy, cv2.DIST_L2, 0, 0.01, 0.01).ravel()
    fit = math.degrees(math.atan2(-vy, vx)) % 180.0
    assert angle_difference(fit, angle) < 1.0
    # Independent: numpy.polyfit of row on column (or column on row when steep).
    if angle_difference(angle, 90.0) > 30:
        slope = np.polyfit(xy[:, 0], xy[:, 1], 1)[0]
        poly = math.degrees(math.atan(-slope)) % 180.0
    else:
        slope = np.polyfit(xy[:, 1], xy[:, 0], 1)[0]  # dx/dy; direction (slope, 1) in pixels
        poly = math.degrees(math.atan2(-1.0, slope)) % 180.0
    assert angle_difference(poly, angle) < 1.0
    # The per-pixel angle map agrees with the OpenCV fit on every mask pixel.
    assert np.all(np.isfinite(ang[mask])) and np.all(np.isnan(ang[~mask]))
    assert float(np.max(angle_difference(ang[mask], fit))) < 1.5
    # Independent: skimage structure tensor of the coverage image.
    assert angle_difference(st_angle(cov), angle) < 1.5


def test_structure_tensor_sign_convention_on_rising_line() -> None:
    # Hand geometry: from lower-left (40, 160) to upper-right (160, 40) is 45 deg on screen.
    cov, _, ang = render_cracks([line_crack((40.0, 160.0), (160.0, 40.0), 2.0)], H, W)
    assert angle_difference(st_angle(cov), 45.0) < 1.0  # skimage structure tensor
    assert angle_difference(float(np.nanmedian(ang)), 45.0) < 0.01


@pytest.mark.parametrize("width", [0.4, 0.8, 1.5, 3.0])
def test_coverage_integrates_to_length_times_width(width: float) -> None:
    # A bent, tortuous polyline with a varying width profile.
    t = np.linspace(0, 1, 40)
    pts = np.stack([20 + 200 * t, 100 + 30 * np.sin(2 * np.pi * 1.5 * t)], axis=1)
    widths = width * (0.7 + 0.3 * np.cos(2 * np.pi * t))
    crack = Crack(points=pts, widths=widths, kind="main", crack_id=1)
    cov, _, _ = render_cracks([crack], H, W)
    # Independent: hand sum of segment length x mean segment width with numpy.
    seg_len = np.linalg.norm(np.diff(pts, axis=0), axis=1)
    expected = float(np.sum(seg_len * 0.5 * (widths[:-1] + widths[1:])))
    assert abs(float(cov.sum()) - expected) / expected < 0.10
    assert cov.dtype == np.float32 and cov.min() >= 0.0 and cov.max() <= 1.0


@pytest.mark.parametrize(("angle", "width"), [(10.0, 3.0), (50.0, 4.5), (100.0, 6.0)])
def test_wide_crack_mask_area_and_shape(angle: float, width: float) -> None:
    length = 140.0
    _, mask, _ = render_cracks([straight(angle, length, width)], H, W)
    # Independent: hand computation L x w.
    assert abs(int(mask.sum()) - length * width) / (length * width) < 0.15
    # Independent: skimage regionprops of the single connected component. Its axis
    # lengths are 4 x the standard deviations, i.e. 4 L / sqrt(12) and 4 w / sqrt(12)
    # for a w x L rectangle; its orientation gives the angle.
    props = regionprops(cc_label(mask))
    assert len(props) == 1
    p = props[0]
    k = math.sqrt(12.0) / 4.0
    assert abs(p.axis_major_length * k - length) / length < 0.05
    assert abs(p.axis_minor_length * k - width) / width < 0.25
    # skimage orientation: angle between the row axis and the major axis, in radians;
    # on screen that is 90 deg + orientation (counter-clockwise from +x).
    assert angle_difference(90.0 + math.degrees(p.orientation), angle) < 1.5


def test_thin_crack_mask_is_connected_one_pixel_band() -> None:
    _, mask, _ = render_cracks([straight(30.0, 150.0, 0.5)], H, W)
    # Independent: skimage connected-component labelling (8-connectivity) finds one piece.
    assert int(cc_label(mask, connectivity=2).max()) == 1
    # A 0.5 px crack keeps a mask band about 1 px wide: area close to the length.
    assert abs(int(mask.sum()) - 150.0) / 150.0 < 0.15


def test_render_cracks_empty() -> None:
    cov, mask, ang = render_cracks([], 20, 30)
    assert cov.shape == (20, 30) and not cov.any() and not mask.any() and np.isnan(ang).all()


# ----- generated scenes -------------------------------------------------------------------
def test_single_scene_direction_structure_tensor() -> None:
    errors = []
    for seed, angle in zip(range(6), (10.0, 40.0, 75.0, 95.0, 130.0, 165.0), strict=True):
        photo = generate_photo(
            seed, SynthOptions(scene="single", crack_angle_deg=angle, distractors=False)
        )
        assert photo.scene == "single" and photo.cracks[0].kind == "main"
        # Independent: skimage structure tensor of the coverage image.
        errors.append(angle_difference(st_angle(photo.coverage), angle))
        # Independent: OpenCV line fit through the main crack's centreline vertices.
        vx, vy, _, _ = cv2.fitLine(
            photo.cracks[0].points.astype(np.float32), cv2.DIST_L2, 0, 0.01, 0.01
        ).ravel()
        assert angle_difference(math.degrees(math.atan2(-vy, vx)), angle) < 12.0
    # Tortuosity and branches move a whole crack's direction a few degrees off its base
    # (over 80 seeds: median ~3 deg, largest ~13 deg).
    assert max(errors) < 15.0
    assert float(np.mean(errors)) < 6.0


def test_single_scene_geometry_is_plausible() -> None:
    opts = SynthOptions(scene="single", crack_angle_deg=20.0, max_width_px=4.0)
    photo = generate_photo(3, opts)
    main = photo.cracks[0]
    h, w = opts.height, opts.width
    # Hand geometry: the main crack crosses much of the frame.
    extent = np.ptp(main.points, axis=0)
    assert max(extent[0] / w, extent[1] / h) > 0.5
    assert math.isclose(float(main.widths.max()), 4.0, rel_tol=1e-9)
    assert float(main.widths.min()) >= 0.3 - 1e-9
    # Random-walk steps are 3..6 px (except the last, clipped at the frame edge).
    steps = np.linalg.norm(np.diff(main.points, axis=0), axis=1)
    assert np.all(steps <= 6.0 + 1e-9) and np.median(steps) > 3.0
    for c in photo.cracks:
        assert np.all((c.points >= 0) & (c.points <= [w, h]))
    # Crack pixels are darker than the rest of the image (simple grey-level means).
    grey = photo.image.astype(float).mean(axis=2)
    assert grey[photo.coverage > 0.8].mean() < grey[~photo.mask].mean() - 25


def test_map_scene_network_has_many_directions() -> None:
    photo = generate_photo(5, SynthOptions(scene="map", height=256, width=384))
    assert photo.scene == "map" and len(photo.cracks) > 20
    assert all(c.kind == "map" for c in photo.cracks)
    widths = np.concatenate([c.widths for c in photo.cracks])
    assert widths.min() >= 0.4 - 1e-9 and widths.max() <= 2.0 + 1e-9
    # Independent: doubled-angle resultant computed here from the vertices with numpy.
    d = np.concatenate([np.diff(c.points, axis=0) for c in photo.cracks])
    a2 = 2 * np.arctan2(-d[:, 1], d[:, 0])
    lw = np.linalg.norm(d, axis=1)
    r = math.hypot((lw * np.cos(a2)).sum(), (lw * np.sin(a2)).sum()) / lw.sum()
    assert r < 0.3


def test_none_scene_has_no_crack_truth_despite_distractors() -> None:
    for seed in range(4):
        photo = generate_photo(seed, SynthOptions(scene="none", height=160, width=200))
        assert photo.cracks == [] and photo.crack_length_px() == 0.0
        assert not photo.mask.any() and not photo.coverage.any() and np.isnan(photo.angle).all()
        assert photo.image.std() > 2.0  # textured, not a flat fill


def test_distractors_do_not_change_crack_truth() -> None:
    base = SynthOptions(scene="single", height=160, width=200)
    a = generate_photo(9, base)
    b = generate_photo(9, SynthOptions(scene="single", height=160, width=200, distractors=False))
    assert np.array_equal(a.mask, b.mask) and np.array_equal(a.coverage, b.coverage)
    assert not np.array_equal(a.image, b.image)


def test_determinism_and_seed_sensitivity() -> None:
    opts = SynthOptions(height=128, width=160, scene="random", jpeg_quality=80)
    a, b, c = generate_photo(11, opts), generate_photo(11, opts), generate_photo(12, opts)
    for name in ("image", "mask", "coverage"):
        assert np.array_equal(getattr(a, name), getattr(b, name))
    assert np.array_equal(a.angle, b.angle, equal_nan=True)
    assert a.to_json_dict() == b.to_json_dict()
    assert not np.array_equal(a.image, c.image)
    assert a.image.dtype == np.uint8 and a.image.shape == (128, 160, 3)


def test_jpeg_option_changes_pixels_only_slightly() -> None:
    raw = generate_photo(4, SynthOptions(scene="single", height=128, width=160))
    jpg = generate_photo(4, SynthOptions(scene="single", height=128, width=160, jpeg_quality=75))
    diff = np.abs(raw.image.astype(float) - jpg.image.astype(float))
    assert 0.0 < diff.mean() < 6.0


def test_json_truth_lengths_and_mm() -> None:
    photo = generate_photo(2, SynthOptions(scene="multi", height=160, width=200, gsd_mm=0.4))
    d = json.loads(json.dumps(photo.to_json_dict()))
    assert d["scene"] == "multi" and d["seed"] == 2 and d["gsd_mm"] == 0.4
    total = 0.0
    for item in d["cracks"]:
        # Independent: polyline length recomputed from the (rounded) JSON points.
        length = polyline_length(np.array(item["points"]))
        assert abs(length - item["length_px"]) < 0.05
        assert abs(item["length_mm"] - 0.4 * item["length_px"]) < 1e-2
        assert len(item["widths_mm"]) == len(item["points"])
        total += length
    assert abs(total - photo.crack_length_px()) < 0.1
    no_scale = generate_photo(2, SynthOptions(scene="multi", height=160, width=200))
    assert "length_mm" not in no_scale.to_json_dict()["cracks"][0]


@pytest.mark.parametrize(
    "kwargs",
    [
        {"scene": "spiral"},
        {"height": 10},
        {"max_width_px": -1.0},
        {"blur_sigma": -0.1},
        {"jpeg_quality": 0},
        {"gsd_mm": 0.0},
        {"crack_angle_deg": float("nan")},
    ],
)
def test_bad_options_raise_value_error(kwargs: dict) -> None:
    with pytest.raises(ValueError, match="expected"):
        SynthOptions(**kwargs)


def test_bad_inputs_raise_value_error() -> None:
    with pytest.raises(ValueError, match="expected"):
        generate_photo(-1)
    with pytest.raises(ValueError, match="expected"):
        Crack(points=np.zeros((1, 2)), widths=np.ones(1), kind="main", crack_id=0)
    with pytest.raises(ValueError, match="expected"):
        Crack(points=np.zeros((2, 2)), widths=np.ones(2), kind="joint", crack_id=0)
    with pytest.raises(ValueError, match="expected"):
        derive_patch_label([], (10, 10, 10, 20), ORIENT)
    with pytest.raises(ValueError, match="expected"):
        LabelRules(map_max_coherence=0.9, oriented_min_coherence=0.5)


# ----- patch labels -----------------------------------------------------------------------
BOX = (100, 100, 228, 228)  # 128 px patch, centre (164, 164)


def through_box(angle_deg: float, length: float = 400.0, centre=(164.0, 164.0)) -> Crack:
    a = math.radians(angle_deg)
    d = np.array([math.cos(a), -math.sin(a)]) * length / 2
    c = np.asarray(centre)
    return line_crack(c - d, c + d, 1.5)


def test_label_empty_is_clear_none() -> None:
    t = derive_patch_label([], BOX, ORIENT)
    assert (t.label, t.status, t.length_px, t.angle_deg) == (0, "clear", 0.0, None)


def test_label_short_stub_is_ambiguous() -> None:
    t = derive_patch_label([line_crack((150.0, 160.0), (160.0, 160.0))], BOX, ORIENT)
    assert t.label is None and t.status == "ambiguous" and "minimum" in t.reason
    assert abs(t.length_px - 10.0) < 1e-9  # hand computation


@pytest.mark.parametrize(
    ("angle", "name"),
    [
        (0.0, "horizontal"),
        (45.0, "diagonal_rising"),
        (90.0, "vertical"),
        (135.0, "diagonal_falling"),
    ],
)
def test_label_straight_lines(angle: float, name: str) -> None:
    t = derive_patch_label([through_box(angle)], BOX, ORIENT)
    assert t.status == "clear" and ORIENT.names[t.label] == name
    assert abs(t.coherence - 1.0) < 1e-9 and angle_difference(t.angle_deg, angle) < 1e-6


def test_label_rising_line_from_pixel_coordinates() -> None:
    # Hand geometry: lower-left (110, 220) to upper-right (220, 110) -> rising, 45 deg.
    t = derive_patch_label([line_crack((110.0, 220.0), (220.0, 110.0))], BOX, ORIENT)
    assert ORIENT.names[t.label] == "diagonal_rising"
    assert abs(t.length_px - 110.0 * math.sqrt(2)) < 1e-9


def test_label_near_boundary_is_ambiguous() -> None:
    t = derive_patch_label([through_box(21.0)], BOX, ORIENT)
    assert t.label is None and "boundary" in t.reason
    clear = derive_patch_label([through_box(10.0)], BOX, ORIENT)
    assert ORIENT.names[clear.label] == "horizontal"


def test_label_crossing_lines_is_map_and_presence_is_crack() -> None:
    crossing = [through_box(0.0), through_box(90.0)]
    t = derive_patch_label(crossing, BOX, ORIENT)
    assert ORIENT.names[t.label] == "map" and t.coherence < 1e-9
    p = derive_patch_label([through_box(30.0)], BOX, PRESENCE)
    assert PRESENCE.names[p.label] == "crack" and p.status == "clear"


def test_label_intermediate_coherence_is_ambiguous() -> None:
    # Independent hand computation: lengths 128 at 0 deg and 40 at 90 deg give
    # R = (128 - 40) / 168 = 0.524, between the 0.5 and 0.75 thresholds.
    cracks = [through_box(0.0), line_crack((164.0, 120.0), (164.0, 160.0), crack_id=1)]
    t = derive_patch_label(cracks, BOX, ORIENT)
    assert abs(t.coherence - 88.0 / 168.0) < 1e-9
    assert t.label is None and "coherence" in t.reason


def test_label_corner_touch_and_halo() -> None:
    # A line through the box corner (100, 100) only: zero length inside, but its width
    # reaches into the patch -> ambiguous, never "none".
    t = derive_patch_label([line_crack((50.0, 150.0), (150.0, 50.0), 2.0)], BOX, ORIENT)
    assert t.length_px == 0.0 and t.status == "ambiguous"
    far = derive_patch_label([line_crack((40.0, 150.0), (140.0, 50.0), 2.0)], BOX, ORIENT)
    assert far.label == 0 and far.status == "clear"


def test_label_clipped_length_is_exact() -> None:
    # Segment (60, 130) -> (260, 230): hand computation of where it crosses x=100 and
    # x=228 (slope 0.5): y = 150 and y = 214, both inside [100, 228].
    t = derive_patch_label([line_crack((60.0, 130.0), (260.0, 230.0))], BOX, ORIENT)
    assert abs(t.length_px - math.hypot(128.0, 64.0)) < 1e-9
    # Only the part inside the border margin counts: 5% of 128 = 6.4 px a side, so a
    # 20 px crack hugging the left edge counts 0 px and is ambiguous, not vertical.
    edge = derive_patch_label([line_crack((103.0, 120.0), (103.0, 200.0))], BOX, ORIENT)
    assert edge.status == "ambiguous" and abs(edge.length_px - 80.0) < 1e-9


def test_labels_on_generated_scenes() -> None:
    boxes = grid_boxes(512, 768, 128, 128)
    map_photo = generate_photo(1, SynthOptions(scene="map", distractors=False))
    names = [derive_patch_label(map_photo.cracks, b, ORIENT).label for b in boxes]
    assert names.count(ORIENT.index("map")) >= 5
    vert = generate_photo(2, SynthOptions(scene="single", crack_angle_deg=90.0))
    labels = [derive_patch_label(vert.cracks, b, ORIENT).label for b in boxes]
    oriented = [x for x in labels if x is not None and x not in (0, ORIENT.index("map"))]
    assert oriented.count(ORIENT.index("vertical")) >= 2
    assert oriented.count(ORIENT.index("vertical")) > len(oriented) / 2


def test_labels_follow_mask_independently() -> None:
    # Patches labelled "none" contain no mask pixels; patches with a clear crack label
    # contain some (checked on the rasterised truth, independent of the polyline clipping).
    photo = generate_photo(6, SynthOptions(scene="multi", distractors=False))
    for x0, y0, x1, y1 in grid_boxes(512, 768, 128, 128):
        t = derive_patch_label(photo.cracks, (x0, y0, x1, y1), ORIENT)
        inside = int(photo.mask[y0:y1, x0:x1].sum())
        if t.label == 0:
            assert inside == 0
        elif t.label is not None:
            assert inside > 0.15 * 128


# ----- dataset writer ---------------------------------------------------------------------
def _digest(root: Path) -> dict[str, str]:
    return {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file()
    }


def test_write_dataset_reproducible_and_consistent(tmp_path: Path) -> None:
    opts = SynthOptions(height=160, width=224)
    kwargs = dict(n_photos=3, seed=7, tile_px=64, options=opts, class_set=ORIENT)
    calls: list[tuple[int, int]] = []
    m1 = write_dataset(tmp_path / "a", progress=lambda i, n: calls.append((i, n)), **kwargs)
    m2 = write_dataset(tmp_path / "b", **kwargs)
    assert calls == [(1, 3), (2, 3), (3, 3)]
    assert m1 == m2
    da, db = _digest(tmp_path / "a"), _digest(tmp_path / "b")
    assert da == db and len(da) == 3 + 3 + 3

    root = tmp_path / "a"
    with open(root / "scale.csv", newline="") as f:
        scale = list(csv.DictReader(f))
    assert list(scale[0]) == ["photo", "structure", "gsd_mm"] and len(scale) == 3
    for row in scale:
        assert row["photo"].startswith(row["structure"] + "-")
        assert 0.25 <= float(row["gsd_mm"]) <= 0.6
        img = np.asarray(Image.open(root / "photos" / row["photo"]))
        assert img.shape == (160, 224, 3) and img.dtype == np.uint8
        truth = json.loads(
            (root / "truth" / (row["photo"].removesuffix(".jpg") + ".json")).read_text()
        )
        assert truth["gsd_mm"] == float(row["gsd_mm"])

    with open(root / "labels.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0]) == ["photo", "x0", "y0", "x1", "y1", "label", "status", "reason"]
    # Independent: recount labels from the CSV and compare with the manifest counts.
    recount: dict[str, int] = {}
    for r in rows:
        key = r["label"] or "ambiguous"
        recount[key] = recount.get(key, 0) + 1
        assert (r["status"] == "ambiguous") == (r["label"] == "")
    assert {k: v for k, v in m1["counts"].items() if v} == recount
    # Independent: the tiles of each photo cover every pixel, all inside the frame.
    for name in {r["photo"] for r in rows}:
        hits = np.zeros((160, 224), int)
        for r in (r for r in rows if r["photo"] == name):
            x0, y0, x1, y1 = (int(r[k]) for k in ("x0", "y0", "x1", "y1"))
            assert 0 <= x0 < x1 <= 224 and 0 <= y0 < y1 <= 160 and x1 - x0 == 64 == y1 - y0
            hits[y0:y1, x0:x1] += 1
        assert hits.min() >= 1
    manifest = json.loads((root / "manifest.json").read_text())
    assert manifest == m1 and manifest["class_set"] == "orientation"
    assert manifest["n_photos"] == 3 and manifest["seed"] == 7

    m3 = write_dataset(tmp_path / "c", **{**kwargs, "seed": 8})
    assert _digest(tmp_path / "c") != da and m3["seed"] == 8


def test_write_dataset_scene_mix() -> None:
    from trainkit.synth.dataset import scene_plan  # deterministic plan, no pixels needed

    plan = scene_plan(np.random.default_rng(0), 20)
    scenes = [s for s, _ in plan]
    # Hand computation of 20 x (20%, 45%, 15%, 20%).
    assert {s: scenes.count(s) for s in set(scenes)} == {
        "none": 4,
        "single": 9,
        "multi": 3,
        "map": 4,
    }
    angles = sorted(a for s, a in plan if s == "single")
    # Stratified over [0, 180): one angle per 20-degree bin.
    assert [int(a // 20) for a in angles] == list(range(9))


def test_photo_specs_plan_is_what_write_dataset_writes(tmp_path: Path) -> None:
    from trainkit.synth.dataset import STRUCTURES, photo_specs

    opts = SynthOptions(height=96, width=128)
    specs = photo_specs(np.random.default_rng(5), 4, opts)
    write_dataset(tmp_path, n_photos=4, seed=5, tile_px=64, options=opts, class_set=PRESENCE)
    for spec in specs:
        truth = json.loads((tmp_path / "truth" / f"{spec.name}.json").read_text())
        assert truth["seed"] == spec.seed and truth["structure"] == spec.structure
        assert truth["scene"] == spec.options.scene and spec.structure in STRUCTURES
    # Names count per structure from 001 without gaps.
    for s in {spec.structure for spec in specs}:
        numbers = sorted(int(sp.name.rsplit("-", 1)[1]) for sp in specs if sp.structure == s)
        assert numbers == list(range(1, len(numbers) + 1))


# --- the reserved surface family (benchmarks/job_trust.py only) ---------------------------


def test_default_surface_still_makes_the_committed_tiny_dataset_photo() -> None:
    """The committed tiny_dataset/ photos were made before the surface option existed: the
    default (implicit or explicit) must still reproduce the first one byte for byte, and the
    committed manifest must not name a surface (PIL encodes the JPEG, as write_dataset does)."""
    import io

    from trainkit.demo import TINY_DATASET
    from trainkit.synth.dataset import photo_specs

    tiny = Path(__file__).resolve().parents[1] / "tiny_dataset"
    base = SynthOptions(height=TINY_DATASET["height"], width=TINY_DATASET["width"])
    spec = photo_specs(np.random.default_rng(TINY_DATASET["seed"]), TINY_DATASET["n_photos"], base)[
        0
    ]
    committed = (tiny / "photos" / f"{spec.name}.jpg").read_bytes()
    for options in (spec.options, replace_surface(spec.options, "default")):
        buf = io.BytesIO()
        Image.fromarray(generate_photo(spec.seed, options).image).save(buf, "JPEG", quality=90)
        assert buf.getvalue() == committed
    manifest = json.loads((tiny / "manifest.json").read_text())
    assert "surface" not in manifest["options"]


def replace_surface(options: SynthOptions, surface: str) -> SynthOptions:
    from dataclasses import replace

    return replace(options, surface=surface)


def test_unknown_surface_is_refused_with_the_choices() -> None:
    with pytest.raises(ValueError, match="expected 'default' or a SurfaceFamily, got 'marble'"):
        SynthOptions(surface="marble")
    # The reserved family is no built-in name: it lives in benchmarks/reserved.py.
    with pytest.raises(ValueError, match="got 'broom'"):
        SynthOptions(surface="broom")
