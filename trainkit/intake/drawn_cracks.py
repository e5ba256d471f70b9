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
from functools import cached_property

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
        lo, hi = self._reach
        if len(self) > _NEAR_ALL:  # many segments: test only those in the box's cells
            idx = self._cells.candidates(x0, y0, x1, y1)
            lo, hi = lo[idx], hi[idx]
        else:
            idx = np.arange(len(self))
        hit = (hi[:, 0] >= x0) & (lo[:, 0] <= x1) & (hi[:, 1] >= y0) & (lo[:, 1] <= y1)
        keep = idx[hit]
        return DrawnCracks(
            self.p0[keep], self.p1[keep], self.w0[keep], self.w1[keep], self.halo[keep]
        )

    @cached_property
    def _reach(self) -> tuple[np.ndarray, np.ndarray]:
        """Each segment's bounding box grown by its halo: (N, 2) lows and highs."""
        grow = self.halo[:, None]
        return np.minimum(self.p0, self.p1) - grow, np.maximum(self.p0, self.p1) + grow

    @cached_property
    def _cells(self) -> _CellIndex:
        return _CellIndex(*self._reach)


#: Up to this many segments, :meth:`DrawnCracks.near` tests them all.
_NEAR_ALL = 2000
#: Side (px) of the square cells :class:`_CellIndex` files segments under.
_CELL_PX = 128.0


