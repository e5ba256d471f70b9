"""Classification counts and their intervals: confusion matrix, binomial intervals, per-class report."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats
from sklearn import metrics as skm

from trainkit.metrics._checks import (
    _METHOD_ALIASES,
    _METHOD_DISPLAY,
    INTERVAL_METHODS,
    _as_1d,
    _check_confidence,
    _check_in_labels,
    _check_labels,
    _ratio,
    _same_length,
)


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
