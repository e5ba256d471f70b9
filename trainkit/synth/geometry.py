"""Pure geometry on crack polylines: directions and clipping of polylines to boxes.

Screen angles and the exact clipping of segments are :mod:`trainkit.core.segments`'s (the patch
label rule in the core needs them); they are re-exported here for the generator's modules.
"""

# Coordinates: continuous pixel coordinates; pixel (row r, col c) covers [c, c+1) x [r, r+1),
# so its centre is (x, y) = (c + 0.5, r + 0.5) and the frame is [0, W] x [0, H]. A box
# (x0, y0, x1, y1) (x1/y1 exclusive as pixel bounds) is the rectangle [x0, x1] x [y0, y1].
# Angles follow trainkit.core.taxonomy: undirected, [0, 180) degrees, counter-clockwise from +x as
# seen on screen, so the pixel-space direction of angle a is (cos a, -sin a).

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from trainkit.core.segments import clip_params, clipped_lengths, screen_angle_deg

__all__ = [
    "screen_angle_deg",
    "direction",
    "clip_params",
    "clipped_lengths",
    "clip_polyline",
    "arclength",
]


def direction(angle_deg: np.ndarray | float) -> np.ndarray:
    a = np.radians(angle_deg)
    return np.stack([np.cos(a), -np.sin(a)], axis=-1)


def clip_polyline(
    pts: np.ndarray, wid: np.ndarray, box: Sequence[float], min_len: float = 1.0
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Cut a polyline (with widths) to a box; returns the inside runs as separate pieces."""
    x0, y0, x1, y1 = box
    if (
        pts[:, 0].min() >= x0
        and pts[:, 0].max() <= x1
        and pts[:, 1].min() >= y0
        and pts[:, 1].max() <= y1
    ):
        return [(pts, wid)]
    t0, t1, hit = clip_params(pts[:-1], pts[1:], box)
    pieces: list[tuple[list, list]] = []
    cur: tuple[list, list] | None = None
    for i in range(len(pts) - 1):
        if not hit[i] or t1[i] <= t0[i]:
            if cur is not None:
                pieces.append(cur)
                cur = None
            continue
        d = pts[i + 1] - pts[i]
        dw = wid[i + 1] - wid[i]
        a, b = pts[i] + t0[i] * d, pts[i] + t1[i] * d
        wa, wb = wid[i] + t0[i] * dw, wid[i] + t1[i] * dw
        if cur is None or t0[i] > 0:
            if cur is not None:
                pieces.append(cur)
            cur = ([a], [wa])
        cur[0].append(b)
        cur[1].append(wb)
        if t1[i] < 1:
            pieces.append(cur)
            cur = None
    if cur is not None:
        pieces.append(cur)
    out = []
    for p, w in pieces:
        pa = np.array(p)
        if len(pa) >= 2 and np.sum(np.hypot(*np.diff(pa, axis=0).T)) >= min_len:
            out.append((pa, np.array(w)))
    return out


def arclength(pts: np.ndarray) -> np.ndarray:
    return np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(pts, axis=0).T))])
