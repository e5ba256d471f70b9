"""Tests for trainkit.metrics against published values, reference libraries and properties."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn import metrics as skm

from trainkit import metrics as M

NEWCOMBE = "Newcombe, R. G. (1998). Statistics in Medicine 17, 857-872, Table I"


def _pairs_from_table(table: list[list[int]]) -> tuple[np.ndarray, np.ndarray]:
    """Expand a contingency table (rows = first variable) into paired label arrays."""
    a, b = [], []
    for i, row in enumerate(table):
        for j, count in enumerate(row):
            a += [i] * count
            b += [j] * count
    return np.array(a), np.array(b)


# --------------------------------------------------------------------------- confusion matrix


def test_confusion_matrix_hand_case_keeps_absent_class_row():
    # Hand-made: class 2 never occurs in y_true or y_pred; its row and column stay zero.
    y_true = [0, 0, 1, 1, 3, 3, 3]
    y_pred = [0, 1, 1, 1, 0, 3, 3]
    expected = np.array(
        [
            [1, 1, 0, 0],
            [0, 2, 0, 0],
            [0, 0, 0, 0],
            [1, 0, 0, 2],
        ]
    )
    cm = M.confusion_matrix(y_true, y_pred, labels=[0, 1, 2, 3])
    np.testing.assert_array_equal(cm, expected)
    np.testing.assert_array_equal(cm, skm.confusion_matrix(y_true, y_pred, labels=[0, 1, 2, 3]))


def test_confusion_matrix_rejects_values_outside_labels():
    with pytest.raises(
        ValueError, match=r"expected every value of y_pred to be one of labels \[0, 1\], got \[5\]"
    ):
        M.confusion_matrix([0, 1], [0, 5], labels=[0, 1])


def test_confusion_matrix_rejects_length_mismatch_and_missing_labels():
    with pytest.raises(ValueError, match="same length, got 3 and 2"):
        M.confusion_matrix([0, 1, 1], [0, 1], labels=[0, 1])
    with pytest.raises(TypeError, match="labels is required"):
        M.confusion_matrix([0, 1], [0, 1], labels=None)
    with pytest.raises(ValueError, match="shape"):
        M.confusion_matrix([[0, 1]], [[0, 1]], labels=[0, 1])


def test_confusion_matrix_empty_input_is_all_zero():
    np.testing.assert_array_equal(M.confusion_matrix([], [], labels=[0, 1, 2]), np.zeros((3, 3)))


def test_confusion_matrix_is_order_invariant():
    rng = np.random.default_rng(0)
    y_true = rng.integers(0, 4, 200)
    y_pred = rng.integers(0, 3, 200)  # class 3 never predicted -> zero column
    perm = rng.permutation(200)
    cm = M.confusion_matrix(y_true, y_pred, labels=[0, 1, 2, 3])
    np.testing.assert_array_equal(
        cm, M.confusion_matrix(y_true[perm], y_pred[perm], labels=[0, 1, 2, 3])
    )
    assert cm.sum() == 200
    assert (cm[:, 3] == 0).all()


def test_row_normalise_keeps_zero_rows_at_zero():
    cm = np.array([[3, 1, 0], [0, 0, 0], [2, 2, 4]])
    out = M.row_normalise(cm)
    assert not np.isnan(out).any()
    np.testing.assert_allclose(out, [[0.75, 0.25, 0.0], [0.0, 0.0, 0.0], [0.25, 0.25, 0.5]])


def test_row_normalise_rejects_bad_input():
    with pytest.raises(ValueError, match=r"expected a 2-D matrix, got shape \(3,\)"):
        M.row_normalise([1, 2, 3])
    with pytest.raises(ValueError, match="non-negative"):
        M.row_normalise([[1, -1], [0, 1]])


# --------------------------------------------------------------------------- intervals

# (x, n, Wilson score low, high, Clopper-Pearson low, high): Newcombe (1998) Table I.
NEWCOMBE_TABLE_I = [
    (81, 263, 0.2553, 0.3662, 0.2527, 0.3676),
    (15, 148, 0.0624, 0.1605, 0.0578, 0.1617),
    (0, 20, 0.0000, 0.1611, 0.0000, 0.1684),
    (1, 29, 0.0061, 0.1718, 0.0009, 0.1776),
]


@pytest.mark.parametrize("k,n,w_lo,w_hi,cp_lo,cp_hi", NEWCOMBE_TABLE_I)
def test_wilson_matches_newcombe_1998_table_i(k, n, w_lo, w_hi, cp_lo, cp_hi):
    # Source: Newcombe, R. G. (1998). Two-sided confidence intervals for the single proportion:
    # comparison of seven methods. Statistics in Medicine 17, 857-872, Table I (method 3).
    iv = M.recall_interval(k, n, confidence=0.95, method="wilson")
    assert iv.low == pytest.approx(w_lo, abs=5e-5), NEWCOMBE
    assert iv.high == pytest.approx(w_hi, abs=5e-5), NEWCOMBE
    # Reference library: scipy.stats.binomtest(...).proportion_ci(method='wilson').
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    assert iv.low == pytest.approx(ref.low, abs=1e-12)
    assert iv.high == pytest.approx(ref.high, abs=1e-12)


@pytest.mark.parametrize("k,n,w_lo,w_hi,cp_lo,cp_hi", NEWCOMBE_TABLE_I)
def test_clopper_pearson_matches_newcombe_1998_table_i(k, n, w_lo, w_hi, cp_lo, cp_hi):
    # Source: Newcombe, R. G. (1998). Statistics in Medicine 17, 857-872, Table I
    # (Clopper-Pearson "exact" column, recomputed with scipy and statsmodels).
    for method in ("clopper-pearson", "exact"):
        iv = M.recall_interval(k, n, confidence=0.95, method=method)
        assert iv.method == "clopper-pearson"
        assert iv.low == pytest.approx(cp_lo, abs=5e-5), NEWCOMBE
        assert iv.high == pytest.approx(cp_hi, abs=5e-5), NEWCOMBE
    # Reference library: scipy.stats.binomtest(...).proportion_ci(method='exact').
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
    assert iv.low == pytest.approx(ref.low, abs=1e-10)
    assert iv.high == pytest.approx(ref.high, abs=1e-10)


@pytest.mark.parametrize("k,n,w_lo,w_hi,cp_lo,cp_hi", NEWCOMBE_TABLE_I)
def test_intervals_match_statsmodels(k, n, w_lo, w_hi, cp_lo, cp_hi):
    # Reference library: statsmodels proportion_confint; its default is Wald, so name the method.
    from statsmodels.stats import proportion  # dev extra

    for ours, theirs in (("wilson", "wilson"), ("clopper-pearson", "beta")):
        lo, hi = proportion.proportion_confint(k, n, alpha=0.05, method=theirs)
        iv = M.recall_interval(k, n, method=ours)
        assert iv.low == pytest.approx(lo, abs=1e-10)
        assert iv.high == pytest.approx(hi, abs=1e-10)


@settings(max_examples=200, deadline=None)
@given(
    n=st.integers(min_value=1, max_value=5000),
    frac=st.floats(min_value=0.0, max_value=1.0),
    confidence=st.sampled_from([0.5, 0.8, 0.9, 0.95, 0.99, 0.999]),
)
def test_wilson_closed_form_agrees_with_scipy_everywhere(n, frac, confidence):
    k = round(frac * n)
    iv = M.recall_interval(k, n, confidence=confidence, method="wilson")
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=confidence, method="wilson")
    assert iv.low == pytest.approx(ref.low, abs=1e-9)
    assert iv.high == pytest.approx(ref.high, abs=1e-9)
    assert 0.0 <= iv.low <= k / n <= iv.high <= 1.0


def test_interval_zero_trials_is_nan():
    iv = M.recall_interval(0, 0)
    assert math.isnan(iv.low) and math.isnan(iv.high) and math.isnan(iv.estimate)
    assert (iv.k, iv.n, iv.method, iv.confidence) == (0, 0, "wilson", 0.95)


def test_interval_str_and_estimate():
    iv = M.recall_interval(17, 20)
    assert iv.estimate == pytest.approx(0.85)
    assert str(iv) == f"0.8500 [{iv.low:.4f}, {iv.high:.4f}] Wilson 95%, 17/20"
    cp = M.recall_interval(1, 29, confidence=0.9, method="exact")
    assert str(cp).endswith("Clopper-Pearson 90%, 1/29")


def test_interval_rejects_bad_arguments():
    with pytest.raises(
        ValueError, match=r"unknown interval method 'wald'; choose one of: wilson, clopper-pearson"
    ):
        M.recall_interval(1, 2, method="wald")
    with pytest.raises(ValueError, match=r"expected 0 <= k <= n, got k=3, n=2"):
        M.recall_interval(3, 2)
    with pytest.raises(ValueError, match=r"expected confidence in \(0, 1\), got 95"):
        M.recall_interval(1, 2, confidence=95)
    with pytest.raises(TypeError, match="expected k to be an int, got float"):
        M.recall_interval(1.0, 2)


def test_interval_narrows_as_confidence_falls():
    wide = M.recall_interval(30, 50, confidence=0.99)
    narrow = M.recall_interval(30, 50, confidence=0.8)
    assert wide.low < narrow.low < 0.6 < narrow.high < wide.high


# --------------------------------------------------------------------------- per-class report


def test_per_class_report_matches_sklearn_and_keeps_absent_class():
    y_true = [0, 0, 0, 1, 1, 3, 3, 3, 3]
    y_pred = [0, 0, 1, 1, 0, 3, 3, 0, 1]
    report = M.per_class_report(
        y_true, y_pred, labels=[0, 1, 2, 3], class_names=["none", "a", "b", "c"]
    )
    assert [r["name"] for r in report] == ["none", "a", "b", "c"]
    assert [r["index"] for r in report] == [0, 1, 2, 3]
    p, r, f, s = skm.precision_recall_fscore_support(
        y_true, y_pred, labels=[0, 1, 2, 3], zero_division=0
    )
    for i, row in enumerate(report):
        assert row["precision"] == pytest.approx(p[i])
        assert row["recall"] == pytest.approx(r[i])
        assert row["f1"] == pytest.approx(f[i])
        assert row["support"] == s[i]
    # Hand check of class 3: 2 of 4 recalled, and the interval is the Wilson one for 2/4.
    assert report[3]["recall"] == 0.5
    assert report[3]["recall_interval"] == M.recall_interval(2, 4).to_dict()
    # Absent class 2: zero support and an undefined (nan) interval with n == 0.
    absent = report[2]
    assert absent["support"] == 0 and absent["recall_interval"]["n"] == 0
    assert math.isnan(absent["recall_interval"]["low"])


def test_per_class_report_checks_class_names():
    with pytest.raises(ValueError, match=r"expected one class name per label \(3\), got 2 names"):
        M.per_class_report([0, 1], [0, 1], labels=[0, 1, 2], class_names=["x", "y"])


# --------------------------------------------------------------------------- screening


def test_screening_scores_hand_counts_and_sklearn():
    y = np.array([1, 1, 1, 1, 0, 0, 0, 0, 0], dtype=bool)
    p = np.array([0.9, 0.5, 0.49, 0.2, 0.7, 0.5, 0.1, 0.0, 0.3])
    s = M.screening_scores(y, p, threshold=0.5)  # p == 0.5 counts as flagged
    assert (s["tp"], s["fn"], s["fp"], s["tn"]) == (2, 2, 2, 3)
    flagged = p >= 0.5
    assert s["recall"] == pytest.approx(skm.recall_score(y, flagged))
    assert s["precision"] == pytest.approx(skm.precision_score(y, flagged))
    assert s["specificity"] == pytest.approx(skm.recall_score(~y, ~flagged))
    assert s["false_alarm_rate"] == pytest.approx(2 / 5)


def test_screening_scores_undefined_ratios_are_nan():
    s = M.screening_scores([0, 0], [0.1, 0.2], threshold=0.5)
    assert math.isnan(s["recall"]) and math.isnan(s["precision"])
    assert s["specificity"] == 1.0 and s["false_alarm_rate"] == 0.0


def test_screening_scores_validates_inputs():
    with pytest.raises(
        ValueError, match=r"expected p_crack to be finite values in \[0, 1\], got \[1.5\]"
    ):
        M.screening_scores([1, 0], [0.2, 1.5], threshold=0.5)
    with pytest.raises(
        ValueError, match=r"expected y_true_crack to hold bool or 0/1 values, got \[2\]"
    ):
        M.screening_scores([1, 2], [0.2, 0.5], threshold=0.5)
    with pytest.raises(ValueError, match=r"expected threshold in \[0, 1\], got 2"):
        M.screening_scores([1, 0], [0.2, 0.5], threshold=2)


def test_threshold_for_recall_hand_example():
    # Cracks score 0.9, 0.8, 0.6, 0.3; non-cracks 0.7, 0.5, 0.2.
    y = [1, 1, 1, 1, 0, 0, 0]
    p = [0.9, 0.8, 0.6, 0.3, 0.7, 0.5, 0.2]
    assert M.threshold_for_recall(y, p, target_recall=0.5) == 0.8
    assert M.threshold_for_recall(y, p, target_recall=0.75) == 0.6
    assert M.threshold_for_recall(y, p, target_recall=0.76) == 0.3
    assert M.threshold_for_recall(y, p, target_recall=1.0) == 0.3
    assert M.threshold_for_recall(y, p, target_recall=0.01) == 0.9


def test_threshold_for_recall_ties_flag_all_tied_patches():
    # Two cracks tie at 0.6 with one non-crack: the threshold cannot split them.
    y = [1, 1, 1, 0, 0]
    p = [0.9, 0.6, 0.6, 0.6, 0.1]
    t = M.threshold_for_recall(y, p, target_recall=0.5)
    assert t == 0.6
    s = M.screening_scores(y, p, threshold=t)
    assert (s["tp"], s["fp"]) == (3, 1)  # recall 1.0 > target, tied non-crack is a false alarm


def test_threshold_for_recall_float_target_is_not_rounded_up():
    # 0.35 * 20 == 7.000000000000001 in floating point; 7 of 20 cracks already give 0.35.
    y = np.ones(20, dtype=bool)
    p = np.linspace(1.0, 0.05, 20)
    t = M.threshold_for_recall(y, p, target_recall=0.35)
    assert t == p[6]
    assert M.screening_scores(y, p, threshold=t)["recall"] >= 0.35


@settings(max_examples=100, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    n=st.integers(1, 60),
    target=st.floats(min_value=0.01, max_value=1.0),
)
def test_threshold_for_recall_is_the_largest_that_meets_the_target(seed, n, target):
    rng = np.random.default_rng(seed)
    y = rng.random(n) < 0.5
    y[0] = True
    p = np.round(rng.random(n), 2)  # rounding makes ties common
    t = M.threshold_for_recall(y, p, target_recall=target)
    assert M.screening_scores(y, p, threshold=t)["recall"] >= target
    above = np.unique(p[p > t])
    if above.size:  # the next higher candidate threshold must miss the target
        assert M.screening_scores(y, p, threshold=above[0])["recall"] < target
    perm = rng.permutation(n)
    assert M.threshold_for_recall(y[perm], p[perm], target_recall=target) == t


def test_threshold_for_recall_needs_positives_and_valid_target():
    with pytest.raises(ValueError, match="expected at least one crack patch .* got 0 of 3"):
        M.threshold_for_recall([0, 0, 0], [0.1, 0.5, 0.9], target_recall=0.9)
    with pytest.raises(ValueError, match=r"expected target_recall in \(0, 1\], got 0"):
        M.threshold_for_recall([1, 0], [0.1, 0.5], target_recall=0)


# --------------------------------------------------------------------------- calibration


def test_ece_guo_2017_hand_example():
    # Guo, C., Pleiss, G., Sun, Y., Weinberger, K. Q. (2017). On Calibration of Modern Neural
    # Networks, ICML. Hand-computed: bin (0.8, 0.9] has 4 at conf .85, acc .75; bin (0.5, 0.6]
    # has 2 at conf .55, acc .5; ECE = 4/6 * 0.1 + 2/6 * 0.05 = 1/12.
    conf = [0.85, 0.85, 0.85, 0.85, 0.55, 0.55]
    correct = [1, 1, 1, 0, 1, 0]
    assert M.expected_calibration_error(conf, correct, n_bins=10) == pytest.approx(1 / 12)


def _ece_loop(conf: np.ndarray, correct: np.ndarray, n_bins: int) -> float:
    """Independent loop in the style of Guo et al. (2017): bins (lo, hi], 0 in the first."""
    total = 0.0
    for m in range(n_bins):
        lo, hi = m / n_bins, (m + 1) / n_bins
        mask = (conf > lo) & (conf <= hi)
        if m == 0:
            mask |= conf == 0.0
        if mask.any():
            total += mask.mean() * abs(correct[mask].mean() - conf[mask].mean())
    return total


@pytest.mark.parametrize("n_bins", [1, 5, 10, 15])
def test_ece_matches_loop_and_is_order_invariant(n_bins):
    rng = np.random.default_rng(n_bins)
    conf = np.round(rng.random(500), 1)  # many values exactly on bin edges, including 0 and 1
    correct = rng.random(500) < conf
    ece = M.expected_calibration_error(conf, correct, n_bins=n_bins)
    assert ece == pytest.approx(_ece_loop(conf, correct, n_bins), abs=1e-12)
    perm = rng.permutation(500)
    assert M.expected_calibration_error(conf[perm], correct[perm], n_bins=n_bins) == pytest.approx(
        ece
    )


def test_reliability_bins_edges_and_empty_bins():
    conf = [0.0, 0.1, 0.3, 0.31, 1.0]
    correct = [0, 1, 1, 0, 1]
    bins = M.reliability_bins(conf, correct, n_bins=10)
    assert len(bins) == 10
    assert [b["count"] for b in bins] == [2, 0, 1, 1, 0, 0, 0, 0, 0, 1]
    assert bins[0]["lo"] == 0.0 and bins[0]["hi"] == 0.1
    assert bins[0]["accuracy"] == 0.5 and bins[0]["confidence"] == pytest.approx(0.05)
    assert math.isnan(bins[1]["accuracy"]) and math.isnan(bins[1]["confidence"])
    assert bins[9]["confidence"] == 1.0


def test_ece_validates_inputs():
    with pytest.raises(ValueError, match="expected at least one sample, got 0"):
        M.expected_calibration_error([], [])
    with pytest.raises(ValueError, match="same length, got 2 and 1"):
        M.expected_calibration_error([0.5, 0.6], [1])
    with pytest.raises(ValueError, match=r"expected n_bins >= 1, got 0"):
        M.expected_calibration_error([0.5], [1], n_bins=0)


# --------------------------------------------------------------------------- McNemar

# Armitage, P. and Berry, G. (1994). Statistical Methods in Medical Research, 3rd ed., p. 127:
# paired table [[20, 12], [2, 16]], rows = A right/wrong, columns = B right/wrong.
ARMITAGE_TABLE = [[20, 12], [2, 16]]


def _paired_correct(table):
    a_wrong, b_wrong = _pairs_from_table(table)  # index 0 = right, 1 = wrong
    return a_wrong == 0, b_wrong == 0


def test_mcnemar_armitage_berry_chi_square():
    # Armitage & Berry (1994), p. 127: continuity-corrected chi-square 5.785714, P = 0.0162.
    a, b = _paired_correct(ARMITAGE_TABLE)
    res = M.mcnemar_test(a, b, exact=False)
    assert (res["b"], res["c"]) == (12, 2)
    assert res["statistic"] == pytest.approx(5.785714, abs=1e-6)
    assert res["p_value"] == pytest.approx(0.0162, abs=5e-5)
    assert res["method"] == "chi-square, continuity-corrected"


def test_mcnemar_armitage_berry_exact():
    # Armitage & Berry (1994), p. 127: exact two-sided P = 0.0129 (= 212 / 2**14).
    a, b = _paired_correct(ARMITAGE_TABLE)
    res = M.mcnemar_test(a, b, exact=True)
    assert res["p_value"] == pytest.approx(0.012939453125, abs=1e-12)
    assert res["method"] == "exact binomial"
    # b + c = 14 < 25, so the default picks the exact test.
    assert M.mcnemar_test(a, b)["p_value"] == res["p_value"]


def test_mcnemar_matches_statsmodels():
    # Reference library: statsmodels.stats.contingency_tables.mcnemar.
    from statsmodels.stats import contingency_tables as ct  # dev extra

    for table in (ARMITAGE_TABLE, [[5, 30], [12, 9]], [[0, 3], [9, 1]]):
        a, b = _paired_correct(table)
        for exact in (True, False):
            ours = M.mcnemar_test(a, b, exact=exact)
            ref = ct.mcnemar(np.array(table), exact=exact, correction=True)
            assert ours["statistic"] == pytest.approx(ref.statistic)
            assert ours["p_value"] == pytest.approx(ref.pvalue)


def test_mcnemar_auto_uses_chi_square_for_many_discordant_pairs_and_is_symmetric():
    a, b = _paired_correct([[5, 30], [12, 9]])  # b + c = 42 >= 25
    res = M.mcnemar_test(a, b)
    assert res["method"] == "chi-square, continuity-corrected"
    assert res["statistic"] == pytest.approx((30 - 12 - 1) ** 2 / 42)
    swapped = M.mcnemar_test(b, a)
    assert (swapped["b"], swapped["c"]) == (12, 30)
    assert swapped["p_value"] == pytest.approx(res["p_value"])
    perm = np.random.default_rng(1).permutation(a.size)
    assert M.mcnemar_test(a[perm], b[perm]) == res


def test_mcnemar_no_difference_gives_p_one():
    a, b = _paired_correct([[10, 4], [4, 10]])
    assert M.mcnemar_test(a, b, exact=False)["p_value"] == 1.0  # correction floored at 0
    assert M.mcnemar_test(a, b, exact=True)["p_value"] == pytest.approx(1.0)
    same = np.array([True, False, True])
    assert M.mcnemar_test(same, same) == {
        "b": 0,
        "c": 0,
        "statistic": 0.0,
        "p_value": 1.0,
        "method": "exact binomial",
    }


# --------------------------------------------------------------------------- kappa


def test_cohen_kappa_two_by_two_textbook_example():
    # 2x2 table [[20, 5], [10, 15]], n = 50: kappa = 0.40 (common textbook example;
    # po = 0.7, pe = 0.5), checked with sklearn cohen_kappa_score.
    a, b = _pairs_from_table([[20, 5], [10, 15]])
    assert M.cohen_kappa(a, b, labels=[0, 1]) == pytest.approx(0.40)
    assert M.cohen_kappa(a, b, labels=[0, 1]) == pytest.approx(skm.cohen_kappa_score(a, b))


def test_cohen_kappa_three_by_three_pmc2648993():
    # 3x3 table [[7, 1, 0], [0, 8, 0], [0, 0, 2]], n = 18: kappa = 29/32 (PMC2648993, Table 2).
    a, b = _pairs_from_table([[7, 1, 0], [0, 8, 0], [0, 0, 2]])
    assert M.cohen_kappa(a, b, labels=[0, 1, 2]) == pytest.approx(29 / 32)
    assert M.cohen_kappa(b, a, labels=[0, 1, 2]) == pytest.approx(29 / 32)  # symmetric


def test_cohen_kappa_absent_label_and_undefined_case():
    a, b = _pairs_from_table([[20, 5], [10, 15]])
    assert M.cohen_kappa(a, b, labels=[0, 1, 2]) == pytest.approx(0.40)  # unused label: no effect
    assert math.isnan(M.cohen_kappa([1, 1, 1], [1, 1, 1], labels=[0, 1]))
    with pytest.raises(
        ValueError, match=r"expected every value of b to be one of labels \[0, 1\], got \[2\]"
    ):
        M.cohen_kappa([0, 1], [0, 2], labels=[0, 1])


# --------------------------------------------------------------------------- against sklearn, edges


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_confusion_and_per_class_match_sklearn_on_random_labels(seed):
    # Reference library: sklearn.metrics confusion_matrix and precision_recall_fscore_support.
    rng = np.random.default_rng(seed)
    y_true = rng.integers(0, 6, 300)
    y_pred = np.where(rng.random(300) < 0.6, y_true, rng.integers(0, 6, 300))
    labels = list(range(6))
    cm = M.confusion_matrix(y_true, y_pred, labels=labels)
    np.testing.assert_array_equal(cm, skm.confusion_matrix(y_true, y_pred, labels=labels))
    p, r, f, s = skm.precision_recall_fscore_support(y_true, y_pred, labels=labels)
    rep = M.per_class_report(y_true, y_pred, labels=labels, class_names=list("abcdef"))
    for i, row in enumerate(rep):
        assert (row["precision"], row["recall"], row["f1"], row["support"]) == pytest.approx(
            (p[i], r[i], f[i], s[i])
        )
        # Recall interval: k/n from the confusion matrix, limits as scipy's Wilson interval.
        ref = stats.binomtest(int(cm[i, i]), int(cm[i].sum())).proportion_ci(method="wilson")
        assert (row["recall_ci_low"], row["recall_ci_high"]) == pytest.approx(
            (ref.low, ref.high), abs=1e-12
        )


def test_per_class_all_predictions_one_class_matches_sklearn():
    # Edge case: the model predicts "none" for everything; class 2 is absent from y_true.
    y_true = [0, 0, 1, 1, 1, 3, 3]
    y_pred = [0] * 7
    labels = [0, 1, 2, 3]
    rep = M.per_class_report(y_true, y_pred, labels=labels, class_names=["n", "a", "b", "c"])
    p, r, f, s = skm.precision_recall_fscore_support(y_true, y_pred, labels=labels, zero_division=0)
    assert [row["precision"] for row in rep] == pytest.approx(p.tolist())
    assert [row["recall"] for row in rep] == pytest.approx(r.tolist())
    assert [row["f1"] for row in rep] == pytest.approx(f.tolist())
    assert [row["support"] for row in rep] == s.tolist()
    np.testing.assert_array_equal(
        M.confusion_matrix(y_true, y_pred, labels=labels),
        skm.confusion_matrix(y_true, y_pred, labels=labels),
    )
    # Recall 0 of 3 for class 1 still has a finite interval with lower limit 0.
    assert rep[1]["recall_ci_low"] == 0.0 and rep[1]["recall_ci_high"] > 0.5
    assert math.isnan(rep[2]["recall_ci_low"])  # absent class: undefined


@pytest.mark.parametrize("n", [1, 7, 20, 263])
@pytest.mark.parametrize("method", ["wilson", "clopper-pearson"])
def test_intervals_at_k_zero_and_k_n(n, method):
    # Reference libraries: scipy binomtest(...).proportion_ci and statsmodels proportion_confint.
    from statsmodels.stats import proportion  # dev extra

    sm_method = {"wilson": "wilson", "clopper-pearson": "beta"}[method]
    sp_method = {"wilson": "wilson", "clopper-pearson": "exact"}[method]
    for k in (0, n):
        iv = M.recall_interval(k, n, method=method)
        ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method=sp_method)
        lo, hi = proportion.proportion_confint(k, n, alpha=0.05, method=sm_method)
        assert (iv.low, iv.high) == pytest.approx((ref.low, ref.high), abs=1e-10)
        assert (iv.low, iv.high) == pytest.approx((lo, hi), abs=1e-10)
    # Symmetry: the interval for n/n mirrors the one for 0/n.
    zero, full = M.recall_interval(0, n, method=method), M.recall_interval(n, n, method=method)
    assert full.high == 1.0 and zero.low == 0.0
    assert full.low == pytest.approx(1.0 - zero.high, abs=1e-12)


# --------------------------------------------------------------------------- temperature scaling


def _overconfident_logits(seed: int = 0, n: int = 400, c: int = 4):
    """Logits from a calibrated model (labels drawn from softmax(z)), then multiplied by 3."""
    rng = np.random.default_rng(seed)
    z = rng.normal(0.0, 1.5, size=(n, c))
    p = np.exp(z) / np.exp(z).sum(1, keepdims=True)
    y = np.array([rng.choice(c, p=row) for row in p])
    return 3.0 * z, y


def test_softmax_and_nll_match_sklearn_log_loss():
    # Reference library: sklearn.metrics.log_loss (natural log, mean over samples).
    z, y = _overconfident_logits()
    for t in (0.5, 1.0, 2.7):
        probs = M.softmax(z, temperature=t)
        np.testing.assert_allclose(probs.sum(1), 1.0, atol=1e-12)
        ref = skm.log_loss(y, probs, labels=[0, 1, 2, 3])
        assert M.negative_log_likelihood(z, y, temperature=t) == pytest.approx(ref, rel=1e-9)


def test_fit_temperature_overconfident_gives_t_above_one_and_lower_nll():
    # Guo et al. (2017): temperature scaling fits one T > 0 by NLL and keeps the argmax.
    z, y = _overconfident_logits()
    t = M.fit_temperature(z, y)
    assert t > 1.0
    assert t == pytest.approx(3.0, rel=0.25)  # the logits were scaled by 3 (sampling noise)
    assert M.negative_log_likelihood(z, y, temperature=t) < M.negative_log_likelihood(z, y)
    np.testing.assert_array_equal(M.softmax(z, temperature=t).argmax(1), z.argmax(1))
    conf_before = M.softmax(z).max(1)
    conf_after = M.softmax(z, temperature=t).max(1)
    correct = z.argmax(1) == y
    assert M.expected_calibration_error(conf_after, correct) < M.expected_calibration_error(
        conf_before, correct
    )


def test_fit_temperature_matches_grid_and_scipy_minimize():
    # Outside checks: a brute-force grid over T, and scipy.optimize.minimize (L-BFGS-B) on T.
    from scipy.optimize import minimize

    z, y = _overconfident_logits(seed=3)
    t = M.fit_temperature(z, y)
    grid = np.linspace(0.5, 8.0, 15001)  # step 0.0005
    nll = [skm.log_loss(y, M.softmax(z, temperature=g), labels=[0, 1, 2, 3]) for g in grid[::50]]
    coarse = grid[::50][int(np.argmin(nll))]
    fine = grid[np.abs(grid - coarse) <= 0.03]
    best = fine[np.argmin([M.negative_log_likelihood(z, y, temperature=g) for g in fine])]
    assert t == pytest.approx(best, abs=1e-3)
    res = minimize(
        lambda v: M.negative_log_likelihood(z, y, temperature=float(v[0])),
        x0=[1.0],
        bounds=[(0.05, 20.0)],
        method="L-BFGS-B",
    )
    assert t == pytest.approx(res.x[0], abs=1e-3)


def test_fit_temperature_underconfident_gives_t_below_one():
    z, y = _overconfident_logits(seed=5)
    assert M.fit_temperature(z / 9.0, y) < 1.0  # logits shrunk below the calibrated scale


def test_temperature_functions_validate_inputs():
    z, y = _overconfident_logits(n=10)
    with pytest.raises(ValueError, match=r"expected temperature > 0, got 0"):
        M.softmax(z, temperature=0)
    with pytest.raises(ValueError, match=r"expected logits of shape \(n, C\).*got shape \(10,\)"):
        M.fit_temperature(z[:, 0], y)
    with pytest.raises(ValueError, match=r"expected labels in \[0, 3\], got \[4\]"):
        M.negative_log_likelihood(z, np.where(y == 0, 4, y))
    with pytest.raises(ValueError, match="same length, got 10 and 9"):
        M.fit_temperature(z, y[:9])
    with pytest.raises(ValueError, match=r"expected bounds 0 < low < high, got \(2.0, 1.0\)"):
        M.fit_temperature(z, y, bounds=(2.0, 1.0))
    with pytest.raises(ValueError, match="expected finite logits"):
        M.softmax(np.array([[0.0, np.inf]]))


# --------------------------------------------------------------------------- breakdowns


def test_scale_bands_equal_count_with_unknown():
    mm = np.array([30.0, 31.0, 40.0, 41.0, 60.0, 61.0, np.nan])
    bands, order = M.scale_bands(mm, n_bands=3)
    # Hand-computed quantiles (linear interpolation at position 5q of the six sorted widths):
    # q=1/3 -> 31 + 2/3 * 9 = 37.0; q=2/3 -> 41 + 1/3 * 19 = 47.33; ends 30 and 61.
    assert order == ["30.0-37.0 mm", "37.0-47.3 mm", "47.3-61.0 mm", "unknown"]
    assert bands == [order[0], order[0], order[1], order[1], order[2], order[2], "unknown"]
    same, order_same = M.scale_bands([50.0, 50.0], n_bands=3)
    assert same == ["50.0-50.0 mm"] * 2 and order_same == ["50.0-50.0 mm"]
    with pytest.raises(ValueError, match=r"expected patch widths > 0 mm, got \[-1.0\]"):
        M.scale_bands([10.0, -1.0])


def test_breakdown_matches_sklearn_per_group():
    # Reference library: sklearn recall_score per group; intervals from scipy's Wilson.
    rng = np.random.default_rng(4)
    keys = rng.choice(["site-a", "site-b", "site-c"], 120)
    crack = rng.random(120) < 0.4
    flagged = np.where(crack, rng.random(120) < 0.8, rng.random(120) < 0.1)
    correct = rng.random(120) < 0.7
    keys[:5] = "site-d"  # a group
    crack[:5] = False  # ... without cracks
    rows = M.breakdown(keys, crack, flagged, correct)
    assert [r["key"] for r in rows] == ["site-a", "site-b", "site-c", "site-d"]
    for r in rows:
        m = keys == r["key"]
        assert r["patches"] == m.sum() and r["cracks"] == (crack & m).sum()
        assert r["accuracy"] == pytest.approx(correct[m].mean())
        if r["cracks"]:
            assert r["recall"] == pytest.approx(skm.recall_score(crack[m], flagged[m]))
            ref = stats.binomtest(r["cracks_found"], r["cracks"]).proportion_ci(method="wilson")
            assert (r["recall_ci_low"], r["recall_ci_high"]) == pytest.approx((ref.low, ref.high))
        fa = skm.confusion_matrix(crack[m], flagged[m], labels=[False, True])[0]
        assert (r["false_alarms"], r["clean"]) == (fa[1], fa.sum())
    assert math.isnan(rows[-1]["recall"]) and math.isnan(rows[-1]["recall_ci_low"])


def test_breakdown_order_must_cover_every_key():
    with pytest.raises(ValueError, match=r"keys missing from it: \['b'\]"):
        M.breakdown(["a", "b"], [1, 0], [1, 0], [1, 1], order=["a"])


@pytest.mark.parametrize("seed", range(20))
def test_threshold_for_false_alarms_is_the_roc_point_within_budget(seed):
    """Checked against scikit-learn's roc_curve: the false-alarm rate at the threshold is
    within the budget and its recall is the best any threshold within the budget reaches."""
    from sklearn.metrics import roc_curve

    from trainkit.metrics import recall_at_false_alarm, threshold_for_false_alarms

    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(6, 90))
    y = rng.random(n) < 0.4
    y[0], y[-1] = True, False
    p = np.round(rng.random(n) * 0.5 + y * rng.random(n) * 0.5, int(rng.integers(1, 4)))
    budget = float(rng.choice([0.0, 0.05, 0.1, 0.3]))
    t = threshold_for_false_alarms(y, p, max_false_alarm_rate=budget)
    flagged = p >= t
    assert flagged[~y].mean() <= budget + 1e-12
    fpr, tpr, _ = roc_curve(y, p)
    best = tpr[fpr <= budget + 1e-12].max()
    assert flagged[y].mean() == pytest.approx(best)
    assert recall_at_false_alarm(y, p, budget=budget) == pytest.approx(best)
    # Lowest such threshold: lowering it to the next non-crack score breaks the budget.
    below = p[~y][p[~y] < t]
    if below.size:
        assert (p[~y] >= below.max()).mean() > budget


def test_weighted_thresholds_match_repeated_patches_and_sklearn_weighted_roc():
    """Weights = 1 / inclusion probability: a patch of weight k counts as k patches. Checked
    against the unweighted functions on the repeated data and scikit-learn's roc_curve with
    sample_weight (the weighted false-alarm and recall rates at the threshold)."""
    from sklearn.metrics import roc_curve

    rng = np.random.default_rng(11)
    y = rng.random(60) < 0.3
    p = np.round(rng.random(60), 2)  # ties on purpose
    w = rng.integers(1, 5, 60).astype(float)
    rep_y, rep_p = np.repeat(y, w.astype(int)), np.repeat(p, w.astype(int))
    for budget in (0.0, 0.05, 0.2, 1.0):
        t = M.weighted_thresholds(y, p, w, max_false_alarm_rate=budget)
        assert t == M.threshold_for_false_alarms(rep_y, rep_p, max_false_alarm_rate=budget)
    for target in (0.5, 0.9, 0.95, 1.0):
        t = M.weighted_thresholds(y, p, w, target_recall=target)
        assert t == M.threshold_for_recall(rep_y, rep_p, target_recall=target)
        fpr, tpr, thr = roc_curve(y, p, sample_weight=w)
        # at the threshold the weighted recall reaches the target; one crack score higher it does not
        assert tpr[thr >= t].max() >= target - 1e-12
        higher = thr > t
        if higher.any():
            assert tpr[higher].max() < target
    with pytest.raises(ValueError, match="exactly one"):
        M.weighted_thresholds(y, p, w)
    with pytest.raises(ValueError, match="positive finite weights"):
        M.weighted_thresholds(y, p, -w, target_recall=0.9)
