"""A threshold that keeps its recall promise: the order-statistic rule against outside
arithmetic (scipy's binomial and beta distributions, the success-run count of reliability
testing) and against simulation with a known score distribution."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from trainkit.metrics import (
    MetricsError,
    cracks_needed_for_promise,
    threshold_for_recall,
    threshold_with_recall_promise,
)


def test_cracks_needed_is_the_success_run_count():
    """Success-run theorem, n = ln(1 - C) / ln(R) rounded up (common practice in
    reliability testing; values worked by hand: 58.4 -> 59, 21.9 -> 22, 44.9 -> 45)."""
    assert cracks_needed_for_promise(0.95, 0.95) == 59
    assert cracks_needed_for_promise(0.90, 0.90) == 22
    assert cracks_needed_for_promise(0.95, 0.90) == 45
    for target, conf in [(0.95, 0.95), (0.9, 0.9), (0.99, 0.8), (0.5, 0.99)]:
        n = cracks_needed_for_promise(target, conf)
        assert 1 - target**n >= conf > 1 - target ** (n - 1)
        assert n == math.ceil(math.log(1 - conf) / math.log(target))


def test_fifty_nine_cracks_promise_095_at_095_with_the_lowest_one():
    scores = np.linspace(0.5, 0.99, 59)
    y = np.ones(59, bool)
    pr = threshold_with_recall_promise(y, scores, target_recall=0.95, confidence=0.95)
    assert pr.kept and pr.below == 1 and pr.threshold == pytest.approx(0.5)
    assert pr.achieved_confidence == pytest.approx(1 - 0.95**59)
    assert pr.validation_recall == 1.0 and pr.cracks_needed == 59
    short = threshold_with_recall_promise(y[:58], scores[:58], target_recall=0.95, confidence=0.95)
    assert not short.kept and short.below == 1 and short.threshold == pytest.approx(0.5)
    assert short.achieved_confidence == pytest.approx(1 - 0.95**58)  # 0.949: short of 0.95
    assert short.recall_bound < 0.95


@pytest.mark.parametrize("n, target, conf", [(300, 0.95, 0.9), (120, 0.9, 0.95), (1000, 0.99, 0.9)])
def test_the_chosen_order_statistic_is_the_largest_the_beta_law_allows(n, target, conf):
    """Brute force with scipy's beta distribution: the miss rate at the k-th lowest crack
    score is Beta(k, n + 1 - k) (order statistics of uniforms); k is the largest with
    P(miss <= 1 - target) >= confidence."""
    rng = np.random.default_rng(n)
    p = rng.random(n + 400)
    y = np.zeros(p.size, bool)
    y[:n] = True
    pr = threshold_with_recall_promise(y, p, target_recall=target, confidence=conf)
    ok = [k for k in range(1, n + 1) if stats.beta.cdf(1 - target, k, n + 1 - k) >= conf]
    assert pr.kept and pr.below == max(ok)
    assert pr.threshold == np.sort(p[y])[pr.below - 1]
    assert pr.recall_bound >= target
    assert pr.recall_bound == pytest.approx(1 - stats.beta.ppf(conf, pr.below, n + 1 - pr.below))
    # never above the plain rule (recall >= target on the validation cracks themselves)
    assert pr.threshold <= threshold_for_recall(y, p, target_recall=target)


def test_the_promise_holds_as_often_as_it_says_in_simulation():
    """2,000 validation sets of 150 crack scores from Beta(5, 1): the true recall at the
    chosen threshold, 1 - F(t) with scipy's Beta(5, 1) cdf, reaches the target in the
    share of sets the rule states (within 4 standard errors), and the plain rule that
    reaches the target on the validation cracks alone keeps it about half the time."""
    rng = np.random.default_rng(2024)
    n, target, conf, runs = 150, 0.95, 0.9, 2000
    kept_promise, kept_plain, stated = 0, 0, None
    y = np.ones(n, bool)
    for _ in range(runs):
        s = rng.beta(5, 1, n)
        pr = threshold_with_recall_promise(y, s, target_recall=target, confidence=conf)
        stated = pr.achieved_confidence
        kept_promise += 1 - stats.beta.cdf(pr.threshold, 5, 1) >= target
        t = threshold_for_recall(y, s, target_recall=target)
        kept_plain += 1 - stats.beta.cdf(t, 5, 1) >= target
    se = math.sqrt(stated * (1 - stated) / runs)
    assert stated >= conf
    assert abs(kept_promise / runs - stated) < 4 * se
    assert kept_plain / runs < 0.7


def test_ties_and_refusals():
    y = np.array([1, 1, 1, 0], bool)
    pr = threshold_with_recall_promise(y, [0.8, 0.8, 0.8, 0.9], target_recall=0.5, confidence=0.5)
    assert pr.threshold == 0.8 and pr.validation_recall == 1.0
    with pytest.raises(MetricsError, match="at least one crack"):
        threshold_with_recall_promise([0, 0], [0.1, 0.2], target_recall=0.9, confidence=0.9)
    with pytest.raises(ValueError, match="never be promised"):
        threshold_with_recall_promise(y, [0.1] * 4, target_recall=1.0, confidence=0.9)
    with pytest.raises(ValueError, match="confidence"):
        threshold_with_recall_promise(y, [0.1] * 4, target_recall=0.9, confidence=1.0)


def test_photo_design_effect_against_scipys_one_way_anova():
    """rho from the one-way ANOVA of the ranks: with F = MSB / MSW from
    ``scipy.stats.f_oneway``, rho = (F - 1) / (F + m0 - 1) (Donner 1986), and the design
    effect 1 + (m_bar - 1) rho (Kish 1965), m_bar = sum m_j^2 / N."""
    from trainkit.metrics import photo_design_effect

    rng = np.random.default_rng(5)
    sizes = rng.integers(2, 12, 30)
    photos = np.repeat(np.arange(30), sizes)
    level = rng.normal(0, 1, 30)[photos]  # photos differ: a real intra-photo correlation
    scores = 1 / (1 + np.exp(-(level + rng.normal(0, 1, photos.size))))
    deff, rho = photo_design_effect(scores, photos)
    ranks = stats.rankdata(scores)
    f = stats.f_oneway(*[ranks[photos == j] for j in range(30)]).statistic
    n = photos.size
    m0 = (n - np.sum(sizes**2) / n) / 29
    assert rho == pytest.approx((f - 1) / (f + m0 - 1))
    assert 0.2 < rho < 0.8
    assert deff == pytest.approx(1 + (np.sum(sizes**2) / n - 1) * rho)
    # one crack per photo: no clustering, no design effect
    assert photo_design_effect(scores, np.arange(n)) == (1.0, 0.0)


def test_cracks_clustered_in_photos_count_for_fewer():
    """The same 300 crack scores: spread one per photo the promise counts 300 cracks;
    clustered 30 to a photo with photo-level differences it counts far fewer and sets a
    lower (more cautious) threshold; without photos given, the plain rule."""
    rng = np.random.default_rng(8)
    photos = np.repeat(np.arange(10), 30)
    s = 1 / (1 + np.exp(-(rng.normal(2, 1.5, 10)[photos] + rng.normal(0, 0.5, 300))))
    y = np.ones(300, bool)
    plain = threshold_with_recall_promise(y, s, target_recall=0.95, confidence=0.9)
    alone = threshold_with_recall_promise(
        y, s, target_recall=0.95, confidence=0.9, photos=np.arange(300)
    )
    grouped = threshold_with_recall_promise(y, s, target_recall=0.95, confidence=0.9, photos=photos)
    assert alone.threshold == plain.threshold and alone.effective_cracks == 300
    assert grouped.photo_correlation > 0.5 and grouped.effective_cracks < 30
    assert not grouped.kept and grouped.threshold == s.min()  # too few: the lowest score
    assert grouped.threshold <= plain.threshold
