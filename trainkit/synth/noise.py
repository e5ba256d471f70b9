"""Smooth random fields: band-limited noise and soft blob masks used by every surface layer."""

from __future__ import annotations

import math

import cv2
import numpy as np

__all__ = ["smooth_noise", "soft_blob_alpha"]


def smooth_noise(
    rng: np.random.Generator, height: int, width: int, scale: float, aspect: float = 1.0
) -> np.ndarray:
    """Unit-variance noise with features about ``scale`` px (``aspect`` > 1: taller).

    White noise on a coarse grid, smoothed there and upsampled bicubically, so the
    cost does not grow with the feature size.
    """
    sy, sx = scale * aspect, scale
    gh = max(4, int(math.ceil(height / sy)) + 4)
    gw = max(4, int(math.ceil(width / sx)) + 4)
    low = rng.standard_normal((gh, gw)).astype(np.float32)
    low = cv2.GaussianBlur(low, (0, 0), 0.7, borderType=cv2.BORDER_REFLECT)
    big_w, big_h = int(gw * sx), int(gh * sy)
    big = cv2.resize(low, (big_w, big_h), interpolation=cv2.INTER_CUBIC)
    oy = int(rng.integers(0, max(1, big_h - height - int(sy))) + int(sy) // 2)
    ox = int(rng.integers(0, max(1, big_w - width - int(sx))) + int(sx) // 2)
    out = big[oy : oy + height, ox : ox + width]
    if out.shape != (height, width):
        out = cv2.resize(out, (width, height), interpolation=cv2.INTER_LINEAR)
    sd = float(out.std())
    return (out - out.mean()) / (sd if sd > 0 else 1.0)


def soft_blob_alpha(
    rng: np.random.Generator,
    height: int,
    width: int,
    scale: float,
    cover: float,
    aspect: float = 1.0,
) -> np.ndarray:
    """Soft-edged random blobs covering roughly ``cover`` of the frame, alpha in [0, 1]."""
    n = smooth_noise(rng, height, width, scale, aspect)
    thr = float(np.quantile(n, 1.0 - cover))
    return np.clip((n - thr) / 0.8, 0.0, 1.0).astype(np.float32)
