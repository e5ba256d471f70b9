"""Interval methods for a job's recall and false-alarm rate from a stratified sample.

- ``"pooled-beta-binomial"`` (default): as ``"beta-binomial"`` below, but the one
  pseudo-crack by which the Clopper-Pearson lean moves the unflagged side is shared out
  over the unflagged strata in proportion to their sizes ``N_h`` instead of added to each
  of them. With one unflagged stratum the two are the same; with several (the ``near``
  band and the ``rest`` bands) the per-stratum lean adds ``sum_h N_h / n_h`` phantom
  misses where the pooled one adds about ``N_unflagged / n_unflagged``, which is what
  made finer strata widen the interval instead of narrowing it. The pooling is this
  module's own rule (no published source known; from memory, spreading one prior
  pseudo-observation over strata by their weights is the usual way to keep a stratified
  Bayesian prior from growing with the number of strata); its coverage is measured in
  the tests and in ``benchmarks/job_intervals.py``, not assumed.
- ``"beta-binomial"``: the Monte Carlo method Webber recommends for recall
  ("Approximate recall confidence intervals", ACM TOIS 31(1), 2013: beta-binomial
  posteriors on the retrieved and unretrieved yield, fixed hyperparameters, and the
  posterior of recall by simulation), extended from two segments to the strata and
  made conservative in the manner of the Clopper-Pearson interval, one pseudo-count per
  stratum (see :func:`simulated_intervals`); the default before the ``rest`` bands.
- ``"jeffreys"``: the same with one set of draws and ``Beta(x + 0.5, n - x + 0.5)`` rates
  (Webber's fixed-hyperparameter form; the value 0.5 recalled from memory). It
  under-covers recall when a miss is seen in the large ``rest`` stratum, and badly with
  the ``rest`` bands (one half pseudo-count per band; see benchmarks/results/lab_notes.md).
- ``"korn-graubard"``: Clopper-Pearson on the effective sample size (Korn and Graubard
  1998, Survey Methodology 24(2)), the usual survey interval for proportions near 0 or 1.
- ``"wald"``: estimate ± z·se, for comparison only.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

__all__ = ["FLAGGED", "korn_graubard", "posterior_totals", "simulated_intervals"]

#: Code of the flagged stratum (the numerator of recall).
FLAGGED = 0


def posterior_totals(
    big: np.ndarray,
    n: np.ndarray,
    x: np.ndarray,
    draws: int,
    shift: np.ndarray,
    prior: float,
    rng: np.random.Generator,
    lean: np.ndarray | None = None,
) -> np.ndarray:
    """(draws, strata) crack totals from per-stratum beta-binomial posteriors.

    The crack rate of stratum h is drawn from ``Beta(x_h + a_h, n_h - x_h + b_h)`` with
    ``(a_h, b_h) = (prior, prior)`` where ``shift[h] == 0``, ``(w_h, 0)`` where
    ``shift[h] > 0`` and ``(0, w_h)`` where ``shift[h] < 0``, ``w_h = lean[h]`` (default 1:
    the Clopper-Pearson ends; a zero first or second parameter is a point mass at 0 or 1);
    the cracks among the unanswered ``N_h - n_h`` cells are binomial given it.
    """
    out = np.empty((draws, big.size))
    w = np.ones(big.size) if lean is None else np.asarray(lean, dtype=np.float64)
    for h in range(big.size):
        unseen = int(big[h] - n[h])
        a, b = {0: (prior, prior), 1: (w[h], 0.0), -1: (0.0, w[h])}[int(np.sign(shift[h]))]
        alpha, beta = x[h] + a, n[h] - x[h] + b
        if unseen == 0:
            out[:, h] = x[h]
            continue
        if alpha <= 0:
            rate = np.zeros(draws)
        elif beta <= 0:
            rate = np.ones(draws)
        else:
            rate = rng.beta(alpha, beta, size=draws)
        out[:, h] = x[h] + rng.binomial(unseen, rate)
    return out


def korn_graubard(p: float, var: float, n_domain: int, df: int, conf: float) -> tuple[float, float]:
    """Clopper-Pearson on the effective sample size (Korn and Graubard 1998)."""
    alpha = 1.0 - conf
    if not math.isfinite(p):
        return math.nan, math.nan
    n_eff = p * (1 - p) / var if (0 < p < 1 and var > 0) else float(n_domain)
    n_eff = min(n_eff, float(n_domain)) if n_domain > 0 else n_eff
    if df > 0:
        ratio = stats.norm.ppf(1 - alpha / 2) / stats.t.ppf(1 - alpha / 2, df)
        n_eff *= ratio**2
    if n_eff <= 0:
        return 0.0, 1.0
    k = p * n_eff
    low = 0.0 if k <= 0 else float(stats.beta.ppf(alpha / 2, k, n_eff - k + 1))
    high = 1.0 if k >= n_eff else float(stats.beta.ppf(1 - alpha / 2, k + 1, n_eff - k))
    return low, high


def simulated_intervals(
    big: np.ndarray,
    n: np.ndarray,
    x: np.ndarray,
    point: tuple[float, float, float],
    conf: float,
    method: str,
    draws: int,
    prior: float,
    seed: int,
) -> tuple[tuple[float, float], ...]:
    """Recall, false-alarm and crack-total intervals from posterior draws of the totals.

    ``"jeffreys"``: one set of draws, every stratum with a ``Beta(x + 0.5, n - x + 0.5)``
    rate, central quantiles. ``"pooled-beta-binomial"``: as ``"beta-binomial"`` with the
    unflagged strata's pseudo-count ``N_h / sum(N_unflagged)`` instead of 1 each.
    ``"beta-binomial"``: two sets in the manner of the
    Clopper-Pearson interval, whose ends are the quantiles of ``Beta(x, n - x + 1)`` and
    ``Beta(x + 1, n - x)``: the low end of recall (and high end of false alarms) from draws
    that lean every stratum's rate toward more misses (flagged: fewer cracks, near and
    rest: more), the high end from draws leaning the other way. Recall rises with the
    flagged total and falls with the others; the false-alarm rate does the opposite, so
    each end takes the quantile of the draws that favour it.
    """
    rng = np.random.default_rng(seed)
    k = big.size
    lean = np.array([-1] + [1] * (k - 1))  # toward low recall, high false alarms
    weight = np.ones(k)
    if method == "pooled-beta-binomial":
        unflagged = np.arange(k) != FLAGGED
        weight[unflagged] = big[unflagged] / max(int(big[unflagged].sum()), 1)
    if method == "jeffreys":
        pess = opt = posterior_totals(big, n, x, draws, np.zeros(k), prior, rng)
    else:
        pess = posterior_totals(big, n, x, draws, lean, prior, rng, weight)
        opt = posterior_totals(big, n, x, draws, -lean, prior, rng, weight)
    total_cells = int(big.sum())
    lo_q, hi_q = (1 - conf) / 2, 1 - (1 - conf) / 2

    def figures(sims: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        y_sim = sims.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            r_sim = sims[:, FLAGGED] / y_sim
            a_sim = (big[FLAGGED] - sims[:, FLAGGED]) / (total_cells - y_sim)
        return r_sim, a_sim, y_sim

    def q(sim: np.ndarray, level: float) -> float:
        ok = sim[np.isfinite(sim)]
        return float(np.quantile(ok, level)) if ok.size else math.nan

    r_p, a_p, y_p = figures(pess)
    r_o, a_o, y_o = figures(opt)
    ends = (
        (q(r_p, lo_q), q(r_o, hi_q)),
        (q(a_o, lo_q), q(a_p, hi_q)),
        (q(y_o, lo_q), q(y_p, hi_q)),
    )
    # Widen to contain the design estimate where the two disagree (no misses seen).
    return tuple(
        (min(lo, est), max(hi, est)) if math.isfinite(est) else (math.nan, math.nan)
        for (lo, hi), est in zip(ends, point, strict=True)
    )
