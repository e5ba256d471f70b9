"""Draw a stratified random sample of a scan's cells over the screening probability.

The design (Cochran, *Sampling Techniques*, 3rd ed. 1977, ch. 5): every cell of a finished
scan falls into exactly one stratum by its screening probability ``p`` and the model's
threshold ``t``:

- ``flagged``: ``p >= t`` (what the screener sends to a person);
- ``near``: ``t * near_fraction <= p < t``, the band just below the threshold where a
  screener's near-misses sit (default ``near_fraction = 0.2``: with ``t = 0.5`` the band
  is ``[0.1, 0.5)``; a ratio band is kept rather than a quantile band so that its meaning
  does not change with the job's mix of clean and cracked cells);
- ``rest``: ``p < t * near_fraction``, the large unflagged pile where silent misses hide,
  by default cut into ``rest_bands = 3`` bands of equal size by the quantiles of ``p``
  within it: ``rest-1`` (highest p) ... ``rest-k`` (lowest). Stratifying on an auxiliary
  variable correlated with the target is Cochran's section 5A.7 (Dalenius and Hodges,
  JASA 54, 1959, give the cum-sqrt(f) rule for the edges); equal-count bands are this
  module's simpler choice (from memory, the gain of any reasonable edges is close to the
  optimum's). Quantile bands are the same in ``p`` and in ``log p``. The inner edges are
  data-dependent, so they are recorded (:attr:`JobSample.rest_edges`, ``to_dict()``) and
  :func:`assign_strata` takes them back. With ``rest_bands = 1`` the design is the
  original three-stratum one (``flagged``, ``near``, ``rest``).

  The bands narrow recall intervals only together with the pooled interval of
  :mod:`trainkit.jobs.intervals` (``pooled-beta-binomial``): a conservative interval that
  adds one phantom miss per stratum widens with every band (measured in
  ``benchmarks/job_intervals.py``). When no miss is seen, no valid interval can be much
  narrower than the Clopper-Pearson bound on the misses in the whole unflagged pile,
  which shrinks only with the number of unflagged cells answered.

Within each stratum the cells are drawn by simple random sampling without replacement, so
a cell of stratum h is included with probability ``n_h / N_h`` (recorded per cell).

A sample can grow (:func:`draw_more`, ``trainkit sample --more``): with the strata and
their edges kept from the first draw, ``m_h`` more cells of stratum h are drawn by simple
random sampling without replacement from its ``N_h - n_h`` cells not drawn yet. The union
is then a simple random sample without replacement of ``n_h + m_h`` of the ``N_h`` cells:
each set U of that size arises from the ``C(n_h + m_h, n_h)`` ways of splitting it into
the two draws, each of chance ``1 / (C(N_h, n_h) C(N_h - n_h, m_h))``, which is
``1 / C(N_h, n_h + m_h)`` in all. So the stratified estimators of Cochran ch. 5 apply
to all the cells with inclusion probability ``(n_h + m_h) / N_h``. The ``m_h`` are fixed
by the rule below before the cells are drawn, never by the answers; choosing how many
more cells to ask for after reading an interval is the usual sequential caveat of any
"answer more" step (common practice accepts it for a sample that only grows).

Allocation of the N cells (a documented rule, not a published optimum):

1. every non-empty stratum first gets ``min(N_h, floor)`` cells, ``floor =
   min(min_per_stratum, n // strata)`` but at least 1 (default 20: enough for a
   within-stratum variance, and a floor so that no pile goes unchecked; lowered for a
   small n so that every stratum is reached);
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

from trainkit.core.errors import TrainkitError
from trainkit.metrics._checks import _as_unit_float, _unit_number

__all__ = [
    "STRATA",
    "DesignError",
    "MAX_REST_BANDS",
    "JobSample",
    "allocate",
    "assign_strata",
    "design_codes",
    "draw_more",
    "draw_sample",
    "rest_band_edges",
]

#: Most bands the ``rest`` pile may be cut into.
MAX_REST_BANDS = 4

#: Stratum names, in code order (the ``stratum`` arrays hold these indices). A design uses
#: either ``rest`` (one band) or ``rest-1`` ... ``rest-k``; the unused codes hold no cells.
STRATA: tuple[str, ...] = ("flagged", "near", "rest") + tuple(
    f"rest-{j}" for j in range(1, MAX_REST_BANDS + 1)
)

#: Code of the first ``rest-j`` band.
_BAND0 = 3


def design_codes(rest_edges: tuple[float, ...] | list[float] = ()) -> tuple[int, ...]:
    """Stratum codes a design with these inner ``rest`` edges uses, in ``STRATA`` order."""
    if not len(rest_edges):
        return (0, 1, 2)
    return (0, 1) + tuple(range(_BAND0, _BAND0 + len(rest_edges) + 1))


class DesignError(TrainkitError):
    """A sampling request the design cannot honour (bad probabilities, sizes, options)."""


@dataclass(frozen=True)
class JobSample:
    """A stratified random sample of a scan's cells.

    Attributes:
        index: (n,) int64 positions of the sampled cells in the probability array given to
            :func:`draw_sample`, sorted by stratum and then by position.
        stratum: (n,) int8 stratum code of each sampled cell (an index into ``STRATA``).
        inclusion_probability: (n,) float64, ``n_h / N_h`` of the cell's stratum.
        population: (len(STRATA),) int64 stratum sizes N_h, in ``STRATA`` order (0 for
            the codes this design does not use).
        allocated: (len(STRATA),) int64 sample sizes n_h, in ``STRATA`` order.
        threshold: the model's screening threshold t.
        near_low: the lower edge ``t * near_fraction`` of the ``near`` band.
        seed: the seed that drew the sample.
        rest_edges: ascending inner edges of the ``rest`` bands (empty: one ``rest``
            stratum); a cell with ``p >= edge`` lies above it.
    """

    index: np.ndarray
    stratum: np.ndarray
    inclusion_probability: np.ndarray
    population: np.ndarray
    allocated: np.ndarray
    threshold: float
    near_low: float
    seed: int
    rest_edges: tuple[float, ...] = ()

    def strata_table(self) -> list[dict[str, Any]]:
        """Per-stratum name, N_h, n_h and inclusion probability of the design's strata."""
        rows = []
        for h in design_codes(self.rest_edges):
            big, small = int(self.population[h]), int(self.allocated[h])
            rows.append(
                {
                    "stratum": STRATA[h],
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
            "rest_edges": [float(e) for e in self.rest_edges],
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
    interval = "(0, 1]" if open_low else "[0, 1)"
    return _unit_number(value, name, interval, error=DesignError, type_error=DesignError)


def _check_probabilities(probabilities: ArrayLike) -> np.ndarray:
    p = _as_unit_float(
        probabilities, "screening probabilities", error=DesignError, type_error=DesignError
    )
    if p.size == 0:
        raise DesignError("expected at least one cell, got an empty probability array")
    return p


def assign_strata(
    probabilities: ArrayLike,
    threshold: float,
    *,
    near_fraction: float = 0.2,
    rest_edges: tuple[float, ...] | list[float] = (),
) -> np.ndarray:
    """Stratum code of every cell: 0 flagged (p >= t), 1 near, then rest or its bands.

    Args:
        probabilities: (n,) screening probability per cell, in [0, 1].
        threshold: the model's screening threshold t in (0, 1].
        near_fraction: the ``near`` band is ``[t * near_fraction, t)``; in [0, 1).
        rest_edges: ascending inner edges of the ``rest`` bands (at most
            ``MAX_REST_BANDS - 1``); empty gives one ``rest`` stratum (code 2), else a
            cell with ``p`` in ``[edge_j, edge_j+1)`` of the k bands, counted from the top,
            gets ``rest-j``.

    Returns:
        (n,) int8 stratum codes, indices into ``STRATA``.

    Raises:
        DesignError: on probabilities outside [0, 1] or options outside their ranges.
    """
    p = _check_probabilities(probabilities)
    t = _check_unit(threshold, "threshold")
    f = _check_unit(near_fraction, "near_fraction", open_low=False)
    edges = np.asarray(rest_edges, dtype=np.float64)
    if edges.ndim != 1 or edges.size > MAX_REST_BANDS - 1 or np.any(np.diff(edges) < 0):
        raise DesignError(
            f"expected at most {MAX_REST_BANDS - 1} ascending rest_edges, got {rest_edges!r}"
        )
    if edges.size and (not np.all(np.isfinite(edges)) or edges.max() > t * f):
        raise DesignError(f"expected rest_edges within [0, {t * f:.6g}], got {rest_edges!r}")
    codes = np.full(p.shape, 2, dtype=np.int8)
    if edges.size:
        codes[:] = _BAND0 + edges.size - np.searchsorted(edges, p, side="right")
    codes[p >= t * f] = 1
    codes[p >= t] = 0
    return codes


def rest_band_edges(
    probabilities: ArrayLike, threshold: float, *, near_fraction: float = 0.2, bands: int = 3
) -> tuple[float, ...]:
    """Inner edges cutting the ``rest`` pile into ``bands`` bands of (about) equal size.

    The edges are the ``j / bands`` quantiles of ``p`` among the ``rest`` cells (numpy's
    default linear interpolation); ties stay in one band, so a band may be empty.

    Args:
        probabilities: (n,) screening probability per cell.
        threshold: the model's screening threshold t.
        near_fraction: the ``near`` band's lower edge is ``t * near_fraction``.
        bands: 1 to ``MAX_REST_BANDS``.

    Returns:
        ``bands - 1`` ascending edges (empty for one band or an empty ``rest`` pile).

    Raises:
        DesignError: on a band count out of range or malformed probabilities.
    """
    if isinstance(bands, bool) or not isinstance(bands, (int, np.integer)):
        raise DesignError(
            f"expected rest_bands to be an int in [1, {MAX_REST_BANDS}], got {bands!r}"
        )
    if not 1 <= bands <= MAX_REST_BANDS:
        raise DesignError(f"expected rest_bands in [1, {MAX_REST_BANDS}], got {bands}")
    p = _check_probabilities(probabilities)
    low = _check_unit(threshold, "threshold") * _check_unit(
        near_fraction, "near_fraction", open_low=False
    )
    rest = p[p < low]
    if bands == 1 or rest.size == 0:
        return ()
    return tuple(float(e) for e in np.quantile(rest, np.arange(1, bands) / bands))


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


def _prior_sd(p: np.ndarray, codes: np.ndarray, floor: float) -> np.ndarray:
    """Prior standard deviation S_h per stratum code (the rule in the module docstring)."""
    big = np.bincount(codes, minlength=len(STRATA))
    sums = np.bincount(codes, weights=p, minlength=len(STRATA))
    mean = np.divide(sums, big, out=np.full(len(STRATA), 0.5), where=big > 0)
    q = np.clip(mean, floor, 1.0 - floor)
    return np.sqrt(q * (1.0 - q))


def draw_sample(
    probabilities: ArrayLike,
    threshold: float,
    n: int,
    *,
    seed: int,
    near_fraction: float = 0.2,
    min_per_stratum: int = 20,
    prior_floor: float = 0.05,
    rest_bands: int = 3,
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
        rest_bands: bands the ``rest`` pile is cut into (1 to ``MAX_REST_BANDS``; 1 is
            the original three-stratum design).

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
    edges = rest_band_edges(p, threshold, near_fraction=near_fraction, bands=rest_bands)
    codes = assign_strata(p, threshold, near_fraction=near_fraction, rest_edges=edges)
    big = np.bincount(codes, minlength=len(STRATA)).astype(np.int64)
    sd = _prior_sd(p, codes, floor)
    used = list(design_codes(edges))
    if isinstance(min_per_stratum, bool) or not isinstance(min_per_stratum, (int, np.integer)):
        raise DesignError(f"expected min_per_stratum to be an int >= 1, got {min_per_stratum!r}")
    if isinstance(n, (int, np.integer)) and not isinstance(n, bool) and min_per_stratum >= 1:
        min_per_stratum = max(1, min(int(min_per_stratum), int(n) // int((big > 0).sum())))
    alloc = np.zeros(len(STRATA), dtype=np.int64)
    alloc[used] = allocate(big[used], n, prior_sd=sd[used], min_per_stratum=min_per_stratum)
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
        rest_edges=edges,
    )


def draw_more(
    probabilities: ArrayLike,
    threshold: float,
    n: int,
    *,
    seed: int,
    sampled: ArrayLike,
    near_fraction: float = 0.2,
    rest_edges: tuple[float, ...] | list[float] = (),
    min_per_stratum: int = 20,
    prior_floor: float = 0.05,
) -> JobSample:
    """Draw n more cells of an earlier sample, from the cells it has not drawn yet.

    The strata are those of the earlier sample (its ``near_fraction`` and ``rest_edges``);
    the n cells are shared out over the cells not yet drawn by the allocation rule of the
    module docstring (floor, then Neyman weights ``(N_h - n_h) * S_h`` with ``S_h`` from
    the whole stratum), then drawn by simple random sampling without replacement within
    each stratum. A cell already drawn, answered or not, is never drawn again.

    Args:
        probabilities: (n_cells,) screening probability of every cell of the scan (the
            same cells, in the same order, as the earlier draw saw).
        threshold: the model's screening threshold t in (0, 1].
        n: cells wanted now, 1 <= n <= cells not yet drawn.
        seed: seed of this draw's random generator (a non-negative int).
        sampled: (n_cells,) bool, True for the cells the earlier draws took.
        near_fraction: the ``near`` band of the earlier sample.
        rest_edges: the inner ``rest`` edges stored with the earlier sample.
        min_per_stratum: floor of new cells per stratum with cells left (lowered for a
            small n as in :func:`draw_sample`).
        prior_floor: clip of the prior prevalence in the Neyman weights, in (0, 0.5].

    Returns:
        A :class:`JobSample` whose ``index`` lists the new cells only; ``allocated`` and
        ``inclusion_probability`` count every draw: ``(n_h + m_h) / N_h``.

    Raises:
        DesignError: on malformed arguments, or n larger than the cells not yet drawn.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise DesignError(f"expected seed to be a non-negative int, got {seed!r}")
    floor = _check_unit(prior_floor, "prior_floor")
    if floor > 0.5:
        raise DesignError(f"expected prior_floor in (0, 0.5], got {prior_floor!r}")
    p = _check_probabilities(probabilities)
    taken = np.asarray(sampled)
    if taken.shape != p.shape or taken.dtype != bool:
        raise DesignError(
            f"expected sampled as a bool array of shape {p.shape}, got {taken.dtype} {taken.shape}"
        )
    edges = tuple(float(e) for e in rest_edges)
    codes = assign_strata(p, threshold, near_fraction=near_fraction, rest_edges=edges)
    big = np.bincount(codes, minlength=len(STRATA)).astype(np.int64)
    before = np.bincount(codes[taken], minlength=len(STRATA)).astype(np.int64)
    room = big - before
    used = list(design_codes(edges))
    if isinstance(min_per_stratum, bool) or not isinstance(min_per_stratum, (int, np.integer)):
        raise DesignError(f"expected min_per_stratum to be an int >= 1, got {min_per_stratum!r}")
    open_strata = int((room[used] > 0).sum())
    if isinstance(n, (int, np.integer)) and not isinstance(n, bool) and min_per_stratum >= 1:
        min_per_stratum = max(1, min(int(min_per_stratum), int(n) // max(open_strata, 1)))
    if open_strata == 0:
        raise DesignError("expected cells not yet drawn, got none: every cell was drawn")
    sd = _prior_sd(p, codes, floor)
    alloc = np.zeros(len(STRATA), dtype=np.int64)
    alloc[used] = allocate(room[used], n, prior_sd=sd[used], min_per_stratum=min_per_stratum)
    rng = np.random.default_rng(int(seed))
    picks, strata, probs = [], [], []
    for h in range(len(STRATA)):
        if alloc[h] == 0:
            continue
        members = np.flatnonzero((codes == h) & ~taken)
        chosen = np.sort(rng.choice(members, size=int(alloc[h]), replace=False))
        picks.append(chosen)
        strata.append(np.full(chosen.size, h, dtype=np.int8))
        probs.append(np.full(chosen.size, (before[h] + alloc[h]) / big[h]))
    return JobSample(
        index=np.concatenate(picks).astype(np.int64),
        stratum=np.concatenate(strata),
        inclusion_probability=np.concatenate(probs),
        population=big,
        allocated=before + alloc,
        threshold=float(threshold),
        near_low=float(threshold) * float(near_fraction),
        seed=int(seed),
        rest_edges=edges,
    )
