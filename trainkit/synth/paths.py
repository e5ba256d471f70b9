"""Random crack geometry: walked centrelines, branches, width profiles and map-crack networks."""

from __future__ import annotations

import math

import numpy as np
from scipy.signal import lfilter
from scipy.spatial import Voronoi

from trainkit.synth.geometry import arclength, clip_params, clip_polyline, direction
from trainkit.synth.options import SynthOptions
from trainkit.synth.truth import Crack

__all__ = ["make_cracks"]

#: Narrowest crack width in pixels a width profile tapers to.
_MIN_WIDTH = 0.3


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
        [[0.0, 0.0], np.cumsum(steps[:k, None] * direction(base_deg + dev[:k]), axis=0)]
    )
    outside = ~_inside(pts, height, width)
    exited = bool(outside.any())
    if exited:
        j = int(np.argmax(outside))
        t0, t1, hit = clip_params(pts[j - 1 : j], pts[j : j + 1], (0, 0, width, height))
        end = pts[j - 1] + t1[0] * (pts[j] - pts[j - 1])
        pts = np.vstack([pts[:j], end])
    return pts, exited


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
    s = arclength(pts)
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
    main_len = arclength(pts)[-1]
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
        out.extend(clip_polyline(pts[sl], wid[sl], frame, min_len=2.0))
    return out


def make_cracks(rng: np.random.Generator, scene: str, opts: SynthOptions) -> list[Crack]:
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
