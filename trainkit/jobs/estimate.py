"""Estimate a job's crack recall, false-alarm rate and flagged share from its answered sample.

Point estimates and standard errors are the textbook ones for stratified simple random
sampling (Cochran, *Sampling Techniques*, 3rd ed. 1977):

- stratum total ``Y_h = N_h * x_h / n_h`` (x_h cracks among n_h answered cells); the
  job's crack total ``Y = sum_h Y_h`` with variance
  ``v(Y) = sum_h N_h^2 (1 - f_h) s_h^2 / n_h``, ``f_h = n_h / N_h`` and ``s_h^2`` the
  sample variance of the 0/1 answers (ch. 5);
- recall ``R = Y_F / Y`` (cracks among flagged over all cracks) is a combined ratio
  estimate (ch. 6). Because ``flagged`` is a stratum its numerator comes from that stratum
  alone, and the linearised variance reduces to
  ``v(R) = [(1 - R)^2 v(Y_F) + R^2 (v(Y_near) + v(Y_rest))] / Y^2``;
- false-alarm rate ``A = C_F / C`` (clean flagged over all clean, ``C_h = N_h - Y_h``)
  likewise, with ``v(C_h) = v(Y_h)``;
- flagged share ``N_F / N`` is known exactly: every cell's probability is in the census.

The strata are any of ``STRATA`` (``flagged``, ``near`` and either ``rest`` or the bands
``rest-1`` ... ``rest-k`` of :mod:`trainkit.jobs.design`); ``flagged`` is recall's
numerator, every other stratum holds misses.

Intervals: Wald intervals (estimate ± z·se) under-cover where recall is near 1 and few
misses are seen; the default is a conservative beta-binomial Monte Carlo interval after
Webber ("Approximate recall confidence intervals", ACM TOIS 31(1), 2013), its lean
pooled over the unflagged strata, with Korn-Graubard (Survey Methodology 24(2), 1998), Jeffreys and Wald for comparison: see
:mod:`trainkit.jobs.intervals`.

Unsure or unanswered cells are counted per stratum and reported; the estimate treats the
answered cells of a stratum as a simple random sample of it (missing at random).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from trainkit.core.errors import TrainkitError
from trainkit.jobs.design import STRATA
from trainkit.jobs.intervals import FLAGGED, korn_graubard, simulated_intervals
from trainkit.metrics import weighted_thresholds

__all__ = [
    "JOB_INTERVAL_METHODS",
    "EstimateError",
    "Figure",
    "JobEstimate",
    "design_weights",
    "estimate_job",
    "job_threshold_summary",
    "stratum_counts",
]

JOB_INTERVAL_METHODS: tuple[str, ...] = (
    "pooled-beta-binomial",
    "beta-binomial",
    "jeffreys",
    "korn-graubard",
    "wald",
)

#: Stratum sizes given as an array of this length are the original three-stratum layout
#: (flagged, near, rest), kept for callers and stored samples from before the rest bands.
_OLD_LAYOUT = 3


class EstimateError(TrainkitError):
    """Answers or stratum sizes from which no estimate can be made."""


@dataclass(frozen=True)
class Figure:
    """One estimated figure with its interval.

    Attributes:
        estimate: the design (Cochran) estimate.
        low: lower end of the interval.
        high: upper end of the interval.
        se: linearised standard error (nan where a stratum has one answered cell).
        method: interval method name.
        confidence: two-sided level.
    """

    estimate: float
    low: float
    high: float
    se: float
    method: str
    confidence: float


@dataclass(frozen=True)
class JobEstimate:
    """A job's estimates at the model's threshold, with the counts behind them.

    Attributes:
        recall: crack recall (cracks among flagged / all cracks).
        false_alarm_rate: clean flagged / all clean.
        crack_total: estimated number of crack cells in the job.
        flagged_share: flagged cells / all cells, exact (from the census of probabilities).
        strata: per non-empty stratum: name, cells N_h, answered n_h, cracks x_h,
            unresolved (unsure or unanswered) count, weight N_h / n_h.
        answered: answered cells in all.
        unresolved: unsure or unanswered sampled cells in all.
    """

    recall: Figure
    false_alarm_rate: Figure
    crack_total: Figure
    flagged_share: float
    strata: list[dict[str, Any]]
    answered: int
    unresolved: int

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (nan becomes None)."""

        def clean(v: Any) -> Any:
            if isinstance(v, float) and not math.isfinite(v):
                return None
            if isinstance(v, dict):
                return {k: clean(x) for k, x in v.items()}
            if isinstance(v, list):
                return [clean(x) for x in v]
            return v

        return clean(asdict(self))


