"""Choosing which patches of a workspace to label: spread over the archive, or guided by a model.

A pick draws ``n`` patches nobody has labelled, picked, left out of review or put in a
job, and records them (append-only; a later pick adds, never rewrites), with the crops
of the picked patches cut and cached at once. Two rules, both seeded (same workspace,
same seed: same pick):

- **spread** (:func:`spread_quotas`): equal quotas per photo group (structure or site);
  within a group, equal quotas per scale bin (an octave of the patch's width in mm; a
  photo's patches share its scale, so the bins are formed over photos), then per photo,
  then per quality stratum (flagged or clean), then drawn at random. Each level is
  filled like water: a unit with fewer candidates than its share gives them all, and
  the rest is shared equally among the others (within one patch; who gets the odd ones
  is drawn by the seed).
- **model-guided** (:func:`choose_guided`), with a trained model: uncertainty sampling
  by margin (Scheffer, Decomain and Wrobel 2001: top-1 minus top-2 probability, small =
  unsure) on a spread candidate pool of ``pool`` times the quota, then greedy k-center
  on the network's features among the least sure (Gonzalez 1985, farthest-first
  traversal; used for batch active learning as the core-set rule by Sener and Savarese
  2018), so a batch is not many near-copies of one hard patch. The train groups' quotas
  set how many guided picks there are and their pool is spread over them; which groups
  the picks then come from is the model's choice.

Model-guided picks come only from groups the current split puts in ``train``: patches a
model finds hard are not a random sample, and an estimate made on them (validation,
test) would be biased. Groups in val or test, or in no split yet, get spread picks only.

Everything the pick needs from the database is counted and drawn by SQL
(:meth:`~trainkit.store.workspace.Workspace.pick_strata`), so a pick from millions of
patches never loads them all.
"""

from __future__ import annotations

import functools
import math
from collections import Counter, defaultdict
from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from trainkit.core.errors import TrainkitError
from trainkit.labels.review import margins
from trainkit.store.workspace import Workspace

__all__ = [
    "PICK_REASONS",
    "PickError",
    "Scorer",
    "ScreenerScorer",
    "allocate",
    "scale_bin",
    "spread_quotas",
    "interleave",
    "greedy_k_center",
    "covering_radius",
    "choose_guided",
    "pick_patches",
]

#: Why a patch was picked: the spread rule; the model's uncertainty alone (the least sure
#: part was no larger than the quota); k-center diversity among the least sure.
PICK_REASONS = ("spread", "uncertain", "diverse")
#: The least-sure part of the pool that k-center chooses from, as a multiple of the quota.
UNCERTAIN_FACTOR = 2
#: Patches cut and scored per batch (bounded memory whatever the pool's size).
SCORE_BATCH = 256

Progress = Callable[[str, int, int], None]


class PickError(TrainkitError):
    """A pick that cannot be made as asked; the message says why and what to do."""


