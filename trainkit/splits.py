"""Split labelled patches into train / validation / test by group, stratified by class.

All patches of a group (a photo by default, or a structure or site when the
sidecar names one) land in the same subset, so no photo contributes to both
training and testing. Stratification uses scikit-learn's StratifiedGroupKFold.
"""

from __future__ import annotations

import warnings
from collections import Counter
from collections.abc import Sequence

import numpy as np
from sklearn.model_selection import StratifiedGroupKFold

from .workspace import PatchRecord, Workspace

__all__ = ["SplitError", "assign_groups", "check_no_leak", "split_workspace", "SUBSETS"]

SUBSETS = ("train", "val", "test")


class SplitError(ValueError):
    """A split that cannot be made or that leaks groups across subsets."""


def _one_fold(
    y: np.ndarray, groups: np.ndarray, fraction: float, seed: int, what: str
) -> np.ndarray:
    """Boolean mask of a held-out part holding about ``fraction`` of the samples."""
    n_splits = max(2, int(round(1.0 / fraction)))
    n_groups = len(np.unique(groups))
    if n_groups < n_splits:
        raise SplitError(
            f"cannot hold out {fraction:.0%} for {what}: that needs at least {n_splits} groups "
            f"(photos or structures), got {n_groups}; label patches from more photos or lower the fraction"
        )
    splitter = StratifiedGroupKFold(n_splits=n_splits, shuffle=True, random_state=seed)
    with warnings.catch_warnings():
        # Rare classes with fewer members than folds are expected here; stratification
        # is "as far as groups allow", and the split report shows the counts.
        warnings.filterwarnings("ignore", message="The least populated class", category=UserWarning)
        _, held = next(iter(splitter.split(np.zeros(len(y)), y, groups)))
    mask = np.zeros(len(y), dtype=bool)
    mask[held] = True
    return mask


def assign_groups(
    labels: Sequence[str],
    groups: Sequence[str],
    *,
    test_fraction: float = 0.2,
    val_fraction: float = 0.15,
    seed: int = 0,
) -> dict[str, str]:
    """Assign each group to a subset: returns group -> 'train' | 'val' | 'test'.

    Args:
        labels: class name per labelled patch (used for stratification).
        groups: group id per labelled patch.
        test_fraction: share of patches held out for testing (approximate, by group).
        val_fraction: share of patches held out for validation (approximate, by group).
        seed: random seed; the same inputs and seed give the same split.
    """
    if len(labels) != len(groups):
        raise ValueError(f"expected as many groups as labels, got {len(groups)} and {len(labels)}")
    for name, v in (("test_fraction", test_fraction), ("val_fraction", val_fraction)):
        if not 0.0 < v < 0.5:
            raise ValueError(f"{name} must be in (0, 0.5), got {v}")
    y = np.asarray(labels, dtype=object).astype(str)
    g = np.asarray(groups, dtype=object).astype(str)
    test = _one_fold(y, g, test_fraction, seed, "testing")
    rest = ~test
    val_share = val_fraction / (1.0 - test_fraction)
    val_rest = _one_fold(y[rest], g[rest], val_share, seed + 1, "validation")
    val = np.zeros(len(y), dtype=bool)
    val[np.flatnonzero(rest)[val_rest]] = True
    out: dict[str, str] = {}
    for grp, is_test, is_val in zip(g, test, val, strict=True):
        out[str(grp)] = "test" if is_test else ("val" if is_val else "train")
    return out


def check_no_leak(records: Sequence[PatchRecord]) -> None:
    """Raise SplitError if any group has patches in more than one subset."""
    seen: dict[str, set[str]] = {}
    for r in records:
        if r.subset:
            seen.setdefault(r.group, set()).add(r.subset)
    leaks = {g: sorted(s) for g, s in seen.items() if len(s) > 1}
    if leaks:
        example = ", ".join(f"{g} in {'+'.join(s)}" for g, s in list(leaks.items())[:3])
        raise SplitError(
            f"{len(leaks)} group(s) appear in more than one subset ({example}); "
            "re-run `trainkit split` before training or evaluating"
        )


def split_workspace(
    workspace: Workspace, *, test_fraction: float = 0.2, val_fraction: float = 0.15, seed: int = 0
) -> dict:
    """Make and store a grouped, stratified split of the workspace's labelled patches.

    Returns a report: group count per subset and class counts per subset.
    """
    records = [r for r in workspace.patches() if r.label is not None]
    if not records:
        raise SplitError(f"workspace {workspace.root} has no labelled patches; label some first")
    group_subset = assign_groups(
        [r.label for r in records],
        [r.group for r in records],
        test_fraction=test_fraction,
        val_fraction=val_fraction,
        seed=seed,
    )
    assignments = {r.id: group_subset[r.group] for r in records}
    counts: dict[str, Counter] = {s: Counter() for s in SUBSETS}
    for r in records:
        counts[group_subset[r.group]][r.label] += 1
    names = workspace.class_set.names
    report = {
        "seed": seed,
        "test_fraction": test_fraction,
        "val_fraction": val_fraction,
        "groups": {s: sum(1 for v in group_subset.values() if v == s) for s in SUBSETS},
        "patches": {s: sum(counts[s].values()) for s in SUBSETS},
        "class_counts": {s: {n: counts[s].get(n, 0) for n in names} for s in SUBSETS},
    }
    workspace.set_split(assignments, report)
    check_no_leak(workspace.patches())
    return report
