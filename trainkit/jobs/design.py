"""Draw a stratified random sample of a scan's cells over the screening probability.

The design (Cochran, *Sampling Techniques*, 3rd ed. 1977, ch. 5): every cell of a finished
scan falls into exactly one of three strata by its screening probability ``p`` and the
model's threshold ``t``:

- ``flagged``: ``p >= t`` (what the screener sends to a person);
- ``near``: ``t * near_fraction <= p < t``, the band just below the threshold where a
  screener's near-misses sit (default ``near_fraction = 0.2``: with ``t = 0.5`` the band
  is ``[0.1, 0.5)``; a ratio band is kept rather than a quantile band so that its meaning
  does not change with the job's mix of clean and cracked cells);
- ``rest``: ``p < t * near_fraction``, the large unflagged pile where silent misses hide.

Within each stratum the cells are drawn by simple random sampling without replacement, so
a cell of stratum h is included with probability ``n_h / N_h`` (recorded per cell).

Allocation of the N cells (a documented rule, not a published optimum):

1. every non-empty stratum first gets ``min(N_h, min_per_stratum)`` cells (default 20:
   enough for a within-stratum variance, and a floor so that no pile goes unchecked);
2. the remainder goes in proportion to ``N_h * S_h`` (Neyman allocation, Cochran ch. 5),
   with the prior standard deviation ``S_h = sqrt(q_h (1 - q_h))`` of a crack indicator
   whose prevalence ``q_h`` is the stratum's mean screening probability, clipped to
   ``[prior_floor, 1 - prior_floor]`` (default 0.05). The clip is common practice rather
   than a formula from a source: on an unfamiliar surface the screener's probabilities are
   the thing in doubt, and an over-confident ``p ~ 0`` must not starve the ``rest``
   stratum, where a missed crack weighs ``N_h / n_h`` times in the estimate;
3. no stratum gets more than it holds: the excess is handed on to the other strata by the
   same rule, and integer counts are set by largest remainders.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "STRATA",
    "DesignError",
    "JobSample",
    "allocate",
    "assign_strata",
    "draw_sample",
]

#: Stratum names, in code order (the ``stratum`` arrays hold these indices).
STRATA: tuple[str, ...] = ("flagged", "near", "rest")


class DesignError(ValueError):
    """A sampling request the design cannot honour (bad probabilities, sizes, options)."""


@dataclass(frozen=True)
class JobSample:
    """A stratified random sample of a scan's cells.

    Attributes:
        index: (n,) int64 positions of the sampled cells in the probability array given to
            :func:`draw_sample`, sorted by stratum and then by position.
        stratum: (n,) int8 stratum code of each sampled cell (an index into ``STRATA``).
        inclusion_probability: (n,) float64, ``n_h / N_h`` of the cell's stratum.
        population: (3,) int64 stratum sizes N_h, in ``STRATA`` order.
        allocated: (3,) int64 sample sizes n_h, in ``STRATA`` order.
        threshold: the model's screening threshold t.
        near_low: the lower edge ``t * near_fraction`` of the ``near`` band.
        seed: the seed that drew the sample.
    """

    index: np.ndarray
    stratum: np.ndarray
    inclusion_probability: np.ndarray
    population: np.ndarray
    allocated: np.ndarray
    threshold: float
    near_low: float
    seed: int

    def strata_table(self) -> list[dict[str, Any]]:
        """Per-stratum name, N_h, n_h and inclusion probability, ready for JSON."""
        rows = []
        for h, name in enumerate(STRATA):
            big, small = int(self.population[h]), int(self.allocated[h])
            rows.append(
                {
                    "stratum": name,
                    "cells": big,
                    "sampled": small,
                    "inclusion_probability": small / big if big else 0.0,
                }
            )
        return rows

    def to_dict(self) -> dict[str, Any]:
        """The design and every sampled cell as plain JSON-ready values."""
        return {
            "threshold": self.threshold,
            "near_low": self.near_low,
            "seed": self.seed,
            "strata": self.strata_table(),
            "cells": [
                {"index": int(i), "stratum": STRATA[int(s)], "inclusion_probability": float(p)}
                for i, s, p in zip(
                    self.index, self.stratum, self.inclusion_probability, strict=True
                )
            ],
        }


def _check_unit(value: float, name: str, *, open_low: bool = True) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)):
        raise DesignError(f"expected {name} to be a number, got {value!r}")
    v = float(value)
    ok = (0.0 < v <= 1.0) if open_low else (0.0 <= v < 1.0)
    if not np.isfinite(v) or not ok:
        interval = "(0, 1]" if open_low else "[0, 1)"
        raise DesignError(f"expected {name} in {interval}, got {value!r}")
    return v


def _check_probabilities(probabilities: ArrayLike) -> np.ndarray:
    p = np.asarray(probabilities, dtype=np.float64)
    if p.ndim != 1:
        raise DesignError(f"expected a 1-D array of screening probabilities, got shape {p.shape}")
    if p.size == 0:
        raise DesignError("expected at least one cell, got an empty probability array")
    if not np.all(np.isfinite(p)) or p.min() < 0.0 or p.max() > 1.0:
        raise DesignError(
            "expected screening probabilities in [0, 1], got values in "
            f"[{np.nanmin(p):.4g}, {np.nanmax(p):.4g}] or non-finite entries"
        )
    return p


def assign_strata(
    probabilities: ArrayLike, threshold: float, *, near_fraction: float = 0.2
) -> np.ndarray:
    """Stratum code of every cell: 0 flagged (p >= t), 1 near, 2 rest.

    Args:
        probabilities: (n,) screening probability per cell, in [0, 1].
        threshold: the model's screening threshold t in (0, 1].
        near_fraction: the ``near`` band is ``[t * near_fraction, t)``; in [0, 1).

    Returns:
        (n,) int8 stratum codes, indices into ``STRATA``.

    Raises:
        DesignError: on probabilities outside [0, 1] or options outside their ranges.
    """
    p = _check_probabilities(probabilities)
    t = _check_unit(threshold, "threshold")
    f = _check_unit(near_fraction, "near_fraction", open_low=False)
    codes = np.full(p.shape, 2, dtype=np.int8)
    codes[p >= t * f] = 1
    codes[p >= t] = 0
    return codes


def allocate(
    population: ArrayLike,
    n: int,
    *,
    prior_sd: ArrayLike | None = None,
    min_per_stratum: int = 20,
) -> np.ndarray:
    """Split a sample of n cells across strata by the rule in the module docstring.

    Args:
        population: stratum sizes N_h (non-negative integers).
        n: total cells wanted, 1 <= n <= sum(N_h).
        prior_sd: prior standard deviation S_h per stratum (Neyman weights ``N_h * S_h``);
            ``None`` gives proportional allocation (all S_h equal).
        min_per_stratum: floor per non-empty stratum before the Neyman share (>= 1).

    Returns:
        int64 sample sizes n_h with ``sum(n_h) == n`` and ``0 <= n_h <= N_h``.

    Raises:
        DesignError: if n is not in [1, sum(N_h)] or an argument is malformed.
    """
    big = np.asarray(population)
    if big.ndim != 1 or big.size == 0 or not np.issubdtype(big.dtype, np.integer) or big.min() < 0:
        raise DesignError(f"expected stratum sizes as non-negative integers, got {population!r}")
    big = big.astype(np.int64)
    total = int(big.sum())
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or not 1 <= n <= total:
        raise DesignError(
            f"expected cells wanted n in [1, {total}] (the cells there are), got {n!r}"
        )
    if isinstance(min_per_stratum, bool) or not isinstance(min_per_stratum, (int, np.integer)):
        raise DesignError(f"expected min_per_stratum to be an int >= 1, got {min_per_stratum!r}")
    if min_per_stratum < 1:
        raise DesignError(f"expected min_per_stratum >= 1, got {min_per_stratum}")
    sd = np.ones(big.size) if prior_sd is None else np.asarray(prior_sd, dtype=np.float64)
    if sd.shape != big.shape or not np.all(np.isfinite(sd)) or np.any(sd <= 0):
        raise DesignError(f"expected one positive prior_sd per stratum, got {prior_sd!r}")
    # 1. The floor, shared out in stratum order if n cannot cover every floor.
    alloc = np.zeros(big.size, dtype=np.int64)
    left = int(n)
    for h in range(big.size):
        take = min(int(big[h]), int(min_per_stratum), left)
        alloc[h] = take
        left -= take
    # 2-3. Neyman shares of the remainder, capped at N_h, the excess handed on.
    while left > 0:
        room = big - alloc
        open_ = room > 0
        weight = np.where(open_, big * sd, 0.0)
        share = left * weight / weight.sum()
        capped = open_ & (share >= room)
        if capped.any():
            alloc[capped] = big[capped]
            left = int(n - alloc.sum())
            continue
        whole = np.floor(share).astype(np.int64)
        rest = left - int(whole.sum())
        order = np.argsort(-(share - whole), kind="stable")
        whole[order[:rest]] += 1
        alloc += whole
        left = 0
    return alloc


def draw_sample(
    probabilities: ArrayLike,
    threshold: float,
    n: int,
    *,
    seed: int,
    near_fraction: float = 0.2,
    min_per_stratum: int = 20,
    prior_floor: float = 0.05,
) -> JobSample:
    """Draw n cells by stratified simple random sampling without replacement.

    The same probabilities, options and seed always give the same sample (numpy's
    ``default_rng(seed)``, one stream drawn stratum by stratum in ``STRATA`` order).

    Args:
        probabilities: (n_cells,) screening probability of every cell of the scan.
        threshold: the model's screening threshold t in (0, 1].
        n: cells wanted, 1 <= n <= n_cells.
        seed: seed of the random generator (a non-negative int).
        near_fraction: the ``near`` band is ``[t * near_fraction, t)``.
        min_per_stratum: floor of cells per non-empty stratum.
        prior_floor: clip of the prior prevalence in the Neyman weights, in (0, 0.5].

    Returns:
        The :class:`JobSample`.

    Raises:
        DesignError: on malformed probabilities, options or seed.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise DesignError(f"expected seed to be a non-negative int, got {seed!r}")
    floor = _check_unit(prior_floor, "prior_floor")
    if floor > 0.5:
        raise DesignError(f"expected prior_floor in (0, 0.5], got {prior_floor!r}")
    p = _check_probabilities(probabilities)
    codes = assign_strata(p, threshold, near_fraction=near_fraction)
    big = np.bincount(codes, minlength=len(STRATA)).astype(np.int64)
    sums = np.bincount(codes, weights=p, minlength=len(STRATA))
    mean = np.divide(sums, big, out=np.full(len(STRATA), 0.5), where=big > 0)
    q = np.clip(mean, floor, 1.0 - floor)
    alloc = allocate(big, n, prior_sd=np.sqrt(q * (1.0 - q)), min_per_stratum=min_per_stratum)
    rng = np.random.default_rng(int(seed))
    # One stable sort groups the cells by stratum; each group is drawn from without
    # replacement, so the work is O(n_cells log n_cells) once, not once per stratum.
    order = np.argsort(codes, kind="stable")
    starts = np.concatenate([[0], np.cumsum(big)])
    picks, strata, probs = [], [], []
    for h in range(len(STRATA)):
        if alloc[h] == 0:
            continue
        members = order[starts[h] : starts[h + 1]]
        chosen = np.sort(rng.choice(members, size=int(alloc[h]), replace=False))
        picks.append(chosen)
        strata.append(np.full(chosen.size, h, dtype=np.int8))
        probs.append(np.full(chosen.size, alloc[h] / big[h]))
    return JobSample(
        index=np.concatenate(picks).astype(np.int64),
        stratum=np.concatenate(strata),
        inclusion_probability=np.concatenate(probs),
        population=big,
        allocated=alloc,
        threshold=float(threshold),
        near_low=float(threshold) * float(near_fraction),
        seed=int(seed),
    )
