"""Tests for trainkit.jobs.estimate: Cochran's stratified estimators, intervals, thresholds."""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest

from trainkit import metrics as M
from trainkit.jobs.design import draw_sample
from trainkit.jobs.estimate import (
    EstimateError,
    design_weights,
    estimate_job,
    job_threshold_summary,
)

COCHRAN5 = "Cochran (1977), Sampling Techniques, 3rd ed., ch. 5 (stratified random sampling)"
COCHRAN6 = "Cochran (1977), ch. 6 (combined ratio estimate, linearised variance)"

# Hand-worked example. Stratum sizes N = (10, 20, 40) for flagged, near, rest.
# Answered: flagged 5 cells, 4 cracks; near 4 cells, 1 crack; rest 5 cells, 1 crack.
STRATA_HAND = ["flagged"] * 5 + ["near"] * 4 + ["rest"] * 5
ANSWERS_HAND = [1, 1, 1, 1, 0] + [1, 0, 0, 0] + [1, 0, 0, 0, 0]
N_HAND = {"flagged": 10, "near": 20, "rest": 40}


def test_hand_worked_stratified_totals_and_ratio():
    e = estimate_job(STRATA_HAND, ANSWERS_HAND, N_HAND, method="wald")
    # COCHRAN5, Y = sum N_h ybar_h:  10*0.8 + 20*0.25 + 40*0.2 = 8 + 5 + 8 = 21.
    assert e.crack_total.estimate == pytest.approx(21.0)
    # s_h^2 = n/(n-1) ybar (1 - ybar): 5/4*.8*.2 = .2; 4/3*.25*.75 = .25; 5/4*.2*.8 = .2.
    # v = sum N^2 (1 - f) s^2 / n: 100*.5*.2/5 = 2; 400*.8*.25/4 = 20; 1600*.875*.2/5 = 56.
    assert e.crack_total.se == pytest.approx(math.sqrt(78.0))
    # COCHRAN6, R = Y_F / Y = 8/21; v(R) = [(1-R)^2 v_F + R^2 (v_near + v_rest)] / Y^2
    #   = [(13/21)^2 * 2 + (8/21)^2 * 76] / 21^2 = (338 + 4864) / 441 / 441 = 5202 / 194481.
    assert e.recall.estimate == pytest.approx(8 / 21)
    assert e.recall.se == pytest.approx(math.sqrt(5202 / 194481))
    # False alarms: clean 70 - 21 = 49, clean flagged 10 - 8 = 2, A = 2/49;
    # v(A) = [(47/49)^2 * 2 + (2/49)^2 * 76] / 49^2 = (4418 + 304) / 2401 / 2401.
    assert e.false_alarm_rate.estimate == pytest.approx(2 / 49)
    assert e.false_alarm_rate.se == pytest.approx(math.sqrt(4722 / 2401**2))
    assert e.flagged_share == pytest.approx(10 / 70)  # exact: N_F / N
    rows = {r["stratum"]: r for r in e.strata}
    assert (rows["near"]["answered"], rows["near"]["cracks"], rows["near"]["weight"]) == (4, 1, 5.0)


def test_ratio_variance_matches_the_general_combined_ratio_formula():
    # COCHRAN6: v(R) = 1/X^2 sum N_h^2 (1-f_h)/n_h (s_y^2 + R^2 s_x^2 - 2 R s_xy), with
    # y = crack and flagged, x = crack, computed here from the raw answers with numpy.cov.
    e = estimate_job(STRATA_HAND, ANSWERS_HAND, N_HAND, method="wald")
    r, total = e.recall.estimate, e.crack_total.estimate
    strata, ans = np.array(STRATA_HAND), np.array(ANSWERS_HAND, float)
    v = 0.0
    for name, big in N_HAND.items():
        x = ans[strata == name]
        y = x * (name == "flagged")
        c = np.cov(np.vstack([y, x]), ddof=1)
        n = x.size
        v += big**2 * (1 - n / big) / n * (c[0, 0] + r**2 * c[1, 1] - 2 * r * c[0, 1])
    assert e.recall.se**2 == pytest.approx(v / total**2)


