"""Crack drawings into labels: masks and traced centrelines measured and labelled by the shared rule.

Outside references, named beside each check: lines and bands drawn by OpenCV (``cv2.line``,
``cv2.fillConvexPoly``) at angles and widths known by construction; scikit-image's
``skeletonize`` for the centreline; scipy's ``distance_transform_edt`` for a band's
width and a junction's half width; scipy's ``cKDTree`` for each crack pixel's nearest
skeleton pixel; hashlib for the drawing's SHA-256; hand-worked polyline lengths.
"""

from __future__ import annotations

import hashlib
import math
import sqlite3

import cv2
import numpy as np
import pytest
from PIL import Image

from trainkit.core.grid import grid_boxes
from trainkit.core.taxonomy import angle_difference, load_class_set
from trainkit.intake.drawing_files import DrawingError
from trainkit.intake.drawn_cracks import (
    cracks_from_mask,
    cracks_from_polylines,
    measure_patch,
)
from trainkit.labels.drawings import (
    DRAWING_REVIEWER,
    import_centrelines,
    import_masks,
)
from trainkit.store.workspace import Workspace

ORIENT = load_class_set("orientation")
FULL = (0, 0, 224, 224)


def _line_mask(angle_deg: float, thickness: int, size: int = 224, half: float = 90.0):
    """A line through the centre at ``angle_deg`` (on-screen, counter-clockwise from +x,
    y down), drawn by OpenCV."""
    m = np.zeros((size, size), np.uint8)
    a = math.radians(angle_deg)
    c = np.array([size / 2, size / 2])
    d = np.array([math.cos(a), -math.sin(a)]) * half
    p, q = (tuple(int(round(v)) for v in c - d), tuple(int(round(v)) for v in c + d))
    cv2.line(m, p, q, 255, thickness)
    return m


def _band_mask(angle_deg: float, width: float, size: int = 224, half: float = 90.0):
    """A straight band ``width`` pixels wide (a rotated rectangle) filled by scikit-image's
    ``draw.polygon``, which takes the pixels whose centres are inside: about ``width``
    pixels across at any angle."""
    from skimage.draw import polygon

    a = math.radians(angle_deg)
    u = np.array([math.cos(a), -math.sin(a)])
    n = np.array([-u[1], u[0]])
    c = np.array([size / 2, size / 2]) + 0.3  # no edge on a row of pixel centres
    corners = np.array([c - half * u - width / 2 * n, c + half * u - width / 2 * n,
                        c + half * u + width / 2 * n, c - half * u + width / 2 * n])  # fmt: skip
    m = np.zeros((size, size), np.uint8)
    rr, cc = polygon(corners[:, 1] - 0.5, corners[:, 0] - 0.5, m.shape)  # centres at integers
    m[rr, cc] = 255
    return m


# ----- one rule ---------------------------------------------------------------------------------


def test_generator_and_importer_label_by_one_function():
    """The generator's labels and the importer's come from the one rule in the core."""
    import trainkit.intake.drawn_cracks as drawn
    import trainkit.synth.labels as synth_labels
    from trainkit.core import patch_rule

    assert synth_labels.label_segments is patch_rule.label_segments
    assert drawn.label_segments is patch_rule.label_segments


def test_traced_truth_labels_like_the_generator_on_every_patch():
    """The generator's exact centrelines, imported as traced polylines, get the generator's
    own labels, angles and lengths on every patch (the same rule on the same geometry)."""
    from trainkit.synth import Crack, SynthOptions, derive_patch_label, generate_photo

    # a crack 2 px wide whose centreline runs 1.5 px below a box: its edge is in the box
    edge = Crack(np.array([[10.0, 65.5], [60.0, 65.5]]), np.array([2.0, 2.0]), "main", 1)
    want = derive_patch_label([edge], (0, 0, 64, 64), ORIENT)
    got = measure_patch(cracks_from_polylines([(edge.points, edge.widths)]), (0, 0, 64, 64), ORIENT)
    assert want.reason == "crack edge just outside the patch" and got.truth == want
    checked = 0
    for seed, scene in ((1, "single"), (2, "multi"), (3, "map")):
        photo = generate_photo(seed, SynthOptions(scene=scene, height=256, width=384))
        drawn = cracks_from_polylines([(c.points, c.widths) for c in photo.cracks])
        for box in grid_boxes(256, 384, 64, 64):
            box = tuple(int(v) for v in box)
            want = derive_patch_label(photo.cracks, box, ORIENT)
            got = measure_patch(drawn, box, ORIENT).truth
            assert (got.label, got.status, got.reason) == (want.label, want.status, want.reason)
            assert got.length_px == pytest.approx(want.length_px, abs=1e-9)
            checked += want.length_px > 0
    assert checked > 10


# ----- masks: angle, width, length ----------------------------------------------------------


