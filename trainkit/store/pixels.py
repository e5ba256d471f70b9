"""Patch pixels on demand: cut from the photo (checked by its SHA-256) or read from the crop store.

Tiling stores no pixels; a patch is a row (photo, box, scale, quality, provenance). The
pixels a person reviews or a network learns from are cut here, by one rule
(:func:`cut_patch`), from the photo where the firm keeps it.
"""

from __future__ import annotations

import numpy as np

from trainkit.core.grid import Box, crop

__all__ = ["cut_patch"]


def cut_patch(image: np.ndarray, box: Box, tile_px: int, src_px: int | None = None) -> np.ndarray:
    """The patch of ``image`` (H, W, 3 uint8, upright) in ``box``, as a ``tile_px`` square.

    The one cutting rule of the kit (tiling's quality measures and every crop shown or
    learned from): the box is cropped to ``src_px`` square (the grid's box side in photo
    pixels; edge-padded where the photo is smaller than the box), and a side other than
    ``tile_px`` (tiling by physical size) is resampled to ``tile_px`` with OpenCV's area
    filter when shrinking, bilinear when enlarging. Without ``src_px`` the side is the
    box's longer side, at least ``tile_px``.
    """
    x0, y0, x1, y1 = box
    side = src_px if src_px is not None else max(x1 - x0, y1 - y0, tile_px)
    patch = crop(image, box, side)
    if side != tile_px:
        import cv2

        interp = cv2.INTER_AREA if side > tile_px else cv2.INTER_LINEAR
        patch = cv2.resize(patch, (tile_px, tile_px), interpolation=interp)
    return patch
