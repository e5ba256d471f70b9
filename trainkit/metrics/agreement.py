"""Paired comparison and agreement: McNemar's test and Cohen's kappa."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats
from sklearn import metrics as skm

from trainkit.metrics._checks import MetricsError, _as_bool, _same_length
from trainkit.metrics.classification import _confusion


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
        raise MetricsError("expected at least one rated sample, got 0")
    p_chance = float((cm.sum(axis=1) * cm.sum(axis=0)).sum()) / float(n) ** 2
    if p_chance >= 1.0:
        return math.nan
    return float(skm.cohen_kappa_score(np.asarray(a), np.asarray(b), labels=np.asarray(labels)))
