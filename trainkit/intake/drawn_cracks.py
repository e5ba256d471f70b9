"""A photo's crack drawing as centreline segments with widths, and what it says of each patch.

A drawing comes as a mask (a single-channel image, non-zero = crack) or as traced
polylines (SVG or CSV, with or without widths). Either becomes :class:`DrawnCracks`:
centreline segments in the photo's continuous pixel coordinates (pixel (r, c) covers
[c, c+1) x [r, r+1)), each with the crack width at both ends (NaN when the drawing gives
none) and a halo (how far the crack reaches beyond its centreline). A patch is then
labelled by the kit's one patch label rule (:func:`trainkit.core.patch_rule.label_segments`,
the rule the generator labels its own photos with) and measured: centreline length, mean
and largest width.

From a mask (:func:`cracks_from_mask`):

1. centreline: the mask's skeleton (scikit-image ``skeletonize``, Zhang-Suen thinning),
   read as chains of 8-connected pixels between ends and junctions; a diagonal step that
   two straight steps through a skeleton pixel already make is not a link (so a staircase
   corner is not a junction); end branches no longer than the crack is wide at their
   junction (twice scipy's Euclidean distance transform there) are spurs of thinning and
   are dropped;
2. direction: each chain is simplified (Ramer-Douglas-Peucker, within
   :data:`SIMPLIFY_PX` of the pixels), so a segment's direction is the skeleton's
   tangent over many pixels, not a 45-degree pixel step;
3. width: every crack pixel goes to its nearest centreline pixel (a nearest-neighbour
   query, the feature transform of the skeleton); the width over a stretch of
   centreline is its crack pixels divided by its length (area / length, unbiased for
   even and fractional widths where twice the distance to the edge is off by a pixel),
   over stretches of at most :data:`WIDTH_STRETCH_PX`;
4. length: the simplified centreline's length clipped to the patch, as the rule counts it.

A speck whose skeleton is one pixel becomes 1 px of centreline without a direction, so a
patch holding only specks is ambiguous, not ``none``, and specks beside a crack do not tilt
its angle.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from trainkit.core.patch_rule import LabelRules, PatchTruth, label_segments
from trainkit.core.segments import clip_params
from trainkit.core.taxonomy import ClassSet

__all__ = [
    "SIMPLIFY_PX",
    "WIDTH_STRETCH_PX",
    "DrawnCracks",
    "PatchMeasure",
    "cracks_from_mask",
    "cracks_from_polylines",
    "measure_patch",
    "simplify_polyline",
]

#: Largest distance (px) of a skeleton pixel from the simplified centreline.
SIMPLIFY_PX = 1.0
#: Longest stretch of centreline (px) one width is measured over.
WIDTH_STRETCH_PX = 16.0
#: Halo of a crack of unknown width: as if it were 1 px wide (half of it + 1 px).
_UNKNOWN_HALO = 1.5
_DEFAULT_RULES = LabelRules()


@dataclass(frozen=True)
class DrawnCracks:
    """One photo's crack centreline as segments, with widths.

    Attributes:
        p0: (N, 2) segment starts (x, y), continuous pixel coordinates of the photo.
        p1: (N, 2) segment ends.
        w0: (N,) crack width in pixels at each start; NaN where the drawing gives none.
        w1: (N,) crack width at each end.
        halo: (N,) reach of the crack beyond its centreline (the rule's halo): half the
            crack's widest width + 1 px, as the generator's truth uses.
    """

    p0: np.ndarray
    p1: np.ndarray
    w0: np.ndarray
    w1: np.ndarray
    halo: np.ndarray

    @classmethod
    def empty(cls) -> DrawnCracks:
        z = np.zeros((0, 2))
        return cls(z, z, np.zeros(0), np.zeros(0), np.zeros(0))

    def __len__(self) -> int:
        return len(self.p0)

    def length_px(self) -> float:
        """Total centreline length in pixels."""
        return float(np.sum(np.hypot(*(self.p1 - self.p0).T)))

    def near(self, box: Sequence[float]) -> DrawnCracks:
        """The segments whose bounding box meets ``box`` grown by their halo (the only
        ones the rule or the measures of that box can see)."""
        x0, y0, x1, y1 = (float(v) for v in box)
        lo = np.minimum(self.p0, self.p1) - self.halo[:, None]
        hi = np.maximum(self.p0, self.p1) + self.halo[:, None]
        keep = (hi[:, 0] >= x0) & (lo[:, 0] <= x1) & (hi[:, 1] >= y0) & (lo[:, 1] <= y1)
        return DrawnCracks(
            self.p0[keep], self.p1[keep], self.w0[keep], self.w1[keep], self.halo[keep]
        )


@dataclass(frozen=True)
class PatchMeasure:
    """What a drawing says of one patch: the rule's label and the crack's measures.

    Attributes:
        truth: the rule's result (label index or None if ambiguous, status, reason,
            centreline length in the patch, dominant angle, coherence).
        width_px: length-weighted mean crack width along the centreline in the patch;
            None without crack or without widths.
        width_max_px: the widest stretch of centreline in the patch; None likewise.
        boundary_deg: distance of the dominant angle to the nearest class boundary when
            the crack is oriented (coherence at or above the rule's threshold and a class
            set with oriented classes); None otherwise.
    """

    truth: PatchTruth
    width_px: float | None
    width_max_px: float | None
    boundary_deg: float | None


# ----- polylines -------------------------------------------------------------------------


def cracks_from_polylines(
    polylines: Sequence[tuple[np.ndarray, np.ndarray | None]],
) -> DrawnCracks:
    """Segments of traced polylines, each ``(points (K, 2) x/y, widths (K,) or None)``.

    Widths are per vertex in pixels (None: not given). A polyline needs two points; a
    zero-length one still counts (as a speck, through its halo)."""
    p0s, p1s, w0s, w1s, halos = [], [], [], [], []
    for pts, wid in polylines:
        pts = np.asarray(pts, float).reshape(-1, 2)
        if len(pts) < 2:
            raise ValueError(f"a polyline needs at least 2 points, got {len(pts)}")
        w = np.full(len(pts), np.nan) if wid is None else np.asarray(wid, float).reshape(-1)
        if w.shape != (len(pts),):
            raise ValueError(f"expected {len(pts)} widths, got {w.shape}")
        p0s.append(pts[:-1])
        p1s.append(pts[1:])
        w0s.append(w[:-1])
        w1s.append(w[1:])
        widest = float(np.nanmax(w)) if np.any(np.isfinite(w)) else None
        halos.append(np.full(len(pts) - 1, _UNKNOWN_HALO if widest is None else widest / 2 + 1))
    if not p0s:
        return DrawnCracks.empty()
    return DrawnCracks(*(np.concatenate(a) for a in (p0s, p1s, w0s, w1s, halos)))


# ----- masks -----------------------------------------------------------------------------


def cracks_from_mask(mask: np.ndarray) -> DrawnCracks:
    """Centreline segments with widths from a crack mask (see the module docstring).

    Args:
        mask: (H, W) array; non-zero = crack.
    """
    m = np.asarray(mask) != 0
    if m.ndim != 2:
        raise ValueError(f"expected a 2-D mask, got shape {m.shape}")
    rows = np.flatnonzero(m.any(axis=1))
    if not len(rows):
        return DrawnCracks.empty()
    cols = np.flatnonzero(m.any(axis=0))
    r0, r1 = int(rows[0]), int(rows[-1]) + 1
    c0, c1 = int(cols[0]), int(cols[-1]) + 1
    # one pixel of background around the cracks' bounding box: thinning sees the edge
    sub = np.zeros((r1 - r0 + 2, c1 - c0 + 2), bool)
    sub[1:-1, 1:-1] = m[r0:r1, c0:c1]
    out = _cracks_from_submask(sub)
    offset = np.array([c0 - 1.0, r0 - 1.0])
    return DrawnCracks(out.p0 + offset, out.p1 + offset, out.w0, out.w1, out.halo)


def _cracks_from_submask(m: np.ndarray) -> DrawnCracks:
    from skimage.morphology import skeletonize

    skel = skeletonize(m)
    graph = _SkeletonGraph(skel)
    spurs = graph.spurs(m)
    if spurs:
        skel[tuple(np.array(spurs).T)] = False
        graph = _SkeletonGraph(skel)
    rc = graph.rc  # (M, 2) skeleton pixels, row and column
    chains = graph.chains()
    area = _pixels_per_skeleton_pixel(m, rc, _chain_ends(graph, chains))
    claimed = np.zeros(len(rc), bool)
    p0s: list[np.ndarray] = []
    p1s: list[np.ndarray] = []
    ws: list[np.ndarray] = []
    halos: list[np.ndarray] = []
    for chain in chains:
        xy = rc[chain][:, ::-1] + 0.5  # pixel centres, x then y
        if len(chain) == 1:  # a speck: one pixel of skeleton
            a = float(area[chain[0]]) if not claimed[chain[0]] else 1.0
            claimed[chain[0]] = True
            w = 2.0 * np.sqrt(max(a, 1.0) / np.pi)  # the diameter of a disc of its area
            # a cross of two half-pixel segments: 1 px of crack with no direction (0 and 90
            # degrees cancel in the doubled-angle mean), so specks do not tilt a patch's angle
            p0s.append(xy + [[-0.25, 0.0], [0.0, -0.25]])
            p1s.append(xy + [[0.25, 0.0], [0.0, 0.25]])
            ws.append(np.array([w, w]))
            halos.append(np.array([w / 2.0 + 1.0] * 2))
            continue
        a0, a1, w = _chain_segments(xy, chain, area, claimed)
        p0s.append(a0)
        p1s.append(a1)
        ws.append(w)
        halos.append(np.full(len(w), float(w.max()) / 2.0 + 1.0))
    if not p0s:
        return DrawnCracks.empty()
    w = np.concatenate(ws)
    return DrawnCracks(np.concatenate(p0s), np.concatenate(p1s), w, w, np.concatenate(halos))


def _chain_ends(graph: _SkeletonGraph, chains: list[list[int]]) -> dict[int, np.ndarray]:
    """Skeleton end pixel -> the unit direction (row, col) in which its chain leaves it."""
    out: dict[int, np.ndarray] = {}
    for chain in chains:
        if len(chain) < 2:
            continue
        for end, inner in ((chain[0], chain[min(4, len(chain) - 1)]),
                           (chain[-1], chain[max(0, len(chain) - 5)])):  # fmt: skip
            if graph.degree(end) == 1:
                d = (graph.rc[end] - graph.rc[inner]).astype(float)
                out[end] = d / max(float(np.hypot(*d)), 1e-9)
    return out


def _pixels_per_skeleton_pixel(
    mask: np.ndarray, rc: np.ndarray, ends: dict[int, np.ndarray]
) -> np.ndarray:
    """How many crack pixels have each skeleton pixel as their nearest (ties to one),
    leaving out the cap beyond a crack's end (pixels more than half a pixel past an end
    pixel, along its chain): the crack is measured across, not along."""
    from scipy.spatial import cKDTree

    if not len(rc):
        return np.zeros(0)
    crack = np.argwhere(mask)
    _, nearest = cKDTree(rc).query(crack, k=1)
    area = np.bincount(nearest, minlength=len(rc)).astype(float)
    if ends:
        order = np.argsort(nearest, kind="stable")
        bounds = np.searchsorted(nearest[order], [[e, e + 1] for e in ends])
        for (e, u), (lo, hi) in zip(ends.items(), bounds, strict=True):
            past = (crack[order[lo:hi]] - rc[e]) @ u > 0.5
            area[e] -= float(np.count_nonzero(past))
    return area


def _chain_segments(
    xy: np.ndarray, chain: list[int], area: np.ndarray, claimed: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A chain of skeleton pixels as simplified segments, cut into equal stretches of at
    most WIDTH_STRETCH_PX along it; each segment has its stretch's width: the crack pixels
    of the stretch's skeleton pixels over the stretch's length."""
    keep = np.asarray(simplify_polyline(xy, SIMPLIFY_PX))
    verts = xy[keep]
    cum = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(verts, axis=0).T))])
    total = float(cum[-1])
    n = max(1, int(np.ceil(total / WIDTH_STRETCH_PX)))
    stretch = total / n
    # where each skeleton pixel lies along the simplified chain, and so its stretch
    k = np.arange(len(chain))
    m = np.clip(np.searchsorted(keep, k, side="right") - 1, 0, len(keep) - 2)
    frac = (k - keep[m]) / (keep[m + 1] - keep[m])
    along = cum[m] + frac * (cum[m + 1] - cum[m])
    piece = np.minimum((along / stretch).astype(int), n - 1) if stretch > 0 else np.zeros_like(k)
    idx = np.asarray(chain)
    own = ~claimed[idx]
    claimed[idx] = True
    widths = np.bincount(piece[own], weights=area[idx[own]], minlength=n) / max(stretch, 1e-9)
    starts, ends, seg_w = [], [], []
    edges = stretch * np.arange(1, n)
    for i in range(len(verts) - 1):
        s0, s1 = cum[i], cum[i + 1]
        if s1 <= s0:
            continue
        cuts = [s0, *edges[(edges > s0) & (edges < s1)], s1]
        for a, b in zip(cuts[:-1], cuts[1:], strict=True):
            pa = verts[i] + (verts[i + 1] - verts[i]) * ((a - s0) / (s1 - s0))
            pb = verts[i] + (verts[i + 1] - verts[i]) * ((b - s0) / (s1 - s0))
            starts.append(pa)
            ends.append(pb)
            seg_w.append(widths[min(int((a + b) / 2.0 / stretch), n - 1)])
    return np.array(starts), np.array(ends), np.array(seg_w)


