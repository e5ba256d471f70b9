"""Light and stains on the surface: uneven lighting, cast shadows, dark stains and efflorescence."""

from __future__ import annotations

import cv2
import numpy as np

from trainkit.synth.noise import soft_blob_alpha

__all__ = ["uneven_lighting", "add_stains", "add_efflorescence", "add_cast_shadow"]


def uneven_lighting(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Multiplicative light field (H, W) float32: a linear gradient times a vignette."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    u = (xx - w / 2) / (w / 2)
    v = (yy - h / 2) / (h / 2)
    ga = rng.uniform(0, 2 * np.pi)
    light = 1.0 + rng.uniform(0.04, 0.18) * (np.cos(ga) * u + np.sin(ga) * v)
    light *= 1.0 - rng.uniform(0.03, 0.22) * (u * u + v * v) / 2.0
    return light.astype(np.float32)


def add_stains(rng: np.random.Generator, rgb: np.ndarray) -> None:
    """Darken ``rgb`` in place with large soft brownish stains."""
    h, w = rgb.shape[:2]
    alpha = soft_blob_alpha(rng, h, w, rng.uniform(60, 140), rng.uniform(0.05, 0.25))
    strength = rng.uniform(0.10, 0.28)
    brown = np.array([0.75, 0.95, 1.25], np.float32)
    rgb *= 1.0 - strength * alpha[:, :, None] * brown[None, None, :]


def add_efflorescence(rng: np.random.Generator, rgb: np.ndarray) -> None:
    """Blend soft whitish patches, often streaky downward, into ``rgb`` in place."""
    h, w = rgb.shape[:2]
    aspect = rng.choice([1.0, 3.0])
    alpha = soft_blob_alpha(rng, h, w, rng.uniform(25, 70), rng.uniform(0.04, 0.15), aspect)
    white = rng.uniform(220, 245)
    a = (rng.uniform(0.25, 0.55) * alpha)[:, :, None]
    rgb *= 1.0 - a
    rgb += a * np.array([white, white, white * 0.98], np.float32)


def add_cast_shadow(rng: np.random.Generator, light: np.ndarray) -> None:
    """Fold a soft cast shadow (a half-plane or a polygon) into ``light`` in place."""
    h, w = light.shape
    soft = rng.uniform(6.0, 40.0)
    if rng.random() < 0.5:
        yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
        a = rng.uniform(0, 2 * np.pi)
        px, py = rng.uniform(0.2, 0.8) * w, rng.uniform(0.2, 0.8) * h
        sd = (xx - px) * np.cos(a) + (yy - py) * np.sin(a)
        alpha = 1.0 / (1.0 + np.exp(-sd / (soft / 3.0)))
    else:
        poly = np.stack([rng.uniform(-0.2, 1.2, 5) * w, rng.uniform(-0.2, 1.2, 5) * h], 1)
        hull = cv2.convexHull(poly.astype(np.float32)).reshape(-1, 2)
        alpha = np.zeros((h, w), np.float32)
        cv2.fillPoly(alpha, [np.round(hull * 16).astype(np.int32)], 1.0, cv2.LINE_AA, 4)
        alpha = cv2.GaussianBlur(alpha, (0, 0), soft / 2.0)
    light *= (1.0 - rng.uniform(0.2, 0.45) * alpha).astype(np.float32)
