"""Quality measures of a patch (focus, exposure, texture) and the flags they raise.

:func:`quality_measures` measures one patch; :func:`grid_quality` measures every patch of a
photo's tile grid at once and gives the same figures (each patch's Laplacian taken with
reflected borders at the patch's own edges, as on a crop), without cutting the patches out.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from trainkit.core.grid import Box
from trainkit.store.pixels import cut_patch

#: Quality thresholds (common practice, tuned on the synthetic set; adjust per camera).
FOCUS_MIN = 20.0  # variance of the Laplacian of the grey patch below this -> "blurred"
CLIPPED_MAX = 0.25  # fraction of grey pixels at <= 2 or >= 253 above this -> "exposure"
TEXTURE_MIN_STD = 2.0  # grey standard deviation below this -> "low_texture"

#: Patches cut out and measured together when the grid cannot be read in place.
_CHUNK = 64


def quality_flags(focus: float, clipped: float, grey_std: float) -> str:
    """The comma-separated flags the thresholds above raise ('' when none)."""
    flags = []
    if focus < FOCUS_MIN:
        flags.append("blurred")
    if clipped > CLIPPED_MAX:
        flags.append("exposure")
    if grey_std < TEXTURE_MIN_STD:
        flags.append("low_texture")
    return ",".join(flags)


def quality_measures(patch_rgb: np.ndarray) -> dict:
    """Focus (variance of the Laplacian), clipped fraction and quality flags of a patch.

    The patch is (h, w, 3) uint8 RGB, converted to grey by ``cv2.cvtColor``, or already
    grey (h, w) uint8.
    """
    import cv2

    grey = patch_rgb if patch_rgb.ndim == 2 else cv2.cvtColor(patch_rgb, cv2.COLOR_RGB2GRAY)
    focus = float(cv2.Laplacian(grey, cv2.CV_64F).var())
    clipped = float(np.mean((grey <= 2) | (grey >= 253)))
    return {
        "focus": focus,
        "clipped": clipped,
        "flags": quality_flags(focus, clipped, float(grey.std())),
    }


def grid_quality(
    image: np.ndarray, boxes: Sequence[Box], *, tile_px: int, src_px: int
) -> list[dict]:
    """:func:`quality_measures` of each patch ``cut_patch(image, box, tile_px, src_px)``.

    The same figures as cutting each patch and measuring it (the focus to floating-point
    rounding: here the variance comes from exact integer sums, numpy's from a two-pass
    float sum; the clipped fraction and the flags are the same), about 5x faster on a
    12-megapixel photo. Where the boxes are squares of ``tile_px`` inside the photo
    (no resampling, no padding) the photo's grey is read in place, a row of adjacent
    boxes at a time: one Laplacian for the row, with the columns at the boxes' shared
    edges corrected to what reflection at each box's own edge gives. Other boxes (tiling
    by physical size, a photo smaller than a box) are cut by
    :func:`trainkit.store.pixels.cut_patch` and measured side by side the same way.

    Args:
        image: the photo, (H, W, 3) uint8 RGB, or its grey levels (H, W) uint8 (then
            measured as they are; for RGB the grey is ``cv2.cvtColor``'s, as in
            :func:`quality_measures`).
        boxes: the grid's boxes (x0, y0, x1, y1) in photo pixels.
        tile_px: the side of the patches measured.
        src_px: the side of the grid's boxes in photo pixels (the cutting rule's ``src_px``).

    Returns:
        One dict per box, in the order given: ``focus``, ``clipped``, ``flags``.
    """
    import cv2

    h, w = image.shape[:2]
    if tile_px < 3:  # too small for the edge correction below: measure patch by patch
        return [quality_measures(cut_patch(image, b, tile_px, src_px)) for b in boxes]
    in_place = src_px == tile_px and all(
        x1 - x0 == y1 - y0 == tile_px and x0 >= 0 and y0 >= 0 and x1 <= w and y1 <= h
        for x0, y0, x1, y1 in boxes
    )
    sums: list[tuple[int, int, int, int, int]] = []

    def to_grey(rgb_or_grey: np.ndarray) -> np.ndarray:
        if rgb_or_grey.ndim == 2:
            return rgb_or_grey
        return cv2.cvtColor(rgb_or_grey, cv2.COLOR_RGB2GRAY)

    if in_place:
        grey = to_grey(image)
        for y0, xa, k in _adjacent_runs(boxes, tile_px):
            sums.extend(_row_sums(grey[y0 : y0 + tile_px, xa : xa + k * tile_px], tile_px))
    else:
        for i in range(0, len(boxes), _CHUNK):
            side_by_side = np.concatenate(
                [cut_patch(image, b, tile_px, src_px) for b in boxes[i : i + _CHUNK]], axis=1
            )
            sums.extend(_row_sums(to_grey(side_by_side), tile_px))
    n = tile_px * tile_px
    out = []
    for lap_sum, lap_sq, grey_sum, grey_sq, n_clipped in sums:
        # variance = (n * sum(x^2) - sum(x)^2) / n^2 with exact integers, rounded once
        focus = (lap_sq * n - lap_sum**2) / (n * n)
        grey_var = (grey_sq * n - grey_sum**2) / (n * n)
        clipped = n_clipped / n
        out.append(
            {
                "focus": focus,
                "clipped": clipped,
                "flags": quality_flags(focus, clipped, grey_var**0.5),
            }
        )
    return out


def _adjacent_runs(boxes: Sequence[Box], side: int) -> list[tuple[int, int, int]]:
    """(y0, x0 of the first box, number of boxes) of each run of consecutive boxes that
    share their rows and touch edge to edge, in the order of ``boxes``."""
    runs: list[list[int]] = []
    for x0, y0, _, _ in boxes:
        last = runs[-1] if runs else None
        if last is not None and last[0] == y0 and last[1] + last[2] * side == x0:
            last[2] += 1
        else:
            runs.append([y0, x0, 1])
    return [(y0, x0, k) for y0, x0, k in runs]


def _row_sums(grey: np.ndarray, side: int) -> list[tuple[int, int, int, int, int]]:
    """Per patch of a (side, k * side) grey strip of k patches side by side: the sum and
    sum of squares of its Laplacian (3 x 3, reflect-101 borders at the patch's own edges,
    as ``cv2.Laplacian`` gives on the patch alone), of its grey levels, and its clipped
    pixel count, as exact integers (OpenCV sums in double precision, exact below 2^53, and
    gives a sum of squares through a square root: rounding restores it)."""
    import cv2

    k = grey.shape[1] // side
    lap = cv2.Laplacian(grey, cv2.CV_16S, borderType=cv2.BORDER_REFLECT_101)
    if k > 1:
        # The strip's Laplacian took the neighbour patch's pixel at each shared edge where
        # the patch alone reflects its own: first column x: g[x+1] instead of g[x-1];
        # last column x: g[x-1] instead of g[x+1].
        first = np.arange(1, k) * side
        last = first - 1
        lap[:, first] += grey[:, first + 1].astype(np.int16) - grey[:, first - 1]
        lap[:, last] += grey[:, last - 1].astype(np.int16) - grey[:, last + 1]

    def per_patch(column_sums: np.ndarray) -> list[int]:
        return column_sums.reshape(k, side).sum(axis=1).tolist()

    grey_sum = per_patch(cv2.reduce(grey, 0, cv2.REDUCE_SUM, dtype=cv2.CV_32S))
    # 255 where a grey level is not clipped (3-252), counted per column
    unclipped = cv2.reduce(cv2.inRange(grey, 3, 252), 0, cv2.REDUCE_SUM, dtype=cv2.CV_32S)
    n_clipped = [side * side - v // 255 for v in per_patch(unclipped)]
    cols = [slice(j * side, (j + 1) * side) for j in range(k)]
    lap_sum = [round(cv2.sumElems(lap[:, c])[0]) for c in cols]
    lap_sq = [round(cv2.norm(lap[:, c], cv2.NORM_L2SQR)) for c in cols]
    grey_sq = [round(cv2.norm(grey[:, c], cv2.NORM_L2SQR)) for c in cols]
    return list(zip(lap_sum, lap_sq, grey_sum, grey_sq, n_clipped, strict=True))