def _codes(strata: ArrayLike, name: str) -> np.ndarray:
    arr = np.asarray(strata)
    if arr.ndim != 1:
        raise EstimateError(f"expected {name} as a 1-D array, got shape {arr.shape}")
    if arr.size == 0:
        return np.zeros(0, dtype=np.int64)
    if arr.dtype.kind in "USO":
        lookup = {s: i for i, s in enumerate(STRATA)}
        bad = sorted({str(s) for s in arr.tolist() if s not in lookup})
        if bad:
            raise EstimateError(
                f"unknown stratum {bad[0]!r} in {name}; choose one of: {', '.join(STRATA)}"
            )
        return np.array([lookup[s] for s in arr.tolist()], dtype=np.int64)
    if arr.dtype.kind not in "iu" or arr.min() < 0 or arr.max() >= len(STRATA):
        raise EstimateError(
            f"expected {name} as stratum codes 0..{len(STRATA) - 1} or names "
            f"({', '.join(STRATA)}), got {arr.dtype} values {np.unique(arr)[:5].tolist()}"
        )
    return arr.astype(np.int64)


def _population(population: ArrayLike | Mapping[str, int]) -> np.ndarray:
    if isinstance(population, Mapping):
        unknown = sorted(set(population) - set(STRATA))
        if unknown:
            raise EstimateError(
                f"unknown stratum {unknown[0]!r} in population; choose one of: {', '.join(STRATA)}"
            )
        population = [population.get(s, 0) for s in STRATA]
    big = np.asarray(population)
    if big.shape == (_OLD_LAYOUT,) and big.dtype.kind in "iu":
        big = np.concatenate([big, np.zeros(len(STRATA) - _OLD_LAYOUT, dtype=big.dtype)])
    if big.shape != (len(STRATA),) or big.dtype.kind not in "iu" or big.min() < 0:
        raise EstimateError(
            f"expected {len(STRATA)} (or the first {_OLD_LAYOUT}) non-negative integer "
            f"stratum sizes ({', '.join(STRATA)}), got {population!r}"
        )
    return big.astype(np.int64)