class _CellIndex:
    """Boxes (a photo's segments grown by their halo) filed under every square cell of
    :data:`_CELL_PX` they meet, so that a box query looks at the boxes of its cells only."""

    def __init__(self, lo: np.ndarray, hi: np.ndarray) -> None:
        c0 = np.floor(lo / _CELL_PX).astype(np.int64)
        c1 = np.floor(hi / _CELL_PX).astype(np.int64)
        self.origin = c0.min(axis=0)
        self.last = c1.max(axis=0)
        self.cols = int(self.last[0] - self.origin[0] + 1)
        c0 -= self.origin
        c1 -= self.origin
        nx, ny = c1[:, 0] - c0[:, 0] + 1, c1[:, 1] - c0[:, 1] + 1
        count = nx * ny
        box = np.repeat(np.arange(len(lo)), count)
        k = np.arange(int(count.sum())) - np.repeat(np.cumsum(count) - count, count)
        cell = (c0[box, 1] + k // nx[box]) * self.cols + c0[box, 0] + k % nx[box]
        order = np.argsort(cell, kind="stable")
        self.items = box[order]
        rows = int(self.last[1] - self.origin[1] + 1)
        self.bounds = np.searchsorted(cell[order], np.arange(rows * self.cols + 1))

    def candidates(self, x0: float, y0: float, x1: float, y1: float) -> np.ndarray:
        """Indices (ascending, unique) of every box that may meet [x0, x1] x [y0, y1]."""
        ax, ay = (
            max(int(np.floor(v / _CELL_PX)), int(o))
            for v, o in zip((x0, y0), self.origin, strict=True)
        )
        bx, by = (
            min(int(np.floor(v / _CELL_PX)), int(e))
            for v, e in zip((x1, y1), self.last, strict=True)
        )
        if ax > bx or ay > by:
            return np.zeros(0, np.int64)
        ox, oy = int(self.origin[0]), int(self.origin[1])
        parts = [
            self.items[
                self.bounds[(r - oy) * self.cols + ax - ox] : self.bounds[
                    (r - oy) * self.cols + bx - ox + 1
                ]
            ]
            for r in range(ay, by + 1)
        ]
        return np.unique(np.concatenate(parts))


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
    m = np.asarray(mask)
    if m.ndim != 2:
        raise ValueError(f"expected a 2-D mask, got shape {m.shape}")
    at = np.flatnonzero(m)  # the crack pixels, row-major: the one pass over the whole mask
    if not len(at):
        return DrawnCracks.empty()
    rows, cols = np.divmod(at, m.shape[1])
    r0, r1 = int(rows[0]), int(rows[-1]) + 1
    c0, c1 = int(cols.min()), int(cols.max()) + 1
    # one pixel of background around the cracks' bounding box: thinning sees the edge
    crack = np.stack([rows - (r0 - 1), cols - (c0 - 1)], axis=1)
    sub = np.zeros((r1 - r0 + 2, c1 - c0 + 2), bool)
    sub[crack[:, 0], crack[:, 1]] = True
    out = _cracks_from_submask(sub, crack)
    offset = np.array([c0 - 1.0, r0 - 1.0])
    return DrawnCracks(out.p0 + offset, out.p1 + offset, out.w0, out.w1, out.halo)


def _cracks_from_submask(m: np.ndarray, crack: np.ndarray) -> DrawnCracks:
    """:func:`cracks_from_mask` of a mask with a background border; ``crack`` its
    non-zero pixels (row, col), row-major."""
    from skimage.morphology import skeletonize

    skel = skeletonize(m)
    graph = _SkeletonGraph(skel, crack)
    spurs = graph.spurs(m)
    if len(spurs):
        graph = graph.without(spurs)
    rc = graph.rc  # (M, 2) skeleton pixels, row and column
    flat, off = graph.chains()
    if not len(flat):
        return DrawnCracks.empty()
    area = _pixels_per_skeleton_pixel(crack, graph, *_chain_ends(graph, flat, off))
    n_chains = len(off) - 1
    sizes = np.diff(off)
    chain_of = np.repeat(np.arange(n_chains), sizes)
    # a pixel's crack pixels count once, for the first chain that holds it (junctions)
    first = np.full(len(rc), n_chains)
    np.minimum.at(first, flat, chain_of)
    own = first[flat] == chain_of
    xy = rc[flat][:, ::-1] + 0.5  # pixel centres, x then y
    speck = sizes == 1
    parts = []  # (chain of each segment, p0, p1, width, halo)
    if np.any(speck):
        pos = off[:-1][speck]
        a = np.where(own[pos], area[flat[pos]], 1.0)
        w = 2.0 * np.sqrt(np.maximum(a, 1.0) / np.pi)  # the diameter of a disc of its area
        # a cross of two half-pixel segments: 1 px of crack with no direction (0 and 90
        # degrees cancel in the doubled-angle mean), so specks do not tilt a patch's angle
        c = xy[pos]
        p0 = np.stack([c + [-0.25, 0.0], c + [0.0, -0.25]], axis=1).reshape(-1, 2)
        p1 = np.stack([c + [0.25, 0.0], c + [0.0, 0.25]], axis=1).reshape(-1, 2)
        ww = np.repeat(w, 2)
        parts.append((np.repeat(np.flatnonzero(speck), 2), p0, p1, ww, ww / 2.0 + 1.0))
    if not np.all(speck):
        parts.append(_chain_segments(xy, off, area[flat], own, ~speck))
    if not parts:
        return DrawnCracks.empty()
    order = np.argsort(np.concatenate([q[0] for q in parts]), kind="stable")
    p0, p1, w, halo = (np.concatenate([q[i] for q in parts])[order] for i in range(1, 5))
    return DrawnCracks(p0, p1, w, w, halo)


def _chain_ends(
    graph: _SkeletonGraph, flat: np.ndarray, off: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Skeleton end pixels (degree 1) and the unit direction (row, col) in which their
    chain leaves them (taken over up to 4 pixels)."""
    sizes = np.diff(off)
    lo, hi = off[:-1][sizes >= 2], off[1:][sizes >= 2]
    n = hi - lo
    end = np.concatenate([flat[lo], flat[hi - 1]])
    inner = np.concatenate([flat[lo + np.minimum(4, n - 1)], flat[lo + np.maximum(0, n - 5)]])
    keep = graph.deg[end] == 1
    end, inner = end[keep], inner[keep]
    d = (graph.rc[end] - graph.rc[inner]).astype(float)
    u = d / np.maximum(np.hypot(d[:, 0], d[:, 1]), 1e-9)[:, None]
    return end, u


def _pixels_per_skeleton_pixel(
    crack: np.ndarray, graph: _SkeletonGraph, ends: np.ndarray, u: np.ndarray
) -> np.ndarray:
    """How many crack pixels have each skeleton pixel as their nearest (ties to one, as
    scipy's ``cKDTree`` query picks), leaving out the cap beyond a crack's end (pixels
    more than half a pixel past an end pixel ``ends``, along its chain's direction
    ``u``): the crack is measured across, not along."""
    from scipy.spatial import cKDTree

    rc = graph.rc
    if not len(rc):
        return np.zeros(0)
    lin = (crack[:, 0] + 1) * graph.width + crack[:, 1] + 1
    nearest = graph.lookup(lin).astype(np.int64)  # a skeleton pixel is its own nearest
    rest = np.flatnonzero(nearest < 0)
    # one skeleton pixel among the 4 straight neighbours (1 px away; any other is at
    # least 1.4 px away): that one is the nearest, tie-free
    nb = np.stack([graph.lookup(lin[rest] + dr * graph.width + dc) for dr, dc in _STRAIGHT])
    one = np.count_nonzero(nb >= 0, axis=0) == 1
    nearest[rest[one]] = nb.max(axis=0)[one]
    ask = rest[~one]
    if len(ask):
        nearest[ask] = cKDTree(rc).query(crack[ask], k=1)[1]
    area = np.bincount(nearest, minlength=len(rc)).astype(float)
    if len(ends):
        which = np.full(len(rc), -1)
        which[ends] = np.arange(len(ends))
        at = which[nearest]
        sel = at >= 0
        d = (crack[sel] - rc[nearest[sel]]).astype(float)
        uu = u[at[sel]]
        past = d[:, 0] * uu[:, 0] + d[:, 1] * uu[:, 1] > 0.5
        area[ends] -= np.bincount(at[sel][past], minlength=len(ends))
    return area


def _chain_segments(
    xy: np.ndarray, off: np.ndarray, area: np.ndarray, own: np.ndarray, which: np.ndarray
) -> tuple[np.ndarray, ...]:
    """Chains of skeleton pixels (``xy[off[i]:off[i+1]]`` for the chains ``which``) as
    simplified segments, each chain cut into equal stretches of at most WIDTH_STRETCH_PX
    along it; each segment has its stretch's width: the crack pixels of the stretch's
    skeleton pixels (``area``, counted where ``own``) over the stretch's length.

    Returns the chain of each segment, its ends, width and halo."""
    ids = np.flatnonzero(which)
    lo, hi = off[:-1][ids], off[1:][ids]
    sizes = hi - lo
    pos = np.repeat(lo - np.concatenate([[0], np.cumsum(sizes)[:-1]]), sizes) + np.arange(
        int(sizes.sum())
    )
    loc_off = np.concatenate([[0], np.cumsum(sizes)])
    pts, ar, mine = xy[pos], area[pos], own[pos]
    keep = _simplify_chains(pts, loc_off, SIMPLIFY_PX)  # (K,) positions kept, ascending
    chain_of_pt = np.repeat(np.arange(len(ids)), sizes)
    kc = chain_of_pt[keep]
    nk = np.bincount(kc, minlength=len(ids))
    koff = np.concatenate([[0], np.cumsum(nk)])
    verts = pts[keep]
    step = np.zeros(len(keep))
    dv = np.diff(verts, axis=0)
    step[1:] = np.hypot(dv[:, 0], dv[:, 1])
    step[koff[:-1]] = 0.0
    cum = _running_sum(step, koff)
    total = cum[koff[1:] - 1]
    n = np.maximum(1, np.ceil(total / WIDTH_STRETCH_PX).astype(int))
    stretch = total / n
    # where each skeleton pixel lies along the simplified chain, and so its stretch
    g = np.searchsorted(keep, np.arange(len(pts)), side="right") - 1
    m = np.clip(g - koff[chain_of_pt], 0, nk[chain_of_pt] - 2) + koff[chain_of_pt]
    frac = (np.arange(len(pts)) - keep[m]) / (keep[m + 1] - keep[m])
    along = cum[m] + frac * (cum[m + 1] - cum[m])
    st = stretch[chain_of_pt]
    with np.errstate(divide="ignore", invalid="ignore"):
        piece = np.where(st > 0, along / np.where(st > 0, st, 1.0), 0.0).astype(int)
    piece = np.minimum(piece, n[chain_of_pt] - 1)
    poff = np.concatenate([[0], np.cumsum(n)])
    gpiece = poff[chain_of_pt] + piece
    widths = np.bincount(gpiece[mine], weights=ar[mine], minlength=int(poff[-1]))
    widths /= np.repeat(np.maximum(stretch, 1e-9), n)
    # the simplified edges, cut at the stretches' ends
    e = np.flatnonzero(np.diff(kc) == 0)  # edge from vertex e to e + 1 of one chain
    ec = kc[e]
    s0, s1 = cum[e], cum[e + 1]
    ok = s1 > s0
    e, ec, s0, s1 = e[ok], ec[ok], s0[ok], s1[ok]
    est, en = stretch[ec], n[ec]
    jlo, jhi = _cut_range(s0, s1, est, en)
    q = np.maximum(0, jhi - jlo + 1)  # cuts inside each edge
    ns = q + 1
    es = np.repeat(np.arange(len(e)), ns)
    r = np.arange(int(ns.sum())) - np.repeat(np.cumsum(ns) - ns, ns)
    S0, S1, ST = s0[es], s1[es], est[es]
    a = np.where(r == 0, S0, ST * (jlo[es] + r - 1))
    b = np.where(r == q[es], S1, ST * (jlo[es] + r))
    v0, v1 = verts[e][es], verts[e + 1][es]
    span = v1 - v0
    pa = v0 + span * ((a - S0) / (S1 - S0))[:, None]
    pb = v0 + span * ((b - S0) / (S1 - S0))[:, None]
    sc = ec[es]
    wi = np.minimum((((a + b) / 2.0) / ST).astype(int), en[es] - 1)
    seg_w = widths[poff[sc] + wi]
    # halo: half the chain's widest stretch + 1 px
    starts = np.flatnonzero(np.concatenate([[True], sc[1:] != sc[:-1]])) if len(sc) else sc
    widest = np.maximum.reduceat(seg_w, starts) if len(sc) else seg_w
    halo = np.repeat(widest / 2.0 + 1.0, np.diff(np.concatenate([starts, [len(sc)]])))
    return ids[sc], pa, pb, seg_w, halo


def _running_sum(values: np.ndarray, off: np.ndarray) -> np.ndarray:
    """Each group ``values[off[i]:off[i+1]]`` summed up in order from its first value (as
    ``np.cumsum`` of the group would, to the bit): one numpy step per rank in the group."""
    out = values.copy()
    sizes = np.diff(off)
    if not len(values):
        return out
    order = np.argsort(-sizes, kind="stable")  # longest groups first
    srt = sizes[order]
    base = off[:-1][order]
    for k in range(1, int(srt[0])):
        live = base[: int(np.searchsorted(-srt, -k, side="left"))]
        at = live + k
        out[at] = out[at - 1] + values[at]
    return out


def _cut_range(
    s0: np.ndarray, s1: np.ndarray, stretch: np.ndarray, n: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The first and last j in 1..n-1 with s0 < stretch * j < s1 (as the products are
    computed: an estimate by division, settled on the products themselves)."""
    safe = np.where(stretch > 0, stretch, 1.0)
    jlo = np.floor(s0 / safe).astype(int) + 1
    for _ in range(2):
        jlo = np.where((jlo > 1) & (stretch * (jlo - 1) > s0), jlo - 1, jlo)
    for _ in range(2):
        jlo = np.where(stretch * jlo <= s0, jlo + 1, jlo)
    jhi = np.ceil(s1 / safe).astype(int) - 1
    for _ in range(2):
        jhi = np.where(stretch * jhi >= s1, jhi - 1, jhi)
    for _ in range(2):
        jhi = np.where(stretch * (jhi + 1) < s1, jhi + 1, jhi)
    jlo = np.maximum(jlo, 1)
    jhi = np.minimum(jhi, n - 1)
    jhi = np.where(stretch > 0, jhi, 0)
    return jlo, jhi


def _simplify_chains(pts: np.ndarray, off: np.ndarray, tolerance: float) -> np.ndarray:
    """:func:`simplify_polyline` of every chain ``pts[off[i]:off[i+1]]`` at once (one numpy
    pass per level of the recursion): the positions kept, ascending."""
    keep = np.zeros(len(pts), bool)
    keep[off[:-1]] = True
    keep[off[1:] - 1] = True
    i, j = off[:-1].copy(), off[1:] - 1
    while True:
        more = j > i + 1
        i, j = i[more], j[more]
        if not len(i):
            break
        cnt = j - i - 1
        seg = np.repeat(np.arange(len(i)), cnt)
        gstart = np.cumsum(cnt) - cnt
        p = np.repeat(i + 1 - gstart, cnt) + np.arange(int(cnt.sum()))
        a = pts[i]
        d = pts[j] - a
        norm = np.hypot(d[:, 0], d[:, 1])
        rel = pts[p] - a[seg]
        ds, ns = d[seg], norm[seg]
        with np.errstate(divide="ignore", invalid="ignore"):
            dist = np.where(
                ns == 0.0,
                np.hypot(rel[:, 0], rel[:, 1]),
                np.abs(rel[:, 0] * ds[:, 1] - rel[:, 1] * ds[:, 0]) / ns,
            )
        top = np.maximum.reduceat(dist, gstart)
        hit = np.flatnonzero(dist == top[seg])
        firsts = hit[np.concatenate([[True], seg[hit[1:]] != seg[hit[:-1]]])]
        split = top > tolerance
        mid = p[firsts][split]
        keep[mid] = True
        i, j = np.concatenate([i[split], mid]), np.concatenate([mid, j[split]])
    return np.flatnonzero(keep)


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
_OFFSETS = _STRAIGHT + _DIAGONAL
#: Index in _OFFSETS of each offset's opposite.
_OPPOSITE = np.array([_OFFSETS.index((-dr, -dc)) for dr, dc in _OFFSETS])
#: How far (px) around a junction the crack's width is looked for when judging a spur.
_SPUR_WINDOW = 16
#: A skeleton with fewer pixels than 1 in this many of its image is numbered by sorted
#: pixel numbers rather than an index image.
_SPARSE = 64


class _SkeletonGraph:
    """A skeleton's pixels and links: 8-neighbours, minus the diagonal links that two
    straight links through a skeleton pixel already make.

    Links are held as arcs (directed links), sorted by pixel and then by neighbour
    offset (straight ones first): ``src``, ``dst``, offset ``k``; ``deg`` is each
    pixel's link count and ``ptr`` where its arcs start.
    """

    def __init__(self, skel: np.ndarray, within: np.ndarray | None = None) -> None:
        """``within``: pixels (row, col), row-major, that hold every skeleton pixel (the
        crack's); saves a pass over the whole image."""
        skel = np.asarray(skel, bool)
        h, w = skel.shape
        #: row length of the padded image the pixels are numbered in (neighbours never wrap)
        self.width = w + 2
        rc = np.argwhere(skel) if within is None else within[skel[within[:, 0], within[:, 1]]]
        #: each padded pixel's skeleton pixel index, -1 off the skeleton; None where the
        #: skeleton is sparse (then looked up in the sorted pixel numbers)
        self.index = None
        if len(rc) * _SPARSE > (h + 2) * self.width:
            self.index = np.full((h + 2) * self.width, -1, np.int64 if h * w >= 2**31 else np.int32)
        self._link(rc)

    def lookup(self, lin: np.ndarray) -> np.ndarray:
        """The skeleton pixel index of padded pixel numbers ``lin``; -1 off the skeleton."""
        if self.index is not None:
            return self.index[lin]
        at = np.minimum(np.searchsorted(self.lin, lin), max(len(self.lin) - 1, 0))
        if not len(self.lin):
            return np.full(len(lin), -1)
        return np.where(self.lin[at] == lin, at, -1)

    def without(self, rc: np.ndarray) -> _SkeletonGraph:
        """The graph of this skeleton less the pixels ``rc`` (row, col); takes over this
        graph's index image (this graph is not to be used after)."""
        g = object.__new__(_SkeletonGraph)
        g.width, g.index = self.width, self.index
        lin = (rc[:, 0] + 1) * self.width + rc[:, 1] + 1
        keep = np.ones(len(self.rc), bool)
        keep[self.lookup(lin)] = False
        if g.index is not None:
            g.index[lin] = -1
        g._link(self.rc[keep])
        return g

    def _link(self, rc: np.ndarray) -> None:
        self.rc = rc
        n, width = len(rc), self.width
        self.lin = lin = (rc[:, 0] + 1) * width + rc[:, 1] + 1  # ascending
        if self.index is not None:
            self.index[lin] = np.arange(n)
        nb = np.empty((n, 8), np.int64)
        for k, (dr, dc) in enumerate(_OFFSETS):
            nb[:, k] = self.lookup(lin + (dr * width + dc))
        ok = nb >= 0
        for k, (dr, dc) in enumerate(_DIAGONAL, start=len(_STRAIGHT)):
            # a diagonal link only where no straight two-step path exists
            ok[:, k] &= ~ok[:, _OFFSETS.index((dr, 0))] & ~ok[:, _OFFSETS.index((0, dc))]
        self.src, self.k = np.nonzero(ok)  # row-major: by pixel, then by offset
        self.dst = nb[ok].astype(np.int64)
        self._arc_at = np.cumsum(ok.ravel()) - 1  # arc id of (pixel, offset) where linked
        self.deg = np.count_nonzero(ok, axis=1)
        self.ptr = np.concatenate([[0], np.cumsum(self.deg)])

    def chains(self) -> tuple[np.ndarray, np.ndarray]:
        """Every pixel path between ends and junctions (junctions shared by their chains),
        closed loops, and lone pixels, each link in one chain, as pixel indices ``flat``
        with chain ``i`` at ``flat[off[i]:off[i+1]]``.

        The order is that of a walk over the pixels (row-major): from each end or
        junction, along each of its links not yet walked (in neighbour order), to the
        next end or junction; then each closed loop of the rest from its first pixel
        (listed at both ends) along its first link."""
        n, na = len(self.rc), len(self.src)
        deg, src, dst = self.deg, self.src, self.dst
        node = deg != 2
        # the arc after u->v (v of degree 2): v's other arc
        first = self.ptr[dst]
        succ = np.where(node[dst], -1, np.where(dst[first] != src, first, first + 1))
        # from every arc leaving an end or junction along degree-2 pixels to the next one
        starts = np.flatnonzero(node[src])
        reached = node.copy()
        last, steps = _follow(succ, dst, starts, mark=reached)
        back = self._arc_at[dst[last] * 8 + _OPPOSITE[self.k[last]]]
        keep = starts < back  # each chain walked from its first end, by its first link
        starts, steps = starts[keep], steps[keep]
        # closed loops of degree-2 pixels: from each one's first pixel along its first link
        loop_pix = loop_steps = np.zeros(0, np.int64)
        if not reached.all():
            arcs = np.flatnonzero(~reached[src])
            low = np.full(na, n)
            low[arcs] = src[arcs]
            hop = np.arange(na)
            hop[arcs] = succ[arcs]
            for _ in range(len(arcs).bit_length() + 1):  # each loop's smallest pixel
                low[arcs] = np.minimum(low[arcs], low[hop[arcs]])
                hop[arcs] = hop[hop[arcs]]
            loop_pix, count = np.unique(low[arcs], return_counts=True)
            loop_steps = count // 2  # each link is two arcs
            succ = succ.copy()
            succ[arcs[dst[arcs] == low[arcs]]] = -1  # a loop ends back at its first pixel
        lone = np.flatnonzero(deg == 0)
        # the walk's order: arcs by (pixel, offset), a lone pixel in its place, loops last
        key = np.concatenate([2 * starts + 1, 2 * self.ptr[lone], 4 * na + 4 + loop_pix])
        size = np.concatenate([steps + 1, np.ones(len(lone), np.int64), loop_steps + 1])
        order = np.argsort(key, kind="stable")
        off = np.concatenate([[0], np.cumsum(size[order])])
        at = np.empty(len(order), np.int64)
        at[order] = off[:-1]
        flat = np.empty(int(off[-1]), np.int64)
        ns, nl = len(starts), len(lone)
        flat[at[ns : ns + nl]] = lone
        walk = np.concatenate([starts, self.ptr[loop_pix]])
        base = np.concatenate([at[:ns], at[ns + nl :]])
        flat[base] = src[walk]
        _follow(succ, dst, walk, flat=flat, base=base)
        return flat, off

    def spurs(self, mask: np.ndarray) -> np.ndarray:
        """Pixels (row, col) of end branches no longer than the crack is wide at their
        junction (twice the Euclidean distance to the background there, looked for
        within :data:`_SPUR_WINDOW` px): thinning's spurs."""
        flat, off = self.chains()
        lo, hi = off[:-1], off[1:]
        a, b = flat[lo], flat[hi - 1]
        deg = self.deg
        ends0, ends1 = deg[a] == 1, deg[b] == 1
        joins0, joins1 = deg[a] >= 3, deg[b] >= 3
        cand = (hi - lo >= 2) & ((ends0 & joins1) | (ends1 & joins0))
        if not np.any(cand):
            return np.zeros((0, 2), int)
        ids = np.flatnonzero(cand)
        junction = np.where(joins1[ids], b[ids], a[ids])
        half = _half_width_at(mask, self.rc[junction])
        steps = np.diff(self.rc[flat], axis=0)
        step = np.hypot(steps[:, 0], steps[:, 1])
        # chain i's steps are step[lo[i]:hi[i]-1]
        length = _group_sums(step, lo[ids], hi[ids] - 1)
        spur = length <= 2.0 * half
        if not np.any(spur):
            return np.zeros((0, 2), int)
        sid, sj = ids[spur], junction[spur]
        sizes = hi[sid] - lo[sid]
        at = np.repeat(lo[sid] - np.cumsum(sizes) + sizes, sizes) + np.arange(int(sizes.sum()))
        pix = flat[at]
        pix = pix[pix != np.repeat(sj, sizes)]
        return self.rc[pix]


def _group_sums(values: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``values[lo[i]:hi[i]].sum()`` of each group, as numpy sums a short array (pairwise
    summation only matters from 8 values on: those groups are summed one by one)."""
    sizes = hi - lo
    out = np.zeros(len(lo))
    short = sizes < 8
    idx = np.flatnonzero(short)
    for k in range(int(sizes[short].max()) if len(idx) else 0):
        at = idx[sizes[idx] > k]
        out[at] = out[at] + values[lo[at] + k]
    for i in np.flatnonzero(~short):
        out[i] = values[lo[i] : hi[i]].sum()
    return out


def _half_width_at(mask: np.ndarray, rc: np.ndarray) -> np.ndarray:
    """The Euclidean distance from each pixel ``rc`` to the nearest background pixel
    within :data:`_SPUR_WINDOW` px (rows and columns) of it, the window's outside
    counting as background."""
    w = _SPUR_WINDOW
    side = 2 * w + 3
    h, wd = mask.shape
    out = np.empty(len(rc))
    off = np.arange(side) - (w + 1)
    d2 = off[:, None] ** 2 + off[None, :] ** 2
    ring = np.zeros((side, side), bool)
    ring[1:-1, 1:-1] = True
    for s in range(0, len(rc), 512):
        r = rc[s : s + 512, 0, None] + off  # (k, side) rows and columns of each window
        c = rc[s : s + 512, 1, None] + off
        win = mask[np.clip(r, 0, h - 1)[:, :, None], np.clip(c, 0, wd - 1)[:, None, :]]
        win &= ((r >= 0) & (r < h))[:, :, None] & ((c >= 0) & (c < wd))[:, None, :]
        win &= ring
        out[s : s + 512] = np.sqrt(np.where(win, np.iinfo(np.int64).max, d2).min(axis=(1, 2)))
    return out


def _follow(
    succ: np.ndarray,
    dst: np.ndarray,
    starts: np.ndarray,
    *,
    mark: np.ndarray | None = None,
    flat: np.ndarray | None = None,
    base: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Walk the arcs from each of ``starts`` along ``succ`` (-1: stop) all at once: the
    last arc of each walk and its number of arcs. Marks each arc's ``dst`` pixel in
    ``mark``, and writes it to ``flat[base + 1 + step]``, when given."""
    cur = starts.copy()
    steps = np.ones(len(starts), np.int64)
    pos = None if base is None else base + 1
    alive = np.arange(len(starts))
    while len(alive) > 16:
        c = cur[alive]
        d = dst[c]
        if mark is not None:
            mark[d] = True
        if flat is not None:
            flat[pos[alive]] = d
            pos[alive] += 1
        s = succ[c]
        go = s >= 0
        alive = alive[go]
        cur[alive] = s[go]
        steps[alive] += 1
    for i in alive.tolist():  # the last few long walks, one step at a time
        a = int(cur[i])
        p = None if pos is None else int(pos[i])
        while True:
            d = int(dst[a])
            if mark is not None:
                mark[d] = True
            if flat is not None:
                flat[p] = d
                p += 1
            s = int(succ[a])
            if s < 0:
                break
            a = s
            steps[i] += 1
        cur[i] = a
    return cur, steps


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