def test_enumeration_of_every_stratified_sample_unbiased_total_and_exact_variance():
    # Population: 3 strata of 5, 6, 7 cells, n_h = 2, 3, 2: all 10*20*21 = 4200 samples.
    pop = [np.array([1, 1, 1, 0, 1]), np.array([0, 1, 0, 0, 0, 1]), np.array([0, 0, 1, 0, 0, 0, 0])]
    take = [2, 3, 2]
    names = ["flagged", "near", "rest"]
    sizes = {n: len(v) for n, v in zip(names, pop, strict=True)}
    estimates, var_estimates = [], []
    for combo in itertools.product(
        *[itertools.combinations(range(len(v)), k) for v, k in zip(pop, take, strict=True)]
    ):
        strata = [n for n, c in zip(names, combo, strict=True) for _ in c]
        answers = [int(v[i]) for v, c in zip(pop, combo, strict=True) for i in c]
        e = estimate_job(strata, answers, sizes, method="wald")
        estimates.append(e.crack_total.estimate)
        var_estimates.append(e.crack_total.se**2)
    estimates, var_estimates = np.array(estimates), np.array(var_estimates)
    assert estimates.size == 4200
    # COCHRAN5: the stratified estimate of the total is unbiased.
    true_total = sum(int(v.sum()) for v in pop)
    assert estimates.mean() == pytest.approx(true_total, abs=1e-12)
    # COCHRAN5: V(Y) = sum N_h^2 (1 - f_h) S_h^2 / n_h with S_h^2 (N_h - 1 divisor)
    # equals the variance of the estimate over every possible sample ...
    formula = sum(
        len(v) ** 2 * (1 - k / len(v)) * np.var(v, ddof=1) / k
        for v, k in zip(pop, take, strict=True)
    )
    assert np.var(estimates) == pytest.approx(formula, rel=1e-12)
    # ... and its sample version (s_h^2) is unbiased for it (COCHRAN5).
    assert var_estimates.mean() == pytest.approx(formula, rel=1e-12)


