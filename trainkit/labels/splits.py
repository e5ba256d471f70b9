"""Split labelled patches into train / validation / test by group, stratified by class.

All patches of a group (a photo by default, or a structure or site when the
sidecar names one) land in the same subset, so no photo contributes to both
training and testing. Stratification uses scikit-learn's StratifiedGroupKFold.
Groups do not catch the same surface photographed twice (repeated frames,
overlapping photos): :func:`find_near_duplicates` looks for crops in different
subsets that look alike and can take the val/test member out of the split.
"""

from __future__ import annotations

import json
import warnings
from collections import Counter
from collections.abc import Callable, Iterable, Sequence

import numpy as np
from sklearn.model_selection import StratifiedGroupKFold

from trainkit.core.errors import TrainkitError
from trainkit.labels import neardup
from trainkit.store.workspace import PatchRecord, Workspace

__all__ = [
    "SplitError",
    "assign_groups",
    "check_no_leak",
    "find_near_duplicates",
    "near_duplicate_lines",
    "split_counts",
    "split_workspace",
    "SUBSETS",
]

SUBSETS = ("train", "val", "test")


class SplitError(TrainkitError):
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
    largest = max(Counter(y.tolist()).values())
    if largest < n_splits:  # scikit-learn refuses to stratify then
        raise SplitError(
            f"cannot hold out {fraction:.0%} for {what}: that needs at least {n_splits} labelled "
            f"patches of one class, the largest class has {largest}; label more patches or "
            "lower the fraction"
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
        raise SplitError(f"expected as many groups as labels, got {len(groups)} and {len(labels)}")
    for name, v in (("test_fraction", test_fraction), ("val_fraction", val_fraction)):
        if not 0.0 < v < 0.5:
            raise SplitError(f"{name} must be in (0, 0.5), got {v}")
    g = np.asarray(groups, dtype=object).astype(str)
    subsets = _patch_subsets(labels, g, test_fraction, val_fraction, seed)
    out: dict[str, str] = {}
    for grp, subset in zip(g.tolist(), subsets.tolist(), strict=True):
        if out.setdefault(grp, subset) != subset:  # guards the folds' group rule
            raise SplitError(f"group {grp} was put in both {out[grp]} and {subset}")
    return out


def _patch_subsets(
    labels: Sequence[str], g: np.ndarray, test_fraction: float, val_fraction: float, seed: int
) -> np.ndarray:
    """Subset name of each patch: a test fold first, then a validation fold of the rest."""
    y = np.asarray(labels, dtype=object).astype(str)
    test = _one_fold(y, g, test_fraction, seed, "testing")
    rest = ~test
    val_share = val_fraction / (1.0 - test_fraction)
    val_rest = _one_fold(y[rest], g[rest], val_share, seed + 1, "validation")
    val = np.zeros(len(y), dtype=bool)
    val[np.flatnonzero(rest)[val_rest]] = True
    return np.where(test, "test", np.where(val, "val", "train"))


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
    # A job's acceptance-sample cells estimate that job's figures: they never join a split,
    # nor do patches of a job's frames whose job record an interrupted sample never wrote.
    records = [
        r for r in workspace.patches(labelled=True) if r.label is not None and not r.of_a_job
    ]
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
    report = {
        "seed": seed,
        "test_fraction": test_fraction,
        "val_fraction": val_fraction,
        **split_counts(
            ((group_subset[r.group], r.group, r.label) for r in records),
            workspace.class_set.names,
        ),
    }
    workspace.set_split(assignments, report)
    check_no_leak(workspace.patches(labelled=True))
    return report


def split_counts(items: Iterable[tuple[str, str, str]], class_names: Sequence[str]) -> dict:
    """Groups, patches and patches per class in each subset.

    Args:
        items: ``(subset, group, label)`` of each labelled patch in the split.
        class_names: the class set's names, in order (absent classes count 0).

    Returns:
        ``{"groups": {subset: n}, "patches": {subset: n}, "class_counts": {subset: {class: n}}}``.
    """
    groups: dict[str, set[str]] = {s: set() for s in SUBSETS}
    counts: dict[str, Counter] = {s: Counter() for s in SUBSETS}
    for subset, group, label in items:
        groups[subset].add(group)
        counts[subset][label] += 1
    return {
        "groups": {s: len(groups[s]) for s in SUBSETS},
        "patches": {s: sum(counts[s].values()) for s in SUBSETS},
        "class_counts": {s: {n: counts[s].get(n, 0) for n in class_names} for s in SUBSETS},
    }


#: Subset pairs searched for near-duplicates, the subset that keeps its member first.
SUBSET_PAIRS = (("train", "val"), ("train", "test"), ("val", "test"))


def _patch_ref(r: PatchRecord) -> dict:
    return {"id": r.id, "photo": r.photo, "box": list(r.box), "subset": r.subset}


def find_near_duplicates(
    workspace: Workspace,
    *,
    max_distance: int = neardup.DEFAULT_MAX_DISTANCE,
    drop: bool = False,
    examples: int = 5,
    progress: Callable[[int, int], None] | None = None,
) -> dict:
    """Find labelled patches in different subsets whose crops are near-duplicates.

    Each crop's perceptual hash (:mod:`trainkit.labels.neardup`) is compared with those of
    every other subset; pairs within ``max_distance`` bits are reported. With ``drop``,
    the val or test member of each pair loses its subset assignment, so training,
    validation and evaluation leave it out (train keeps its member; re-running
    ``trainkit split`` brings the patches back). The report is also stored in the
    workspace's split info under ``near_duplicates``, with the counts brought up to date
    after a drop.

    Args:
        workspace: a workspace with a split.
        max_distance: largest Hamming distance (bits of 64) counted as a near-duplicate.
        drop: take the val/test member of each pair out of the split.
        examples: how many pairs (closest first) to name in the report.
        progress: called as ``progress(done, total)`` while crops are hashed.

    Returns:
        ``method``, ``max_distance``, ``checked`` (crops hashed), ``unreadable`` (crops
        that could not be read, not checked), ``pairs`` (count per subset pair, e.g.
        ``"train-test"``), ``total``, ``examples`` (``a``, ``b``, ``distance``),
        ``dropped`` (patches taken out per subset) and ``dropped_ids``.
    """
    if examples < 0:
        raise SplitError(f"examples must be >= 0, got {examples}")
    everything = workspace.patches(labelled=True)
    records = [r for r in everything if r.subset in SUBSETS and r.label is not None]
    if not records:
        raise SplitError(
            f"workspace {workspace.root} has no split to check; run `trainkit split` first"
        )
    hashes, ok = _crop_hashes(workspace, records, progress)
    subset_of = np.array([r.subset for r in records])
    members = {s: np.flatnonzero((subset_of == s) & ok) for s in SUBSETS}
    found: list[tuple[int, int, int]] = []  # (record index a, record index b, distance)
    pairs: dict[str, int] = {}
    for a, b in SUBSET_PAIRS:
        ia, ib = members[a], members[b]
        i, j, d = neardup.near_pairs(hashes[ia], hashes[ib], max_distance=max_distance)
        pairs[f"{a}-{b}"] = len(i)
        found.extend(zip(ia[i].tolist(), ib[j].tolist(), d.tolist(), strict=True))
    found.sort(key=lambda f: (f[2], records[f[0]].id, records[f[1]].id))
    report = {
        "method": neardup.HASH_NAME,
        "max_distance": max_distance,
        "checked": int(ok.sum()),
        "unreadable": int((~ok).sum()),
        "pairs": pairs,
        "total": len(found),
        "examples": [
            {"a": _patch_ref(records[p]), "b": _patch_ref(records[q]), "distance": d}
            for p, q, d in found[:examples]
        ],
        "dropped": {"val": 0, "test": 0},
        "dropped_ids": [],
    }
    info = dict(workspace.split_info() or {})
    if drop and found:
        gone = neardup.members_to_drop(
            [
                (records[p].id, records[p].subset, records[q].id, records[q].subset)
                for p, q, _ in found
            ]
        )
        report["dropped"] = {s: sum(1 for v in gone.values() if v == s) for s in ("val", "test")}
        report["dropped_ids"] = sorted(gone)
        kept = [r for r in everything if r.subset in SUBSETS and r.id not in gone]
        info.update(
            split_counts(
                ((r.subset, r.group, r.label) for r in kept if r.label is not None),
                workspace.class_set.names,
            )
        )
        info["near_duplicates"] = report
        workspace.set_split({r.id: r.subset for r in kept}, info)
    else:
        info["near_duplicates"] = report
        workspace.set_meta("split_info", json.dumps(info))
    return report


def _crop_hashes(
    workspace: Workspace,
    records: Sequence[PatchRecord],
    progress: Callable[[int, int], None] | None,
) -> tuple[np.ndarray, np.ndarray]:
    """pHash of each record's crop (:mod:`trainkit.store.pixels`), a photo's patches at a time;
    ``ok`` is False where the crop cannot be had (its photo missing or changed)."""
    from trainkit.store.pixels import PatchPixels, PhotoMissingError

    hashes = np.zeros(len(records), dtype=np.uint64)
    ok = np.zeros(len(records), dtype=bool)
    by_photo: dict[str, list[int]] = {}
    for i, r in enumerate(records):
        by_photo.setdefault(r.photo, []).append(i)
    done = 0
    with PatchPixels(workspace) as pixels:
        for idx in by_photo.values():
            try:
                hashes[idx] = neardup.hash_arrays(pixels.get([records[i] for i in idx]))
                ok[idx] = True
            except PhotoMissingError:  # one by one: those with a crop file of their own count
                for i in idx:
                    try:
                        hashes[i] = neardup.array_hash(pixels.one(records[i]))
                        ok[i] = True
                    except PhotoMissingError:  # unreadable, as a missing crop file was
                        pass
            done += len(idx)
            if progress is not None:
                progress(done, len(records))
    return hashes, ok


def near_duplicate_lines(report: dict) -> list[str]:
    """The near-duplicate report as a few lines of plain text for the terminal."""
    pairs = ", ".join(f"{k} {v}" for k, v in report["pairs"].items())
    lines = [
        f"Near-duplicates across subsets (pHash within {report['max_distance']} of "
        f"{neardup.HASH_BITS} bits): {report['total']} pair(s): {pairs}"
    ]
    for ex in report["examples"]:
        a, b = ex["a"], ex["b"]
        lines.append(
            f"  {a['subset']} patch {a['id']} ({a['photo']} at {tuple(a['box'])}) ~ "
            f"{b['subset']} patch {b['id']} ({b['photo']} at {tuple(b['box'])}): "
            f"{ex['distance']} bits"
        )
    if report["unreadable"]:
        lines.append(f"  {report['unreadable']} crop(s) could not be read and were not checked")
    n_dropped = sum(report["dropped"].values())
    if n_dropped:
        lines.append(
            f"  took {n_dropped} patch(es) out of the split ({report['dropped']['val']} val, "
            f"{report['dropped']['test']} test); training and evaluation leave them out"
        )
    elif report["total"]:
        lines.append(
            "  --drop-near-duplicates takes the val/test member of each pair out of the split"
        )
    return lines
