"""What a synthetic photo is made from: the generator version, the scene kinds and the options."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from trainkit.core.errors import TrainkitError

__all__ = [
    "GENERATOR_VERSION",
    "SCENES",
    "SCENE_MIX",
    "SurfaceFamily",
    "SynthError",
    "SynthOptions",
]


class SynthError(TrainkitError):
    """Generator options that cannot be used; the message names the option and its valid range."""


#: Recorded in manifests and truth files; bump when the generated pixels change.
GENERATOR_VERSION = "trainkit.synth 1.0"

#: Scene kinds accepted by :class:`SynthOptions` (``random`` resolves to one of the others).
SCENES = ("none", "single", "multi", "map", "random")


@dataclass(frozen=True)
class SurfaceFamily:
    """A surface family other than the kit's own ``"default"``: its paste and its camera.

    The kit makes every dataset, demo frame and test photo from the default family; a
    family from outside (``benchmarks/reserved.py`` defines the job-trust benchmark's
    ``broom``) makes photos that no training data of the kit is made from.

    Attributes:
        name: the family's name, recorded in manifests.
        surface: ``surface(rng, h, w) -> (rgb, light)``, the (H, W, 3) float32 concrete and
            its (H, W) lighting field, like :func:`~trainkit.synth.surface.concrete_surface`.
        camera: ``camera(rng, rgb, blur_sigma, noise_sigma) -> image``, the lit float RGB
            (cracks drawn) to the (H, W, 3) uint8 image; None keeps the default optics and
            sensor noise.
    """

    name: str
    surface: Callable[[np.random.Generator, int, int], tuple[np.ndarray, np.ndarray]]
    camera: Callable[[np.random.Generator, np.ndarray, float, float], np.ndarray] | None = None


#: Scene mix used for ``scene="random"`` and by :func:`write_dataset`.
SCENE_MIX: tuple[tuple[str, float], ...] = (
    ("none", 0.20),
    ("single", 0.45),
    ("multi", 0.15),
    ("map", 0.20),
)


@dataclass(frozen=True)
class SynthOptions:
    """What to generate; a photo is fully determined by ``(seed, options)``.

    Attributes:
        height: image rows.
        width: image columns.
        scene: ``none``, ``single``, ``multi`` (2-3 cracks), ``map`` or ``random``.
        crack_angle_deg: base direction of a ``single`` scene's main crack; random if None.
        max_width_px: width of the widest point of a main crack (map cracks stay <= 2 px).
        distractors: draw joints, tie holes, stains, efflorescence, shadows and pores.
        blur_sigma: optical blur in pixels (0 = none).
        noise_sigma: sensor noise in grey levels.
        jpeg_quality: if set, the returned image went through JPEG at this quality.
        gsd_mm: scale in mm per pixel, recorded for widths/lengths in mm.
        surface: ``"default"`` (the kit's surface family) or a :class:`SurfaceFamily`, which
            changes the paste, texture, light and camera but not the cracks, their truth
            or the distractors.
    """

    height: int = 512
    width: int = 768
    scene: str = "random"
    crack_angle_deg: float | None = None
    max_width_px: float = 5.0
    distractors: bool = True
    blur_sigma: float = 0.6
    noise_sigma: float = 2.0
    jpeg_quality: int | None = None
    gsd_mm: float | None = None
    surface: str | SurfaceFamily = "default"

    def __post_init__(self) -> None:
        for name in ("height", "width"):
            v = getattr(self, name)
            if not isinstance(v, int | np.integer) or isinstance(v, bool) or v < 32:
                raise SynthError(f"SynthOptions.{name}: expected an int >= 32, got {v!r}")
        if self.scene not in SCENES:
            raise SynthError(f"SynthOptions.scene: expected one of {SCENES}, got {self.scene!r}")
        if self.crack_angle_deg is not None and not math.isfinite(self.crack_angle_deg):
            raise SynthError(
                f"SynthOptions.crack_angle_deg: expected a finite number or None, "
                f"got {self.crack_angle_deg!r}"
            )
        if not (0.5 <= self.max_width_px <= 20.0):
            raise SynthError(
                f"SynthOptions.max_width_px: expected 0.5..20, got {self.max_width_px!r}"
            )
        if not (0.0 <= self.blur_sigma <= 10.0):
            raise SynthError(f"SynthOptions.blur_sigma: expected 0..10, got {self.blur_sigma!r}")
        if not (0.0 <= self.noise_sigma <= 50.0):
            raise SynthError(f"SynthOptions.noise_sigma: expected 0..50, got {self.noise_sigma!r}")
        if self.jpeg_quality is not None and not (1 <= self.jpeg_quality <= 100):
            raise SynthError(
                f"SynthOptions.jpeg_quality: expected 1..100 or None, got {self.jpeg_quality!r}"
            )
        if self.surface != "default" and not isinstance(self.surface, SurfaceFamily):
            raise SynthError(
                f"SynthOptions.surface: expected 'default' or a SurfaceFamily, got {self.surface!r}"
            )
        if self.gsd_mm is not None and not (self.gsd_mm > 0 and math.isfinite(self.gsd_mm)):
            raise SynthError(f"SynthOptions.gsd_mm: expected > 0 or None, got {self.gsd_mm!r}")
