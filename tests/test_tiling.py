"""Tile grids cover every pixel; quality measures match outside references."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from trainkit.core.grid import axis_starts, crop, grid_boxes, overlap_to_stride
from trainkit.intake.quality import quality_measures
from trainkit.intake.tiling import tile_photo


@settings(max_examples=300, deadline=None)
@given(length=st.integers(1, 3000), tile=st.integers(1, 512), frac=st.floats(0.05, 1.0))
def test_every_pixel_is_covered_and_no_tile_leaves_the_image(length, tile, frac):
    stride = max(1, min(tile, int(tile * frac)))
    starts = axis_starts(length, tile, stride)
    covered = np.zeros(length, bool)
    for s in starts:
        assert s >= 0 and (s + tile <= length or length <= tile)
        covered[s : s + tile] = True
    assert covered.all()
    assert starts == sorted(set(starts))
    if length >= tile:
        assert starts[-1] + tile == length  # last tile ends exactly at the border


def test_border_rule_example():
    # 500 px at 224 px: tiles at 0 and 224 and the last shifted inward to 276 (500 - 224).
    assert axis_starts(500, 224, 224) == [0, 224, 276]
    assert axis_starts(448, 224, 224) == [0, 224]
    assert axis_starts(100, 224, 224) == [0]
    assert grid_boxes(300, 500, 224)[:3] == [
        (0, 0, 224, 224),
        (224, 0, 448, 224),
        (276, 0, 500, 224),
    ]


def test_overlap_to_stride():
    assert overlap_to_stride(224, 0.0) == 224
    assert overlap_to_stride(224, 0.5) == 112
    with pytest.raises(ValueError, match=r"overlap must be in \[0, 1\)"):
        overlap_to_stride(224, 1.0)


def test_small_image_is_edge_padded():
    img = np.arange(10 * 20 * 3, dtype=np.uint8).reshape(10, 20, 3)
    p = crop(img, (0, 0, 20, 10), 32)
    assert p.shape == (32, 32, 3)
    np.testing.assert_array_equal(p[:10, :20], img)
    np.testing.assert_array_equal(p[20, 25], img[9, 19])


def test_tile_mm_resamples_to_physical_size():
    img = np.zeros((400, 600, 3), np.uint8)
    tiles = tile_photo(img, tile_px=64, tile_mm=50.0, gsd_mm=0.5)  # 100 px of photo per tile
    assert all(p.shape == (64, 64, 3) for _, p in tiles)
    assert {(b.x1 - b.x0) for b, _ in tiles} == {100}
    assert len(tiles) == 4 * 6
    with pytest.raises(ValueError, match="needs the photo's scale"):
        tile_photo(img, tile_px=64, tile_mm=50.0, gsd_mm=None)


def test_focus_measure_matches_opencv_and_scipy():
    # Pech-Pacheco et al. (2000), variance of the Laplacian: a 5 x 5 zero image with a
    # single 1 in the centre has variance 0.8 with OpenCV's default 3 x 3 kernel and with
    # scipy.ndimage.laplace (shared REFERENCES). We scale to 0/255 grey: variance x 255^2.
    import cv2
    from scipy import ndimage

    img = np.zeros((5, 5), np.float64)
    img[2, 2] = 1.0
    assert cv2.Laplacian(img, cv2.CV_64F).var() == pytest.approx(0.8)
    assert ndimage.laplace(img).var() == pytest.approx(0.8)
    rgb = np.repeat((img * 255).astype(np.uint8)[..., None], 3, axis=2)
    q = quality_measures(rgb)
    assert q["focus"] == pytest.approx(0.8 * 255**2)


def test_quality_flags():
    flat = np.full((64, 64, 3), 128, np.uint8)
    assert set(quality_measures(flat)["flags"].split(",")) == {"blurred", "low_texture"}
    white = np.full((64, 64, 3), 255, np.uint8)
    assert "exposure" in quality_measures(white)["flags"]
    rng = np.random.default_rng(0)
    textured = rng.integers(60, 200, (64, 64, 3)).astype(np.uint8)
    assert quality_measures(textured)["flags"] == ""


# ----- the grid's quality measured at once equals patch by patch ----------------------


def _test_photos():
    """Random noise, a synthetic concrete photo, and one with flat, black and white parts
    (so every flag is raised somewhere)."""
    from trainkit.synth import SynthOptions, generate_photo

    rng = np.random.default_rng(22)
    noise = rng.integers(0, 256, (203, 317, 3), dtype=np.uint8)
    synth = generate_photo(7, SynthOptions(height=240, width=320)).image
    mixed = synth.copy()
    mixed[:96, :96] = 128  # flat: blurred, low texture
    mixed[100:180, 150:260] = 255  # clipped: exposure
    mixed[190:, :40] = 0
    return {"noise": noise, "synth": synth, "mixed": mixed}


@pytest.mark.parametrize(
    "tile_px, src_px, overlap",
    [
        (32, 32, 0.0),  # boxes read in place, the last row and column shifted inward
        (32, 32, 0.5),  # overlapping boxes
        (32, 50, 0.0),  # tiling by physical size: boxes shrunk to the patch size
        (32, 20, 0.25),  # ... and enlarged
        (16, 16, 0.0),  # the smallest patch the command line allows
    ],
)
def test_grid_quality_equals_the_per_patch_measures(tile_px, src_px, overlap):
    """The batch measures equal cutting each patch and measuring it alone (the reference,
    itself checked against OpenCV and SciPy above), on the same pixels: RGB, and the grey
    levels tiling decodes a JPEG to."""
    import cv2

    from trainkit.core.grid import iter_patch_boxes, overlap_to_stride
    from trainkit.intake.quality import grid_quality
    from trainkit.store.pixels import cut_patch

    flags_seen = set()
    photos = _test_photos()
    photos.update({f"{k} grey": cv2.cvtColor(v, cv2.COLOR_RGB2GRAY) for k, v in photos.items()})
    for name, img in photos.items():
        stride = overlap_to_stride(src_px, overlap)
        boxes = [b.box for b in iter_patch_boxes(*img.shape[:2], src_px, stride)]
        got = grid_quality(img, boxes, tile_px=tile_px, src_px=src_px)
        want = [quality_measures(cut_patch(img, b, tile_px, src_px)) for b in boxes]
        assert len(got) == len(want) == len(boxes)
        for box, g, w in zip(boxes, got, want, strict=True):
            # numpy's variance is a two-pass float sum; the batch's is exact: equal to
            # floating-point rounding
            assert g["focus"] == pytest.approx(w["focus"], rel=1e-12, abs=1e-9), (name, box)
            assert g["clipped"] == w["clipped"], (name, box)
            assert g["flags"] == w["flags"], (name, box)
            flags_seen.update(f for f in g["flags"].split(",") if f)
    assert flags_seen == {"blurred", "exposure", "low_texture"}


def test_grid_quality_of_a_photo_smaller_than_one_patch_is_the_padded_patch():
    from trainkit.intake.quality import grid_quality
    from trainkit.store.pixels import cut_patch

    img = np.random.default_rng(3).integers(0, 256, (20, 45, 3), dtype=np.uint8)
    box = (0, 0, 45, 20)  # the grid's one box keeps the photo's true extent
    [got] = grid_quality(img, [box], tile_px=32, src_px=64)
    want = quality_measures(cut_patch(img, box, 32, 64))
    assert got["focus"] == pytest.approx(want["focus"], rel=1e-12)
    assert (got["clipped"], got["flags"]) == (want["clipped"], want["flags"])
    [got] = grid_quality(img, [box], tile_px=64, src_px=64)  # padded, not resampled
    want = quality_measures(cut_patch(img, box, 64, 64))
    assert got["focus"] == pytest.approx(want["focus"], rel=1e-12)
    assert (got["clipped"], got["flags"]) == (want["clipped"], want["flags"])


def test_grid_focus_matches_scipy_laplace_with_mirrored_borders():
    """Outside reference: scipy.ndimage.laplace with mode="mirror" (d c b | a b c d | c b a,
    OpenCV's BORDER_REFLECT_101) on each grey patch alone, and numpy's variance."""
    import cv2
    from scipy import ndimage

    from trainkit.core.grid import iter_patch_boxes
    from trainkit.intake.quality import grid_quality

    img = _test_photos()["synth"]
    boxes = [b.box for b in iter_patch_boxes(*img.shape[:2], 48, 48)]
    got = grid_quality(img, boxes, tile_px=48, src_px=48)
    grey = cv2.cvtColor(img, cv2.COLOR_RGB2GRAY).astype(np.float64)
    for (x0, y0, x1, y1), g in zip(boxes, got, strict=True):
        lap = ndimage.laplace(grey[y0:y1, x0:x1], mode="mirror")
        assert g["focus"] == pytest.approx(lap.var(), rel=1e-12)


def test_tiling_measures_from_the_luminance_decode_match_the_colour_decode():
    """Tiling decodes a JPEG to its luminance only; on the demo's photos the measures equal
    those of the colour decode's grey (``cv2.cvtColor``) to 1 % of focus, flags equal."""
    from pathlib import Path

    from trainkit.core.decode import read_luma_fast, read_rgb_fast
    from trainkit.intake.quality import grid_quality
    from trainkit.intake.tiling import photo_grid

    photos = sorted((Path(__file__).parents[1] / "tiny_dataset" / "photos").glob("*.jpg"))[:6]
    assert photos
    for path in photos:
        data = path.read_bytes()
        luma, rgb = read_luma_fast(path, data=data), read_rgb_fast(path, data=data)
        assert luma.ndim == 2 and luma.shape == rgb.shape[:2]
        src_px, grid = photo_grid(*luma.shape, tile_px=64, overlap=0.0, tile_mm=None, gsd_mm=None)
        boxes = [pb.box for pb in grid]
        got = grid_quality(luma, boxes, tile_px=64, src_px=src_px)
        want = grid_quality(rgb, boxes, tile_px=64, src_px=src_px)
        for g, w in zip(got, want, strict=True):
            assert g["focus"] == pytest.approx(w["focus"], rel=0.01)
            assert g["flags"] == w["flags"]