@pytest.mark.parametrize("thickness", [1, 5])
@pytest.mark.parametrize("angle", [0, 15, 30, 40, 50, 60, 75, 90, 105, 120, 135, 150, 165])
def test_a_drawn_line_gives_its_class_and_angle(angle, thickness):
    """OpenCV line at a known angle: the class is the nearest angle centre and the angle
    is recovered to within a degree (a line of 180 px ends on whole pixels: about 0.3 deg)."""
    m = measure_patch(cracks_from_mask(_line_mask(angle, thickness)), FULL, ORIENT)
    want = ORIENT.class_for_angle(angle)  # by construction: 0 -> horizontal, 30 -> rising...
    assert m.truth.label == want, m.truth.reason
    assert angle_difference(m.truth.angle_deg, angle) < 1.0
    assert m.truth.coherence > 0.97


@pytest.mark.parametrize("width", [2.0, 3.0, 4.5, 6.0, 9.0])
@pytest.mark.parametrize("angle", [0, 30, 45, 100])
def test_the_width_of_a_band_of_known_width(width, angle):
    """A band scikit-image filled at a known width: its drawn width (pixels over its 180-px
    length) is within half a pixel of the width asked, and the measured mean width is within
    0.5 px or 10 % of the drawn one; the widest stretch half a pixel more."""
    mask = _band_mask(angle, width)
    drawn = np.count_nonzero(mask) / 180.0
    assert abs(drawn - width) <= 0.5
    m = measure_patch(cracks_from_mask(mask), FULL, ORIENT)
    tol = max(0.5, 0.1 * drawn)
    assert abs(m.width_px - drawn) <= tol
    assert abs(m.width_max_px - drawn) <= tol + 0.5


