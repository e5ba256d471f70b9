"""The benchmarks' reserved surface family: broom-finished warm paste seen by another camera.

``SynthOptions(surface=BROOM)`` makes photos that no training data, demo or tiny dataset
of the kit is made from: it lives here, outside the package, for ``job_trust.py`` (and
``job_adapt.py`` and ``cascade.py``, which reuse its frames), which checks whether a
screener trained on the default family notices that these frames are unfamiliar and how
well a job's acceptance sample estimates its recall on them. Keep it out of every other
use, or the benchmarks stop measuring a surface the model never saw.

How it differs from the default family (:mod:`~trainkit.synth.surface`), all invented:

- paste: a darker, sand-coloured paste (grey 95-140, warm tint) instead of light grey;
- aggregate: exposed stones, larger (radius 2-7 px), each with its own colour (rust,
  charcoal, cream, slate) and a stronger contrast;
- texture: a broom finish, fine parallel grooves 3-6 px apart along one direction per
  photo that wander slowly and fade in and out;
- light: a stronger gradient, and a colour cast after the cracks are drawn (cold
  blue-white shade or warm low sun, chosen per photo);
- camera: a tone curve (lifted shadows, compressed highlights), more optical blur, more
  luminance noise plus low-frequency chroma noise, and JPEG at quality 55-75.

The crack geometry, distractors and truth are those of the default family (the same
random streams), so :func:`~trainkit.synth.labels.derive_patch_label` applies unchanged.
"""

from __future__ import annotations

import io

import cv2
import numpy as np
from PIL import Image

from trainkit.synth import SurfaceFamily
from trainkit.synth.lighting import uneven_lighting
from trainkit.synth.noise import smooth_noise

__all__ = ["BROOM", "FAMILIES", "broom_surface", "broom_camera"]

#: Stone colours of the exposed aggregate (RGB multipliers of the paste grey).
_STONES = np.array(
    [[1.18, 0.92, 0.78], [0.62, 0.62, 0.66], [1.22, 1.16, 1.02], [0.80, 0.86, 0.95]], np.float32
)


