"""Pure evaluation metrics for the crack screener: counts, intervals, thresholds, calibration."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats
from sklearn import metrics as skm

__all__ = [
    "Interval",
    "INTERVAL_METHODS",
    "breakdown",
    "cohen_kappa",
    "confusion_matrix",
    "expected_calibration_error",
    "fit_temperature",
    "mcnemar_test",
    "negative_log_likelihood",
    "per_class_report",
    "recall_at_false_alarm",
    "recall_interval",
    "reliability_bins",
    "row_normalise",
    "scale_bands",
    "screening_scores",
    "softmax",
    "threshold_for_false_alarms",
    "threshold_for_recall",
]

#: Canonical interval method names; "exact" is accepted as an alias of "clopper-pearson".
INTERVAL_METHODS: tuple[str, ...] = ("wilson", "clopper-pearson")
_METHOD_ALIASES = {
    "wilson": "wilson",
    "clopper-pearson": "clopper-pearson",
    "exact": "clopper-pearson",
}
_METHOD_DISPLAY = {"wilson": "Wilson", "clopper-pearson": "Clopper-Pearson"}


# --------------------------------------------------------------------------- validation helpers


def _as_1d(x: ArrayLike, name: str) -> np.ndarray:
    arr = np.asarray(x)
    if arr.ndim != 1:
        raise ValueError(f"expected {name} to be 1-D of shape (n,), got shape {arr.shape}")
    return arr


def _same_length(a: np.ndarray, b: np.ndarray, name_a: str, name_b: str) -> None:
    if a.shape[0] != b.shape[0]:
        raise ValueError(
            f"expected {name_a} and {name_b} to have the same length, "
            f"got {a.shape[0]} and {b.shape[0]}"
        )


def _as_bool(x: ArrayLike, name: str) -> np.ndarray:
    """A 1-D bool array from bool or 0/1 values."""
    arr = _as_1d(x, name)
    if arr.dtype == bool:
        return arr
    if arr.size == 0:
        return arr.astype(bool)
    if not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
        raise TypeError(f"expected {name} to hold bool or 0/1 values, got dtype {arr.dtype}")
    bad = ~np.isin(arr, (0, 1))
    if bad.any():
        raise ValueError(
            f"expected {name} to hold bool or 0/1 values, got {arr[bad][:5].tolist()} "
            f"({int(bad.sum())} bad values)"
        )
    return arr.astype(bool)


def _as_unit_float(x: ArrayLike, name: str) -> np.ndarray:
    """A 1-D float array with finite values in [0, 1]."""
    arr = _as_1d(x, name)
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise TypeError(f"expected {name} to be numbers in [0, 1], got dtype {arr.dtype}")
    arr = arr.astype(float)
    bad = ~np.isfinite(arr) | (arr < 0.0) | (arr > 1.0)
    if bad.any():
        raise ValueError(
            f"expected {name} to be finite values in [0, 1], got {arr[bad][:5].tolist()} "
            f"({int(bad.sum())} bad values)"
        )
    return arr


def _check_labels(labels: Sequence[Any] | None) -> np.ndarray:
    if labels is None:
        raise TypeError("labels is required (a sequence of all class labels), got None")
    arr = np.asarray(labels)
    if arr.ndim != 1 or arr.size == 0:
        raise ValueError(f"expected labels to be a non-empty 1-D sequence, got shape {arr.shape}")
    if np.unique(arr).size != arr.size:
        raise ValueError(f"expected labels without repeats, got {arr.tolist()}")
    return arr


def _check_in_labels(values: np.ndarray, labels: np.ndarray, name: str) -> None:
    unknown = ~np.isin(values, labels)
    if unknown.any():
        raise ValueError(
            f"expected every value of {name} to be one of labels {labels.tolist()}, "
            f"got {np.unique(values[unknown])[:10].tolist()}"
        )


def _check_confidence(confidence: float) -> float:
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float, np.floating)):
        raise TypeError(
            f"expected confidence to be a float in (0, 1), got {type(confidence).__name__}"
        )
    if not 0.0 < float(confidence) < 1.0:
        raise ValueError(f"expected confidence in (0, 1), got {confidence}")
    return float(confidence)


def _check_n_bins(n_bins: int) -> int:
    if isinstance(n_bins, bool) or not isinstance(n_bins, (int, np.integer)):
        raise TypeError(f"expected n_bins to be a positive int, got {type(n_bins).__name__}")
    if n_bins < 1:
        raise ValueError(f"expected n_bins >= 1, got {n_bins}")
    return int(n_bins)


def _ratio(num: int, den: int) -> float:
    return num / den if den > 0 else math.nan


# --------------------------------------------------------------------------- confusion matrix


def confusion_matrix(y_true: ArrayLike, y_pred: ArrayLike, *, labels: Sequence[Any]) -> np.ndarray:
    """Confusion matrix of counts, rows = true class, columns = predicted class.

    Computed by :func:`sklearn.metrics.confusion_matrix`. Every label keeps its row and
    column, so classes absent from the data give rows/columns of zeros. Unlike sklearn,
    values not in ``labels`` raise instead of being silently dropped.

    Args:
        y_true: true labels, shape (n,).
        y_pred: predicted labels, shape (n,).
        labels: all class labels, in the order of the rows/columns.

    Returns:
        Integer array of shape (len(labels), len(labels)).

    Raises:
        ValueError: on shape mismatch, repeated labels or values outside ``labels``.
        TypeError: if ``labels`` is None.
    """
    return _confusion(y_true, y_pred, labels, ("y_true", "y_pred"))


def _confusion(
    first: ArrayLike, second: ArrayLike, labels: Sequence[Any], names: tuple[str, str]
) -> np.ndarray:
    lab = _check_labels(labels)
    yt = _as_1d(first, names[0])
    yp = _as_1d(second, names[1])
    _same_length(yt, yp, *names)
    _check_in_labels(yt, lab, names[0])
    _check_in_labels(yp, lab, names[1])
    if yt.size == 0:
        return np.zeros((lab.size, lab.size), dtype=np.int64)
    return skm.confusion_matrix(yt, yp, labels=lab).astype(np.int64)


def row_normalise(cm: ArrayLike) -> np.ndarray:
    """Divide each row of a count matrix by its sum; all-zero rows stay zero (never NaN).

    Args:
        cm: non-negative 2-D count matrix, e.g. from :func:`confusion_matrix`.

    Returns:
        Float array of the same shape whose non-empty rows sum to 1.

    Raises:
        ValueError: if ``cm`` is not 2-D, not finite or has negative entries.
    """
    arr = np.asarray(cm, dtype=float)
    if arr.ndim != 2:
        raise ValueError(f"expected a 2-D matrix, got shape {arr.shape}")
    if not np.isfinite(arr).all() or (arr < 0).any():
        raise ValueError("expected finite non-negative counts, got negative or non-finite entries")
    sums = arr.sum(axis=1, keepdims=True)
    out = np.zeros_like(arr)
    np.divide(arr, sums, out=out, where=sums > 0)
    return out


# --------------------------------------------------------------------------- binomial intervals


@dataclass(frozen=True)
class Interval:
    """A two-sided confidence interval for a proportion k/n.

    Attributes:
        low: lower bound (nan when n == 0).
        high: upper bound (nan when n == 0).
        method: "wilson" or "clopper-pearson".
        confidence: two-sided confidence level, e.g. 0.95.
        k: successes.
        n: trials.
    """

    low: float
    high: float
    method: str
    confidence: float
    k: int
    n: int

    @property
    def estimate(self) -> float:
        """The point estimate k/n (nan when n == 0)."""
        return _ratio(self.k, self.n)

    def to_dict(self) -> dict[str, Any]:
        """Plain dict with low, high, method, confidence, k and n."""
        return {
            "low": self.low,
            "high": self.high,
            "method": self.method,
            "confidence": self.confidence,
            "k": self.k,
            "n": self.n,
        }

    def __str__(self) -> str:
        name = _METHOD_DISPLAY.get(self.method, self.method)
        return (
            f"{self.estimate:.4f} [{self.low:.4f}, {self.high:.4f}] "
            f"{name} {self.confidence * 100:g}%, {self.k}/{self.n}"
        )


def _check_count(x: int, name: str) -> int:
    if isinstance(x, bool) or not isinstance(x, (int, np.integer)):
        raise TypeError(f"expected {name} to be an int, got {type(x).__name__}")
    return int(x)


def recall_interval(
    k: int, n: int, *, confidence: float = 0.95, method: str = "wilson"
) -> Interval:
    """Two-sided confidence interval for a binomial proportion such as a recall k/n.

    Wilson score interval (closed form, Newcombe 1998 method 3, no continuity correction):
    ``(k + z²/2 ± z·sqrt(k(n-k)/n + z²/4)) / (n + z²)`` with ``z`` the normal quantile at
    ``1 - (1 - confidence)/2``. Clopper-Pearson ("exact") interval from beta quantiles:
    ``[Beta(α/2; k, n-k+1), Beta(1-α/2; k+1, n-k)]``, with 0 when k == 0 and 1 when k == n.

    Args:
        k: successes (e.g. correctly recalled cracks), 0 <= k <= n.
        n: trials (e.g. true cracks). n == 0 gives a nan interval.
        confidence: two-sided level in (0, 1).
        method: "wilson" or "clopper-pearson" ("exact" is an alias).

    Returns:
        The :class:`Interval`; its ``method`` is the canonical name.

    Raises:
        ValueError: on an unknown method, k outside [0, n] or confidence outside (0, 1).
        TypeError: if k or n is not an int.
    """
    if not isinstance(method, str) or method.lower() not in _METHOD_ALIASES:
        raise ValueError(
            f"unknown interval method {method!r}; choose one of: "
            f"{', '.join(INTERVAL_METHODS)} ('exact' = clopper-pearson)"
        )
    canon = _METHOD_ALIASES[method.lower()]
    k = _check_count(k, "k")
    n = _check_count(n, "n")
    conf = _check_confidence(confidence)
    if n < 0 or not 0 <= k <= n:
        raise ValueError(f"expected 0 <= k <= n, got k={k}, n={n}")
    if n == 0:
        return Interval(math.nan, math.nan, canon, conf, k, n)
    alpha = 1.0 - conf
    if canon == "wilson":
        z = float(stats.norm.ppf(1.0 - alpha / 2.0))
        z2 = z * z
        centre = (k + z2 / 2.0) / (n + z2)
        half = z * math.sqrt(k * (n - k) / n + z2 / 4.0) / (n + z2)
        low = 0.0 if k == 0 else max(0.0, centre - half)
        high = 1.0 if k == n else min(1.0, centre + half)
    else:
        low = 0.0 if k == 0 else float(stats.beta.ppf(alpha / 2.0, k, n - k + 1))
        high = 1.0 if k == n else float(stats.beta.ppf(1.0 - alpha / 2.0, k + 1, n - k))
    return Interval(low, high, canon, conf, k, n)


def per_class_report(
    y_true: ArrayLike,
    y_pred: ArrayLike,
    *,
    labels: Sequence[Any],
    class_names: Sequence[str],
    confidence: float = 0.95,
    method: str = "wilson",
) -> list[dict[str, Any]]:
    """Precision, recall, F1, support and a recall interval for every class.

    Precision/recall/F1 come from :func:`sklearn.metrics.precision_recall_fscore_support`
    with ``zero_division=0``: a class never predicted has precision 0, and a class absent
    from ``y_true`` has recall 0 and support 0 (its ``recall_interval`` is nan, n == 0,
    which marks the recall as undefined).

    Args:
        y_true: true labels, shape (n,).
        y_pred: predicted labels, shape (n,).
        labels: all class labels, in report order.
        class_names: one display name per label.
        confidence: level of the recall interval.
        method: recall interval method, see :func:`recall_interval`.

    Returns:
        One dict per label with keys name, index (the label), precision, recall, f1,
        support, recall_ci_low, recall_ci_high and recall_interval (a dict with low,
        high, method, confidence, k, n).

    Raises:
        ValueError: on mismatched lengths, or values outside ``labels``.
    """
    lab = _check_labels(labels)
    names = list(class_names)
    if len(names) != lab.size:
        raise ValueError(f"expected one class name per label ({lab.size}), got {len(names)} names")
    cm = confusion_matrix(y_true, y_pred, labels=labels)
    yt = np.asarray(y_true)
    if yt.size == 0:
        zeros = np.zeros(lab.size)
        prec, rec, f1, sup = zeros, zeros, zeros, np.zeros(lab.size, dtype=int)
    else:
        prec, rec, f1, sup = skm.precision_recall_fscore_support(
            yt, np.asarray(y_pred), labels=lab, average=None, zero_division=0
        )
    report = []
    for i, label in enumerate(lab.tolist()):
        k, n = int(cm[i, i]), int(cm[i].sum())
        iv = recall_interval(k, n, confidence=confidence, method=method)
        report.append(
            {
                "name": str(names[i]),
                "index": label,
                "precision": float(prec[i]),
                "recall": float(rec[i]),
                "f1": float(f1[i]),
                "support": int(sup[i]),
                "recall_ci_low": iv.low,
                "recall_ci_high": iv.high,
                "recall_interval": iv.to_dict(),
            }
        )
    return report


# --------------------------------------------------------------------------- screening threshold


def _check_threshold(threshold: float) -> float:
    if isinstance(threshold, bool) or not isinstance(threshold, (int, float, np.number)):
        raise TypeError(
            f"expected threshold to be a float in [0, 1], got {type(threshold).__name__}"
        )
    t = float(threshold)
    if not 0.0 <= t <= 1.0:
        raise ValueError(f"expected threshold in [0, 1], got {threshold}")
    return t


def screening_scores(
    y_true_crack: ArrayLike, p_crack: ArrayLike, *, threshold: float
) -> dict[str, Any]:
    """Binary crack-vs-no-crack counts and rates at a probability threshold.

    A patch is flagged when ``p_crack >= threshold``. Ratios whose denominator is zero
    (e.g. recall with no true cracks) are nan rather than 0.

    Args:
        y_true_crack: whether each patch truly shows a crack (bool or 0/1), shape (n,).
        p_crack: predicted crack probability per patch in [0, 1], shape (n,).
        threshold: flagging threshold in [0, 1].

    Returns:
        Dict with threshold, tp, fn, fp, tn (ints) and recall, specificity,
        false_alarm_rate (= fp / (fp + tn)), precision (floats).

    Raises:
        ValueError: on shape mismatch, non-binary truth, probabilities outside [0, 1].
    """
    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    _same_length(y, p, "y_true_crack", "p_crack")
    t = _check_threshold(threshold)
    flagged = p >= t
    cm = confusion_matrix(y.astype(int), flagged.astype(int), labels=[0, 1])
    tn, fp, fn, tp = (int(v) for v in cm.ravel())
    return {
        "threshold": t,
        "tp": tp,
        "fn": fn,
        "fp": fp,
        "tn": tn,
        "recall": _ratio(tp, tp + fn),
        "specificity": _ratio(tn, tn + fp),
        "false_alarm_rate": _ratio(fp, fp + tn),
        "precision": _ratio(tp, tp + fp),
    }


def threshold_for_recall(
    y_true_crack: ArrayLike, p_crack: ArrayLike, *, target_recall: float
) -> float:
    """The largest threshold whose recall on these data is at least ``target_recall``.

    Recall at threshold t is ``#{crack: p >= t} / #cracks``, non-increasing in t, and
    false alarms are non-increasing in t too, so the largest such t gives the fewest false
    alarms. The answer is always a crack patch's score: with the crack scores sorted
    descending, it is the m-th one, m the smallest count with ``m / #cracks >= target``.

    Ties: flagging uses ``>=``, so every patch (crack or not) whose score equals the
    returned threshold is flagged. A threshold cannot split tied scores, so the achieved
    recall may exceed the target, and tied non-crack patches are counted as false alarms.

    Args:
        y_true_crack: whether each patch truly shows a crack (bool or 0/1), shape (n,).
        p_crack: predicted crack probability per patch in [0, 1], shape (n,).
        target_recall: required recall in (0, 1].

    Returns:
        The threshold, as a float.

    Raises:
        ValueError: if there are no crack patches, or target_recall is outside (0, 1].
    """
    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    _same_length(y, p, "y_true_crack", "p_crack")
    if isinstance(target_recall, bool) or not isinstance(target_recall, (int, float, np.number)):
        raise TypeError(
            f"expected target_recall to be a float in (0, 1], got {type(target_recall).__name__}"
        )
    target = float(target_recall)
    if not 0.0 < target <= 1.0:
        raise ValueError(f"expected target_recall in (0, 1], got {target_recall}")
    n_pos = int(y.sum())
    if n_pos == 0:
        raise ValueError(
            "expected at least one crack patch (y_true_crack true) to set a recall threshold, "
            f"got 0 of {y.size}"
        )
    # Smallest m with m / n_pos >= target, using the same float division as the recall.
    m = max(1, math.ceil(target * n_pos))
    while m > 1 and (m - 1) / n_pos >= target:
        m -= 1
    while m < n_pos and m / n_pos < target:
        m += 1
    pos_scores = np.sort(p[y])[::-1]
    return float(pos_scores[m - 1])


def _check_budget(budget: float) -> float:
    b = float(budget)
    if not 0.0 <= b <= 1.0:
        raise ValueError(f"expected a false-alarm budget in [0, 1], got {budget}")
    return b


def threshold_for_false_alarms(
    y_true_crack: ArrayLike, p_crack: ArrayLike, *, max_false_alarm_rate: float
) -> float:
    """The smallest threshold whose false-alarm rate on these data is at most the budget.

    With the non-crack scores sorted descending as v_0 >= v_1 >= ..., at most
    k = floor(budget * #non-crack) of them may be flagged, so the threshold is the
    smallest float above v_k (flagging uses ``>=``); the recall there is
    :func:`recall_at_false_alarm`. A budget covering every non-crack patch gives 0.0.

    Raises:
        ValueError: without non-crack patches, or a budget outside [0, 1].
    """
    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    _same_length(y, p, "y_true_crack", "p_crack")
    b = _check_budget(max_false_alarm_rate)
    neg = np.sort(p[~y])[::-1]
    if neg.size == 0:
        raise ValueError("expected at least one non-crack patch to set a false-alarm threshold")
    k = math.floor(b * neg.size + 1e-9)
    if k >= neg.size:
        return 0.0
    return float(np.nextafter(neg[k], np.inf))


def recall_at_false_alarm(y_true_crack: ArrayLike, p_crack: ArrayLike, *, budget: float) -> float:
    """The highest recall any threshold reaches while its false-alarm rate stays within ``budget``.

    This is the recall at :func:`threshold_for_false_alarms` (the threshold just above
    the k-th highest non-crack score, k = floor(budget * #non-crack)), i.e. the largest
    true-positive rate on the ROC curve whose false-positive rate is <= budget. Used to
    select checkpoints at a fixed false-alarm cost.

    Returns:
        The recall; nan when there are no crack patches, 1.0 when there are no others.

    Raises:
        ValueError: on shape mismatch, probabilities outside [0, 1], budget outside [0, 1].
    """
    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    _same_length(y, p, "y_true_crack", "p_crack")
    if not y.any():
        _check_budget(budget)
        return float("nan")
    if y.all():
        _check_budget(budget)
        return 1.0
    t = threshold_for_false_alarms(y, p, max_false_alarm_rate=budget)
    return float(np.mean(p[y] >= t))


# --------------------------------------------------------------------------- calibration


def _bin_stats(
    confidences: ArrayLike, correct: ArrayLike, n_bins: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    conf = _as_unit_float(confidences, "confidences")
    corr = _as_bool(correct, "correct")
    _same_length(conf, corr, "confidences", "correct")
    nb = _check_n_bins(n_bins)
    if conf.size == 0:
        raise ValueError("expected at least one sample, got 0")
    # Edges i / n_bins (correctly rounded), bins (lo, hi], the first bin also holds 0.
    edges = np.arange(nb + 1) / nb
    idx = np.clip(np.searchsorted(edges, conf, side="left") - 1, 0, nb - 1)
    count = np.bincount(idx, minlength=nb)
    conf_sum = np.bincount(idx, weights=conf, minlength=nb)
    corr_sum = np.bincount(idx, weights=corr.astype(float), minlength=nb)
    return edges, count, conf_sum, corr_sum, conf


def reliability_bins(
    confidences: ArrayLike, correct: ArrayLike, *, n_bins: int = 10
) -> list[dict[str, Any]]:
    """Equal-width reliability-diagram bins over [0, 1].

    Bins are ``(lo, hi]`` with edges ``i / n_bins``; the first bin is ``[0, hi]``.

    Args:
        confidences: confidence of each prediction in [0, 1], shape (n,).
        correct: whether each prediction was right (bool or 0/1), shape (n,).
        n_bins: number of bins.

    Returns:
        One dict per bin (empty bins included) with lo, hi, count, accuracy and
        confidence (mean within the bin; nan for an empty bin).

    Raises:
        ValueError: on empty input, mismatched lengths or confidences outside [0, 1].
    """
    edges, count, conf_sum, corr_sum, _ = _bin_stats(confidences, correct, n_bins)
    out = []
    for i in range(count.size):
        c = int(count[i])
        out.append(
            {
                "lo": float(edges[i]),
                "hi": float(edges[i + 1]),
                "count": c,
                "accuracy": float(corr_sum[i] / c) if c else math.nan,
                "confidence": float(conf_sum[i] / c) if c else math.nan,
            }
        )
    return out


def expected_calibration_error(
    confidences: ArrayLike, correct: ArrayLike, *, n_bins: int = 10
) -> float:
    """Expected calibration error with equal-width bins (Guo et al. 2017).

    ``ECE = sum_m |B_m| / n * |acc(B_m) - conf(B_m)|`` over the bins of
    :func:`reliability_bins`; empty bins contribute nothing.

    Args:
        confidences: confidence of each prediction in [0, 1], shape (n,).
        correct: whether each prediction was right (bool or 0/1), shape (n,).
        n_bins: number of bins.

    Returns:
        The ECE, in [0, 1].

    Raises:
        ValueError: on empty input, mismatched lengths or confidences outside [0, 1].
    """
    _, count, conf_sum, corr_sum, conf = _bin_stats(confidences, correct, n_bins)
    # |B_m|/n * |acc - conf| = |sum(correct) - sum(conf)| / n per bin.
    return float(np.abs(corr_sum - conf_sum).sum() / conf.size)


# ----------------------------------------------------------------- paired tests, agreement


def mcnemar_test(
    correct_a: ArrayLike, correct_b: ArrayLike, *, exact: bool | None = None
) -> dict[str, Any]:
    """McNemar's test for two classifiers scored on the same samples.

    Only discordant pairs matter: ``b`` = A right and B wrong, ``c`` = A wrong and B right.
    The exact test is the two-sided binomial test of b out of b + c at 1/2 (statistic
    ``min(b, c)``); otherwise the continuity-corrected chi-square
    ``max(0, |b - c| - 1)² / (b + c)`` on 1 degree of freedom. The correction is floored
    at 0 so that b == c gives statistic 0 and p = 1. With b + c == 0 the result is
    statistic 0, p = 1.

    Args:
        correct_a: whether classifier A was right per sample (bool or 0/1), shape (n,).
        correct_b: whether classifier B was right per sample, shape (n,).
        exact: True for the exact test, False for chi-square, None to use the exact test
            when b + c < 25.

    Returns:
        Dict with b, c (ints), statistic, p_value (floats) and method
        ("exact binomial" or "chi-square, continuity-corrected").

    Raises:
        ValueError: on mismatched lengths or non-binary values.
    """
    a = _as_bool(correct_a, "correct_a")
    bb = _as_bool(correct_b, "correct_b")
    _same_length(a, bb, "correct_a", "correct_b")
    if exact is not None and not isinstance(exact, (bool, np.bool_)):
        raise TypeError(f"expected exact to be True, False or None, got {exact!r}")
    b = int(np.sum(a & ~bb))
    c = int(np.sum(~a & bb))
    n_disc = b + c
    use_exact = bool(exact) if exact is not None else n_disc < 25
    if use_exact:
        method = "exact binomial"
        statistic = float(min(b, c))
        p_value = float(stats.binomtest(b, n_disc, 0.5).pvalue) if n_disc else 1.0
    else:
        method = "chi-square, continuity-corrected"
        if n_disc == 0:
            statistic, p_value = 0.0, 1.0
        else:
            statistic = max(0, abs(b - c) - 1) ** 2 / n_disc
            p_value = float(stats.chi2.sf(statistic, df=1))
    return {"b": b, "c": c, "statistic": float(statistic), "p_value": p_value, "method": method}


def cohen_kappa(a: ArrayLike, b: ArrayLike, *, labels: Sequence[Any]) -> float:
    """Cohen's kappa between two raters, via :func:`sklearn.metrics.cohen_kappa_score`.

    Kappa is undefined when chance agreement is 1 (both raters always give the same single
    label); nan is returned then.

    Args:
        a: labels from rater A, shape (n,).
        b: labels from rater B, shape (n,).
        labels: all class labels.

    Returns:
        Kappa in [-1, 1], or nan when undefined.

    Raises:
        ValueError: on mismatched lengths, empty input or values outside ``labels``.
    """
    cm = _confusion(a, b, labels, ("a", "b"))
    n = cm.sum()
    if n == 0:
        raise ValueError("expected at least one rated sample, got 0")
    p_chance = float((cm.sum(axis=1) * cm.sum(axis=0)).sum()) / float(n) ** 2
    if p_chance >= 1.0:
        return math.nan
    return float(skm.cohen_kappa_score(np.asarray(a), np.asarray(b), labels=np.asarray(labels)))


# ----------------------------------------------------------------- temperature scaling


def _check_logits(logits: ArrayLike, labels: ArrayLike | None = None) -> tuple[np.ndarray, Any]:
    z = np.asarray(logits, dtype=float)
    if z.ndim != 2 or z.shape[0] == 0 or z.shape[1] < 2:
        raise ValueError(
            f"expected logits of shape (n, C) with n >= 1 and C >= 2, got shape {z.shape}"
        )
    if not np.isfinite(z).all():
        raise ValueError("expected finite logits, got nan or inf entries")
    if labels is None:
        return z, None
    y = _as_1d(labels, "labels")
    _same_length(z, y, "logits", "labels")
    if not np.issubdtype(y.dtype, np.integer):
        raise TypeError(f"expected labels to be integer class indices, got dtype {y.dtype}")
    bad = (y < 0) | (y >= z.shape[1])
    if bad.any():
        raise ValueError(
            f"expected labels in [0, {z.shape[1] - 1}], got {np.unique(y[bad])[:10].tolist()}"
        )
    return z, y.astype(np.int64)


def _check_temperature(temperature: float) -> float:
    if isinstance(temperature, bool) or not isinstance(temperature, (int, float, np.number)):
        raise TypeError(f"expected temperature to be a float > 0, got {type(temperature).__name__}")
    t = float(temperature)
    if not (math.isfinite(t) and t > 0.0):
        raise ValueError(f"expected temperature > 0, got {temperature}")
    return t


def softmax(logits: ArrayLike, *, temperature: float = 1.0) -> np.ndarray:
    """Row-wise softmax of ``logits / temperature`` (numerically stable).

    Args:
        logits: unnormalised scores, shape (n, C). Log-probabilities work too: softmax is
            unchanged by a constant shift per row, so ``softmax(log p / T)`` equals
            ``softmax(z / T)`` for the logits ``z`` behind ``p``.
        temperature: T > 0; T > 1 softens, T < 1 sharpens. The argmax never changes.

    Returns:
        Probabilities, shape (n, C), rows summing to 1.

    Raises:
        ValueError: on a bad shape, non-finite logits or a temperature that is not > 0.
    """
    from scipy.special import softmax as _softmax

    z, _ = _check_logits(logits)
    return _softmax(z / _check_temperature(temperature), axis=1)


def negative_log_likelihood(
    logits: ArrayLike, labels: ArrayLike, *, temperature: float = 1.0
) -> float:
    """Mean negative log-likelihood (cross-entropy, natural log) of the true classes.

    ``NLL(T) = -mean_i log softmax(z_i / T)[y_i]``.

    Args:
        logits: unnormalised scores, shape (n, C).
        labels: true class index per row, shape (n,).
        temperature: T > 0.

    Returns:
        The mean NLL in nats.

    Raises:
        ValueError: on a bad shape, labels outside [0, C) or a temperature that is not > 0.
    """
    from scipy.special import log_softmax

    z, y = _check_logits(logits, labels)
    logp = log_softmax(z / _check_temperature(temperature), axis=1)
    return float(-logp[np.arange(y.size), y].mean())


def fit_temperature(
    logits: ArrayLike, labels: ArrayLike, *, bounds: tuple[float, float] = (0.05, 20.0)
) -> float:
    """Temperature T > 0 that minimises the NLL of ``softmax(logits / T)`` (Guo et al. 2017).

    The NLL is convex in the inverse temperature ``b = 1 / T`` (a log-sum-exp of terms
    linear in b, minus a linear term), so a bounded one-dimensional search over b finds
    the global minimum within ``bounds``. Scaling by one positive T keeps every row's
    argmax, so accuracy and the predicted classes are unchanged.

    Args:
        logits: validation logits, shape (n, C).
        labels: validation class indices, shape (n,).
        bounds: smallest and largest temperature searched, 0 < low < high.

    Returns:
        The fitted temperature (a bound when the optimum lies outside them).

    Raises:
        ValueError: on bad logits or labels, or bounds not 0 < low < high.
    """
    from scipy.optimize import minimize_scalar
    from scipy.special import log_softmax

    z, y = _check_logits(logits, labels)
    lo, hi = (float(b) for b in bounds)
    if not 0.0 < lo < hi:
        raise ValueError(f"expected bounds 0 < low < high, got {bounds}")
    rows = np.arange(y.size)

    def nll(beta: float) -> float:
        return float(-log_softmax(z * beta, axis=1)[rows, y].mean())

    res = minimize_scalar(
        nll, bounds=(1.0 / hi, 1.0 / lo), method="bounded", options={"xatol": 1e-10}
    )
    # The bounded search never evaluates the end points; keep one if it is better.
    best = min((1.0 / hi, 1.0 / lo, float(res.x)), key=nll)
    return 1.0 / best


# ----------------------------------------------------------------- breakdowns (photo, site, scale)


def scale_bands(patch_mm: ArrayLike, *, n_bands: int = 3) -> tuple[list[str], list[str]]:
    """Assign each patch to an equal-count band of its physical width in mm.

    Edges are the ``i / n_bands`` quantiles of the known widths (repeated edges merged);
    bands are ``(lo, hi]`` except the first, which includes its lower edge. Patches
    without a scale (nan) get the band ``"unknown"``.

    Args:
        patch_mm: surface width of each patch in mm, nan where unknown, shape (n,).
        n_bands: number of bands wanted (fewer when widths repeat).

    Returns:
        (band label per patch, band labels in increasing order of width, then
        "unknown" if any patch has no scale).

    Raises:
        ValueError: on negative widths or n_bands < 1.
    """
    mm = _as_1d(patch_mm, "patch_mm").astype(float)
    nb = _check_n_bins(n_bands)
    known = np.isfinite(mm)
    if (mm[known] <= 0).any():
        raise ValueError(f"expected patch widths > 0 mm, got {mm[known & (mm <= 0)][:5].tolist()}")
    out = np.full(mm.size, "unknown", dtype=object)
    order: list[str] = []
    if known.any():
        edges = np.unique(np.quantile(mm[known], np.arange(nb + 1) / nb))
        if edges.size == 1:
            edges = np.array([edges[0], edges[0]])
        labels = [f"{edges[i]:.1f}-{edges[i + 1]:.1f} mm" for i in range(edges.size - 1)]
        idx = np.clip(np.searchsorted(edges, mm[known], side="left") - 1, 0, len(labels) - 1)
        out[known] = [labels[i] for i in idx]
        order = [lab for lab in labels if lab in set(out[known])]
    if (~known).any():
        order.append("unknown")
    return [str(v) for v in out], order


def breakdown(
    keys: Sequence[str],
    is_crack: ArrayLike,
    flagged: ArrayLike,
    correct: ArrayLike,
    *,
    order: Sequence[str] | None = None,
    confidence: float = 0.95,
    method: str = "wilson",
) -> list[dict[str, Any]]:
    """Screening recall (with interval), false alarms and accuracy for each value of a key.

    Args:
        keys: the group of each patch (photo, site, scale band), shape (n,).
        is_crack: whether each patch truly shows a crack, shape (n,).
        flagged: whether the screener flagged each patch, shape (n,).
        correct: whether the predicted class was right, shape (n,).
        order: row order (default: sorted keys); every key must be listed.
        confidence: level of the recall intervals.
        method: interval method, see :func:`recall_interval`.

    Returns:
        One dict per key with key, patches, cracks, cracks_found, recall, recall_ci_low,
        recall_ci_high (nan when the group has no cracks), clean, false_alarms,
        false_alarm_rate (nan without clean patches) and accuracy.

    Raises:
        ValueError: on mismatched lengths, non-binary flags or keys missing from ``order``.
    """
    k = np.asarray([str(v) for v in keys], dtype=object)
    crack = _as_bool(is_crack, "is_crack")
    flag = _as_bool(flagged, "flagged")
    corr = _as_bool(correct, "correct")
    for arr, name in ((crack, "is_crack"), (flag, "flagged"), (corr, "correct")):
        _same_length(k, arr, "keys", name)
    present = sorted(set(k.tolist()))
    rows_order = list(order) if order is not None else present
    missing = sorted(set(present) - set(rows_order))
    if missing:
        raise ValueError(f"expected every key in order, got keys missing from it: {missing[:10]}")
    out = []
    for key in rows_order:
        m = k == key
        if not m.any():
            continue
        n_crack = int((m & crack).sum())
        found = int((m & crack & flag).sum())
        clean = int((m & ~crack).sum())
        fa = int((m & ~crack & flag).sum())
        iv = recall_interval(found, n_crack, confidence=confidence, method=method)
        out.append(
            {
                "key": key,
                "patches": int(m.sum()),
                "cracks": n_crack,
                "cracks_found": found,
                "recall": _ratio(found, n_crack),
                "recall_ci_low": iv.low,
                "recall_ci_high": iv.high,
                "clean": clean,
                "false_alarms": fa,
                "false_alarm_rate": _ratio(fa, clean),
                "accuracy": float(corr[m].mean()),
            }
        )
    return out