@pytest.mark.parametrize("thickness", [1, 2, 3, 5, 7])
def test_the_width_of_an_opencv_line_is_what_opencv_draws(thickness):
    """OpenCV draws a line of thickness t > 1 as 2 * ((t + 1) // 2) + 1 pixels across
    (counted in the drawn mask: 2 -> 3, 3 -> 5, 5 -> 7); the measure gives that width."""
    m = np.zeros((64, 224), np.uint8)
    cv2.line(m, (20, 32), (200, 32), 255, thickness)
    across = int(np.count_nonzero(m[:, 112]))
    assert across == (1 if thickness == 1 else 2 * ((thickness + 1) // 2) + 1)
    got = measure_patch(cracks_from_mask(m), (0, 0, 224, 64), ORIENT).width_px
    assert got == pytest.approx(across, abs=0.25)


@pytest.mark.parametrize("width", [3, 5, 7])
def test_the_width_agrees_with_scipys_distance_transform(width):
    """On a horizontal band of an odd number of rows, twice scipy's Euclidean distance
    transform at the centre row minus one is the band's width; the measure agrees."""
    from scipy.ndimage import distance_transform_edt

    mask = np.zeros((64, 200), bool)
    mask[32 - width // 2 : 32 + width // 2 + 1, 20:180] = True
    edt = distance_transform_edt(mask)
    reference = 2 * edt[32, 60:140].max() - 1
    assert reference == width
    m = measure_patch(cracks_from_mask(mask), (0, 0, 200, 64), ORIENT)
    assert abs(m.width_px - reference) < 0.25


@pytest.mark.parametrize("shape", ["line", "circle"])
def test_the_centreline_is_scikit_images_skeleton(shape):
    """The segments run within 1.5 px (the simplification's 1 px and half a pixel) of every
    pixel of scikit-image's skeleton, on a straight line and on a circle (where a coarser
    simplification would cut corners)."""
    from skimage.morphology import skeletonize

    if shape == "line":
        mask = _line_mask(35, 5) > 0
    else:
        mask = np.zeros((224, 224), np.uint8)
        cv2.circle(mask, (112, 112), 80, 255, 3)
        mask = mask > 0
    skel = np.argwhere(skeletonize(mask))[:, ::-1] + 0.5  # pixel centres, x y
    drawn = cracks_from_mask(mask)
    a, b = drawn.p0[None], drawn.p1[None]
    d = b - a
    t = np.clip(np.sum((skel[:, None] - a) * d, -1) / np.sum(d * d, -1), 0, 1)
    dist = np.hypot(*(skel[:, None] - a - t[..., None] * d).transpose(2, 0, 1)).min(axis=1)
    assert dist.max() <= 1.5


def test_the_length_of_a_circle():
    """A circle of radius 80 px drawn by OpenCV: 2 pi 80 = 502.7 px of centreline by hand;
    measured within 1 % (a closed loop of skeleton, no end)."""
    mask = np.zeros((224, 224), np.uint8)
    cv2.circle(mask, (112, 112), 80, 255, 3)
    assert cracks_from_mask(mask).length_px() == pytest.approx(2 * math.pi * 80, rel=0.01)


def test_the_length_of_a_hand_worked_polyline():
    """An L drawn by OpenCV from (20, 20) to (180, 20) to (180, 140) (pixel centres at
    +0.5): 160 px + 120 px = 280 px by hand; the measured length is within 1 %, and a box
    holding only the first leg measures it alone."""
    mask = np.zeros((224, 224), np.uint8)
    cv2.polylines(mask, [np.array([[20, 20], [180, 20], [180, 140]], np.int32)], False, 255, 1)
    drawn = cracks_from_mask(mask)
    assert drawn.length_px() == pytest.approx(280.0, rel=0.01)
    first_leg = measure_patch(drawn, (0, 0, 170, 60), ORIENT)  # x 20.5..170: 149.5 px
    assert first_leg.truth.length_px == pytest.approx(149.5, abs=1.0)
    assert first_leg.truth.label == ORIENT.index("horizontal")


@pytest.mark.parametrize("blob", [1, 3])
def test_a_speck_makes_its_patch_ambiguous_not_none(blob):
    """A lone crack pixel (its skeleton is itself) and a 3 x 3 blob (two skeleton pixels):
    crack pixels without a centreline long enough to label, so ambiguous, not ``none``."""
    mask = np.zeros((64, 64), np.uint8)
    mask[30 : 30 + blob, 30 : 30 + blob] = 1
    m = measure_patch(cracks_from_mask(mask), (0, 0, 64, 64), ORIENT)
    assert m.truth.status == "ambiguous" and m.truth.length_px > 0
    assert measure_patch(cracks_from_mask(mask * 0), (0, 0, 64, 64), ORIENT).truth.label == 0


def test_specks_beside_a_crack_do_not_tilt_its_angle():
    """A line at 30 degrees (OpenCV) with 40 lone pixels scattered beside it: the angle stays
    within half a degree of the line's alone."""
    mask = _line_mask(30, 1)
    alone = measure_patch(cracks_from_mask(mask), FULL, ORIENT).truth.angle_deg
    rng = np.random.default_rng(0)
    for r, c in rng.integers(5, 60, (40, 2)):  # the upper-left corner, off the line
        mask[r, c] = 255
    noisy = measure_patch(cracks_from_mask(mask), FULL, ORIENT).truth
    assert abs(noisy.angle_deg - alone) < 0.5 and noisy.label == ORIENT.index("diagonal_rising")


# ----- a workspace ---------------------------------------------------------------------------


def _workspace(root, photos: dict[str, tuple[int, int]], tile: int = 64, gsd_mm=None):
    """A workspace of photos of the given (width, height), tiled into a grid of ``tile``."""
    ws = Workspace.create(root, class_set=ORIENT, tile_px=tile)
    for k, (name, (w, h)) in enumerate(photos.items()):
        boxes = grid_boxes(h, w, tile, tile)
        ws.add_photo_with_patches(
            name=name, source_path=f"/x/{name}", width=w, height=h, gsd_mm=gsd_mm,
            group_id=f"g{k}", sha256=f"{k:064d}", grid_px=tile,
            patches=[dict(row=int(b[1]) // tile, col=int(b[0]) // tile, x0=int(b[0]),
                          y0=int(b[1]), x1=int(b[2]), y1=int(b[3]), crop="", patch_mm=None,
                          focus=50.0, clipped=0.0) for b in boxes],
        )  # fmt: skip
    return ws


def _save(path, mask):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray((np.asarray(mask) > 0).astype(np.uint8) * 255).save(path)
    return path


def _counts(ws):
    with sqlite3.connect(ws.db_path) as con:
        return (
            con.execute("SELECT COUNT(*) FROM label_events").fetchone()[0],
            con.execute("SELECT COUNT(*) FROM drawing_measures").fetchone()[0],
        )


def _vertical_mask(w=192, h=128, x=40, thickness=3):
    m = np.zeros((h, w), np.uint8)
    cv2.line(m, (x, 0), (x, h - 1), 255, thickness)
    return m


def test_masks_become_labels_with_origin_checksum_width_and_length(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128), "site/b.jpg": (192, 192)}, gsd_mm=0.5)
    _save(tmp_path / "m" / "a.png", _vertical_mask(x=40))
    f = _save(tmp_path / "m" / "site" / "b.tif", _vertical_mask(h=192, x=150, thickness=5))
    res = import_masks(ws, tmp_path / "m", workers=1)
    assert (res.photos, res.patches) == (2, 15)
    events = ws.label_events()
    assert {e["origin"] for e in events} == {"drawing"}
    assert {e["reviewer"] for e in events} == {DRAWING_REVIEWER}
    labels = {r.box: r.label for r in ws.patches(labelled=True) if r.photo == "a.jpg"}
    # the crack at x = 40 runs down the first column of patches: vertical there, none elsewhere
    assert labels[(0, 0, 64, 64)] == "vertical" and labels[(64, 0, 128, 64)] == "none"
    measures = ws.drawing_measures()
    b_patch = next(r.id for r in ws.patches() if r.photo == "site/b.jpg" and r.box[:2] == (128, 64))
    m = measures[b_patch]
    assert m["drawing_sha256"] == hashlib.sha256(f.read_bytes()).hexdigest()  # hashlib
    assert m["kind"] == "mask" and m["drawing"] == str(f)
    assert m["length_px"] == pytest.approx(64, abs=2)  # the crack crosses the 64-px patch
    assert m["width_px"] == pytest.approx(7, abs=0.5)  # cv2 thickness 5 draws 7 px across
    assert m["length_mm"] == pytest.approx(m["length_px"] * 0.5)
    assert m["width_mm"] == pytest.approx(m["width_px"] * 0.5, abs=1e-3)
    assert m["angle_deg"] == pytest.approx(90, abs=1)


def test_a_presence_workspace_gets_crack_and_none(tmp_path):
    """In the presence-only class set the rule's catch-all class is ``crack``; no angle
    class, so no patch is near a class boundary."""
    ws = Workspace.create(tmp_path / "ws", class_set=load_class_set("presence"), tile_px=64)
    ws.add_photo_with_patches(
        name="a.jpg", source_path="/x/a.jpg", width=128, height=64, gsd_mm=None, group_id="g",
        sha256="0" * 64, grid_px=64,
        patches=[dict(row=0, col=c, x0=64 * c, y0=0, x1=64 * c + 64, y1=64, crop="",
                      patch_mm=None, focus=1.0, clipped=0.0) for c in (0, 1)],
    )  # fmt: skip
    _save(tmp_path / "m" / "a.png", _vertical_mask(w=128, h=64, x=30))
    import_masks(ws, tmp_path / "m", workers=1)
    assert [r.label for r in ws.patches()] == ["crack", "none"]
    assert all(m["boundary_deg"] is None for m in ws.drawing_measures().values())


def test_a_mask_of_the_wrong_size_imports_nothing(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128), "b.jpg": (192, 128)})
    _save(tmp_path / "m" / "a.png", _vertical_mask())
    _save(tmp_path / "m" / "b.png", np.zeros((128, 190)))
    with pytest.raises(DrawingError, match=r"b\.png is 190 x 128 pixels.* 192 x 128"):
        import_masks(ws, tmp_path / "m", workers=1)
    assert _counts(ws) == (0, 0)  # the good mask was not imported either: all or nothing


