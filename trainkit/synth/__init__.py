"""Generate procedural concrete photos with exact crack ground truth and patch labels."""

# Coordinates: continuous pixel coordinates; pixel (row r, col c) covers [c, c+1) x [r, r+1),
# so its centre is (x, y) = (c + 0.5, r + 0.5) and the frame is [0, W] x [0, H]. A box
# (x0, y0, x1, y1) (x1/y1 exclusive as pixel bounds) is the rectangle [x0, x1] x [y0, y1].
# Angles follow trainkit.core.taxonomy: undirected, [0, 180) degrees, counter-clockwise from +x as
# seen on screen, so the pixel-space direction of angle a is (cos a, -sin a).

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import cv2
import numpy as np
from PIL import Image
from scipy import ndimage
from scipy.signal import lfilter
from scipy.spatial import Voronoi

from trainkit.core.grid import grid_boxes
from trainkit.core.taxonomy import ClassSet

__all__ = [
    "GENERATOR_VERSION",
    "SCENES",
    "Crack",
    "SynthOptions",
    "SynthPhoto",
    "LabelRules",
    "PatchTruth",
    "generate_photo",
    "render_cracks",
    "clipped_lengths",
    "derive_patch_label",
    "write_dataset",
]

#: Recorded in manifests and truth files; bump when the generated pixels change.
GENERATOR_VERSION = "trainkit.synth 1.0"

#: Scene kinds accepted by :class:`SynthOptions` (``random`` resolves to one of the others).
SCENES = ("none", "single", "multi", "map", "random")

#: Scene mix used for ``scene="random"`` and by :func:`write_dataset`.
SCENE_MIX: tuple[tuple[str, float], ...] = (
    ("none", 0.20),
    ("single", 0.45),
    ("multi", 0.15),
    ("map", 0.20),
)

#: Fictional asset owner and structures used to name photos in :func:`write_dataset`.
ASSET_OWNER = "Millbrook Canal Trust"
STRUCTURES = ("aqueduct-deck", "culvert-east", "lock-3-wall", "pier-n")

_CRACK_KINDS = ("main", "branch", "map")
_MIN_WIDTH = 0.3


# =============================================================================
# Data classes
# =============================================================================
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
        if self.kind not in _CRACK_KINDS:
            raise ValueError(f"Crack kind: expected one of {_CRACK_KINDS}, got {self.kind!r}")
        pts.setflags(write=False)
        wid.setflags(write=False)
        object.__setattr__(self, "points", pts)
        object.__setattr__(self, "widths", wid)
        object.__setattr__(self, "crack_id", int(self.crack_id))

    def length_px(self) -> float:
        """Centreline length in pixels."""
        return float(np.sum(np.hypot(*np.diff(self.points, axis=0).T)))


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

    def __post_init__(self) -> None:
        for name in ("height", "width"):
            v = getattr(self, name)
            if not isinstance(v, int | np.integer) or isinstance(v, bool) or v < 32:
                raise ValueError(f"SynthOptions.{name}: expected an int >= 32, got {v!r}")
        if self.scene not in SCENES:
            raise ValueError(f"SynthOptions.scene: expected one of {SCENES}, got {self.scene!r}")
        if self.crack_angle_deg is not None and not math.isfinite(self.crack_angle_deg):
            raise ValueError(
                f"SynthOptions.crack_angle_deg: expected a finite number or None, "
                f"got {self.crack_angle_deg!r}"
            )
        if not (0.5 <= self.max_width_px <= 20.0):
            raise ValueError(
                f"SynthOptions.max_width_px: expected 0.5..20, got {self.max_width_px!r}"
            )
        if not (0.0 <= self.blur_sigma <= 10.0):
            raise ValueError(f"SynthOptions.blur_sigma: expected 0..10, got {self.blur_sigma!r}")
        if not (0.0 <= self.noise_sigma <= 50.0):
            raise ValueError(f"SynthOptions.noise_sigma: expected 0..50, got {self.noise_sigma!r}")
        if self.jpeg_quality is not None and not (1 <= self.jpeg_quality <= 100):
            raise ValueError(
                f"SynthOptions.jpeg_quality: expected 1..100 or None, got {self.jpeg_quality!r}"
            )
        if self.gsd_mm is not None and not (self.gsd_mm > 0 and math.isfinite(self.gsd_mm)):
            raise ValueError(f"SynthOptions.gsd_mm: expected > 0 or None, got {self.gsd_mm!r}")


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