def _population(
    n_cells: int, n_cracks: int, recall: float, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Cells with screening probabilities and truth: 5 % of clean cells flagged, misses low."""
    rng = np.random.default_rng(seed)
    p = rng.beta(0.6, 12.0, n_cells)
    p[rng.random(n_cells) < 0.05] = rng.uniform(0.5, 0.9)
    crack = rng.choice(n_cells, n_cracks, replace=False)
    n_miss = int(round(n_cracks * (1 - recall)))
    p[crack[n_miss:]] = rng.uniform(0.5, 1.0, n_cracks - n_miss) ** 0.3
    p[crack[:n_miss]] = rng.uniform(0.0, 0.5, n_miss) * rng.choice([0.1, 1.0], n_miss)
    y = np.zeros(n_cells, bool)
    y[crack] = True
    return p, y


@pytest.mark.parametrize("recall", [0.95, 0.99])
def test_beta_binomial_interval_coverage_by_simulation(recall):
    # Coverage of the 95 % intervals over 300 seeded samples of one fixed job (the design-
    # based sense: the job is fixed, the sample varies). Target from issue 16: >= 0.93.
    p, y = _population(4000, 150, recall, seed=1)
    flagged = p >= 0.5
    true_r = (y & flagged).sum() / y.sum()
    true_a = (~y & flagged).sum() / (~y).sum()
    hit_r = hit_a = 0
    reps = 300
    for r in range(reps):
        s = draw_sample(p, 0.5, 300, seed=r)
        e = estimate_job(s.stratum, y[s.index], s.population, draws=2000, seed=r)
        hit_r += e.recall.low <= true_r <= e.recall.high
        hit_a += e.false_alarm_rate.low <= true_a <= e.false_alarm_rate.high
    assert hit_r / reps >= 0.93
    assert hit_a / reps >= 0.93


def test_interval_contains_the_estimate_and_is_reproducible_by_seed():
    kw = {"draws": 4000, "seed": 5}
    a = estimate_job(STRATA_HAND, ANSWERS_HAND, N_HAND, **kw)
    b = estimate_job(STRATA_HAND, ANSWERS_HAND, N_HAND, **kw)
    assert a == b
    for f in (a.recall, a.false_alarm_rate, a.crack_total):
        assert f.low <= f.estimate <= f.high
    json.dumps(a.to_dict())


def test_unresolved_cells_are_counted_not_dropped_and_errors_name_the_value():
    e = estimate_job(STRATA_HAND, ANSWERS_HAND, N_HAND, unresolved_strata=["rest", "rest", "near"])
    assert e.unresolved == 3 and {r["stratum"]: r["unresolved"] for r in e.strata}["rest"] == 2
    with pytest.raises(EstimateError, match="no answered cells"):
        estimate_job([], [], N_HAND)
    with pytest.raises(EstimateError, match="'near' has 20 cells but no answered"):
        estimate_job(["flagged", "rest"], [1, 0], N_HAND)
    with pytest.raises(EstimateError, match="'flagged' holds 3 cells but 5"):
        estimate_job(STRATA_HAND, ANSWERS_HAND, {"flagged": 3, "near": 20, "rest": 40})
    with pytest.raises(EstimateError, match="unknown stratum 'middle'"):
        estimate_job(["middle"], [1], N_HAND)
    with pytest.raises(EstimateError, match="unknown interval method 'normal'"):
        estimate_job(STRATA_HAND, ANSWERS_HAND, N_HAND, method="normal")


def test_job_threshold_summary_matches_replicated_cells():
    # Horvitz-Thompson: a cell of weight w counts as w cells. With integer weights the
    # weighted answer equals the unweighted brute force on the cells replicated w times.
    rng = np.random.default_rng(4)
    p = rng.uniform(size=60)
    y = rng.random(60) < p
    w = rng.integers(1, 6, size=60).astype(float)
    rep_p, rep_y = np.repeat(p, w.astype(int)), np.repeat(y, w.astype(int))
    for target in (0.5, 0.8, 0.95, 1.0):
        out = job_threshold_summary(p, y, w, target_recall=target)
        # Brute force: the largest crack probability t with recall(t) >= target.
        ok = [t for t in rep_p[rep_y] if (rep_p[rep_y] >= t).mean() >= target]
        assert out["threshold"] == max(ok)
        t = out["threshold"]
        assert out["false_alarm_rate"] == pytest.approx((rep_p[~rep_y] >= t).mean())
        assert out["flagged_share"] == pytest.approx((rep_p >= t).mean())


@pytest.mark.parametrize("seed", range(6))
def test_job_threshold_is_the_metrics_weighted_threshold_and_a_brute_force_sweep(seed):
    # One estimator, one home: the job's threshold is metrics.weighted_thresholds, and both
    # equal a brute-force sweep over every crack probability of the Horvitz-Thompson
    # weighted recall (Cochran 1977, ch. 5: weight = 1 / inclusion probability).
    rng = np.random.default_rng(seed)
    m = int(rng.integers(5, 90))
    p = rng.uniform(size=m)
    if seed % 2:
        p = np.round(p, 1)  # ties
    y = rng.random(m) < p
    y[0] = True
    w = rng.uniform(0.5, 40.0, size=m)
    for target in (0.3, 0.5, 0.8, 0.9, 0.95, 1.0, float(rng.uniform(0.01, 1.0))):
        out = job_threshold_summary(p, y, w, target_recall=target)
        assert out["threshold"] == M.weighted_thresholds(y, p, w, target_recall=target)
        recall_at = {t: w[y & (p >= t)].sum() / w[y].sum() for t in p[y]}
        ok = [t for t, r in recall_at.items() if r >= target * (1 - 1e-12)]
        assert out["threshold"] == max(ok)
        assert out["recall"] == pytest.approx(recall_at[out["threshold"]])


def test_design_weights_are_inverse_inclusion_probabilities():
    assert design_weights(STRATA_HAND, N_HAND).tolist() == [2.0] * 5 + [5.0] * 4 + [8.0] * 5


@pytest.mark.parametrize(
    ("k", "n", "low", "high"),
    [(81, 263, 0.2527, 0.3676), (15, 148, 0.0578, 0.1617), (0, 20, 0.0, 0.1684)],
)
def test_beta_binomial_reduces_to_clopper_pearson_on_one_huge_stratum(k, n, low, high):
    # With one stratum of 10^8 cells the crack share's interval is the Clopper-Pearson one,
    # whose ends are the Beta(x, n-x+1) and Beta(x+1, n-x) quantiles: Newcombe, R. G. (1998),
    # Statistics in Medicine 17, 857-872, Table I (exact column). Monte Carlo error with
    # 200,000 draws is below 0.002 here.
    big = 10**8
    e = estimate_job(["rest"] * n, [1] * k + [0] * (n - k), {"rest": big}, draws=200_000, seed=1)
    assert e.crack_total.low / big == pytest.approx(low, abs=0.002)
    assert e.crack_total.high / big == pytest.approx(high, abs=0.002)


def test_enumeration_on_the_banded_layout_unbiased_total_and_recall_strata():
    # Five strata (flagged, near, rest-1..3) of 4 cells, 2 answered in each: all 6^5 = 7776
    # samples. The stratified total is unbiased and the mean of its variance estimate is the
    # exact variance sum N_h^2 (1 - f_h) S_h^2 / n_h (COCHRAN5, theorems 5.1-5.4).
    names = ["flagged", "near", "rest-1", "rest-2", "rest-3"]
    pop = [
        np.array(v) for v in ([1, 1, 0, 1], [0, 1, 0, 0], [1, 0, 0, 0], [0, 0, 0, 0], [0, 1, 1, 0])
    ]
    sizes = {n: 4 for n in names}
    est, var, flagged_total = [], [], []
    for combo in itertools.product(*[itertools.combinations(range(4), 2) for _ in names]):
        strata = [n for n, c in zip(names, combo, strict=True) for _ in c]
        answers = [int(v[i]) for v, c in zip(pop, combo, strict=True) for i in c]
        e = estimate_job(strata, answers, sizes, method="wald")
        est.append(e.crack_total.estimate)
        var.append(e.crack_total.se**2)
        flagged_total.append(e.recall.estimate * e.crack_total.estimate)
    truth = sum(int(v.sum()) for v in pop)
    exact = sum(16 * (1 - 2 / 4) * np.var(v, ddof=1) / 2 for v in pop)
    assert np.mean(est) == pytest.approx(truth)
    assert np.mean(var) == pytest.approx(exact)
    # recall's numerator is the flagged stratum alone, whose total is unbiased too.
    assert np.mean(flagged_total) == pytest.approx(int(pop[0].sum()))
    assert {r["stratum"] for r in e.strata} == set(names)


def test_old_three_size_array_still_means_flagged_near_rest():
    by_name = estimate_job(STRATA_HAND, ANSWERS_HAND, N_HAND, method="wald")
    by_array = estimate_job(STRATA_HAND, ANSWERS_HAND, np.array([10, 20, 40]), method="wald")
    assert by_name == by_array


def test_pooled_lean_equals_the_per_stratum_lean_with_one_unflagged_stratum():
    # With one unflagged stratum its pooled pseudo-count is N/N = 1: the two methods are one.
    strata = ["flagged"] * 5 + ["rest"] * 5
    answers = [1, 1, 1, 1, 0] + [1, 0, 0, 0, 0]
    sizes = {"flagged": 10, "rest": 40}
    a = estimate_job(strata, answers, sizes, method="pooled-beta-binomial", draws=4000, seed=2)
    b = estimate_job(strata, answers, sizes, method="beta-binomial", draws=4000, seed=2)
    assert (a.recall.low, a.recall.high) == (b.recall.low, b.recall.high)
    # With several unflagged strata and no miss seen the per-stratum lean adds one phantom
    # miss per stratum (weight N_h / n_h each); the pooled one adds about one in all.
    strata = ["flagged"] * 20 + ["near"] * 20 + [f"rest-{j}" for j in (1, 2, 3) for _ in range(20)]
    answers = [1] * 15 + [0] * 5 + [0] * 80
    sizes = {"flagged": 60, "near": 300, "rest-1": 2000, "rest-2": 2000, "rest-3": 2000}
    a = estimate_job(strata, answers, sizes, method="pooled-beta-binomial", draws=4000, seed=2)
    b = estimate_job(strata, answers, sizes, method="beta-binomial", draws=4000, seed=2)
    assert a.recall.low > b.recall.low


def _uninformative_job(n_cells: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Cells whose missed cracks take the probability of a random clean cell below 0.1."""
    p, y = _population(n_cells, 150, 0.95, seed=seed)
    rng = np.random.default_rng(seed)
    pile = p[~y & (p < 0.1)]
    missed = y & (p < 0.5)
    p[missed] = rng.choice(pile, int(missed.sum()))
    return p, y


@pytest.mark.parametrize("job", ["misses low", "misses spread over rest"])
def test_default_banded_design_and_pooled_interval_cover_by_simulation(job):
    # The new default (rest cut into 3 bands, pooled-beta-binomial) over 250 seeded samples
    # of one fixed job, including one where p says nothing about where in the rest pile
    # the misses are. Target from issue 16: coverage >= 0.93.
    p, y = (
        _population(4000, 150, 0.95, seed=2) if job == "misses low" else _uninformative_job(4000, 3)
    )
    flagged = p >= 0.5
    true_r = (y & flagged).sum() / y.sum()
    true_a = (~y & flagged).sum() / (~y).sum()
    hit_r = hit_a = 0
    reps = 250
    for r in range(reps):
        s = draw_sample(p, 0.5, 200, seed=r)
        assert len(s.rest_edges) == 2
        e = estimate_job(s.stratum, y[s.index], s.population, draws=2000, seed=r)
        assert e.recall.method == "pooled-beta-binomial"
        hit_r += e.recall.low <= true_r <= e.recall.high
        hit_a += e.false_alarm_rate.low <= true_a <= e.false_alarm_rate.high
    assert hit_r / reps >= 0.93
    assert hit_a / reps >= 0.93
