"""Photo intake: scale precedence, EXIF, regions of interest, idempotent re-runs, provenance."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from PIL import Image

from trainkit.core.decode import read_rgb
from trainkit.core.taxonomy import load_class_set
from trainkit.intake.scale import (
    ExifInfo,
    ScaleOptions,
    gsd_from_exif,
    gsd_mm_per_px,
    read_exif,
    resolve_scale,
)
from trainkit.intake.sidecar import parse_roi, read_sidecar
from trainkit.intake.tiling import tile_into_workspace, tile_photo
from trainkit.store.workspace import Workspace


def textured(h, w, seed=0):
    return np.random.default_rng(seed).integers(40, 220, (h, w, 3), dtype=np.uint8)


def new_ws(tmp_path, tile_px=32):
    return Workspace.create(
        tmp_path / "ws", class_set=load_class_set("orientation"), tile_px=tile_px
    )


# ----- scale ------------------------------------------------------------------------


def test_35mm_equivalent_path_agrees_with_sensor_path():
    # Standard photogrammetry pinhole relation. A 1-inch-type sensor 13.2 mm wide with an
    # 8.8 mm lens has crop factor 36 / 13.2 = 2.727..., so its 35 mm-equivalent focal length
    # is 8.8 x 36 / 13.2 = 24 mm. Both routes must give the same scale:
    # 13.2 mm x 5 m / (8.8 mm x 5472 px) = 66000 / 48153.6 = 1.370614 mm/px.
    direct = gsd_mm_per_px(sensor_width_mm=13.2, distance_m=5, focal_mm=8.8, image_width_px=5472)
    assert direct == pytest.approx(66000 / 48153.6, rel=1e-9)
    via35 = gsd_from_exif(ExifInfo(None, 24.0, None, None), distance_m=5, image_width_px=5472)
    assert via35 == pytest.approx(36 * 5000 / (24 * 5472), rel=1e-12)
    assert via35 == pytest.approx(direct, rel=1e-9)
    both = gsd_from_exif(
        ExifInfo(8.8, 24.0, None, None), distance_m=5, image_width_px=5472, sensor_width_mm=13.2
    )
    assert both == pytest.approx(direct)


def test_scale_precedence():
    opts = ScaleOptions(gsd_mm=0.9, distance_m=2.0, focal_mm=10.0, sensor_width_mm=10.0)
    exif = ExifInfo(None, 36.0, None, None)
    assert resolve_scale({"gsd_mm": 0.3}, 1000, opts, exif) == (0.3, "sidecar")
    cam = {"distance_m": 1.0, "focal_mm": 10.0, "sensor_width_mm": 10.0}
    assert resolve_scale(cam, 1000, opts, exif) == (
        pytest.approx(1.0),
        "sidecar-camera",
    )  # 10*1000/(10*1000)
    assert resolve_scale({}, 1000, opts, exif) == (0.9, "option")
    no_gsd = ScaleOptions(distance_m=2.0, focal_mm=10.0, sensor_width_mm=10.0)
    assert resolve_scale({}, 1000, no_gsd, exif) == (pytest.approx(2.0), "option-camera")
    # EXIF 35 mm-equivalent 36 mm at 2 m over 1000 px: 36 x 2000 / (36 x 1000) = 2.0 mm/px
    assert resolve_scale({}, 1000, ScaleOptions(distance_m=2.0), exif) == (
        pytest.approx(2.0),
        "exif",
    )
    assert resolve_scale({}, 1000, ScaleOptions(), exif) == (None, "none")


def test_exif_focal_lengths_and_date_are_read(tmp_path):
    im = Image.fromarray(textured(20, 30))
    exif = im.getexif()
    sub = exif.get_ifd(0x8769)
    sub[0x920A] = 8.8  # FocalLength
    sub[0xA405] = 24  # FocalLengthIn35mmFilm
    sub[0x9003] = "2026:05:17 10:11:12"  # DateTimeOriginal
    path = tmp_path / "e.jpg"
    im.save(path, exif=exif)
    info = read_exif(path)
    assert (
        info.focal_mm == pytest.approx(8.8)
        and info.focal_35mm == 24
        and info.capture_date == "2026-05-17"
    )


# ----- EXIF orientation -----------------------------------------------------------------

# EXIF 2.3 Orientation tag (from memory): how the stored pixels must be transformed to be
# shown upright. We build each stored image from an upright one with plain NumPy.
STORED_FROM_UPRIGHT = {
    1: lambda u: u,
    2: lambda u: u[:, ::-1],  # mirrored left-right
    3: lambda u: u[::-1, ::-1],  # rotated 180
    4: lambda u: u[::-1, :],  # mirrored top-bottom
    5: lambda u: u.transpose(1, 0, 2),  # transposed
    6: lambda u: np.rot90(u, 1),  # shown after a 90-degree clockwise turn
    7: lambda u: np.rot90(u, 2).transpose(1, 0, 2),  # transverse
    8: lambda u: np.rot90(u, -1),  # shown after a 90-degree counter-clockwise turn
}


@pytest.mark.parametrize("orientation", range(1, 9))
def test_all_eight_exif_orientations_give_the_same_upright_pixels(tmp_path, orientation):
    upright = textured(12, 20, seed=3)
    stored = np.ascontiguousarray(STORED_FROM_UPRIGHT[orientation](upright))
    im = Image.fromarray(stored)
    exif = im.getexif()
    exif[0x0112] = orientation
    path = tmp_path / f"o{orientation}.png"  # lossless, so pixels compare exactly
    im.save(path, exif=exif)
    np.testing.assert_array_equal(read_rgb(path), upright)


# ----- geometry -----------------------------------------------------------------------------


@pytest.mark.parametrize("h,w,stride", [(96, 128, 32), (100, 130, 32), (96, 128, 16), (70, 50, 24)])
def test_crops_equal_independent_slicing(h, w, stride):
    """Crops against skimage.util.view_as_windows (sizes that are multiples of the stride)
    and against plain NumPy slicing of the shifted-inward border tiles (sizes that are not)."""
    from skimage.util import view_as_windows

    img = textured(h, w, seed=1)
    tiles = tile_photo(img, tile_px=32, overlap=1 - stride / 32)
    windows = view_as_windows(img, (32, 32, 3), step=(stride, stride, 3))[:, :, 0]
    for pb, patch in tiles:
        np.testing.assert_array_equal(patch, img[pb.y0 : pb.y1, pb.x0 : pb.x1])
        if pb.y0 % stride == 0 and pb.x0 % stride == 0:
            np.testing.assert_array_equal(patch, windows[pb.y0 // stride, pb.x0 // stride])
    covered = np.zeros((h, w), bool)
    for pb, _ in tiles:
        covered[pb.y0 : pb.y1, pb.x0 : pb.x1] = True
    assert covered.all()


def test_scale_aware_tiles_cover_the_requested_mm_within_one_pixel():
    gsd = 0.37  # mm per pixel of the synthetic photo
    img = textured(600, 900, seed=2)
    for tile_mm in (50.0, 80.0, 123.0):
        tiles = tile_photo(img, tile_px=64, tile_mm=tile_mm, gsd_mm=gsd)
        for pb, patch in tiles:
            assert patch.shape == (64, 64, 3)
            assert (
                abs((pb.x1 - pb.x0) * gsd - tile_mm) <= gsd
                and abs((pb.y1 - pb.y0) * gsd - tile_mm) <= gsd
            )


def test_focus_ranks_blurred_below_sharp():
    """Variance of the Laplacian (Pech-Pacheco et al. 2000) against cv2.Laplacian directly."""
    import cv2

    from trainkit.intake.quality import quality_measures

    sharp = textured(64, 64, seed=4)
    blurred = cv2.GaussianBlur(sharp, (0, 0), 2.0)
    qs, qb = quality_measures(sharp), quality_measures(blurred)
    assert qs["focus"] > qb["focus"]
    grey = cv2.cvtColor(blurred, cv2.COLOR_RGB2GRAY)
    assert qb["focus"] == pytest.approx(cv2.Laplacian(grey, cv2.CV_64F).var())


# ----- regions of interest and sidecars -----------------------------------------------------


def test_roi_parsing_and_errors():
    box = parse_roi("10 20 110 220")
    assert box.tolist() == [[10, 20], [110, 20], [110, 220], [10, 220]]
    assert parse_roi("0,0 100,0 50,80").shape == (3, 2)
    with pytest.raises(ValueError, match="must be 'x0 y0 x1 y1' or at least three 'x,y' points"):
        parse_roi("1,2 3,4")
    with pytest.raises(ValueError, match="needs x1 > x0"):
        parse_roi("10 10 5 20")


def test_sidecar_errors(tmp_path):
    p = tmp_path / "s.csv"
    p.write_text("photo,gsd_mm,colour\na.jpg,0.3,red\n")
    with pytest.raises(ValueError, match="unknown columns \\['colour'\\]"):
        read_sidecar(p)
    p.write_text("photo,gsd_mm\na.jpg,-1\n")
    with pytest.raises(ValueError, match="line 2: gsd_mm must be positive"):
        read_sidecar(p)
    for bad in ("inf", "1e400", "nan"):  # an infinite scale made 1-px tiles and inf patch_mm
        p.write_text(f"photo,gsd_mm\na.jpg,{bad}\n")
        with pytest.raises(ValueError, match="line 2: gsd_mm must be positive and finite"):
            read_sidecar(p)
    p.write_text("photo,date\na.jpg,17/05/2026\n")
    with pytest.raises(ValueError, match="is not YYYY-MM-DD"):
        read_sidecar(p)
    p.write_text("photo,gsd_mm\n../a.jpg,0.3\n")
    with pytest.raises(ValueError, match="must be a relative name"):
        read_sidecar(p)


def test_sidecar_errors_are_the_kits_own_one_line_errors(tmp_path):
    # A user's mistake in a sidecar is a TrainkitError (one `trainkit:` line), never a crash.
    from trainkit.core.errors import TrainkitError

    p = tmp_path / "s.csv"
    for text in ("photo,gsd_mm\na.jpg,abc\n", "gsd_mm\n0.3\n", "photo,roi\na.jpg,1 2 3\n"):
        p.write_text(text)
        with pytest.raises(TrainkitError, match="sidecar s.csv"):
            read_sidecar(p)


def test_sidecar_from_a_spreadsheet_bom_latin1_and_oversized_fields(tmp_path):
    from trainkit.core.csvfile import CsvFileError

    p = tmp_path / "scale.csv"
    p.write_bytes("photo,gsd_mm,structure\na.jpg,0.3,Pont\n".encode("utf-8-sig"))
    assert read_sidecar(p) == {"a.jpg": {"gsd_mm": 0.3, "group": "Pont"}}
    p.write_bytes("photo,gsd_mm,structure\na.jpg,0.3,Pont\nb.jpg,0.3,Fa\xe7ade\n".encode("latin-1"))
    with pytest.raises(CsvFileError, match=r"sidecar scale\.csv line 3: not UTF-8 text"):
        read_sidecar(p)
    p.write_text("photo,gsd_mm,structure\na.jpg,0.3," + "x" * 200_000 + "\n")
    with pytest.raises(CsvFileError, match=r"sidecar scale\.csv line 2: a field is longer than"):
        read_sidecar(p)


def write_photos(folder, n=3, size=(64, 96)):
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i in range(n):
        p = folder / f"img{i}.png"
        Image.fromarray(textured(*size, seed=10 + i)).save(p)
        paths.append(p)
    return paths


def test_intake_provenance_roi_groups_and_skip_flagged(tmp_path):
    photos = write_photos(tmp_path / "site-a" / "2026-05-17", n=2)
    sidecar = {
        "img0.png": {"gsd_mm": 0.5, "roi": "0 0 48 64", "group": "pier-3"},
    }
    ws = new_ws(tmp_path)
    res = tile_into_workspace(
        photos,
        ws,
        sidecar=sidecar,
        skip_flagged=True,
        workers=1,
        group_pattern=r"^(?P<group>[^/]+)/(?P<date>\d{4}-\d\d-\d\d)/",
        roots={p: tmp_path for p in photos},
    )
    assert res["photos_added"] == 2 and res["patches_added"] == 2 * 6
    rows = {r["name"]: r for r in ws.photos()}
    first = rows["site-a/2026-05-17/img0.png"]
    assert first["sha256"] == hashlib.sha256(photos[0].read_bytes()).hexdigest()
    assert first["size_bytes"] == photos[0].stat().st_size
    assert (
        first["gsd_mm"] == 0.5
        and first["gsd_source"] == "sidecar"
        and first["group_id"] == "pier-3"
    )
    assert first["capture_date"] == "2026-05-17"
    second = rows["site-a/2026-05-17/img1.png"]
    assert (
        second["group_id"] == "site-a"
        and second["gsd_mm"] is None
        and second["gsd_source"] == "none"
    )
    recs = [r for r in ws.patches() if r.photo.endswith("img0.png")]
    outside = {r.box for r in recs if "outside_roi" in r.flags}
    assert outside == {
        (64, 0, 96, 32),
        (64, 32, 96, 64),
    }  # columns starting at x=64 lie outside x<48
    assert all(r.review_skip for r in recs if r.flags)
    assert recs[0].box_mm == (0.0, 0.0, 16.0, 16.0)
    assert ws.summary()["left_out_of_review"] == res["patches_left_out_of_review"] == 2


def test_rerun_is_idempotent_and_detects_moved_and_changed_files(tmp_path):
    photos = write_photos(tmp_path / "in", n=3)
    ws = new_ws(tmp_path)
    roots = {p: tmp_path / "in" for p in photos}
    first = tile_into_workspace(photos, ws, workers=2, roots=roots)
    assert first["photos_added"] == 3 and first["workers"] == 2
    again = tile_into_workspace(photos, ws, workers=2, roots=roots)
    assert again["photos_already_present"] == 3 and again["photos_added"] == 0
    assert len(ws.patches()) == 3 * 6
    # move one file, change another
    moved = tmp_path / "in" / "renamed.png"
    photos[0].rename(moved)
    Image.fromarray(textured(64, 96, seed=99)).save(photos[1])
    files = [moved, photos[1], photos[2]]
    res = tile_into_workspace(files, ws, workers=1, roots={p: tmp_path / "in" for p in files})
    assert (
        res["photos_moved"] == 1
        and res["photos_skipped"] == 1
        and res["photos_already_present"] == 1
    )
    assert "img1.png changed since it was tiled" in res["problems"][0]
    assert next(r for r in ws.photos() if r["name"] == "img0.png")["source_path"] == str(
        moved.resolve()
    )
    assert len(ws.patches()) == 3 * 6


def test_bad_files_are_skipped_with_one_line_each_and_nothing_partial(tmp_path):
    folder = tmp_path / "in"
    good = write_photos(folder, n=1)
    (folder / "zero.jpg").write_bytes(b"")
    (folder / "text.png").write_text("hello")
    Image.fromarray(textured(64, 96)).save(folder / "trunc.jpg", quality=90)
    data = (folder / "trunc.jpg").read_bytes()
    (folder / "trunc.jpg").write_bytes(data[: len(data) // 2])
    big = folder / "big.png"
    Image.new("L", (3000, 2000)).save(big)
    files = sorted(folder.iterdir())
    ws = new_ws(tmp_path)
    res = tile_into_workspace(files, ws, workers=1, max_pixels=1_000_000)
    assert res["photos_added"] == 1 and res["photos_skipped"] == 4
    text = "\n".join(res["problems"])
    for name in ("zero.jpg", "text.png", "trunc.jpg", "big.png"):
        assert name in text
    assert "larger than the limit" in text
    assert [r["name"] for r in ws.photos()] == [good[0].name]
    assert {r.photo for r in ws.patches()} == {good[0].name}  # no rows of skipped files
    assert not (ws.root / "patches").exists()  # and no crop file at all
