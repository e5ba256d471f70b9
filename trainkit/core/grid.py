"""The tile grid: square cells that cover every pixel of a frame, and cropping them.

Border rule: tiles start at 0 and advance by the stride; if the last tile would
run past the border, it is shifted inward so that it ends exactly at the border
(it then overlaps its neighbour). No pixel is dropped and nothing is padded. A
photo smaller than one tile along an axis gives a single tile along that axis
that is padded by edge replication when cropped, and the box records the true
extent.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

Box = tuple[int, int, int, int]


@dataclass(frozen=True)
class PatchBox:
    """A tile's place in its photo: grid row/column and pixel box (x1, y1 exclusive)."""

    row: int
    col: int
    x0: int
    y0: int
    x1: int
    y1: int

    @property
    def box(self) -> Box:
        return (self.x0, self.y0, self.x1, self.y1)


def axis_starts(length: int, tile: int, stride: int) -> list[int]:
    """Start offsets along one axis with the last tile shifted inward to end at the border.

    Args:
        length: image extent in pixels along the axis (>= 1).
        tile: tile size in pixels (>= 1).
        stride: step between tile starts in pixels (1 <= stride <= tile).

    Returns:
        Sorted, unique start offsets; every pixel in [0, length) is covered.
    """
    if length < 1 or tile < 1:
        raise ValueError(f"expected positive length and tile, got length={length}, tile={tile}")
    if not 1 <= stride <= tile:
        raise ValueError(f"stride must be between 1 and the tile size {tile}, got {stride}")
    if length <= tile:
        return [0]
    starts = list(range(0, length - tile + 1, stride))
    if starts[-1] + tile < length:
        starts.append(length - tile)
    return starts


def grid_boxes(height: int, width: int, tile_px: int, stride_px: int | None = None) -> list[Box]:
    """Boxes (x0, y0, x1, y1) of a row-major tile grid that covers the whole image."""
    return [p.box for p in iter_patch_boxes(height, width, tile_px, stride_px)]


def iter_patch_boxes(
    height: int, width: int, tile_px: int, stride_px: int | None = None
) -> Iterator[PatchBox]:
    """Row-major :class:`PatchBox` grid covering the whole image (see module docstring)."""
    stride = tile_px if stride_px is None else stride_px
    ys = axis_starts(height, tile_px, stride)
    xs = axis_starts(width, tile_px, stride)
    for r, y0 in enumerate(ys):
        for c, x0 in enumerate(xs):
            yield PatchBox(r, c, x0, y0, min(x0 + tile_px, width), min(y0 + tile_px, height))


def overlap_to_stride(tile_px: int, overlap: float) -> int:
    """Stride in pixels for a fractional overlap in [0, 1)."""
    if not 0.0 <= overlap < 1.0:
        raise ValueError(f"overlap must be in [0, 1), got {overlap}")
    return max(1, int(round(tile_px * (1.0 - overlap))))


def crop(image: np.ndarray, box: Box, tile_px: int) -> np.ndarray:
    """Crop a box; a box smaller than the tile (tiny photo) is edge-padded to tile_px square."""
    x0, y0, x1, y1 = box
    patch = image[y0:y1, x0:x1]
    ph, pw = patch.shape[:2]
    if ph < tile_px or pw < tile_px:
        pad = [(0, tile_px - ph), (0, tile_px - pw)] + [(0, 0)] * (image.ndim - 2)
        patch = np.pad(patch, pad, mode="edge")
    return np.ascontiguousarray(patch)


def resize_patch(rgb: np.ndarray, size: int) -> np.ndarray:
    """An (h, w, 3) uint8 patch resampled to (size, size, 3) with Pillow's bilinear filter.

    The one resize used wherever a stored crop meets a model (training data, the review
    queue's model suggestions); the Screener resamples whole frames with the same filter.
    A patch already of that size is returned as it is.
    """
    if rgb.shape[:2] == (size, size):
        return rgb
    from PIL import Image

    return np.asarray(Image.fromarray(rgb).resize((size, size), Image.Resampling.BILINEAR))