@pytest.mark.parametrize(
    "save,match",
    [
        (lambda p: Image.new("RGB", (192, 128)).save(p.with_suffix(".png")), "3 channels"),
        (lambda p: Image.new("L", (192, 128)).save(p.with_suffix(".jpg")), "JPEG"),
        (lambda p: p.with_suffix(".png").write_bytes(b"not a png"), "cannot be read"),
    ],
)
def test_unusable_masks_are_one_error_and_import_nothing(tmp_path, save, match):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128), "b.jpg": (192, 128)})
    _save(tmp_path / "m" / "a.png", _vertical_mask())
    save(tmp_path / "m" / "b")
    with pytest.raises(DrawingError, match=match) as err:
        import_masks(ws, tmp_path / "m", workers=1)
    assert "\n" not in str(err.value)
    assert _counts(ws) == (0, 0)


def test_empty_masks_unmatched_masks_and_photos_without_one_are_one_line_each(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128), "b.jpg": (192, 128), "c.jpg": (64, 64)})
    _save(tmp_path / "m" / "a.png", _vertical_mask())
    _save(tmp_path / "m" / "b.png", np.zeros((128, 192)))  # no crack at all
    _save(tmp_path / "m" / "zz.png", np.zeros((10, 10)))  # no such photo
    res = import_masks(ws, tmp_path / "m", workers=1)
    assert len(res.notes) == 3 and all("\n" not in n for n in res.notes)
    assert any("1 mask matches no photo" in n and "zz.png" in n for n in res.notes)
    assert any("1 photo has no drawing" in n and "c.jpg" in n for n in res.notes)
    assert any("1 mask holds no crack pixel" in n and "6 patches are labelled none" in n
               for n in res.notes)  # fmt: skip
    labelled = {r.photo: r.label for r in ws.patches(labelled=True) if r.photo == "b.jpg"}
    assert labelled == {"b.jpg": "none"}
    assert not [r for r in ws.patches(labelled=True) if r.photo == "c.jpg"]  # left as it was