def simplify_polyline(points: np.ndarray, tolerance: float) -> list[int]:
    """Indices of the vertices Ramer-Douglas-Peucker keeps: every point lies within
    ``tolerance`` of the kept polyline (first and last always kept)."""
    pts = np.asarray(points, float)
    n = len(pts)
    if n <= 2:
        return list(range(n))
    keep = np.zeros(n, bool)
    keep[0] = keep[-1] = True
    stack = [(0, n - 1)]
    while stack:
        i, j = stack.pop()
        if j <= i + 1:
            continue
        a, b = pts[i], pts[j]
        d = b - a
        norm = float(np.hypot(*d))
        rel = pts[i + 1 : j] - a
        if norm == 0.0:
            dist = np.hypot(rel[:, 0], rel[:, 1])
        else:
            dist = np.abs(rel[:, 0] * d[1] - rel[:, 1] * d[0]) / norm
        k = int(np.argmax(dist))
        if dist[k] > tolerance:
            m = i + 1 + k
            keep[m] = True
            stack.append((i, m))
            stack.append((m, j))
    return [int(i) for i in np.flatnonzero(keep)]


#: The 8 neighbour offsets (row, column), straight ones first.
_STRAIGHT = ((0, 1), (1, 0), (0, -1), (-1, 0))
_DIAGONAL = ((1, 1), (1, -1), (-1, 1), (-1, -1))