@dataclass(frozen=True)
class LabelRules:
    """Thresholds that turn crack geometry inside a patch into a class label.

    Attributes:
        min_length_frac: minimum counted centreline length as a fraction of the patch
            side (the shorter side for non-square boxes); less but > 0 -> ambiguous.
        border_margin_frac: only centreline inside the box shrunk by this fraction of
            the side on every edge counts toward the minimum length. Any centreline in
            the box, or within half a crack width + 1 px outside it, rules out "none".
        oriented_min_coherence: length-weighted doubled-angle resultant R at or above
            this -> oriented class.
        map_max_coherence: R below this -> the catch-all crack class; in between ->
            ambiguous.
        boundary_margin_deg: dominant angle closer than this to a class boundary ->
            ambiguous.
    """

    min_length_frac: float = 0.15
    border_margin_frac: float = 0.05
    oriented_min_coherence: float = 0.75
    map_max_coherence: float = 0.5
    boundary_margin_deg: float = 4.0

    def __post_init__(self) -> None:
        if not (0.0 <= self.min_length_frac <= 10.0):
            raise ValueError(
                f"LabelRules.min_length_frac: expected 0..10, got {self.min_length_frac!r}"
            )
        if not (0.0 <= self.border_margin_frac < 0.5):
            raise ValueError(
                f"LabelRules.border_margin_frac: expected 0 <= x < 0.5, "
                f"got {self.border_margin_frac!r}"
            )
        if not (0.0 <= self.map_max_coherence <= self.oriented_min_coherence <= 1.0):
            raise ValueError(
                "LabelRules: expected 0 <= map_max_coherence <= oriented_min_coherence <= 1, "
                f"got {self.map_max_coherence!r} and {self.oriented_min_coherence!r}"
            )
        if not (0.0 <= self.boundary_margin_deg < 90.0):
            raise ValueError(
                f"LabelRules.boundary_margin_deg: expected 0 <= x < 90, "
                f"got {self.boundary_margin_deg!r}"
            )


@dataclass(frozen=True)
class PatchTruth:
    """Label of one patch derived from the exact crack geometry.

    Attributes:
        label: class index, or None if ambiguous.
        status: ``"clear"`` or ``"ambiguous"``.
        reason: short human-readable explanation.
        length_px: centreline length inside the box.
        angle_deg: length-weighted dominant angle (doubled-angle mean), None if no crack.
        coherence: doubled-angle resultant length R in [0, 1], None if no crack.
    """

    label: int | None
    status: str
    reason: str
    length_px: float
    angle_deg: float | None
    coherence: float | None


# =============================================================================
# Geometry helpers
# =============================================================================
def _screen_angle_deg(dx: np.ndarray, dy: np.ndarray) -> np.ndarray:
    """On-screen undirected angle in [0, 180) of pixel-space direction(s) (dx, dy)."""
    a = np.degrees(np.arctan2(-np.asarray(dy, float), np.asarray(dx, float))) % 180.0
    return np.where(a >= 180.0, 0.0, a)


def _direction(angle_deg: np.ndarray | float) -> np.ndarray:
    a = np.radians(angle_deg)
    return np.stack([np.cos(a), -np.sin(a)], axis=-1)


