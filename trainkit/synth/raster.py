"""Rasterise crack polylines into exact coverage, mask and angle maps."""

from __future__ import annotations

from collections.abc import Sequence

import cv2
import numpy as np
from scipy import ndimage

from trainkit.synth.geometry import screen_angle_deg
from trainkit.synth.truth import CRACK_KINDS, Crack

__all__ = ["render_cracks"]


def _render_layer(
    cracks: Sequence[Crack], height: int, width: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    p0s, p1s, w0s, w1s, prev, nxt = [], [], [], [], [], []
    start = 0
    for c in cracks:
        n = len(c.points) - 1
        p0s.append(c.points[:-1])
        p1s.append(c.points[1:])
        w0s.append(c.widths[:-1])
        w1s.append(c.widths[1:])
        idx = np.arange(start, start + n)
        prev.append(np.maximum(idx - 1, start))
        nxt.append(np.minimum(idx + 1, start + n - 1))
        start += n
    p0 = np.concatenate(p0s)
    p1 = np.concatenate(p1s)
    w0 = np.concatenate(w0s)
    w1 = np.concatenate(w1s)
    prev_i = np.concatenate(prev)
    next_i = np.concatenate(nxt)

    ids = np.zeros((height, width), np.float32)
    q0 = np.round((p0 - 0.5) * 16.0).astype(np.int64)
    q1 = np.round((p1 - 0.5) * 16.0).astype(np.int64)
    lim = 1 << 26
    q0 = np.clip(q0, -lim, lim)
    q1 = np.clip(q1, -lim, lim)
    for i in range(len(p0)):
        cv2.line(
            ids,
            (int(q0[i, 0]), int(q0[i, 1])),
            (int(q1[i, 0]), int(q1[i, 1])),
            float(i + 1),
            1,
            cv2.LINE_8,
            4,
        )

    coverage = np.zeros((height, width), np.float32)
    mask = np.zeros((height, width), bool)
    angle = np.full((height, width), np.nan, np.float32)
    if not np.any(ids):
        return coverage, mask, angle
    dist, (ri, ci) = ndimage.distance_transform_edt(ids == 0, return_indices=True)
    reach = float(max(w0.max(), w1.max())) / 2.0 + 2.0
    rr, cc = np.nonzero(dist <= reach)
    seg = ids[ri[rr, cc], ci[rr, cc]].astype(np.int64) - 1
    px = np.stack([cc + 0.5, rr + 0.5], axis=1)

    best_d = np.full(len(seg), np.inf)
    best_s = seg.copy()
    best_t = np.zeros(len(seg))
    for cand in (seg, prev_i[seg], next_i[seg]):
        a = p0[cand]
        d = p1[cand] - a
        dd = np.maximum(np.sum(d * d, axis=1), 1e-12)
        t = np.clip(np.sum((px - a) * d, axis=1) / dd, 0.0, 1.0)
        dist_c = np.hypot(*(px - a - t[:, None] * d).T)
        better = dist_c < best_d
        best_d = np.where(better, dist_c, best_d)
        best_s = np.where(better, cand, best_s)
        best_t = np.where(better, t, best_t)

    wpx = w0[best_s] + best_t * (w1[best_s] - w0[best_s])
    cov = np.where(
        wpx >= 1.0,
        np.clip(wpx / 2.0 + 0.5 - best_d, 0.0, 1.0),
        wpx * np.maximum(0.0, 1.0 - best_d),
    )
    inside = best_d <= np.maximum(wpx / 2.0, 0.5)
    seg_angle = screen_angle_deg(*(p1 - p0).T)
    coverage[rr, cc] = cov
    mask[rr, cc] = inside
    angle[rr[inside], cc[inside]] = seg_angle[best_s[inside]]
    return coverage, mask, angle


def render_cracks(
    cracks: Sequence[Crack], height: int, width: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rasterise crack polylines into coverage, mask and angle maps.

    Each pixel takes the exact distance ``d`` from its centre to the nearest centreline
    segment (found with one Euclidean distance transform per crack kind) and that
    segment's interpolated width ``w``. Coverage is ``clip(w/2 + 0.5 - d, 0, 1)`` for
    ``w >= 1`` and ``w * max(0, 1 - d)`` below, so it integrates to about ``w`` across
    the crack; the mask is ``d <= max(w/2, 0.5)``. Kinds are rendered separately and
    merged with a per-pixel maximum so that thin branches do not notch a wide crack.

    Args:
        cracks: crack polylines in pixel coordinates.
        height: image rows.
        width: image columns.

    Returns:
        ``(coverage, mask, angle)``: float32 in [0, 1], bool, float32 degrees (NaN off
        the mask), each of shape (height, width).
    """
    if height < 1 or width < 1:
        raise ValueError(f"render_cracks: expected height, width >= 1, got {height}x{width}")
    coverage = np.zeros((height, width), np.float32)
    mask = np.zeros((height, width), bool)
    angle = np.full((height, width), np.nan, np.float32)
    for kind in CRACK_KINDS:
        group = [c for c in cracks if c.kind == kind]
        if not group:
            continue
        cov, msk, ang = _render_layer(group, height, width)
        take = (msk & ~mask) | (msk & (cov > coverage))
        angle[take] = ang[take]
        coverage = np.maximum(coverage, cov)
        mask |= msk
    return coverage, mask, angle