class Scorer(Protocol):
    """What a model gives a pick: class probabilities and features of uint8 patches.

    Attributes:
        input_px: the patch side the model takes.
        class_names: its classes, in index order.
        features_kind: what the features are (``penultimate`` or ``probabilities``).
        source: the model's path.
    """

    input_px: int
    class_names: Sequence[str]
    features_kind: str
    source: str

    def __call__(self, images: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(N, C) probabilities and (N, D) features of (N, S, S, 3) uint8 patches."""
        ...


class ScreenerScorer:
    """An exported ``model.onnx`` as a :class:`Scorer`: its probabilities, which are also the
    features k-center works on (an ONNX model exposes no inner layer; an experiment folder
    gives the network's own features, :mod:`trainkit.learning.features`)."""

    features_kind = "probabilities"

    def __init__(self, path: str | Path) -> None:
        from trainkit.screener import Screener

        self.source = str(path)
        self._screener = Screener(path)
        self.input_px = int(self._screener.patch_px)
        self.class_names = tuple(self._screener.class_names)

    def __call__(self, images: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        probs = np.asarray(self._screener.predict(images), dtype=np.float64)
        return probs, probs

    def close(self) -> None:
        self._screener.close()


# ----- the spread rule (pure) ----------------------------------------------------------------


def allocate(
    n: int, capacities: Mapping[Hashable, int], rng: np.random.Generator
) -> dict[Hashable, int]:
    """Share ``n`` among units as equally as their capacities allow (water-filling).

    A unit whose capacity is below the equal share gets all it has; the rest is shared
    equally among the others, and the ``r`` left over after integer division go, one
    each, to ``r`` of them drawn by ``rng``. So every unit with room ends within one of
    every other unit with room, and the total is ``min(n, sum(capacities))``.

    Args:
        n: how many to share (>= 0).
        capacities: unit -> how many it can take (>= 0). Units are visited in sorted
            order of their ``str``, so the result does not depend on the mapping's order.
        rng: draws who gets the odd ones.
    """
    if n < 0:
        raise ValueError(f"n must be >= 0, got {n}")
    keys = sorted(capacities, key=str)
    out = dict.fromkeys(keys, 0)
    left = [k for k in keys if capacities[k] > 0]
    rest = int(n)
    while left and rest > 0:
        share = rest // len(left)
        small = [k for k in left if capacities[k] <= share]
        if not small:
            break
        for k in small:
            out[k] = int(capacities[k])
            rest -= out[k]
        left = [k for k in left if k not in set(small)]
    if left and rest > 0:
        share, odd = divmod(rest, len(left))
        lucky = {left[i] for i in rng.permutation(len(left))[:odd]}
        for k in left:
            out[k] = share + (k in lucky)
    return out


@functools.lru_cache(maxsize=4096)  # an archive has few distinct scales and millions of patches
def scale_bin(patch_mm: float | None) -> str:
    """The scale stratum of a patch: the octave of its width in mm (``16-32 mm``), or
    ``unknown`` without a scale."""
    if patch_mm is None or not math.isfinite(patch_mm) or patch_mm <= 0:
        return "unknown"
    lo = 2.0 ** math.floor(math.log2(patch_mm))
    return f"{lo:g}-{2 * lo:g} mm"


def _total(tree: Any) -> int:
    return int(tree) if not isinstance(tree, Mapping) else sum(_total(v) for v in tree.values())


def spread_quotas(n: int, tree: Mapping, rng: np.random.Generator) -> dict[tuple, int]:
    """Share ``n`` down a tree of strata, equally at every level (:func:`allocate`).

    Args:
        n: how many to draw.
        tree: nested mappings whose leaves are candidate counts, e.g. scale bin -> photo
            -> quality -> count.
        rng: draws who gets the odd ones at each level.

    Returns:
        Path of keys to a leaf -> how many to draw there (leaves with 0 left out).
    """
    out: dict[tuple, int] = {}

    def walk(k: int, node: Mapping, path: tuple) -> None:
        shares = allocate(k, {key: _total(v) for key, v in node.items()}, rng)
        for key, q in shares.items():
            if q == 0:
                continue
            child = node[key]
            if isinstance(child, Mapping):
                walk(q, child, (*path, key))
            else:
                out[(*path, key)] = q

    walk(int(n), tree, ())
    return out


def interleave(lists: Sequence[Sequence]) -> list:
    """Merge lists so each is spread evenly through the result (its i-th item of m at the
    fractional position (i + 0.5) / m; ties go in list order). Any start of the result
    then holds every list in about its share."""
    keyed = [
        ((i + 0.5) / len(items), j, i, x)
        for j, items in enumerate(lists)
        for i, x in enumerate(items)
    ]
    return [x for *_, x in sorted(keyed, key=lambda t: t[:3])]


# ----- the model-guided rule (pure) ------------------------------------------------------------


def greedy_k_center(features: np.ndarray, k: int, *, first: int = 0) -> np.ndarray:
    """Greedy k-center (farthest-first traversal, Gonzalez 1985): ``k`` row indices.

    Starts at row ``first``; each next pick is the row farthest (Euclidean) from every
    row picked so far (ties: the lowest index). Its covering radius is at most twice the
    best possible with ``k`` centres (Gonzalez 1985, theorem 2.2).

    Args:
        features: (N, D) points.
        k: how many to pick (at most N).
        first: the first centre.
    """
    x = np.asarray(features, dtype=np.float64)
    if x.ndim != 2:
        raise ValueError(f"expected features of shape (n, d), got {x.shape}")
    n = len(x)
    if not 0 <= k <= n:
        raise ValueError(f"k must be in [0, {n}], got {k}")
    if k == 0:
        return np.zeros(0, dtype=np.int64)
    if not 0 <= first < n:
        raise ValueError(f"first must be in [0, {n}), got {first}")
    chosen = [int(first)]
    nearest = np.linalg.norm(x - x[first], axis=1)
    for _ in range(k - 1):
        nxt = int(np.argmax(nearest))  # argmax takes the lowest index among ties
        chosen.append(nxt)
        nearest = np.minimum(nearest, np.linalg.norm(x - x[nxt], axis=1))
    return np.asarray(chosen, dtype=np.int64)


def covering_radius(features: np.ndarray, centres: Sequence[int]) -> float:
    """The largest distance from a point to its nearest centre (the k-center objective)."""
    x = np.asarray(features, dtype=np.float64)
    c = x[np.asarray(centres, dtype=np.int64)]
    d = np.sqrt(((x[:, None, :] - c[None, :, :]) ** 2).sum(axis=2))
    return float(d.min(axis=1).max())


def choose_guided(
    probabilities: np.ndarray, features: np.ndarray, k: int, *, uncertain: int | None = None
) -> tuple[np.ndarray, list[str], np.ndarray]:
    """The model-guided choice of ``k`` of a candidate pool.

    The ``uncertain`` candidates of smallest margin (default ``UNCERTAIN_FACTOR * k``;
    ties in pool order) are the least-sure part; when it holds more than ``k``, greedy
    k-center on their features chooses ``k``, starting from the least sure. The order
    returned is the order of choice (farthest-first: each next one adds the most new).

    Returns:
        (pool indices, reason of each: ``uncertain`` for one chosen by its margin alone,
        ``diverse`` for one chosen by k-center; the margin of each).
    """
    m = margins(probabilities)
    k = min(int(k), len(m))
    size = min(len(m), UNCERTAIN_FACTOR * k if uncertain is None else int(uncertain))
    if size < k:
        raise ValueError(f"the uncertain part ({size}) must hold at least k = {k}")
    part = np.argsort(m, kind="stable")[:size]
    if size == k:
        return part, ["uncertain"] * k, m[part]
    order = part[greedy_k_center(np.asarray(features)[part], k, first=0)]
    reasons = ["uncertain"] + ["diverse"] * (k - 1)
    return order, reasons, m[order]


# ----- the pick ------------------------------------------------------------------------------


@dataclass
class _Strata:
    """Candidate counts: group -> scale bin -> photo id -> quality -> count."""

    tree: dict

    @classmethod
    def read(cls, ws: Workspace) -> _Strata:
        tree: dict = defaultdict(lambda: defaultdict(lambda: defaultdict(dict)))
        for photo, group, mm, flagged, count in ws.pick_strata():
            q = "flagged" if flagged else "clean"
            leaf = tree[group][scale_bin(mm)][photo]
            leaf[q] = leaf.get(q, 0) + count
        return cls({g: {s: dict(p) for s, p in v.items()} for g, v in tree.items()})

    def group_sizes(self) -> dict[str, int]:
        return {g: _total(v) for g, v in self.tree.items()}


def _draw(
    ws: Workspace, quotas: dict[tuple, int], rng: np.random.Generator
) -> dict[str, list[int]]:
    """Patch ids drawn at random for the quotas (group, scale, photo, quality) -> count."""
    by_photo: dict[int, list[tuple]] = defaultdict(list)
    for path, q in quotas.items():
        by_photo[path[2]].append((path, q))
    out: dict[str, list[int]] = defaultdict(list)
    for photo, candidates in ws.pick_candidates(sorted(by_photo)):
        cells: dict[tuple[str, str], list[int]] = defaultdict(list)
        for pid, mm, flagged in candidates:
            cells[(scale_bin(mm), "flagged" if flagged else "clean")].append(pid)
        for (group, scale, _, quality), q in sorted(by_photo[photo]):
            ids = cells[(scale, quality)]
            if len(ids) < q:  # the workspace changed between counting and drawing
                raise PickError(
                    f"photo {photo} of {ws.root} has {len(ids)} patches to pick in stratum "
                    f"{scale}/{quality}, {q} were counted; another run changed it: pick again"
                )
            out[group].extend(ids[i] for i in sorted(rng.choice(len(ids), q, replace=False)))
    return dict(out)


def _shuffled_interleave(by_group: dict[str, list[int]], rng: np.random.Generator) -> list[int]:
    """Each group's ids in random order, the groups spread evenly through the list."""
    lists = []
    for g in sorted(by_group):
        ids = by_group[g]
        lists.append([ids[i] for i in rng.permutation(len(ids))])
    return interleave(lists)


def _guided(
    ws: Workspace,
    ids: list[int],
    k: int,
    scorer: Scorer,
    progress: Progress | None,
) -> tuple[list[int], list[str], list[float]]:
    """Cut (without caching) and score the pool ``ids`` batch by batch, a photo's patches
    together; choose ``k`` by :func:`choose_guided`."""
    from trainkit.store.pixels import PatchPixels

    recs = ws.patches(ids=ids)  # photo then grid order: each photo decoded once
    probs, feats = [], []
    with PatchPixels(ws) as pixels:
        for start in range(0, len(recs), SCORE_BATCH):
            chunk = recs[start : start + SCORE_BATCH]
            p, f = scorer(pixels.get(chunk, size=scorer.input_px, store=False, keep=True))
            probs.append(np.asarray(p, dtype=np.float64))
            feats.append(np.asarray(f, dtype=np.float32).reshape(len(chunk), -1))
            if progress:
                progress("scoring the candidate pool", start + len(chunk), len(recs))
    order, reasons, scores = choose_guided(np.concatenate(probs), np.concatenate(feats), k)
    return [recs[i].id for i in order], reasons, [float(s) for s in scores]


def pick_patches(
    ws: Workspace,
    n: int,
    *,
    seed: int,
    scorer: Scorer | None = None,
    pool: int = 5,
    cache: bool = True,
    progress: Progress | None = None,
) -> dict:
    """Draw ``n`` patches to label, cache their crops and record the pick (see the module).

    Args:
        ws: the workspace.
        n: how many patches to pick (fewer when fewer can be picked).
        seed: the random seed (recorded).
        scorer: a model; its picks come from ``train`` groups only, the other groups'
            picks are spread.
        pool: the model's candidate pool, as a multiple of its quota.
        cache: cut and cache the picked patches' crops now.
        progress: called with (stage, done, total) while crops are cut and scored.

    Returns:
        A JSON-ready summary: ``pick`` (its number), ``seed``, ``asked``, ``picked``,
        ``candidates``, ``by_reason``, ``groups`` (group -> ``candidates``, ``picked``,
        ``guided``), ``model``, ``features``, ``pool_size``, ``crops`` (``cached``: newly
        cut, ``store``: where) and ``note``.

    Raises:
        PickError: ``n`` or ``pool`` out of range, or a model of other classes.
    """
    if n < 1:
        raise PickError(f"the number of patches to pick must be at least 1, got {n}")
    if pool < 1:
        raise PickError(f"the candidate pool must be at least 1 times the quota, got {pool}")
    if scorer is not None and tuple(scorer.class_names) != tuple(ws.class_set.names):
        raise PickError(
            f"model {scorer.source} predicts classes {list(scorer.class_names)}, the workspace "
            f"uses {list(ws.class_set.names)}"
        )
    rng = np.random.default_rng(seed)
    strata = _Strata.read(ws)
    sizes = strata.group_sizes()
    if not sizes:
        raise PickError(
            f"{ws.root} holds no patch to pick: every patch is labelled, picked, left out of "
            "review or in a job"
        )
    quota = allocate(n, sizes, rng)
    subsets = ws.group_subsets()
    train = sorted(g for g in sizes if subsets.get(g) == {"train"})
    # the model guides only train groups, and only when the quotas give them patches
    guided_groups = train if scorer is not None and sum(quota[g] for g in train) else []
    spread_groups = sorted(g for g in sizes if g not in set(guided_groups))

    spread_quota: dict[tuple, int] = {}
    for g in spread_groups:
        spread_quota.update(
            {(g, *p): q for p, q in spread_quotas(quota[g], strata.tree[g], rng).items()}
        )
    spread_ids = _draw(ws, spread_quota, rng)
    group_of = {i: g for g, ids in spread_ids.items() for i in ids}

    guided: tuple[list[int], list[str], list[float]] = ([], [], [])
    pool_size = 0
    if guided_groups and scorer is not None:
        k = sum(quota[g] for g in guided_groups)
        pool_quota: dict[tuple, int] = {}
        for g in guided_groups:
            want = min(sizes[g], pool * quota[g])
            pool_quota.update(
                {(g, *p): q for p, q in spread_quotas(want, strata.tree[g], rng).items()}
            )
        pool_by_group = _draw(ws, pool_quota, rng)
        group_of.update({i: g for g, ids in pool_by_group.items() for i in ids})
        pool_ids = [i for g in sorted(pool_by_group) for i in pool_by_group[g]]
        pool_size = len(pool_ids)
        guided = _guided(ws, pool_ids, k, scorer, progress)

    spread_order = _shuffled_interleave(spread_ids, rng)
    entries = interleave(
        [
            [{"patch_id": i, "reason": r, "score": s} for i, r, s in zip(*guided, strict=True)],
            [{"patch_id": i, "reason": "spread", "score": None} for i in spread_order],
        ]
    )
    cached, store = 0, None
    if cache:
        from trainkit.store.pixels import PatchPixels

        picked = ws.patches(ids=[e["patch_id"] for e in entries])
        with PatchPixels(ws) as pixels:
            cached = pixels.store(
                picked,
                progress=(lambda d, t: progress("caching crops", d, t)) if progress else None,
            )
            store = pixels.crops.path
    design = {
        "asked": int(n),
        "pool": int(pool) if guided_groups else None,
        "pool_size": pool_size,
        "uncertain_factor": UNCERTAIN_FACTOR if guided_groups else None,
        "features": scorer.features_kind if scorer is not None else None,
        "guided_groups": guided_groups,
        "group_quota": {g: int(q) for g, q in quota.items() if q},
        "rules": "spread: equal quotas per group, scale bin, photo, quality; "
        "guided: margin (Scheffer et al. 2001) then greedy k-center (Gonzalez 1985)",
    }
    number = ws.record_pick(
        entries, seed=seed, model=None if scorer is None else scorer.source, design=design
    )
    by_reason = {r: sum(e["reason"] == r for e in entries) for r in PICK_REASONS}
    picked_in = Counter(group_of[e["patch_id"]] for e in entries)
    per_group = {
        g: {"candidates": sizes[g], "picked": picked_in[g], "guided": g in set(guided_groups)}
        for g in sorted(sizes)
    }
    return {
        "pick": number,
        "seed": int(seed),
        "asked": int(n),
        "picked": len(entries),
        "candidates": int(sum(sizes.values())),
        "by_reason": by_reason,
        "groups": per_group,
        "model": None if scorer is None else scorer.source,
        "features": None if scorer is None else scorer.features_kind,
        "pool_size": pool_size,
        "crops": {"cached": int(cached), "store": None if store is None else str(store)},
        "note": _note(scorer, [g for g in sizes if g not in set(train)], len(entries), n),
    }


def _note(scorer: Scorer | None, not_train: list[str], picked: int, asked: int) -> str:
    """What the reader of a pick's summary should know: a short pick, groups left spread."""
    parts = []
    if picked < asked:
        parts.append(f"only {picked} patches could be picked, not {asked}")
    if scorer is not None and not_train:
        parts.append(
            f"{len(not_train)} groups are not in the split's train part (val, test or no "
            "split): their picks are spread, not model-guided, so estimates made on them stay "
            "unbiased"
        )
    return "; ".join(parts)
