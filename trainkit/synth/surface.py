"""Bare concrete: a mottled grey base with aggregate, sand grain and a colour tint, under uneven light."""

from __future__ import annotations

import cv2
import numpy as np

from trainkit.synth.lighting import uneven_lighting
from trainkit.synth.noise import smooth_noise

__all__ = ["concrete_surface"]

#: Mottling octaves of the base grey: (feature size in px, relative amplitude).
_OCTAVES = ((140.0, 0.05), (48.0, 0.035), (14.0, 0.02), (4.0, 0.012))


def _mottled_grey(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Base luminance (H, W) float32: one grey level modulated by four noise octaves."""
    grey = rng.uniform(140.0, 190.0)
    lum = np.full((h, w), grey, np.float32)
    for scale, amp in _OCTAVES:
        lum *= 1.0 + rng.uniform(0.6, 1.4) * amp * smooth_noise(rng, h, w, scale)
    return lum


def _aggregate(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Aggregate (H, W) float32 to add: faint irregular blobs a few tones lighter or darker."""
    agg = np.zeros((h, w), np.float32)
    n_agg = int(h * w / rng.uniform(250.0, 600.0))
    cx = rng.uniform(0, w, n_agg)
    cy = rng.uniform(0, h, n_agg)
    ax = rng.uniform(1.0, 4.0, n_agg)
    ay = ax * rng.uniform(0.5, 1.0, n_agg)
    ang = rng.uniform(0, 180, n_agg)
    tone = rng.choice([-1.0, 1.0], n_agg) * rng.uniform(3.0, 9.0, n_agg)
    for i in range(n_agg):
        cv2.ellipse(
            agg,
            (int(cx[i] * 16), int(cy[i] * 16)),
            (int(ax[i] * 16), int(ay[i] * 16)),
            float(ang[i]),
            0,
            360,
            float(tone[i]),
            -1,
            cv2.LINE_8,
            4,
        )
    return cv2.GaussianBlur(agg, (0, 0), 0.9)


def _sand_grain(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Fine sand grain (H, W) float32 to add."""
    grain = rng.standard_normal((h, w)).astype(np.float32)
    return rng.uniform(4.0, 8.0) * cv2.GaussianBlur(grain, (0, 0), 0.6) * 1.6


def _tint(rng: np.random.Generator) -> np.ndarray:
    """RGB multipliers (3,) float32 from a warm-to-cool cement tint."""
    tint_kind = rng.uniform(-1.0, 1.0)
    tint = np.array([1.0 + 0.035 * tint_kind, 1.0, 1.0 - 0.045 * tint_kind], np.float32)
    tint *= rng.uniform(0.985, 1.015, 3).astype(np.float32)
    return tint


def concrete_surface(rng: np.random.Generator, h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Base concrete (H, W, 3) float32 RGB and a multiplicative lighting field (H, W).

    Args:
        rng: the surface's random stream (drawn in a fixed order: grey, aggregate,
            grain, tint, lighting).
        h: image rows.
        w: image columns.

    Returns:
        ``(rgb, light)``; ``light`` is applied by the caller after the cracks are drawn.
    """
    lum = _mottled_grey(rng, h, w)
    lum += _aggregate(rng, h, w)
    lum += _sand_grain(rng, h, w)
    rgb = lum[:, :, None] * _tint(rng)[None, None, :]
    return rgb, uneven_lighting(rng, h, w)