def test_importing_again_adds_nothing_and_a_persons_label_is_kept(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    _save(tmp_path / "m" / "a.png", _vertical_mask())
    first = import_masks(ws, tmp_path / "m", workers=1)
    pid = next(r.id for r in ws.patches() if r.box == (0, 0, 64, 64))
    ws.add_label_event(pid, "diagonal_rising", reviewer="ana")
    again = import_masks(ws, tmp_path / "m", workers=1)
    assert again.added == 0 and again.kept == 1 and again.unchanged == first.added - 1
    assert ws.patches(ids=[pid])[0].label == "diagonal_rising"
    assert _counts(ws) == (first.added + 1, 6)  # measures replaced, not added again


def test_a_newer_drawing_wins_and_withdraws_a_label_it_finds_ambiguous(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    _save(tmp_path / "m1" / "a.png", _vertical_mask(x=40))
    import_masks(ws, tmp_path / "m1", workers=1)
    pid = next(r.id for r in ws.patches() if r.box == (0, 0, 64, 64))
    assert ws.patches(ids=[pid])[0].label == "vertical"
    short = np.zeros((128, 192), np.uint8)
    cv2.line(short, (40, 20), (40, 26), 255, 1)  # 7 px: ambiguous under the rule
    f2 = _save(tmp_path / "m2" / "a.png", short)
    res = import_masks(ws, tmp_path / "m2", workers=1)
    assert res.withdrawn == 1
    rec = ws.patches(ids=[pid])[0]
    assert rec.labelled and rec.label is None  # unsure: out of training
    m = ws.drawing_measures([pid])[pid]
    assert m["drawing_sha256"] == hashlib.sha256(f2.read_bytes()).hexdigest()
    assert m["label"] is None and "minimum" in m["reason"]


def test_a_workspace_made_before_drawings_opens_and_imports(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    with sqlite3.connect(ws.db_path) as con:
        con.execute("DROP TABLE drawing_measures")  # as an older kit made it
    ws = Workspace.open(ws.root)
    _save(tmp_path / "m" / "a.png", _vertical_mask())
    assert import_masks(ws, tmp_path / "m", workers=1).patches == 6


def test_ambiguous_patches_stay_unlabelled_and_out_of_training(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    mask = np.zeros((128, 192), np.uint8)
    cv2.line(mask, (100, 10), (106, 10), 255, 1)  # 7 px: under the rule's 15 % of 64 px
    _save(tmp_path / "m" / "a.png", mask)
    res = import_masks(ws, tmp_path / "m", workers=1)
    assert res.ambiguous == 1
    amb = [pid for pid, m in ws.drawing_measures().items() if m["label"] is None]
    assert len(amb) == 1 and "minimum" in ws.drawing_measures()[amb[0]]["reason"]
    assert not ws.patches(ids=amb)[0].labelled


# ----- centrelines -------------------------------------------------------------------------


def test_centreline_csv_with_and_without_widths(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128), "b.jpg": (192, 128)})
    csv_file = tmp_path / "lines.csv"
    csv_file.write_text(
        "photo,crack_id,x,y,width_px\n"
        "a,1,10.5,32.5,3\n"
        "a,1,180.5,32.5,3\n"  # horizontal along the first row of patches
        "b.jpg,7,32,0,\n"
        "b.jpg,7,32,128,\n"  # vertical, no width given
    )
    res = import_centrelines(ws, csv_file)
    assert res.photos == 2 and res.kind == "csv"
    by = {(r.photo, r.box): r.label for r in ws.patches(labelled=True)}
    assert by[("a.jpg", (64, 0, 128, 64))] == "horizontal"
    assert by[("b.jpg", (0, 64, 64, 128))] == "vertical"
    m = ws.drawing_measures()
    a_mid = next(r.id for r in ws.patches() if r.photo == "a.jpg" and r.box == (64, 0, 128, 64))
    b_low = next(r.id for r in ws.patches() if r.photo == "b.jpg" and r.box == (0, 64, 64, 128))
    assert m[a_mid]["width_px"] == 3 and m[a_mid]["length_px"] == 64  # by hand: 64 px across
    assert m[b_low]["width_px"] is None and m[b_low]["length_px"] == 64
    assert m[a_mid]["drawing_sha256"] == hashlib.sha256(csv_file.read_bytes()).hexdigest()


@pytest.mark.parametrize(
    "text,match",
    [
        ("photo,crack_id,x\na,1,3\n", "expected columns"),
        ("photo,crack_id,x,y\na,1,3,4\n", "has one point"),
        ("photo,crack_id,x,y,width_px\na,1,3,4,2\na,1,9,9,\n", "width_px on 1 of its 2"),
        ("photo,crack_id,x,y\na,1,3,4\na,1,x,9\n", r"line 3: x and y must be numbers"),
        ("photo,crack_id,x,y\na,1,3,4\na,1,3000,9\n", r"outside its photo \(192 x 128"),
    ],
)
def test_bad_centreline_csv_is_one_error_and_imports_nothing(tmp_path, text, match):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    (tmp_path / "c.csv").write_text(text)
    with pytest.raises(DrawingError, match=match):
        import_centrelines(ws, tmp_path / "c.csv")
    assert _counts(ws) == (0, 0)


SVG = """<?xml version="1.0"?>
<svg xmlns="http://www.w3.org/2000/svg" width="192" height="128" {viewbox}>
  <image href="a.jpg" width="192" height="128"/>
  <g transform="translate(10 0)" style="stroke-width:4">
    <polyline id="c1" points="0,32.5 150,32.5"/>
    <path d="M 22 10 C 22 40, 22 80, 22 120" style="stroke-width:2px"/>
  </g>
  <g style="display:none"><polyline points="0,0 190,120"/></g>
  <rect x="1" y="1" width="5" height="5"/>
  {extra}
</svg>
"""


def test_svg_polylines_and_paths_with_transforms_and_widths(tmp_path):
    """A polyline in a translated group, a straight cubic curve, a hidden layer, a rect."""
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    (tmp_path / "d").mkdir()
    (tmp_path / "d" / "a.svg").write_text(SVG.format(viewbox='viewBox="0 0 192 128"', extra=""))
    res = import_centrelines(ws, tmp_path / "d")
    assert res.kind == "svg" and res.photos == 1
    assert any("1 rect elements are not centrelines" in n for n in res.notes)
    by = {r.box: r for r in ws.patches()}
    m = ws.drawing_measures()
    top_right = m[by[(128, 0, 192, 64)].id]  # polyline x 10..160 (translated) at y 32.5
    assert top_right["label"] == "horizontal" and top_right["width_px"] == 4
    assert top_right["length_px"] == pytest.approx(160 - 128)
    low_left = m[by[(0, 64, 64, 128)].id]  # the curve: x = 32 (translated), y 64..120
    assert low_left["label"] == "vertical" and low_left["width_px"] == 2
    assert low_left["length_px"] == pytest.approx(120 - 64, abs=1e-6)
    assert m[by[(64, 64, 128, 128)].id]["label"] == "none"  # the hidden diagonal is not drawn


@pytest.mark.parametrize(
    "viewbox,extra,match",
    [
        ('viewBox="0 0 210 297"', "", "viewBox '0 0 210 297'"),
        ("", '<path d="M 1 1 A 5 5 0 0 1 20 20"/>', "arc"),
        ("", '<polyline points="1,1 5,5" style="stroke-width:1mm"/>', "not in pixels"),
        ("", '<polyline points="1,1 5,5" transform="perspective(3)"/>', "cannot read transform"),
    ],
)
def test_svg_that_cannot_be_read_as_pixels_is_refused(tmp_path, viewbox, extra, match):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    (tmp_path / "a.svg").write_text(SVG.format(viewbox=viewbox, extra=extra))
    with pytest.raises(DrawingError, match=match):
        import_centrelines(ws, tmp_path / "a.svg")
    assert _counts(ws) == (0, 0)


def test_svg_declaring_entities_is_refused(tmp_path):
    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)})
    (tmp_path / "a.svg").write_text(
        '<?xml version="1.0"?><!DOCTYPE svg [<!ENTITY a "aaaaaaaa">]>'
        '<svg xmlns="http://www.w3.org/2000/svg"><text>&a;</text></svg>'
    )
    with pytest.raises(DrawingError, match="entities"):
        import_centrelines(ws, tmp_path / "a.svg")