def _paste(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Paste luminance (H, W) float32: darker than the default, mottled at two scales."""
    lum = np.full((h, w), rng.uniform(95.0, 140.0), np.float32)
    lum *= 1.0 + 0.07 * smooth_noise(rng, h, w, 90.0)
    lum *= 1.0 + 0.03 * smooth_noise(rng, h, w, 20.0)
    return lum


def _broom_grooves(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Broom-finish grooves (H, W) float32 to add: parallel, wandering, fading in and out."""
    a = rng.uniform(0.0, np.pi)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    across = -xx * np.float32(np.sin(a)) + yy * np.float32(np.cos(a))
    across += np.float32(rng.uniform(3.0, 8.0)) * smooth_noise(rng, h, w, 150.0)
    spacing = rng.uniform(3.0, 6.0)
    across = (across - across.min()) / np.float32(spacing)
    profile = rng.standard_normal(int(across.max()) + 3).astype(np.float32)
    grooves = np.interp(across.ravel(), np.arange(profile.size), profile).reshape(h, w)
    fade = np.clip(0.55 + 0.45 * smooth_noise(rng, h, w, 70.0), 0.0, 1.0)
    return (rng.uniform(8.0, 14.0) * grooves * fade).astype(np.float32)


def _stones(rng: np.random.Generator, h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Stone mask (H, W) in [0, 1] and stone colour (H, W, 3) of the exposed aggregate."""
    mask = np.zeros((h, w), np.float32)
    colour = np.ones((h, w, 3), np.float32)
    n = int(h * w / rng.uniform(700.0, 1400.0))
    cx, cy = rng.uniform(0, w, n), rng.uniform(0, h, n)
    ax = rng.uniform(2.0, 7.0, n)
    ay = ax * rng.uniform(0.5, 1.0, n)
    ang = rng.uniform(0, 180, n)
    kind = rng.integers(0, len(_STONES), n)
    shade = rng.uniform(0.9, 1.1, n)
    for i in range(n):
        centre = (int(cx[i] * 16), int(cy[i] * 16))
        axes = (int(ax[i] * 16), int(ay[i] * 16))
        cv2.ellipse(mask, centre, axes, float(ang[i]), 0, 360, 1.0, -1, cv2.LINE_AA, 4)
        c = tuple(float(v) for v in _STONES[kind[i]] * shade[i])
        cv2.ellipse(colour, centre, axes, float(ang[i]), 0, 360, c, -1, cv2.LINE_8, 4)
    return cv2.GaussianBlur(mask, (0, 0), 0.7), colour


def broom_surface(rng: np.random.Generator, h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Reserved-family concrete (H, W, 3) float32 RGB and its lighting field (H, W).

    Args:
        rng: the surface's random stream (drawn in a fixed order).
        h: image rows.
        w: image columns.

    Returns:
        ``(rgb, light)`` like :func:`~trainkit.synth.surface.concrete_surface`.
    """
    lum = _paste(rng, h, w)
    lum += _broom_grooves(rng, h, w)
    lum += rng.uniform(2.0, 4.0) * cv2.GaussianBlur(
        rng.standard_normal((h, w)).astype(np.float32), (0, 0), 0.8
    )
    tint = np.array([1.10, 1.0, 0.80], np.float32) * rng.uniform(0.97, 1.03, 3).astype(np.float32)
    rgb = lum[:, :, None] * tint[None, None, :]
    mask, colour = _stones(rng, h, w)
    stones = rgb * colour * np.float32(rng.uniform(1.05, 1.25))
    rgb += mask[:, :, None] * (stones - rgb)
    light = uneven_lighting(rng, h, w)
    light *= 1.0 + np.float32(rng.uniform(0.10, 0.25)) * smooth_noise(rng, h, w, 300.0)
    return rgb, np.clip(light, 0.3, 1.6).astype(np.float32)


def _jpeg(image: np.ndarray, quality: int) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(image, "RGB").save(buf, format="JPEG", quality=int(quality))
    buf.seek(0)
    with Image.open(buf) as im:
        return np.asarray(im.convert("RGB")).copy()


def broom_camera(
    rng: np.random.Generator, rgb: np.ndarray, blur_sigma: float, noise_sigma: float
) -> np.ndarray:
    """The reserved family's light cast and camera: lit float RGB in, uint8 RGB out.

    Args:
        rng: the photo's noise stream.
        rgb: (H, W, 3) float32 lit image (cracks drawn, light applied).
        blur_sigma: the options' optical blur; this camera adds 0.5-0.9 px to it.
        noise_sigma: the options' sensor noise; this camera adds 3-5 grey levels to it.

    Returns:
        The (H, W, 3) uint8 image after the JPEG round trip.
    """
    h, w = rgb.shape[:2]
    cold = rng.random() < 0.5
    cast = [0.90, 0.98, 1.14] if cold else [1.12, 1.0, 0.84]
    rgb = rgb * np.asarray(cast, np.float32)[None, None, :]
    x = np.clip(rgb / 255.0, 0.0, 1.2)
    x = np.power(x, np.float32(rng.uniform(0.75, 0.9)))  # lifted shadows
    x = x / (1.0 + np.float32(rng.uniform(0.15, 0.3)) * x) * np.float32(1.25)  # soft shoulder
    rgb = (x * 255.0).astype(np.float32)
    rgb = cv2.GaussianBlur(rgb, (0, 0), blur_sigma + rng.uniform(0.5, 0.9))
    sigma = np.float32(noise_sigma + rng.uniform(3.0, 5.0))
    rgb += rng.standard_normal((h, w, 1), dtype=np.float32) * sigma
    chroma = rng.standard_normal((max(2, h // 8), max(2, w // 8), 3)).astype(np.float32)
    chroma = cv2.resize(chroma, (w, h), interpolation=cv2.INTER_LINEAR)
    rgb += chroma * np.float32(rng.uniform(2.0, 4.0))
    image = np.clip(np.rint(rgb), 0, 255).astype(np.uint8)
    return _jpeg(image, int(rng.integers(55, 76)))


#: The reserved family, for ``SynthOptions(surface=BROOM)``.
BROOM = SurfaceFamily("broom", broom_surface, broom_camera)
#: The benchmarks' frame sets by name: the kit's own family and the reserved one.
FAMILIES: dict[str, str | SurfaceFamily] = {"default": "default", "broom": BROOM}
