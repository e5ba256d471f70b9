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
