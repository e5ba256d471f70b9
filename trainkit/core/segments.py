"""Pure geometry on line segments: screen angles and exact clipping to boxes (numpy only)."""

# Coordinates: continuous pixel coordinates; pixel (row r, col c) covers [c, c+1) x [r, r+1),
# so its centre is (x, y) = (c + 0.5, r + 0.5) and the frame is [0, W] x [0, H]. A box
# (x0, y0, x1, y1) (x1/y1 exclusive as pixel bounds) is the rectangle [x0, x1] x [y0, y1].
# Angles follow trainkit.core.taxonomy: undirected, [0, 180) degrees, counter-clockwise from +x as
# seen on screen, so the pixel-space direction of angle a is (cos a, -sin a).

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["screen_angle_deg", "clip_params", "clipped_lengths"]


def screen_angle_deg(dx: np.ndarray, dy: np.ndarray) -> np.ndarray:
    """On-screen undirected angle in [0, 180) of pixel-space direction(s) (dx, dy)."""
    a = np.degrees(np.arctan2(-np.asarray(dy, float), np.asarray(dx, float))) % 180.0
    return np.where(a >= 180.0, 0.0, a)


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
