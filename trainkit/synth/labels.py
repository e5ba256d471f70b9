"""Derive a patch's class label from the exact crack geometry inside it.

The rule itself is :func:`trainkit.core.patch_rule.label_segments`, shared with the import of
a firm's crack drawings; this module turns the generator's crack polylines into its segments.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from trainkit.core.patch_rule import LabelRules, PatchTruth, label_segments
from trainkit.core.taxonomy import ClassSet
from trainkit.synth.truth import Crack

__all__ = ["LabelRules", "PatchTruth", "derive_patch_label", "crack_segments"]

#: The rule's default thresholds (frozen, so safe to share).
_DEFAULT_RULES = LabelRules()


def crack_segments(cracks: Sequence[Crack]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The segments of crack polylines as the rule takes them: starts, ends and halos
    (half the crack's widest width + 1 px, for every segment of that crack)."""
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
    rules: LabelRules = _DEFAULT_RULES,
) -> PatchTruth:
    """Label one patch from exact crack geometry by the kit's patch label rule.

    The halo of each crack is half its widest width + 1 px; the rules, in order, are
    :func:`trainkit.core.patch_rule.label_segments`'s.

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
    return label_segments(*crack_segments(cracks), box, class_set, rules)
