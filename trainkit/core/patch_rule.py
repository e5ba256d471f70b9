"""The patch label rule: crack centreline segments in and around a box to a class label.

One rule for every source of exact crack geometry: the generator's truth
(:func:`trainkit.synth.labels.derive_patch_label`) and a firm's own crack drawings, masks
and traced centrelines (:mod:`trainkit.labels.drawings`). numpy only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from trainkit.core.segments import clipped_lengths, screen_angle_deg
from trainkit.core.taxonomy import ClassSet

__all__ = ["LabelRules", "PatchTruth", "label_segments"]


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


def label_segments(
    p0: np.ndarray,
    p1: np.ndarray,
    halo: np.ndarray,
    box: tuple[int, int, int, int],
    class_set: ClassSet,
    rules: LabelRules = LabelRules(),
) -> PatchTruth:
    """Label one patch from crack centreline segments.

    Every segment is clipped to the box with Liang-Barsky. Rules, in order:

    1. No centreline in the box nor within a segment's ``halo`` outside it -> class 0,
       clear, "no crack".
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
        p0: (N, 2) segment starts (x, y), continuous pixel coordinates.
        p1: (N, 2) segment ends.
        halo: (N,) reach of each segment's crack beyond its centreline in pixels (the
            generator uses half the crack's widest width + 1 px).
        box: ``(x0, y0, x1, y1)`` pixel bounds, x1/y1 exclusive.
        class_set: the class set whose index to return.
        rules: labelling thresholds.

    Returns:
        The patch label, its status, reason, length, dominant angle and coherence.
    """
    if len(box) != 4:
        raise ValueError(f"label_segments: expected box (x0, y0, x1, y1), got {box!r}")
    x0, y0, x1, y1 = (float(v) for v in box)
    if not (x1 > x0 and y1 > y0):
        raise ValueError(f"label_segments: expected x1 > x0 and y1 > y0, got {box!r}")
    side = min(x1 - x0, y1 - y0)
    p0 = np.asarray(p0, float).reshape(-1, 2)
    p1 = np.asarray(p1, float).reshape(-1, 2)
    halo = np.asarray(halo, float).reshape(-1)
    if not (len(p0) == len(p1) == len(halo)):
        raise ValueError(
            f"label_segments: expected as many starts, ends and halos, got "
            f"{len(p0)}, {len(p1)} and {len(halo)}"
        )
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

    dbl = np.radians(2.0 * screen_angle_deg(*(p1 - p0).T))
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