class _SkeletonGraph:
    """A skeleton's pixels and links: 8-neighbours, minus the diagonal links that two
    straight links through a skeleton pixel already make."""

    def __init__(self, skel: np.ndarray) -> None:
        self.rc = np.argwhere(skel)
        h, w = skel.shape
        index = np.full((h + 2, w + 2), -1, np.int64)  # padded: neighbours never wrap
        index[self.rc[:, 0] + 1, self.rc[:, 1] + 1] = np.arange(len(self.rc))
        self._index = index
        r, c = self.rc[:, 0] + 1, self.rc[:, 1] + 1
        nbrs: list[list[int]] = [[] for _ in range(len(self.rc))]
        for dr, dc in _STRAIGHT + _DIAGONAL:
            other = index[r + dr, c + dc]
            ok = other >= 0
            if dr and dc:  # a diagonal link only where no straight two-step path exists
                ok &= (index[r + dr, c] < 0) & (index[r, c + dc] < 0)
            for a, b in zip(np.flatnonzero(ok), other[ok], strict=True):
                nbrs[a].append(int(b))
        self.nbrs = nbrs

    def degree(self, i: int) -> int:
        return len(self.nbrs[i])

    def chains(self) -> list[list[int]]:
        """Every pixel path between ends and junctions (junctions shared by their chains),
        closed loops, and lone pixels; each link walked once."""
        seen: set[tuple[int, int]] = set()
        out: list[list[int]] = []
        nodes = [i for i in range(len(self.nbrs)) if self.degree(i) != 2]
        for n in nodes:
            if not self.nbrs[n]:
                out.append([n])
                continue
            for m in self.nbrs[n]:
                if (n, m) not in seen:
                    out.append(self._walk(n, m, seen))
        for i in range(len(self.nbrs)):  # loops: degree-2 pixels not reached from a node
            for m in self.nbrs[i]:
                if (i, m) not in seen:
                    out.append(self._walk(i, m, seen))
        return out

    def _walk(self, start: int, nxt: int, seen: set[tuple[int, int]]) -> list[int]:
        path = [start]
        prev, cur = start, nxt
        seen.add((prev, cur))
        seen.add((cur, prev))
        while True:
            path.append(cur)
            if self.degree(cur) != 2 or cur == start:
                return path
            a, b = self.nbrs[cur]
            step = b if a == prev else a
            if (cur, step) in seen:  # a loop closed on itself
                return path
            seen.add((cur, step))
            seen.add((step, cur))
            prev, cur = cur, step

    def spurs(self, mask: np.ndarray) -> list[tuple[int, int]]:
        """Pixels (row, col) of end branches no longer than the crack is wide at their
        junction (twice the distance transform there): thinning's spurs."""
        from scipy import ndimage

        out: list[tuple[int, int]] = []
        for chain in self.chains():
            if len(chain) < 2:
                continue
            a, b = chain[0], chain[-1]
            ends = (self.degree(a) == 1, self.degree(b) == 1)
            joins = (self.degree(a) >= 3, self.degree(b) >= 3)
            if not ((ends[0] and joins[1]) or (ends[1] and joins[0])):
                continue
            junction = b if joins[1] else a
            r, c = self.rc[junction]
            win = 16
            ra, ca = max(0, r - win), max(0, c - win)
            local = ndimage.distance_transform_edt(
                np.pad(mask[ra : r + win + 1, ca : c + win + 1], 1)
            )
            half = float(local[r - ra + 1, c - ca + 1])
            steps = np.diff(self.rc[chain], axis=0)
            length = float(np.sum(np.hypot(steps[:, 0], steps[:, 1])))
            if length <= 2.0 * half:
                out.extend(tuple(int(v) for v in self.rc[i]) for i in chain if i != junction)
        return out


