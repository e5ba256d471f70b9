"""Paired comparison of two models on the same patches: McNemar's tests and the disagreements."""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from trainkit import metrics as M
from trainkit.core.errors import TrainkitError
from trainkit.core.fsutil import atomic_path
from trainkit.core.textsafe import csv_cell
from trainkit.judging.scoring import Scored

__all__ = ["Side", "ComparisonError", "paired_comparison", "write_disagreements"]

DISAGREEMENTS_COLUMNS = (
    "patch_id", "photo", "group", "true", "predicted_a", "predicted_b",
    "screening_probability_a", "screening_probability_b", "flagged_a", "flagged_b",
    "screening_right",
)  # fmt: skip


class ComparisonError(TrainkitError):
    """Two runs that cannot be compared patch by patch; the message says why."""


@dataclass
class Side:
    """One model of a comparison: its name, its predictions and its own threshold."""

    name: str
    scored: Scored
    keys: list[tuple[str, tuple[int, int, int, int]]]
    threshold: float
    threshold_source: str


def paired_comparison(a: Side, b: Side) -> tuple[dict, dict]:
    """Compare ``b`` with ``a`` on the same patches (matched by photo and box).

    Returns:
        The ``comparison`` block of metrics.json (without ``disagreements_csv``) and the
        arrays behind it (``order`` of b's patches in a's order, disagreement ``index``
        most telling first, screening probabilities ``pa``/``pb``, flags ``fa``/``fb``,
        classes ``ca``/``cb``).

    Raises:
        ComparisonError: the evaluated patches or their labels differ.
    """
    ka = dict(zip(a.keys, a.scored.labels.tolist(), strict=True))
    kb = dict(zip(b.keys, b.scored.labels.tolist(), strict=True))
    only_a, only_b = set(ka) - set(kb), set(kb) - set(ka)
    relabelled = [k for k in set(ka) & set(kb) if ka[k] != kb[k]]
    if only_a or only_b or relabelled:
        raise ComparisonError(
            f"cannot compare {a.name} with {b.name}: their evaluated patches differ "
            f"({len(only_a)} only in the first, {len(only_b)} only in the second, "
            f"{len(relabelled)} with different labels); both must be evaluated on the same "
            "workspace split with the same labels"
        )
    pos_b = {k: i for i, k in enumerate(b.keys)}
    order = np.array([pos_b[k] for k in a.keys], dtype=np.int64)
    y = a.scored.labels
    crack = y != 0
    pa, pb = a.scored.screening, b.scored.screening[order]
    fa, fb = pa >= a.threshold, pb >= b.threshold
    ca, cb = a.scored.probs.argmax(1), b.scored.probs.argmax(1)[order]
    # Disagreements: screening decision differs, or the predicted class differs;
    # missed or found cracks first, then false alarms, then class-only differences.
    screen_diff = fa != fb
    disagree = np.flatnonzero(screen_diff | (ca != cb))
    rank = np.where(screen_diff & crack, 0, np.where(screen_diff, 1, 2))
    disagree = disagree[np.lexsort((-np.abs(pa - pb)[disagree], rank[disagree]))]

    def side(p: np.ndarray, cls: np.ndarray, s: Side) -> dict:
        sc = M.screening_scores(crack, p, threshold=s.threshold)
        return {
            "experiment": s.name,
            "threshold": s.threshold,
            "threshold_source": s.threshold_source,
            "recall": sc["recall"],
            "cracks_found": sc["tp"],
            "false_alarm_rate": sc["false_alarm_rate"],
            "false_alarms": sc["fp"],
            "accuracy": float(np.mean(cls == y)),
        }

    sa, sb = side(pa, ca, a), side(pb, cb, b)
    block = {
        "experiment_b": b.name,
        "patches": int(y.size),
        "cracks": int(crack.sum()),
        "a": sa,
        "b": sb,
        "recall_difference": sa["recall"] - sb["recall"],
        "accuracy_difference": sa["accuracy"] - sb["accuracy"],
        "mcnemar_recall": M.mcnemar_test(fa[crack], fb[crack]),
        "mcnemar_accuracy": M.mcnemar_test(ca == y, cb == y),
        "disagreements": int(disagree.size),
        "screening_disagreements": int(screen_diff.sum()),
    }
    arrays = {"order": order, "index": disagree, "pa": pa, "pb": pb, "fa": fa, "fb": fb}
    arrays.update(ca=ca, cb=cb)
    return block, arrays


def write_disagreements(
    path: Path, arrays: dict, *, patch_ids, photos, groups, labels, class_names: list[str]
) -> None:
    """Write ``disagreements.csv``: one row per patch on which the two models differ."""
    pa, pb, fa, fb, ca, cb = (arrays[k] for k in ("pa", "pb", "fa", "fb", "ca", "cb"))
    who = {(1, 1): "both", (1, 0): "a", (0, 1): "b", (0, 0): "neither"}
    with atomic_path(path) as tmp, tmp.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(DISAGREEMENTS_COLUMNS)
        for i in arrays["index"]:
            crack = labels[i] != 0
            right = (int(fa[i] == crack), int(fb[i] == crack))
            w.writerow(
                [
                    int(patch_ids[i]), csv_cell(photos[i]), csv_cell(groups[i]),
                    *(csv_cell(class_names[k[i]]) for k in (labels, ca, cb)),
                    repr(float(pa[i])), repr(float(pb[i])),
                    int(fa[i]), int(fb[i]), who[right],
                ]
            )  # fmt: skip
