"""Pure geometry on crack polylines: screen angles, directions and exact clipping to boxes."""

# Coordinates: continuous pixel coordinates; pixel (row r, col c) covers [c, c+1) x [r, r+1),
# so its centre is (x, y) = (c + 0.5, r + 0.5) and the frame is [0, W] x [0, H]. A box
# (x0, y0, x1, y1) (x1/y1 exclusive as pixel bounds) is the rectangle [x0, x1] x [y0, y1].
# Angles follow trainkit.core.taxonomy: undirected, [0, 180) degrees, counter-clockwise from +x as
# seen on screen, so the pixel-space direction of angle a is (cos a, -sin a).

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = [
    "screen_angle_deg",
    "direction",
    "clip_params",
    "clipped_lengths",
    "clip_polyline",
    "arclength",
]


def screen_angle_deg(dx: np.ndarray, dy: np.ndarray) -> np.ndarray:
    """On-screen undirected angle in [0, 180) of pixel-space direction(s) (dx, dy)."""
    a = np.degrees(np.arctan2(-np.asarray(dy, float), np.asarray(dx, float))) % 180.0
    return np.where(a >= 180.0, 0.0, a)


def direction(angle_deg: np.ndarray | float) -> np.ndarray:
    a = np.radians(angle_deg)
    return np.stack([np.cos(a), -np.sin(a)], axis=-1)


def clip_params(
    p0: np.ndarray, p1: np.ndarray, box: np.ndarray | Sequence[float]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Liang-Barsky clip of segments p0->p1 (N, 2) to boxes (x0, y0, x1, y1).

    ``box`` is a 4-sequence or an (N, 4) array. Returns ``(t0, t1, hit)`` with the
    parameter interval of the part inside the box; ``hit`` is False for misses.
    """
    p0 = np.asarray(p0, float)
    p1 = np.asarray(p1, float)
    b = np.asarray(box, float)
    bx0, by0, bx1, by1 = (b[..., i] for i in range(4))
    d = p1 - p0
    n = p0.shape[0]
    t0 = np.zeros(n)
    t1 = np.ones(n)
    hit = np.ones(n, bool)
    for p, q in (
        (-d[:, 0], p0[:, 0] - bx0),
        (d[:, 0], bx1 - p0[:, 0]),
        (-d[:, 1], p0[:, 1] - by0),
        (d[:, 1], by1 - p0[:, 1]),
    ):
        parallel = p == 0
        hit &= ~(parallel & (q < 0))
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(parallel, 0.0, q / np.where(parallel, 1.0, p))
        t0 = np.where(~parallel & (p < 0), np.maximum(t0, t), t0)
        t1 = np.where(~parallel & (p > 0), np.minimum(t1, t), t1)
    hit &= t0 <= t1
    return t0, t1, hit


def clipped_lengths(
    p0: np.ndarray, p1: np.ndarray, box: np.ndarray | Sequence[float]
) -> np.ndarray:
    """Exact length of each segment p0->p1 inside a box ``(x0, y0, x1, y1)``.

    Args:
        p0: (N, 2) segment starts (x, y).
        p1: (N, 2) segment ends (x, y).
        box: ``(x0, y0, x1, y1)`` or an (N, 4) array of boxes, continuous coordinates.

    Returns:
        (N,) lengths in pixels (0 for segments missing the box).
    """
    p0 = np.asarray(p0, float).reshape(-1, 2)
    p1 = np.asarray(p1, float).reshape(-1, 2)
    t0, t1, hit = clip_params(p0, p1, box)
    seg_len = np.hypot(*(p1 - p0).T)
    return np.where(hit, np.clip(t1 - t0, 0.0, 1.0) * seg_len, 0.0)


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