# ----- review and export --------------------------------------------------------------------


def test_the_boundary_queue_holds_drawn_patches_near_a_class_boundary(tmp_path):
    """Lines at 15 and 29 deg (7.5 deg from the 22.5 boundary), 70 deg (2.5: ambiguous) and
    90 deg (22.5 away): the queue holds the three near ones, nearest first, and a patch a
    person has answered leaves it."""
    from trainkit.labels.review_run import ReviewRequest, prepare_session

    photos = {f"p{a}.jpg": (64, 64) for a in (15, 29, 70, 90)}
    ws = _workspace(tmp_path / "ws", photos)
    for a in (15, 29, 70, 90):
        m = np.zeros((64, 64), np.uint8)
        c, d = (
            np.array([32.0, 32.0]),
            28 * np.array([math.cos(math.radians(a)), -math.sin(math.radians(a))]),
        )
        cv2.line(
            m, tuple(int(round(v)) for v in c - d), tuple(int(round(v)) for v in c + d), 255, 1
        )
        _save(tmp_path / "m" / f"p{a}.png", m)
    import_masks(ws, tmp_path / "m", workers=1)
    session = prepare_session(ws, ReviewRequest(reviewer="ana", queue="boundary"))
    photos_in_order = [session.record(pid).photo for pid in session.queue]
    assert photos_in_order[0] == "p70.jpg"  # 2.5 deg from 67.5: ambiguous, unlabelled
    assert set(photos_in_order) == {"p70.jpg", "p15.jpg", "p29.jpg"}
    assert "deg from a class boundary" in __import__(
        "trainkit.labels.review", fromlist=["describe_drawing"]
    ).describe_drawing(session.drawing(session.queue[0]))
    session.answer("vertical")
    again = prepare_session(ws, ReviewRequest(reviewer="ana", queue="boundary"))
    assert len(again.queue) == 2