def stratum_counts(
    answered_strata: ArrayLike,
    answers: ArrayLike,
    population: ArrayLike | Mapping[str, int],
    unresolved_strata: ArrayLike = (),
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Validate the answered sample and count it per stratum.

    Args:
        answered_strata: (m,) stratum (code or name) of each answered cell.
        answers: (m,) bool, True where the person saw a crack.
        population: stratum sizes N_h, in ``STRATA`` order (or only the first three, the
            original layout) or as a name -> size mapping.
        unresolved_strata: stratum of each sampled cell answered unsure or not at all.

    Returns:
        ``(N_h, n_h, x_h, u_h)``: sizes, answered, cracks, unresolved; int64 arrays.

    Raises:
        EstimateError: on no answered cells, a non-empty stratum without answers, more
            sampled cells than a stratum holds, or malformed arrays.
    """
    codes = _codes(answered_strata, "answered_strata")
    y = np.asarray(answers)
    if y.shape != codes.shape or (y.size and y.dtype.kind not in "bui"):
        raise EstimateError(
            f"expected one bool answer per answered cell ({codes.size}), got shape {y.shape}"
        )
    if y.size and not np.isin(y, (0, 1)).all():
        raise EstimateError("expected answers as bool or 0/1 (crack / no crack)")
    if codes.size == 0:
        raise EstimateError("no answered cells: answer some sampled cells before estimating")
    big = _population(population)
    k = len(STRATA)
    answered = np.bincount(codes, minlength=k).astype(np.int64)
    cracks = np.bincount(codes, weights=y.astype(np.float64), minlength=k).astype(np.int64)
    unresolved = np.bincount(_codes(unresolved_strata, "unresolved_strata"), minlength=k)
    for h, name in enumerate(STRATA):
        if answered[h] + unresolved[h] > big[h]:
            raise EstimateError(
                f"stratum {name!r} holds {big[h]} cells but {answered[h] + unresolved[h]} "
                "were sampled from it (answered + unresolved)"
            )
        if big[h] > 0 and answered[h] == 0:
            raise EstimateError(
                f"stratum {name!r} has {big[h]} cells but no answered ones "
                f"({unresolved[h]} unresolved): answer at least one of its sampled cells"
            )
    return big, answered, cracks, unresolved.astype(np.int64)


def _totals(big: np.ndarray, n: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Stratum crack totals and their estimated variances (Cochran ch. 5, binary y)."""
    nz = np.maximum(n, 1)
    mean = np.where(big > 0, x / nz, 0.0)
    f = np.where(big > 0, n / np.maximum(big, 1), 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        s2 = np.where(n > 1, n * mean * (1.0 - mean) / (n - 1), np.nan)
        var = np.where(f >= 1.0, 0.0, big.astype(float) ** 2 * (1.0 - f) * s2 / nz)
    return big * mean, var


def _ratio_var(r: float, var_top: float, var_other: float, den: float) -> float:
    """Linearised variance of a combined ratio whose numerator is the flagged stratum."""
    if den <= 0:
        return math.nan
    return ((1.0 - r) ** 2 * var_top + r**2 * var_other) / den**2


def estimate_job(
    answered_strata: ArrayLike,
    answers: ArrayLike,
    population: ArrayLike | Mapping[str, int],
    *,
    unresolved_strata: ArrayLike = (),
    confidence: float = 0.95,
    method: str = "pooled-beta-binomial",
    draws: int = 20000,
    prior: float = 0.5,
    seed: int = 0,
) -> JobEstimate:
    """The job's recall, false-alarm rate, crack total and flagged share at the threshold.

    Args:
        answered_strata: (m,) stratum (code or name) of each answered cell.
        answers: (m,) bool, True where the person saw a crack.
        population: stratum sizes N_h (``STRATA`` order, or a name -> size mapping).
        unresolved_strata: stratum of each sampled cell answered unsure or not at all.
        confidence: two-sided level in (0, 1).
        method: one of ``JOB_INTERVAL_METHODS`` (see the module docstring).
        draws: Monte Carlo draws of the beta-binomial method (>= 1000).
        prior: the beta prior's two hyperparameters (0.5: Jeffreys).
        seed: seed of the Monte Carlo draws (same inputs and seed, same interval).

    Returns:
        The :class:`JobEstimate`.

    Raises:
        EstimateError: on an unknown method, bad options, or answers no estimate can use.
    """
    if method not in JOB_INTERVAL_METHODS:
        raise EstimateError(
            f"unknown interval method {method!r}; choose one of: {', '.join(JOB_INTERVAL_METHODS)}"
        )
    if not isinstance(confidence, (int, float)) or not 0.0 < float(confidence) < 1.0:
        raise EstimateError(f"expected confidence in (0, 1), got {confidence!r}")
    if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 1000:
        raise EstimateError(f"expected draws to be an int >= 1000, got {draws!r}")
    if not isinstance(prior, (int, float)) or not float(prior) > 0.0:
        raise EstimateError(f"expected a positive prior hyperparameter, got {prior!r}")
    big, n, x, u = stratum_counts(answered_strata, answers, population, unresolved_strata)
    conf = float(confidence)
    total_cells = int(big.sum())
    y_h, v_h = _totals(big, n, x)
    y_tot, v_tot = float(y_h.sum()), float(v_h.sum())
    c_tot = total_cells - y_tot
    c_flag = float(big[FLAGGED] - y_h[FLAGGED])
    v_other = float(v_h.sum() - v_h[FLAGGED])
    recall = y_h[FLAGGED] / y_tot if y_tot > 0 else math.nan
    fa = c_flag / c_tot if c_tot > 0 else math.nan
    se_r = math.sqrt(_ratio_var(recall, v_h[FLAGGED], v_other, y_tot)) if y_tot > 0 else math.nan
    se_a = math.sqrt(_ratio_var(fa, v_h[FLAGGED], v_other, c_tot)) if c_tot > 0 else math.nan
    se_y = math.sqrt(v_tot)
    z = float(stats.norm.ppf(1 - (1 - conf) / 2))

    def wald(est: float, se: float, unit: bool = True) -> tuple[float, float]:
        if not (math.isfinite(est) and math.isfinite(se)):
            return math.nan, math.nan
        low, high = est - z * se, est + z * se
        return (max(0.0, low), min(1.0, high)) if unit else (max(0.0, low), high)

    if method in ("pooled-beta-binomial", "beta-binomial", "jeffreys"):
        r_int, a_int, y_int = simulated_intervals(
            big, n, x, (recall, fa, y_tot), conf, method, int(draws), float(prior), int(seed)
        )
    elif method == "korn-graubard":
        df = int(n.sum()) - int((big > 0).sum())
        r_int = korn_graubard(recall, se_r**2, int(x.sum()), df, conf)
        a_int = korn_graubard(fa, se_a**2, int((n - x).sum()), df, conf)
        y_int = wald(y_tot, se_y, unit=False)
    else:
        r_int, a_int, y_int = wald(recall, se_r), wald(fa, se_a), wald(y_tot, se_y, unit=False)
    weight = np.where(n > 0, big / np.maximum(n, 1), 0.0)
    table = [
        {
            "stratum": name,
            "cells": int(big[h]),
            "answered": int(n[h]),
            "cracks": int(x[h]),
            "unresolved": int(u[h]),
            "weight": float(weight[h]),
        }
        for h, name in enumerate(STRATA)
        if big[h] > 0 or n[h] > 0 or u[h] > 0
    ]
    return JobEstimate(
        recall=Figure(float(recall), *r_int, se_r, method, conf),
        false_alarm_rate=Figure(float(fa), *a_int, se_a, method, conf),
        crack_total=Figure(y_tot, *y_int, se_y, method, conf),
        flagged_share=float(big[FLAGGED] / total_cells),
        strata=table,
        answered=int(n.sum()),
        unresolved=int(u.sum()),
    )


def design_weights(
    answered_strata: ArrayLike, population: ArrayLike | Mapping[str, int]
) -> np.ndarray:
    """Design weight ``N_h / n_h`` (1 / inclusion probability) of every answered cell.

    Args:
        answered_strata: (m,) stratum (code or name) of each answered cell.
        population: stratum sizes N_h.

    Returns:
        (m,) float64 weights.
    """
    codes = _codes(answered_strata, "answered_strata")
    big = _population(population)
    n = np.bincount(codes, minlength=len(STRATA))
    if np.any(n > big):
        raise EstimateError(
            f"more answered cells per stratum {n.tolist()} than cells {big.tolist()}"
        )
    return (big / np.maximum(n, 1))[codes].astype(np.float64)


def job_threshold_summary(
    probabilities: ArrayLike,
    answers: ArrayLike,
    weights: ArrayLike,
    *,
    target_recall: float,
    census_probabilities: ArrayLike | None = None,
) -> dict[str, Any]:
    """The highest threshold whose estimated recall on this job reaches the target, with
    the figures a person weighs it by.

    The threshold itself is :func:`trainkit.metrics.weighted_thresholds` (recall at t is
    the design-weighted share of answered crack cells with ``p >= t``, Horvitz-Thompson
    totals, weights 1 / inclusion probability). The false-alarm rate at t is the weighted share of answered clean cells with
    ``p >= t``; the flagged share is exact when the census of all cells' probabilities is
    given, else weighted. The threshold is chosen on these same cells, so its recall is an
    optimistic point estimate: check it again on cells it was not chosen on.

    Args:
        probabilities: (m,) screening probability of each answered cell.
        answers: (m,) bool, True for crack.
        weights: (m,) design weights (see :func:`design_weights`).
        target_recall: in (0, 1].
        census_probabilities: optional probabilities of every cell of the job.

    Returns:
        Dict with threshold, estimated recall, false_alarm_rate, flagged_share,
        flagged_share_exact (bool), target_recall and the cracks answered.

    Raises:
        EstimateError: on no answered crack cell, a target outside (0, 1] or bad arrays.
    """
    p = np.asarray(probabilities, dtype=np.float64)
    y = np.asarray(answers).astype(bool)
    w = np.asarray(weights, dtype=np.float64)
    if p.ndim != 1 or y.shape != p.shape or w.shape != p.shape:
        raise EstimateError(
            f"expected probabilities, answers, weights of one shape, got {p.shape}, {y.shape}, {w.shape}"
        )
    if not isinstance(target_recall, (int, float)) or not 0.0 < float(target_recall) <= 1.0:
        raise EstimateError(f"expected target_recall in (0, 1], got {target_recall!r}")
    if not y.any():
        raise EstimateError("no answered crack cell: a recall threshold needs at least one")
    if np.any(w <= 0) or not np.all(np.isfinite(w)):
        raise EstimateError("expected positive finite design weights")
    t = weighted_thresholds(y, p, w, target_recall=float(target_recall))
    order = np.argsort(-p[y], kind="stable")
    crack_p, crack_w = p[y][order], w[y][order]
    clean_w = w[~y].sum()
    fa = float(w[~y & (p >= t)].sum() / clean_w) if clean_w > 0 else math.nan
    if census_probabilities is not None:
        share, exact = float(np.mean(np.asarray(census_probabilities) >= t)), True
    else:
        share, exact = float(w[p >= t].sum() / w.sum()), False
    return {
        "threshold": t,
        "target_recall": float(target_recall),
        "recall": float(crack_w[crack_p >= t].sum() / crack_w.sum()),
        "false_alarm_rate": fa,
        "flagged_share": share,
        "flagged_share_exact": exact,
        "cracks_answered": int(y.sum()),
    }
