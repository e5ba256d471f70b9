"""Compose one synthetic photo: crack geometry, surface, distractors, optics and sensor noise."""

from __future__ import annotations

import io

import cv2
import numpy as np
from PIL import Image

from trainkit.synth.distractors import draw_distractors
from trainkit.synth.noise import smooth_noise
from trainkit.synth.options import SCENE_MIX, SurfaceFamily, SynthOptions
from trainkit.synth.paths import make_cracks
from trainkit.synth.raster import render_cracks
from trainkit.synth.surface import concrete_surface
from trainkit.synth.truth import SynthPhoto

__all__ = ["generate_photo"]

#: Options used unless the caller passes others (frozen, so safe to share).
_DEFAULT_OPTIONS = SynthOptions()


def _jpeg_roundtrip(image: np.ndarray, quality: int) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(image, "RGB").save(buf, format="JPEG", quality=int(quality))
    buf.seek(0)
    with Image.open(buf) as im:
        return np.asarray(im.convert("RGB")).copy()


def _resolve_scene(rng: np.random.Generator, scene: str) -> str:
    if scene != "random":
        return scene
    names = [s for s, _ in SCENE_MIX]
    probs = np.array([p for _, p in SCENE_MIX])
    return str(names[int(rng.choice(len(names), p=probs / probs.sum()))])


def generate_photo(seed: int, options: SynthOptions = _DEFAULT_OPTIONS) -> SynthPhoto:
    """Generate one synthetic concrete photo with exact crack truth.

    The result depends only on ``(seed, options)``: all randomness comes from
    ``numpy.random.default_rng(seed)`` and independent child streams spawned from it
    for scene, geometry, surface, distractors and sensor noise (so toggling
    distractors does not change the crack geometry).

    Args:
        seed: non-negative integer seed.
        options: what to generate.

    Returns:
        The photo with its mask, coverage, angle map and crack polylines.
    """
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ValueError(f"generate_photo: expected a non-negative int seed, got {seed!r}")
    if not isinstance(options, SynthOptions):
        raise ValueError(f"generate_photo: expected SynthOptions, got {type(options).__name__}")
    rng = np.random.default_rng(int(seed))
    r_scene, r_geo, r_surf, r_dist, r_noise = rng.spawn(5)
    scene = _resolve_scene(r_scene, options.scene)
    h, w = options.height, options.width

    cracks = make_cracks(r_geo, scene, options)
    coverage, mask, angle = render_cracks(cracks, h, w)

    family = options.surface if isinstance(options.surface, SurfaceFamily) else None
    rgb, light = (family.surface if family else concrete_surface)(r_surf, h, w)
    if options.distractors:
        draw_distractors(r_dist, rgb, light)
    if cracks:
        depth = r_geo.uniform(0.55, 0.85)
        depth_field = depth * (1.0 + 0.08 * smooth_noise(r_geo, h, w, 80.0))
        rgb *= (1.0 - np.clip(depth_field, 0.4, 0.92) * coverage)[:, :, None]
    rgb *= light[:, :, None]
    if family and family.camera:
        image = family.camera(r_noise, rgb, options.blur_sigma, options.noise_sigma)
    else:
        if options.blur_sigma > 0:
            rgb = cv2.GaussianBlur(rgb, (0, 0), options.blur_sigma)
        if options.noise_sigma > 0:
            rgb += r_noise.standard_normal(rgb.shape, dtype=np.float32) * np.float32(
                options.noise_sigma
            )
        image = np.clip(np.rint(rgb), 0, 255).astype(np.uint8)
    if options.jpeg_quality is not None:
        image = _jpeg_roundtrip(image, options.jpeg_quality)
    return SynthPhoto(
        image=image,
        mask=mask,
        coverage=coverage,
        angle=angle,
        cracks=cracks,
        scene=scene,
        seed=int(seed),
        gsd_mm=options.gsd_mm,
    )
