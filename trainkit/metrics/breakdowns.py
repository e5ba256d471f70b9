"""Breakdowns of screening figures by photo, structure group and scale band."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from trainkit.metrics._checks import _as_1d, _as_bool, _check_n_bins, _ratio, _same_length
from trainkit.metrics.classification import recall_interval


def scale_bands(patch_mm: ArrayLike, *, n_bands: int = 3) -> tuple[list[str], list[str]]:
    """Assign each patch to an equal-count band of its physical width in mm.

    Edges are the ``i / n_bands`` quantiles of the known widths (repeated edges merged);
    bands are ``(lo, hi]`` except the first, which includes its lower edge. Patches
    without a scale (nan) get the band ``"unknown"``.

    Args:
        patch_mm: surface width of each patch in mm, nan where unknown, shape (n,).
        n_bands: number of bands wanted (fewer when widths repeat).

    Returns:
        (band label per patch, band labels in increasing order of width, then
        "unknown" if any patch has no scale).

    Raises:
        ValueError: on negative widths or n_bands < 1.
    """
    mm = _as_1d(patch_mm, "patch_mm").astype(float)
    nb = _check_n_bins(n_bands)
    known = np.isfinite(mm)
    if (mm[known] <= 0).any():
        raise ValueError(f"expected patch widths > 0 mm, got {mm[known & (mm <= 0)][:5].tolist()}")
    out = np.full(mm.size, "unknown", dtype=object)
    order: list[str] = []
    if known.any():
        edges = np.unique(np.quantile(mm[known], np.arange(nb + 1) / nb))
        if edges.size == 1:
            edges = np.array([edges[0], edges[0]])
        labels = [f"{edges[i]:.1f}-{edges[i + 1]:.1f} mm" for i in range(edges.size - 1)]
        idx = np.clip(np.searchsorted(edges, mm[known], side="left") - 1, 0, len(labels) - 1)
        out[known] = [labels[i] for i in idx]
        order = [lab for lab in labels if lab in set(out[known])]
    if (~known).any():
        order.append("unknown")
    return [str(v) for v in out], order


def breakdown(
    keys: Sequence[str],
    is_crack: ArrayLike,
    flagged: ArrayLike,
    correct: ArrayLike,
    *,
    order: Sequence[str] | None = None,
    confidence: float = 0.95,
    method: str = "wilson",
) -> list[dict[str, Any]]:
    """Screening recall (with interval), false alarms and accuracy for each value of a key.

    Args:
        keys: the group of each patch (photo, site, scale band), shape (n,).
        is_crack: whether each patch truly shows a crack, shape (n,).
        flagged: whether the screener flagged each patch, shape (n,).
        correct: whether the predicted class was right, shape (n,).
        order: row order (default: sorted keys); every key must be listed.
        confidence: level of the recall intervals.
        method: interval method, see :func:`recall_interval`.

    Returns:
        One dict per key with key, patches, cracks, cracks_found, recall, recall_ci_low,
        recall_ci_high (nan when the group has no cracks), clean, false_alarms,
        false_alarm_rate (nan without clean patches) and accuracy.

    Raises:
        ValueError: on mismatched lengths, non-binary flags or keys missing from ``order``.
    """
    k = np.asarray([str(v) for v in keys], dtype=object)
    crack = _as_bool(is_crack, "is_crack")
    flag = _as_bool(flagged, "flagged")
    corr = _as_bool(correct, "correct")
    for arr, name in ((crack, "is_crack"), (flag, "flagged"), (corr, "correct")):
        _same_length(k, arr, "keys", name)
    present = sorted(set(k.tolist()))
    rows_order = list(order) if order is not None else present
    missing = sorted(set(present) - set(rows_order))
    if missing:
        raise ValueError(f"expected every key in order, got keys missing from it: {missing[:10]}")
    out = []
    for key in rows_order:
        m = k == key
        if not m.any():
            continue
        n_crack = int((m & crack).sum())
        found = int((m & crack & flag).sum())
        clean = int((m & ~crack).sum())
        fa = int((m & ~crack & flag).sum())
        iv = recall_interval(found, n_crack, confidence=confidence, method=method)
        out.append(
            {
                "key": key,
                "patches": int(m.sum()),
                "cracks": n_crack,
                "cracks_found": found,
                "recall": _ratio(found, n_crack),
                "recall_ci_low": iv.low,
                "recall_ci_high": iv.high,
                "clean": clean,
                "false_alarms": fa,
                "false_alarm_rate": _ratio(fa, clean),
                "accuracy": float(corr[m].mean()),
            }
        )
    return out
