"""The screening view (crack vs no crack): scores at a threshold and threshold choices."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike

from trainkit.metrics._checks import (
    MetricsError,
    _as_bool,
    _as_unit_float,
    _check_confidence,
    _ratio,
    _same_length,
    _unit_number,
)
from trainkit.metrics.classification import confusion_matrix


def _check_threshold(threshold: float) -> float:
    return _unit_number(threshold, "threshold", "[0, 1]")


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
        MetricsError: if there are no crack patches.
        ValueError: if target_recall is outside (0, 1].
    """
    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    _same_length(y, p, "y_true_crack", "p_crack")
    target = _unit_number(target_recall, "target_recall", "(0, 1]")
    n_pos = int(y.sum())
    if n_pos == 0:
        raise MetricsError(
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


@dataclass(frozen=True)
class RecallPromise:
    """A threshold chosen so that recall >= ``target`` holds with stated confidence.

    Attributes:
        threshold: flag a patch when its crack probability is >= this.
        target: the recall promised.
        confidence: the confidence asked for.
        cracks: validation cracks the choice rests on (n).
        below: validation cracks at or below the threshold, the threshold's own included
            (k: the threshold is the k-th lowest crack score).
        achieved_confidence: the probability, over draws of n validation cracks, that recall
            at a threshold chosen this way is >= ``target`` (>= ``confidence`` when ``kept``).
        recall_bound: recall at the threshold is at least this with ``confidence``.
        validation_recall: the share of the validation cracks the threshold flags.
        kept: whether the promise is made; False when n is too few for it (``cracks_needed``).
        cracks_needed: the fewest validation cracks for which this promise can be made
            (independent cracks; with photos given, effective ones).
        effective_cracks: n divided by the design effect of the cracks' photos (n when no
            photos are given).
        photo_correlation: the intra-photo correlation of the crack scores' ranks behind
            that design effect (0 when no photos are given).
    """

    threshold: float
    target: float
    confidence: float
    cracks: int
    below: int
    achieved_confidence: float
    recall_bound: float
    validation_recall: float
    kept: bool
    cracks_needed: int
    effective_cracks: float = math.nan
    photo_correlation: float = 0.0

    def as_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def cracks_needed_for_promise(target_recall: float, confidence: float) -> int:
    """The fewest validation cracks for which :func:`threshold_with_recall_promise` can
    promise recall >= ``target_recall`` with ``confidence``: the smallest n with
    ``1 - target**n >= confidence`` (a threshold at the lowest of n crack scores misses a
    new crack with probability Beta(1, n); with target 0.95 and confidence 0.95, 59 --
    the success-run count of reliability testing)."""
    target = _unit_number(target_recall, "target_recall", "(0, 1]")
    conf = _check_confidence(confidence)
    if target >= 1.0:
        raise ValueError("a recall of 1 can never be promised from a finite sample")
    n = math.ceil(math.log1p(-conf) / math.log(target))
    while n > 1 and 1.0 - target ** (n - 1) >= conf:
        n -= 1
    while 1.0 - target**n < conf:
        n += 1
    return max(1, n)


def photo_design_effect(scores: ArrayLike, photos: ArrayLike) -> tuple[float, float]:
    """Kish's design effect of cracks clustered in photos, and the correlation behind it.

    The intra-photo correlation rho of the crack scores' ranks is the one-way ANOVA
    estimator (Donner 1986; MSB and MSW as in ``scipy.stats.f_oneway``:
    rho = (MSB - MSW) / (MSB + (m0 - 1) MSW), m0 = (N - sum m_j^2 / N) / (J - 1)),
    clipped to [0, 1]; the design effect is 1 + (m_bar - 1) rho with m_bar = sum m_j^2 / N
    the size-weighted mean number of cracks per photo (Kish 1965). Cracks of one photo
    that score alike (a hard photo whose cracks all score low) make it large.

    Returns:
        (design effect >= 1, rho); (1, 0) with fewer than two photos or no photo holding
        two cracks.
    """
    from scipy import stats

    r = stats.rankdata(np.asarray(scores, dtype=float))
    _, inv = np.unique(np.asarray(photos), return_inverse=True)
    m = np.bincount(inv)
    n, j = r.size, m.size
    if j < 2 or n <= j:
        return 1.0, 0.0
    means = np.bincount(inv, weights=r) / m
    msb = float(np.sum(m * (means - r.mean()) ** 2)) / (j - 1)
    msw = float(np.sum((r - means[inv]) ** 2)) / (n - j)
    m0 = (n - float(np.sum(m**2)) / n) / (j - 1)
    den = msb + (m0 - 1.0) * msw
    rho = min(max((msb - msw) / den, 0.0), 1.0) if den > 0 else 0.0
    m_bar = float(np.sum(m**2)) / n
    return 1.0 + (m_bar - 1.0) * rho, rho


def threshold_with_recall_promise(
    y_true_crack: ArrayLike,
    p_crack: ArrayLike,
    *,
    target_recall: float,
    confidence: float,
    photos: ArrayLike | None = None,
) -> RecallPromise:
    """The highest threshold at which recall >= ``target_recall`` holds with ``confidence``.

    A distribution-free order-statistic rule (the binomial tail bound of risk-controlling
    thresholds, Bates, Angelopoulos, Lei, Malik and Jordan 2021; the same arithmetic as
    Wilks' tolerance limits). With the n validation crack scores sorted ascending
    s_(1) <= ... <= s_(n), a new crack like them scores below s_(k) with probability
    F(s_(k)), distributed Beta(k, n + 1 - k) over draws of the validation cracks; so
    P(miss rate <= 1 - target) = P(Binomial(n, 1 - target) >= k), and the rule takes the
    largest k where that is >= ``confidence`` (the highest threshold, fewest false alarms).
    Ties only add flagged patches, so they keep the promise.

    When n is too few (fewer than :func:`cracks_needed_for_promise`), no k keeps it: the
    threshold is then the lowest validation crack score (k = 1, the most any validation
    set of n cracks can support), ``kept`` is False and ``achieved_confidence`` says how
    much confidence n cracks give.

    The exact bound assumes new cracks are exchangeable with the validation cracks, one by
    one. Cracks of one photo resemble each other, so with ``photos`` (each patch's photo)
    the rule counts n_eff = n / design effect cracks (:func:`photo_design_effect`): it
    takes the largest k_eff for m = floor(n_eff) cracks and the threshold at the same share
    of the n scores (k = floor(k_eff n / m), at least 1). That adjustment is the survey
    practice for clustered samples, an approximation, not part of the exact bound. Either
    way the promise is for photos like the validation photos.

    Raises:
        MetricsError: no crack patch.
        ValueError: target outside (0, 1), confidence outside (0, 1).
    """
    from scipy import stats

    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    _same_length(y, p, "y_true_crack", "p_crack")
    target = _unit_number(target_recall, "target_recall", "(0, 1]")
    conf = _check_confidence(confidence)
    if target >= 1.0:
        raise ValueError("a recall of 1 can never be promised from a finite sample")
    n = int(y.sum())
    if n == 0:
        raise MetricsError(
            "expected at least one crack patch (y_true_crack true) to set a recall threshold, "
            f"got 0 of {y.size}"
        )
    deff, rho = 1.0, 0.0
    if photos is not None:
        ph = np.asarray(photos)
        if ph.shape != p.shape:
            raise ValueError(f"expected {p.size} photos, one per patch, got shape {ph.shape}")
        deff, rho = photo_design_effect(p[y], ph[y])
    n_eff = n / deff
    m = max(1, math.floor(n_eff + 1e-9))  # the whole effective cracks the bound counts
    miss = 1.0 - target
    ks = np.arange(1, m + 1)
    # P(Binomial(m, miss) >= k) = P(Beta(k, m + 1 - k) <= miss), for every k at once
    held = stats.binom.sf(ks - 1, m, miss)
    ok = np.flatnonzero(held >= conf)
    kept = ok.size > 0
    k_eff = int(ks[ok[-1]]) if kept else 1
    # the same share of the n scores; without a promise, the lowest score (k = 1)
    k = max(1, min(n, math.floor(k_eff * n / m + 1e-9))) if kept else 1
    scores = np.sort(p[y])
    t = float(scores[k - 1])
    bound = 1.0 - float(stats.beta.ppf(conf, k_eff, m + 1 - k_eff))
    needed = cracks_needed_for_promise(target, conf)
    return RecallPromise(
        threshold=t,
        target=target,
        confidence=conf,
        cracks=n,
        below=k,
        achieved_confidence=float(held[k_eff - 1]),
        recall_bound=bound,
        validation_recall=float(np.mean(p[y] >= t)),
        kept=kept,
        cracks_needed=needed if deff == 1.0 else math.ceil(needed * deff),
        effective_cracks=round(n_eff, 3),
        photo_correlation=round(rho, 4),
    )


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
        MetricsError: without non-crack patches.
        ValueError: on a budget outside [0, 1].
    """
    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    _same_length(y, p, "y_true_crack", "p_crack")
    b = _check_budget(max_false_alarm_rate)
    neg = np.sort(p[~y])[::-1]
    if neg.size == 0:
        raise MetricsError("expected at least one non-crack patch to set a false-alarm threshold")
    k = math.floor(b * neg.size + 1e-9)
    if k >= neg.size:
        return 0.0
    return float(np.nextafter(neg[k], np.inf))


def weighted_thresholds(
    y_true_crack: ArrayLike,
    p_crack: ArrayLike,
    weights: ArrayLike,
    *,
    target_recall: float | None = None,
    max_false_alarm_rate: float | None = None,
) -> float:
    """The thresholds of :func:`threshold_for_recall` / :func:`threshold_for_false_alarms`
    when each patch stands for ``weights`` patches of a population (a stratified sample:
    weight = 1 / inclusion probability, the Horvitz-Thompson weights of Cochran ch. 5).

    Exactly one of ``target_recall`` (the largest crack score whose weighted recall reaches
    it) and ``max_false_alarm_rate`` (the smallest threshold whose weighted false-alarm
    rate is within it) is given. With equal weights both equal the unweighted functions.

    Raises:
        MetricsError: no patch of the kind the rule needs.
        ValueError: both or neither rule, or weights that are not positive and finite.
    """
    y = _as_bool(y_true_crack, "y_true_crack")
    p = _as_unit_float(p_crack, "p_crack")
    w = np.asarray(weights, dtype=float)
    _same_length(y, p, "y_true_crack", "p_crack")
    if w.shape != p.shape or not np.all(np.isfinite(w)) or np.any(w <= 0):
        raise ValueError(f"expected {p.size} positive finite weights, got shape {w.shape}")
    if (target_recall is None) == (max_false_alarm_rate is None):
        raise ValueError("give exactly one of target_recall and max_false_alarm_rate")
    if target_recall is not None:
        if not 0.0 < float(target_recall) <= 1.0:
            raise ValueError(f"expected target_recall in (0, 1], got {target_recall}")
        if not y.any():
            raise MetricsError("expected at least one crack patch to set a recall threshold")
        order = np.argsort(-p[y], kind="stable")
        scores, cum = p[y][order], np.cumsum(w[y][order])
        m = int(np.searchsorted(cum, float(target_recall) * cum[-1] * (1 - 1e-12)))
        return float(scores[min(m, scores.size - 1)])
    b = _check_budget(cast(float, max_false_alarm_rate))  # not None: exactly one was given
    if y.all():
        raise MetricsError("expected at least one non-crack patch to set a false-alarm threshold")
    order = np.argsort(-p[~y], kind="stable")
    scores, cum = p[~y][order], np.cumsum(w[~y][order])
    # k: how many of the highest-scoring non-crack patches fit within the budget.
    k = int(np.searchsorted(cum, b * cum[-1] * (1 + 1e-12), side="right"))
    if k >= scores.size:
        return 0.0
    return float(np.nextafter(scores[k], np.inf))


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