def test_review_shows_and_export_writes_the_drawings_measures(tmp_path):
    import csv

    from trainkit.labels.labels_io import DRAWING_COLUMNS, export_csv
    from trainkit.labels.review import Session
    from trainkit.labels.review_ui import _patch_lines

    ws = _workspace(tmp_path / "ws", {"a.jpg": (192, 128)}, gsd_mm=0.25)
    _save(tmp_path / "m" / "a.png", _vertical_mask(thickness=5))
    import_masks(ws, tmp_path / "m", workers=1)
    pid = next(r.id for r in ws.patches() if r.box == (0, 0, 64, 64))
    session = Session(ws, "ana", [pid])
    lines = _patch_lines(session, session.current(), np.zeros((64, 64, 3), np.uint8))
    shown = next(line for line in lines if line.startswith("drawing: vertical"))
    m = ws.drawing_measures([pid])[pid]
    assert f"{m['width_px']:.1f} px ({m['width_mm']:.2f} mm) wide" in shown
    assert f"crack {m['length_px']:.1f} px ({m['length_mm']:.2f} mm) long" in shown
    export_csv(ws, tmp_path / "out.csv")
    rows = list(csv.DictReader((tmp_path / "out.csv").open()))
    assert set(DRAWING_COLUMNS) <= set(rows[0])
    row = next(r for r in rows if int(r["patch_id"]) == pid)
    assert float(row["crack_width_px"]) == m["width_px"]
    assert float(row["crack_length_mm"]) == pytest.approx(m["length_px"] * 0.25, abs=1e-3)
    assert row["drawing_sha256"] == m["drawing_sha256"] and row["origin"] == "drawing"


# ----- the command line ----------------------------------------------------------------------