def _clip_params(
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
    t0, t1, hit = _clip_params(p0, p1, box)
    seg_len = np.hypot(*(p1 - p0).T)
    return np.where(hit, np.clip(t1 - t0, 0.0, 1.0) * seg_len, 0.0)


def _clip_polyline(
    pts: np.ndarray, wid: np.ndarray, box: Sequence[float], min_len: float = 1.0
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Cut a polyline (with widths) to a box; returns the inside runs as separate pieces."""
    x0, y0, x1, y1 = box
    if (
        pts[:, 0].min() >= x0
        and pts[:, 0].max() <= x1
        and pts[:, 1].min() >= y0
        and pts[:, 1].max() <= y1
    ):
        return [(pts, wid)]
    t0, t1, hit = _clip_params(pts[:-1], pts[1:], box)
    pieces: list[tuple[list, list]] = []
    cur: tuple[list, list] | None = None
    for i in range(len(pts) - 1):
        if not hit[i] or t1[i] <= t0[i]:
            if cur is not None:
                pieces.append(cur)
                cur = None
            continue
        d = pts[i + 1] - pts[i]
        dw = wid[i + 1] - wid[i]
        a, b = pts[i] + t0[i] * d, pts[i] + t1[i] * d
        wa, wb = wid[i] + t0[i] * dw, wid[i] + t1[i] * dw
        if cur is None or t0[i] > 0:
            if cur is not None:
                pieces.append(cur)
            cur = ([a], [wa])
        cur[0].append(b)
        cur[1].append(wb)
        if t1[i] < 1:
            pieces.append(cur)
            cur = None
    if cur is not None:
        pieces.append(cur)
    out = []
    for p, w in pieces:
        pa = np.array(p)
        if len(pa) >= 2 and np.sum(np.hypot(*np.diff(pa, axis=0).T)) >= min_len:
            out.append((pa, np.array(w)))
    return out


# =============================================================================
# Crack geometry
# =============================================================================
def _inside(p: np.ndarray, height: int, width: int) -> np.ndarray:
    return (p[..., 0] >= 0) & (p[..., 0] <= width) & (p[..., 1] >= 0) & (p[..., 1] <= height)


def _walk(
    rng: np.random.Generator,
    start: np.ndarray,
    base_deg: float,
    max_len: float,
    height: int,
    width: int,
    heading_sd: float,
    phi: float = 0.85,
) -> tuple[np.ndarray, bool]:
    """Random walk with mean-reverting (AR(1)) heading noise around ``base_deg``.

    Returns the vertices (starting with ``start``) and whether the walk left the frame
    (its last vertex is then moved onto the frame edge).
    """
    n = int(math.ceil(max_len / 3.0)) + 2
    innov = rng.normal(0.0, heading_sd * math.sqrt(1.0 - phi * phi), n)
    e0 = rng.normal(0.0, heading_sd)
    dev = lfilter([1.0], [1.0, -phi], innov, zi=[phi * e0])[0]
    dev = dev + rng.normal(0.0, 0.5 * heading_sd, n)  # step-scale jaggedness
    steps = rng.uniform(3.0, 6.0, n)
    csum = np.cumsum(steps)
    k = int(np.searchsorted(csum, max_len)) + 1
    k = min(k, n)
    pts = start + np.vstack(
        [[0.0, 0.0], np.cumsum(steps[:k, None] * _direction(base_deg + dev[:k]), axis=0)]
    )
    outside = ~_inside(pts, height, width)
    exited = bool(outside.any())
    if exited:
        j = int(np.argmax(outside))
        t0, t1, hit = _clip_params(pts[j - 1 : j], pts[j : j + 1], (0, 0, width, height))
        end = pts[j - 1] + t1[0] * (pts[j] - pts[j - 1])
        pts = np.vstack([pts[:j], end])
    return pts, exited


def _arclength(pts: np.ndarray) -> np.ndarray:
    return np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(pts, axis=0).T))])


def _width_profile(
    rng: np.random.Generator,
    pts: np.ndarray,
    w_max: float,
    taper_start: bool,
    taper_end: bool,
    variation: float = 0.3,
    w_min: float = _MIN_WIDTH,
) -> np.ndarray:
    """Smooth random width profile along a polyline, peaking at exactly ``w_max``."""
    s = _arclength(pts)
    length = max(s[-1], 1e-6)
    f = np.zeros_like(s)
    amp_sum = 0.0
    for _ in range(3):
        wl = rng.uniform(60.0, 320.0)
        amp = rng.uniform(0.4, 1.0)
        f += amp * np.sin(2 * np.pi * s / wl + rng.uniform(0, 2 * np.pi))
        amp_sum += amp
    prof = (1.0 - variation) + variation * f / amp_sum
    taper_len = min(0.3 * length, 150.0)
    if taper_start:
        prof = prof * np.clip(s / taper_len, 0.0, 1.0) ** 0.6
    if taper_end:
        prof = prof * np.clip((length - s) / taper_len, 0.0, 1.0) ** 0.6
    prof = prof / max(prof.max(), 1e-9)
    return np.clip(prof * w_max, min(w_min, w_max), w_max)


def _local_heading(pts: np.ndarray, j: int) -> float:
    a = pts[max(j - 2, 0)]
    b = pts[min(j + 2, len(pts) - 1)]
    return float(np.degrees(np.arctan2(-(b[1] - a[1]), b[0] - a[0])))


def _main_crack(
    rng: np.random.Generator,
    height: int,
    width: int,
    base_deg: float,
    w_max: float,
    centre_frac: tuple[float, float],
    half_len_frac: tuple[float, float] = (0.45, 1.0),
) -> tuple[np.ndarray, np.ndarray]:
    """A crack walked both ways from a random centre; half lengths are fractions of the
    diagonal, so most cross the frame; ends that stop inside the frame taper."""
    lo, hi = centre_frac
    centre = np.array([rng.uniform(lo, hi) * width, rng.uniform(lo, hi) * height])
    diag = math.hypot(height, width)
    heading_sd = rng.uniform(10.0, 15.0)
    fwd, fwd_out = _walk(
        rng, centre, base_deg, rng.uniform(*half_len_frac) * diag, height, width, heading_sd
    )
    bwd, bwd_out = _walk(
        rng, centre, base_deg + 180.0, rng.uniform(*half_len_frac) * diag, height, width, heading_sd
    )
    pts = np.vstack([bwd[::-1], fwd[1:]])
    wid = _width_profile(rng, pts, w_max, taper_start=not bwd_out, taper_end=not fwd_out)
    return pts, wid


def _branches(
    rng: np.random.Generator,
    pts: np.ndarray,
    wid: np.ndarray,
    height: int,
    width: int,
    n: int,
) -> list[tuple[np.ndarray, np.ndarray]]:
    out = []
    main_len = _arclength(pts)[-1]
    for _ in range(n):
        if len(pts) < 8:
            break
        j = int(rng.integers(int(0.15 * len(pts)), int(0.85 * len(pts))))
        heading = _local_heading(pts, j) + (180.0 if rng.random() < 0.5 else 0.0)
        offset = rng.uniform(25.0, 60.0) * (1.0 if rng.random() < 0.5 else -1.0)
        bpts, _ = _walk(
            rng,
            pts[j],
            heading + offset,
            rng.uniform(0.15, 0.4) * main_len,
            height,
            width,
            rng.uniform(12.0, 16.0),
        )
        if len(bpts) < 3:
            continue
        w0 = max(rng.uniform(0.3, 0.55) * wid[j], _MIN_WIDTH)
        bw = _width_profile(rng, bpts, w0, taper_start=False, taper_end=True, variation=0.2)
        out.append((bpts, bw))
    return out


def _map_network(
    rng: np.random.Generator, height: int, width: int, w_cap: float
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Polygonal crack network: Voronoi ridges of jittered grid seeds, subdivided every
    ~4 px and bent by a Brownian bridge (ends fixed, so the network stays connected)."""
    spacing = rng.uniform(35.0, 70.0)
    if rng.random() < 0.5:
        region = (0.0, 0.0, float(width), float(height))
        keep = (-spacing, -spacing, width + spacing, height + spacing)
    else:
        rw, rh = rng.uniform(0.5, 0.9) * width, rng.uniform(0.5, 0.9) * height
        rx, ry = rng.uniform(0, width - rw), rng.uniform(0, height - rh)
        region = (rx, ry, rx + rw, ry + rh)
        keep = region
    gx = np.arange(region[0] - spacing, region[2] + 1.5 * spacing, spacing)
    gy = np.arange(region[1] - spacing, region[3] + 1.5 * spacing, spacing)
    xx, yy = np.meshgrid(gx, gy)
    seeds = np.stack([xx.ravel(), yy.ravel()], axis=1)
    seeds += rng.uniform(-0.42, 0.42, seeds.shape) * spacing
    vor = Voronoi(seeds)
    ridges = np.array(sorted(tuple(sorted(r)) for r in vor.ridge_vertices if min(r) >= 0))
    if len(ridges) == 0:
        return []
    a, b = vor.vertices[ridges[:, 0]], vor.vertices[ridges[:, 1]]

    def within(p: np.ndarray) -> np.ndarray:
        return (
            (p[:, 0] >= keep[0])
            & (p[:, 0] <= keep[2])
            & (p[:, 1] >= keep[1])
            & (p[:, 1] <= keep[3])
        )

    d = b - a
    length = np.hypot(d[:, 0], d[:, 1])
    ok = within(a) & within(b) & (length >= 2.0)
    ok &= rng.random(len(ok)) >= rng.uniform(0.0, 0.15)
    a, d, length = a[ok], d[ok], length[ok]
    m = len(a)
    if m == 0:
        return []
    w_net = rng.uniform(0.8, 2.0) * min(1.0, w_cap / 2.0)
    jitter_sd = np.minimum(rng.uniform(0.8, 2.2), 0.08 * length)
    base_w = rng.uniform(0.5, 1.0, m) * w_net
    wavelength = rng.uniform(40.0, 200.0, m)
    phase = rng.uniform(0.0, 2 * np.pi, m)

    n = np.maximum(2, np.ceil(length / 4.0).astype(int))  # segments per ridge
    counts = n + 1
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    ends = starts + n
    rid = np.repeat(np.arange(m), counts)
    local = np.arange(int(counts.sum())) - starts[rid]
    t = local / n[rid]
    z = rng.normal(0.0, 1.0, len(t))
    z[starts] = 0.0
    walk = np.cumsum(z)
    walk -= walk[starts][rid]
    walk -= t * walk[ends][rid]
    off = walk * (jitter_sd / np.sqrt(n / 6.0))[rid] + rng.normal(0.0, 0.25, len(t))
    off[starts] = 0.0
    off[ends] = 0.0
    normal = np.stack([-d[:, 1], d[:, 0]], axis=1) / length[:, None]
    pts = a[rid] + t[:, None] * d[rid] + off[:, None] * normal[rid]
    wid = base_w[rid] * (
        1.0 + 0.25 * np.sin(2 * np.pi * t * length[rid] / wavelength[rid] + phase[rid])
    )
    wid = np.clip(wid, 0.4, 2.0)
    out: list[tuple[np.ndarray, np.ndarray]] = []
    frame = (0, 0, width, height)
    for i in range(m):
        sl = slice(starts[i], ends[i] + 1)
        out.extend(_clip_polyline(pts[sl], wid[sl], frame, min_len=2.0))
    return out


def _make_cracks(rng: np.random.Generator, scene: str, opts: SynthOptions) -> list[Crack]:
    h, w = opts.height, opts.width
    raw: list[tuple[np.ndarray, np.ndarray, str]] = []
    if scene == "single":
        base = (
            float(opts.crack_angle_deg) % 180.0
            if opts.crack_angle_deg is not None
            else rng.uniform(0.0, 180.0)
        )
        pts, wid = _main_crack(rng, h, w, base, opts.max_width_px, (0.3, 0.7))
        raw.append((pts, wid, "main"))
        for bp, bw in _branches(rng, pts, wid, h, w, int(rng.integers(0, 3))):
            raw.append((bp, bw, "branch"))
    elif scene == "multi":
        n = int(rng.integers(2, 4))
        first = rng.uniform(0.0, 180.0)
        for k in range(n):
            base = (first + k * 180.0 / n + rng.uniform(-20.0, 20.0)) % 180.0
            wmax = opts.max_width_px * (1.0 if k == 0 else rng.uniform(0.4, 0.9))
            pts, wid = _main_crack(rng, h, w, base, wmax, (0.1, 0.9), (0.15, 0.8))
            raw.append((pts, wid, "main"))
            for bp, bw in _branches(rng, pts, wid, h, w, int(rng.integers(0, 2))):
                raw.append((bp, bw, "branch"))
    elif scene == "map":
        for pts, wid in _map_network(rng, h, w, opts.max_width_px):
            raw.append((pts, wid, "map"))
    return [Crack(points=p, widths=wd, kind=k, crack_id=i) for i, (p, wd, k) in enumerate(raw)]


# =============================================================================
# Rendering of crack truth rasters
# =============================================================================
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
    seg_angle = _screen_angle_deg(*(p1 - p0).T)
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
    for kind in _CRACK_KINDS:
        group = [c for c in cracks if c.kind == kind]
        if not group:
            continue
        cov, msk, ang = _render_layer(group, height, width)
        take = (msk & ~mask) | (msk & (cov > coverage))
        angle[take] = ang[take]
        coverage = np.maximum(coverage, cov)
        mask |= msk
    return coverage, mask, angle


# =============================================================================
# Surface rendering
# =============================================================================
def _smooth_noise(
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


def _soft_blob_alpha(
    rng: np.random.Generator,
    height: int,
    width: int,
    scale: float,
    cover: float,
    aspect: float = 1.0,
) -> np.ndarray:
    """Soft-edged random blobs covering roughly ``cover`` of the frame, alpha in [0, 1]."""
    n = _smooth_noise(rng, height, width, scale, aspect)
    thr = float(np.quantile(n, 1.0 - cover))
    return np.clip((n - thr) / 0.8, 0.0, 1.0).astype(np.float32)


def _surface(rng: np.random.Generator, h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Base concrete (H, W, 3) float32 RGB and a multiplicative lighting field (H, W)."""
    grey = rng.uniform(140.0, 190.0)
    lum = np.full((h, w), grey, np.float32)
    for scale, amp in ((140.0, 0.05), (48.0, 0.035), (14.0, 0.02), (4.0, 0.012)):
        lum *= 1.0 + rng.uniform(0.6, 1.4) * amp * _smooth_noise(rng, h, w, scale)
    # Aggregate: faint irregular blobs a few tones lighter or darker.
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
    lum += cv2.GaussianBlur(agg, (0, 0), 0.9)
    # Fine sand grain.
    grain = rng.standard_normal((h, w)).astype(np.float32)
    lum += rng.uniform(4.0, 8.0) * cv2.GaussianBlur(grain, (0, 0), 0.6) * 1.6
    tint_kind = rng.uniform(-1.0, 1.0)
    tint = np.array([1.0 + 0.035 * tint_kind, 1.0, 1.0 - 0.045 * tint_kind], np.float32)
    tint *= rng.uniform(0.985, 1.015, 3).astype(np.float32)
    rgb = lum[:, :, None] * tint[None, None, :]
    # Uneven lighting: linear gradient times vignette.
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    u = (xx - w / 2) / (w / 2)
    v = (yy - h / 2) / (h / 2)
    ga = rng.uniform(0, 2 * np.pi)
    light = 1.0 + rng.uniform(0.04, 0.18) * (np.cos(ga) * u + np.sin(ga) * v)
    light *= 1.0 - rng.uniform(0.03, 0.22) * (u * u + v * v) / 2.0
    return rgb, light.astype(np.float32)


def _distractors(rng: np.random.Generator, rgb: np.ndarray, light: np.ndarray) -> None:
    """Draw non-crack features in place: stains, efflorescence, pores, joints, tie holes,
    and fold a cast shadow into ``light``."""
    h, w = rgb.shape[:2]
    if rng.random() < 0.55:  # stains: large soft darker brownish blobs
        alpha = _soft_blob_alpha(rng, h, w, rng.uniform(60, 140), rng.uniform(0.05, 0.25))
        strength = rng.uniform(0.10, 0.28)
        brown = np.array([0.75, 0.95, 1.25], np.float32)
        rgb *= 1.0 - strength * alpha[:, :, None] * brown[None, None, :]
    if rng.random() < 0.4:  # efflorescence: soft whitish patches, often streaky downward
        aspect = rng.choice([1.0, 3.0])
        alpha = _soft_blob_alpha(rng, h, w, rng.uniform(25, 70), rng.uniform(0.04, 0.15), aspect)
        white = rng.uniform(220, 245)
        a = (rng.uniform(0.25, 0.55) * alpha)[:, :, None]
        rgb *= 1.0 - a
        rgb += a * np.array([white, white, white * 0.98], np.float32)
    # Pores and bug holes: small dark soft ellipses 1-8 px.
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
    rgb *= (1.0 - cv2.GaussianBlur(dark, (0, 0), 0.7))[:, :, None]
    factor = np.ones((h, w), np.float32)
    if rng.random() < 0.35:  # formwork joints: straight, full-span, dark with a bright edge
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
    if rng.random() < 0.3:  # tie holes: regular grid of round dark holes with a lighter rim
        sx, sy = rng.uniform(120, 240), rng.uniform(120, 240)
        ox, oy = rng.uniform(0, sx), rng.uniform(0, sy)
        rad = rng.uniform(5.0, 9.0)
        holes = np.ones((h, w), np.float32)
        shade = rng.uniform(0.3, 0.55)
        for yc in np.arange(oy, h + rad, sy):
            for xc in np.arange(ox, w + rad, sx):
                c = (int(xc * 16), int(yc * 16))
                cv2.circle(
                    holes,
                    c,
                    int((rad + 2.0) * 16),
                    float(rng.uniform(1.08, 1.16)),
                    -1,
                    cv2.LINE_AA,
                    4,
                )
                cv2.circle(holes, c, int(rad * 16), float(shade), -1, cv2.LINE_AA, 4)
        factor *= cv2.GaussianBlur(holes, (0, 0), 0.8)
    rgb *= factor[:, :, None]
    if rng.random() < 0.3:  # cast shadow: soft half-plane or polygon
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


def generate_photo(seed: int, options: SynthOptions = SynthOptions()) -> SynthPhoto:
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

    cracks = _make_cracks(r_geo, scene, options)
    coverage, mask, angle = render_cracks(cracks, h, w)

    rgb, light = _surface(r_surf, h, w)
    if options.distractors:
        _distractors(r_dist, rgb, light)
    if cracks:
        depth = r_geo.uniform(0.55, 0.85)
        depth_field = depth * (1.0 + 0.08 * _smooth_noise(r_geo, h, w, 80.0))
        rgb *= (1.0 - np.clip(depth_field, 0.4, 0.92) * coverage)[:, :, None]
    rgb *= light[:, :, None]
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


# =============================================================================
# Patch labels
# =============================================================================
def _segments(cracks: Sequence[Crack]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if not cracks:
        z = np.zeros((0, 2))
        return z, z, np.zeros(0)
    p0 = np.concatenate([c.points[:-1] for c in cracks])
    p1 = np.concatenate([c.points[1:] for c in cracks])
    halo = np.concatenate(
        [np.full(len(c.points) - 1, float(c.widths.max()) / 2.0 + 1.0) for c in cracks]
    )
    return p0, p1, halo


def derive_patch_label(
    cracks: Sequence[Crack],
    box: tuple[int, int, int, int],
    class_set: ClassSet,
    rules: LabelRules = LabelRules(),
) -> PatchTruth:
    """Label one patch from exact crack geometry.

    Every centreline segment is clipped to the box with Liang-Barsky. Rules, in order:

    1. No centreline in the box nor within (half the crack's widest width + 1 px)
       outside it -> class 0, clear, "no crack".
    2. Centreline only in that halo outside the box -> ambiguous (crack edge visible).
    3. Length inside the box shrunk by ``border_margin_frac * side`` on each edge below
       ``min_length_frac * side`` -> ambiguous.
    4. Set without oriented classes -> the catch-all class, clear.
    5. Otherwise, from all segments clipped to the box: length-weighted doubled-angle
       resultant R and dominant angle. R >= ``oriented_min_coherence`` -> nearest
       oriented class (ambiguous if within ``boundary_margin_deg`` of a boundary);
       R < ``map_max_coherence`` -> catch-all class (ambiguous if the set has none);
       in between -> ambiguous.

    Args:
        cracks: crack polylines of the photo.
        box: ``(x0, y0, x1, y1)`` pixel bounds, x1/y1 exclusive.
        class_set: the class set whose index to return.
        rules: labelling thresholds.

    Returns:
        The patch truth.
    """
    if len(box) != 4:
        raise ValueError(f"derive_patch_label: expected box (x0, y0, x1, y1), got {box!r}")
    x0, y0, x1, y1 = (float(v) for v in box)
    if not (x1 > x0 and y1 > y0):
        raise ValueError(f"derive_patch_label: expected x1 > x0 and y1 > y0, got {box!r}")
    side = min(x1 - x0, y1 - y0)
    p0, p1, halo = _segments(cracks)
    seg_in = clipped_lengths(p0, p1, (x0, y0, x1, y1))
    length = float(seg_in.sum())

    if length <= 0.0:
        if len(halo):
            grown = np.stack([x0 - halo, y0 - halo, x1 + halo, y1 + halo], axis=1)
            near = float(clipped_lengths(p0, p1, grown).sum())
        else:
            near = 0.0
        if near > 0.0:
            return PatchTruth(
                None, "ambiguous", "crack edge just outside the patch", 0.0, None, None
            )
        return PatchTruth(0, "clear", "no crack", 0.0, None, None)

    dbl = np.radians(2.0 * _screen_angle_deg(*(p1 - p0).T))
    vec = np.array([np.sum(seg_in * np.cos(dbl)), np.sum(seg_in * np.sin(dbl))]) / length
    coherence = float(min(1.0, np.hypot(*vec)))
    dominant = float(np.degrees(np.arctan2(vec[1], vec[0])) / 2.0 % 180.0)
    if dominant >= 180.0:
        dominant = 0.0

    def amb(reason: str) -> PatchTruth:
        return PatchTruth(None, "ambiguous", reason, length, dominant, coherence)

    def clear(label: int, reason: str) -> PatchTruth:
        return PatchTruth(label, "clear", reason, length, dominant, coherence)

    m = rules.border_margin_frac * side
    counted = float(clipped_lengths(p0, p1, (x0 + m, y0 + m, x1 - m, y1 - m)).sum())
    min_len = rules.min_length_frac * side
    if counted < min_len:
        return amb(f"crack {counted:.0f} px < {min_len:.0f} px minimum")

    catchall = class_set.catchall_index
    if not class_set.oriented_indices:
        return clear(int(catchall), f"crack {counted:.0f} px")  # type: ignore[arg-type]
    if coherence >= rules.oriented_min_coherence:
        gap = class_set.boundary_distance(dominant)
        if gap < rules.boundary_margin_deg:
            return amb(
                f"angle {dominant:.1f} deg within {rules.boundary_margin_deg:g} deg "
                "of a class boundary"
            )
        return clear(
            class_set.class_for_angle(dominant),
            f"crack {counted:.0f} px at {dominant:.1f} deg; coherence {coherence:.2f}",
        )
    if coherence < rules.map_max_coherence:
        if catchall is None:
            return amb(f"crossing cracks (coherence {coherence:.2f}) but no catch-all class")
        return clear(int(catchall), f"crossing cracks; coherence {coherence:.2f}")
    return amb(
        f"coherence {coherence:.2f} between {rules.map_max_coherence:g} "
        f"and {rules.oriented_min_coherence:g}"
    )


# =============================================================================
# Dataset writer
# =============================================================================
def _boxes(height: int, width: int, tile_px: int) -> list[tuple[int, int, int, int]]:
    return [tuple(int(v) for v in b) for b in grid_boxes(height, width, tile_px, tile_px)]


def _scene_plan(rng: np.random.Generator, n: int) -> list[tuple[str, float | None]]:
    """Deterministic scene list matching SCENE_MIX (largest remainder), shuffled."""
    fr = np.array([p for _, p in SCENE_MIX]) * n
    counts = np.floor(fr).astype(int)
    order = sorted(range(len(fr)), key=lambda i: (-(fr[i] - counts[i]), i))
    for i in order[: n - int(counts.sum())]:
        counts[i] += 1
    scenes: list[str] = []
    for (name, _), c in zip(SCENE_MIX, counts, strict=True):
        scenes.extend([name] * int(c))
    n_single = scenes.count("single")
    angles = list(
        rng.permutation(
            (np.arange(n_single) + rng.uniform(0, 1, n_single)) * 180.0 / max(n_single, 1)
        )
    )
    plan: list[tuple[str, float | None]] = []
    for s in (scenes[i] for i in rng.permutation(n)):
        plan.append((s, round(float(angles.pop()), 2) if s == "single" else None))
    return plan


def write_dataset(
    out_dir: Path,
    *,
    n_photos: int,
    seed: int,
    tile_px: int,
    options: SynthOptions,
    class_set: ClassSet,
    rules: LabelRules = LabelRules(),
    jpeg_quality: int = 90,
    progress: Callable[[int, int], None] | None = None,
) -> dict:
    """Write a labelled synthetic dataset of concrete photos.

    Layout: ``photos/<name>.jpg``, ``truth/<name>.json``, ``scale.csv``
    (photo,structure,gsd_mm; photo is the file name with its suffix), ``labels.csv`` (photo,x0,y0,x1,y1,label,status,reason)
    for a tile grid of ``tile_px`` squares, and ``manifest.json``. Photos belong to
    structures of a fictional owner (:data:`ASSET_OWNER`). Each photo gets its own seed,
    a scene from :data:`SCENE_MIX` (single-crack angles spread over [0, 180)), a gsd in
    [0.25, 0.6] mm/px (unless ``options.gsd_mm`` is set) and a widest main-crack width
    drawn in [0.2, 1] x ``options.max_width_px`` (at least 0.8 px). ``options.scene`` and
    ``options.crack_angle_deg`` are replaced per photo; ``options.jpeg_quality`` is
    ignored (the files are JPEG at ``jpeg_quality``). Output is byte-for-byte
    reproducible for the same arguments.

    Args:
        out_dir: output folder (created).
        n_photos: number of photos (>= 1).
        seed: master seed (>= 0).
        tile_px: tile side in pixels (<= photo height and width).
        options: base generation options.
        class_set: class set used for labels.
        rules: labelling thresholds.
        jpeg_quality: JPEG quality of the written photos (1..100).
        progress: called as ``progress(done, total)`` after each photo.

    Returns:
        The manifest dict (also written to ``manifest.json``).
    """
    if isinstance(n_photos, bool) or not isinstance(n_photos, int) or n_photos < 1:
        raise ValueError(f"write_dataset: expected n_photos >= 1, got {n_photos!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ValueError(f"write_dataset: expected a non-negative int seed, got {seed!r}")
    if not (1 <= jpeg_quality <= 100):
        raise ValueError(f"write_dataset: expected jpeg_quality 1..100, got {jpeg_quality!r}")
    if not isinstance(tile_px, int) or not (1 <= tile_px <= min(options.height, options.width)):
        raise ValueError(
            f"write_dataset: expected tile_px in 1..{min(options.height, options.width)}, "
            f"got {tile_px!r}"
        )
    out_dir = Path(out_dir)
    (out_dir / "photos").mkdir(parents=True, exist_ok=True)
    (out_dir / "truth").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    plan = _scene_plan(rng, n_photos)
    boxes = _boxes(options.height, options.width, tile_px)

    per_structure = dict.fromkeys(STRUCTURES, 0)
    scale_rows: list[tuple[str, str, str]] = []
    label_rows: list[tuple] = []
    scene_counts = dict.fromkeys((s for s, _ in SCENE_MIX), 0)
    for i, (scene, angle) in enumerate(plan):
        structure = STRUCTURES[int(rng.integers(len(STRUCTURES)))]
        per_structure[structure] += 1
        name = f"{structure}-{per_structure[structure]:03d}"
        gsd = (
            options.gsd_mm
            if options.gsd_mm is not None
            else round(float(rng.uniform(0.25, 0.6)), 4)
        )
        wmax = round(max(0.8, float(rng.uniform(0.2, 1.0)) * options.max_width_px), 3)
        photo_seed = int(rng.integers(0, 2**31 - 1))
        opts = replace(
            options,
            scene=scene,
            crack_angle_deg=angle,
            max_width_px=wmax,
            jpeg_quality=None,
            gsd_mm=gsd,
        )
        photo = generate_photo(photo_seed, opts)
        scene_counts[photo.scene] += 1
        Image.fromarray(photo.image, "RGB").save(
            out_dir / "photos" / f"{name}.jpg", format="JPEG", quality=int(jpeg_quality)
        )
        truth = photo.to_json_dict()
        truth["structure"] = structure
        truth["max_width_px_option"] = wmax
        (out_dir / "truth" / f"{name}.json").write_text(
            json.dumps(truth, sort_keys=True, separators=(",", ":")) + "\n", encoding="utf-8"
        )
        scale_rows.append((f"{name}.jpg", structure, f"{gsd:.4f}"))
        for b in boxes:
            t = derive_patch_label(photo.cracks, b, class_set, rules)
            label = "" if t.label is None else class_set.names[t.label]
            label_rows.append((f"{name}.jpg", *b, label, t.status, t.reason))
        if progress is not None:
            progress(i + 1, n_photos)

    scale_rows.sort()
    label_rows.sort(key=lambda r: (r[0], r[2], r[1], r[4], r[3]))
    with open(out_dir / "scale.csv", "w", newline="", encoding="utf-8") as f:
        wr = csv.writer(f, lineterminator="\n")
        wr.writerow(["photo", "structure", "gsd_mm"])
        wr.writerows(scale_rows)
    with open(out_dir / "labels.csv", "w", newline="", encoding="utf-8") as f:
        wr = csv.writer(f, lineterminator="\n")
        wr.writerow(["photo", "x0", "y0", "x1", "y1", "label", "status", "reason"])
        wr.writerows(label_rows)

    counts = dict.fromkeys(class_set.names, 0)
    counts["ambiguous"] = 0
    for r in label_rows:
        counts[r[5] if r[5] else "ambiguous"] += 1
    manifest = {
        "generator": GENERATOR_VERSION,
        "asset_owner": ASSET_OWNER,
        "seed": seed,
        "n_photos": n_photos,
        "tile_px": tile_px,
        "jpeg_quality": int(jpeg_quality),
        "options": asdict(options),
        "rules": asdict(rules),
        "class_set": class_set.name,
        "class_names": list(class_set.names),
        "counts": counts,
        "n_tiles": len(label_rows),
        "scenes": scene_counts,
        "structures": {k: v for k, v in per_structure.items() if v},
    }
    (out_dir / "manifest.json").write_text(
        json.dumps(manifest, sort_keys=True, indent=2) + "\n", encoding="utf-8"
    )
    return manifest