# ----- one patch -------------------------------------------------------------------------


def measure_patch(
    cracks: DrawnCracks,
    box: tuple[int, int, int, int],
    class_set: ClassSet,
    rules: LabelRules = _DEFAULT_RULES,
) -> PatchMeasure:
    """The rule's label of one patch and the crack's length and widths in it.

    Args:
        cracks: the photo's drawing (or the part :meth:`DrawnCracks.near` the box).
        box: ``(x0, y0, x1, y1)`` in photo pixels.
        class_set: the workspace's classes.
        rules: the patch label rule's thresholds.
    """
    near = cracks.near(box)
    truth = label_segments(near.p0, near.p1, near.halo, box, class_set, rules)
    width = width_max = None
    if truth.length_px > 0:
        t0, t1, hit = clip_params(near.p0, near.p1, box)
        seg = np.hypot(*(near.p1 - near.p0).T)
        inside = np.where(hit, np.clip(t1 - t0, 0.0, 1.0) * seg, 0.0)
        wa = near.w0 + t0 * (near.w1 - near.w0)  # width where the segment enters the box
        wb = near.w0 + t1 * (near.w1 - near.w0)
        known = (inside > 0) & np.isfinite(wa) & np.isfinite(wb)
        if np.any(known):
            width = float(np.sum(inside[known] * (wa[known] + wb[known]) / 2.0))
            width /= float(np.sum(inside[known]))
            width_max = float(np.max(np.maximum(wa[known], wb[known])))
    boundary = None
    if (
        truth.angle_deg is not None
        and truth.coherence is not None
        and truth.coherence >= rules.oriented_min_coherence
        and len(class_set.oriented_indices) >= 2
    ):
        boundary = float(class_set.boundary_distance(truth.angle_deg))
    return PatchMeasure(truth, width, width_max, boundary)