def test_tile_imports_masks_and_says_what_it_left_out(tmp_path, capsys):
    from trainkit.cli import main

    photos = tmp_path / "photos"
    photos.mkdir()
    rng = np.random.default_rng(0)
    for name in ("p0", "p1"):
        Image.fromarray(rng.integers(0, 255, (128, 192, 3), dtype=np.uint8)).save(
            photos / f"{name}.png"
        )
    _save(tmp_path / "m" / "p0.png", _vertical_mask())
    args = ["tile", str(photos), "-w", str(tmp_path / "ws"), "--tile-px", "64", "--workers", "1"]
    assert main([*args, "--import-masks", str(tmp_path / "m")]) == 0
    cap = capsys.readouterr()
    out = " ".join(cap.out.split())  # the console wraps long lines
    assert "imported masks of 1 photo from" in out and "6 patches measured" in out
    assert "trainkit: 1 photo has no drawing (e.g. p1.png)" in cap.err
    ws = Workspace.open(tmp_path / "ws")
    assert {e["origin"] for e in ws.label_events()} == {"drawing"}
    # a vertical crack is 22.5 degrees from a class boundary: nothing to confirm
    assert main(["review", str(tmp_path / "ws"), "--queue", "boundary"]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "nothing to review in the boundary queue" in out and "--import-masks" in out
    # a mask of the wrong size: one line, exit 2, nothing more written
    _save(tmp_path / "bad" / "p1.png", np.zeros((100, 100)))
    before = _counts(ws)
    assert main([*args, "--import-masks", str(tmp_path / "bad")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("trainkit: mask ") and "100 x 100 pixels" in err[-1]
    assert "Traceback" not in "\n".join(err) and _counts(ws) == before


# ----- the vectorised mask reading, against the plain computations it replaces ---------


def _scribbles(seed: int, size: int = 160) -> np.ndarray:
    """Lines, rings and specks drawn by OpenCV at random: ends, junctions, closed loops."""
    rng = np.random.default_rng(seed)
    mask = np.zeros((size, size), np.uint8)
    for _ in range(4):
        pts = rng.integers(5, size - 5, (int(rng.integers(2, 5)), 2)).astype(np.int32)
        cv2.polylines(mask, [pts], bool(rng.integers(0, 2)), 1, int(rng.integers(1, 8)))
    cv2.circle(mask, (size // 2, size // 2), int(rng.integers(10, 40)), 1, 1)
    mask[rng.integers(2, size - 2, 6), rng.integers(2, size - 2, 6)] = 1
    return np.pad(mask > 0, 1)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_the_half_width_at_a_junction_is_scipys_distance_transform(seed):
    """The crack's half width at a pixel, read from one window around it, equals scipy's
    ``distance_transform_edt`` of that window padded with background (16 px each way)."""
    from scipy import ndimage

    from trainkit.intake.drawn_cracks import _half_width_at

    mask = _scribbles(seed)
    pix = np.argwhere(mask)[:: max(1, int(mask.sum()) // 60)]
    got = _half_width_at(mask, pix)
    for (r, c), g in zip(pix, got, strict=True):
        ra, ca = max(0, r - 16), max(0, c - 16)
        local = ndimage.distance_transform_edt(np.pad(mask[ra : r + 17, ca : c + 17], 1))
        assert g == local[r - ra + 1, c - ca + 1]


@pytest.mark.parametrize("sparse", [1, 10**9])  # skeleton pixels by index image, by search
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_crack_pixels_go_to_the_skeleton_pixel_scipys_kdtree_finds(seed, sparse, monkeypatch):
    """Each crack pixel's nearest skeleton pixel (before the end caps are left out, so with
    no chain ends given) is the one scipy's ``cKDTree`` query finds, ties included."""
    from scipy.spatial import cKDTree
    from skimage.morphology import skeletonize

    import trainkit.intake.drawn_cracks as dc
    from trainkit.intake.drawn_cracks import _pixels_per_skeleton_pixel, _SkeletonGraph

    monkeypatch.setattr(dc, "_SPARSE", sparse)
    mask = _scribbles(seed)
    graph = _SkeletonGraph(skeletonize(mask))
    assert (graph.index is None) == (sparse == 1)
    got = _pixels_per_skeleton_pixel(np.argwhere(mask), graph, np.zeros(0, int), np.zeros((0, 2)))
    _, nearest = cKDTree(graph.rc).query(np.argwhere(mask), k=1)
    assert np.array_equal(got, np.bincount(nearest, minlength=len(graph.rc)))


@pytest.mark.parametrize("sparse", [1, 10**9])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_the_chains_cover_scikit_images_skeleton_link_by_link(seed, sparse, monkeypatch):
    """The chains hold every pixel of scikit-image's skeleton, and each pair of
    8-neighbours of it (less the diagonals two straight steps make) is one step of exactly
    one chain; inner chain pixels have two links, so chains break only at ends and
    junctions."""
    from skimage.morphology import skeletonize

    import trainkit.intake.drawn_cracks as drawn
    from trainkit.intake.drawn_cracks import _SkeletonGraph

    monkeypatch.setattr(drawn, "_SPARSE", sparse)
    skel = skeletonize(_scribbles(seed))
    graph = _SkeletonGraph(skel)
    flat, off = graph.chains()
    px = {tuple(p) for p in np.argwhere(skel)}
    assert {tuple(graph.rc[i]) for i in flat} == px
    links = set()
    for r, c in px:
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                q = (r + dr, c + dc)
                if (dr or dc) and q in px and not (dr and dc and ({(r + dr, c), (r, c + dc)} & px)):
                    links.add(frozenset([(r, c), q]))
    steps = [
        frozenset([tuple(graph.rc[a]), tuple(graph.rc[b])])
        for lo, hi in zip(off[:-1], off[1:], strict=True)
        for a, b in zip(flat[lo : hi - 1], flat[lo + 1 : hi], strict=True)
    ]
    assert len(steps) == len(set(steps)) and set(steps) == links
    for lo, hi in zip(off[:-1], off[1:], strict=True):
        inner = flat[lo + 1 : hi - 1]
        assert np.all(graph.deg[inner] == 2)


def test_near_picks_what_a_plain_comparison_picks():
    """With enough segments to file them by cell, ``near`` returns, in their order, the
    segments whose reach (bounding box grown by the halo) meets the box: the plain numpy
    comparison over all of them, on boxes inside, across and outside the photo."""
    from trainkit.intake.drawn_cracks import _NEAR_ALL, DrawnCracks

    rng = np.random.default_rng(5)
    n = _NEAR_ALL * 3
    p0 = rng.uniform(-50, 1050, (n, 2))
    p1 = p0 + rng.uniform(-20, 20, (n, 2))
    halo = rng.uniform(1, 30, n)
    cracks = DrawnCracks(p0, p1, halo, halo, halo)
    lo = np.minimum(p0, p1) - halo[:, None]
    hi = np.maximum(p0, p1) + halo[:, None]
    for x0, y0, w, h in rng.uniform([-300, -300, 1, 1], [1200, 1200, 500, 500], (60, 4)):
        box = (x0, y0, x0 + w, y0 + h)
        want = (
            (hi[:, 0] >= box[0])
            & (lo[:, 0] <= box[2])
            & (hi[:, 1] >= box[1])
            & (lo[:, 1] <= box[3])
        )
        assert np.array_equal(cracks.near(box).p0, p0[want])


def test_all_chains_simplified_at_once_keep_what_each_alone_keeps():
    """Ramer-Douglas-Peucker over many chains at once keeps, chain by chain, the vertices
    the one-chain ``simplify_polyline`` keeps (itself checked on hand-worked lengths
    above), on random walks, straight runs and closed loops."""
    from trainkit.intake.drawn_cracks import SIMPLIFY_PX, _simplify_chains, simplify_polyline

    rng = np.random.default_rng(9)
    chains = [
        np.cumsum(rng.integers(-1, 2, (int(k), 2)), axis=0) + 0.5 for k in rng.integers(1, 90, 40)
    ]
    chains.append(np.stack([np.arange(30.0), np.full(30, 2.5)], axis=1))
    ring = np.stack(
        [np.cos(np.linspace(0, 2 * np.pi, 41)), np.sin(np.linspace(0, 2 * np.pi, 41))], 1
    )
    chains.append(np.round(ring * 15) + 0.5)
    off = np.concatenate([[0], np.cumsum([len(c) for c in chains])])
    kept = _simplify_chains(np.concatenate(chains), off, SIMPLIFY_PX)
    want = np.concatenate(
        [
            np.asarray(simplify_polyline(c, SIMPLIFY_PX), int) + o
            for c, o in zip(chains, off, strict=False)
        ]
    )
    assert np.array_equal(kept, want)
