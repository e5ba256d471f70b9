"""Non-crack features that look a little like cracks: pores, formwork joints and tie holes."""

from __future__ import annotations

import cv2
import numpy as np

from trainkit.synth.lighting import add_cast_shadow, add_efflorescence, add_stains

__all__ = ["draw_distractors"]


def _pores(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Darkening (H, W) float32 in [0, 1) from pores and bug holes: soft ellipses 1-8 px."""
    dark = np.zeros((h, w), np.float32)
    n_pores = int(h * w / 2500 * rng.uniform(0.3, 2.0))
    diam = np.clip(rng.exponential(1.6, n_pores) + 1.0, 1.0, 8.0)
    cx, cy = rng.uniform(0, w, n_pores), rng.uniform(0, h, n_pores)
    asp = rng.uniform(0.55, 1.0, n_pores)
    ang = rng.uniform(0, 180, n_pores)
    depth = rng.uniform(0.25, 0.6, n_pores)
    for i in range(n_pores):
        r = diam[i] / 2.0
        cv2.ellipse(
            dark,
            (int(cx[i] * 16), int(cy[i] * 16)),
            (max(1, int(r * 16)), max(1, int(r * asp[i] * 16))),
            float(ang[i]),
            0,
            360,
            float(depth[i]),
            -1,
            cv2.LINE_AA,
            4,
        )
    return cv2.GaussianBlur(dark, (0, 0), 0.7)


def _formwork_joints(rng: np.random.Generator, factor: np.ndarray) -> None:
    """Multiply 1-2 straight full-span joints (dark, with a bright edge) into ``factor``."""
    h, w = factor.shape
    for _ in range(int(rng.integers(1, 3))):
        vertical = rng.random() < 0.5
        span = w if vertical else h
        pos = int(rng.integers(int(0.1 * span), int(0.9 * span)))
        thick = int(rng.integers(1, 4))
        shade = rng.uniform(0.45, 0.7)
        bright = rng.uniform(1.05, 1.14)
        side = -1 if rng.random() < 0.5 else thick
        if vertical:
            factor[:, pos : pos + thick] *= shade
            factor[:, max(0, pos + side) : pos + side + 1] *= bright
        else:
            factor[pos : pos + thick, :] *= shade
            factor[max(0, pos + side) : pos + side + 1, :] *= bright


def _tie_holes(rng: np.random.Generator, factor: np.ndarray) -> None:
    """Multiply a regular grid of round dark tie holes with lighter rims into ``factor``."""
    h, w = factor.shape
    sx, sy = rng.uniform(120, 240), rng.uniform(120, 240)
    ox, oy = rng.uniform(0, sx), rng.uniform(0, sy)
    rad = rng.uniform(5.0, 9.0)
    holes = np.ones((h, w), np.float32)
    shade = rng.uniform(0.3, 0.55)
    for yc in np.arange(oy, h + rad, sy):
        for xc in np.arange(ox, w + rad, sx):
            c = (int(xc * 16), int(yc * 16))
            cv2.circle(
                holes, c, int((rad + 2.0) * 16), float(rng.uniform(1.08, 1.16)), -1, cv2.LINE_AA, 4
            )
            cv2.circle(holes, c, int(rad * 16), float(shade), -1, cv2.LINE_AA, 4)
    factor *= cv2.GaussianBlur(holes, (0, 0), 0.8)


def draw_distractors(rng: np.random.Generator, rgb: np.ndarray, light: np.ndarray) -> None:
    """Draw non-crack features in place and fold a cast shadow into ``light``.

    Each feature appears with a fixed probability, decided in this order from ``rng``:
    stains 55 %, efflorescence 40 %, pores always, formwork joints 35 %, tie holes 30 %,
    cast shadow 30 %.

    Args:
        rng: the distractors' random stream.
        rgb: (H, W, 3) float32 surface, changed in place.
        light: (H, W) float32 multiplicative light field, changed in place.
    """
    h, w = rgb.shape[:2]
    if rng.random() < 0.55:
        add_stains(rng, rgb)
    if rng.random() < 0.4:
        add_efflorescence(rng, rgb)
    rgb *= (1.0 - _pores(rng, h, w))[:, :, None]
    factor = np.ones((h, w), np.float32)
    if rng.random() < 0.35:
        _formwork_joints(rng, factor)
    if rng.random() < 0.3:
        _tie_holes(rng, factor)
    rgb *= factor[:, :, None]
    if rng.random() < 0.3:
        add_cast_shadow(rng, light)
