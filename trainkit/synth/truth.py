"""Exact crack truth records: a crack polyline with its widths, and a photo with its truth."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from trainkit.synth.options import GENERATOR_VERSION

__all__ = ["CRACK_KINDS", "Crack", "SynthPhoto"]

#: Crack kinds, in the order :func:`trainkit.synth.raster.render_cracks` draws them.
CRACK_KINDS = ("main", "branch", "map")


@dataclass(frozen=True, eq=False)
class Crack:
    """One crack centreline with its width profile.

    Attributes:
        points: (K, 2) float64 centreline vertices, columns x (col) and y (row), pixels.
        widths: (K,) float64 full crack width in pixels at each vertex.
        kind: ``"main"``, ``"branch"`` or ``"map"``.
        crack_id: identifier unique within a photo.
    """

    points: np.ndarray
    widths: np.ndarray
    kind: str
    crack_id: int

    def __post_init__(self) -> None:
        pts = np.array(self.points, dtype=np.float64)
        wid = np.array(self.widths, dtype=np.float64)
        if pts.ndim != 2 or pts.shape[1] != 2 or pts.shape[0] < 2:
            raise ValueError(f"Crack points: expected shape (K>=2, 2), got {pts.shape}")
        if wid.shape != (pts.shape[0],):
            raise ValueError(f"Crack widths: expected shape ({pts.shape[0]},), got {wid.shape}")
        if not (np.all(np.isfinite(pts)) and np.all(np.isfinite(wid))):
            raise ValueError("Crack points and widths: expected finite values, got NaN or inf")
        if np.any(wid <= 0):
            raise ValueError(f"Crack widths: expected > 0, got minimum {wid.min()}")
        if self.kind not in CRACK_KINDS:
            raise ValueError(f"Crack kind: expected one of {CRACK_KINDS}, got {self.kind!r}")
        pts.setflags(write=False)
        wid.setflags(write=False)
        object.__setattr__(self, "points", pts)
        object.__setattr__(self, "widths", wid)
        object.__setattr__(self, "crack_id", int(self.crack_id))

    def length_px(self) -> float:
        """Centreline length in pixels."""
        return float(np.sum(np.hypot(*np.diff(self.points, axis=0).T)))


@dataclass
class SynthPhoto:
    """A generated photo and its exact crack truth.

    Attributes:
        image: (H, W, 3) uint8 RGB.
        mask: (H, W) bool, pixels within ``max(w / 2, 0.5)`` px of a crack centreline.
        coverage: (H, W) float32 in [0, 1], fraction of each pixel covered by crack
            (before optical blur).
        angle: (H, W) float32 degrees in [0, 180) of the local crack segment, NaN off
            the mask.
        cracks: crack polylines, all inside the photo frame.
        scene: resolved scene kind.
        seed: the seed it was generated from.
        gsd_mm: mm per pixel, or None if unknown.
    """

    image: np.ndarray
    mask: np.ndarray
    coverage: np.ndarray
    angle: np.ndarray
    cracks: list[Crack] = field(default_factory=list)
    scene: str = "none"
    seed: int = 0
    gsd_mm: float | None = None

    def crack_length_px(self) -> float:
        """Total centreline length of all cracks in pixels (all lie inside the frame)."""
        return float(sum(c.length_px() for c in self.cracks))

    def to_json_dict(self) -> dict:
        """Plain-JSON truth: crack polylines (3 decimals), scene, seed, scale and mm values."""
        g = self.gsd_mm
        cracks = []
        for c in self.cracks:
            length = c.length_px()
            item: dict = {
                "crack_id": int(c.crack_id),
                "kind": c.kind,
                "points": [[round(float(x), 3), round(float(y), 3)] for x, y in c.points],
                "widths": [round(float(w), 3) for w in c.widths],
                "length_px": round(length, 3),
                "max_width_px": round(float(c.widths.max()), 3),
            }
            if g is not None:
                item["widths_mm"] = [round(float(w) * g, 3) for w in c.widths]
                item["length_mm"] = round(length * g, 3)
                item["max_width_mm"] = round(float(c.widths.max()) * g, 3)
            cracks.append(item)
        out: dict = {
            "generator": GENERATOR_VERSION,
            "scene": self.scene,
            "seed": int(self.seed),
            "height": int(self.image.shape[0]),
            "width": int(self.image.shape[1]),
            "gsd_mm": None if g is None else float(g),
            "crack_length_px": round(self.crack_length_px(), 3),
            "cracks": cracks,
        }
        if g is not None:
            out["crack_length_mm"] = round(self.crack_length_px() * g, 3)
        return out
