"""trainkit.judging.scoring: the cascade's pass threshold (brute force and scikit-learn's roc_curve) and its gate."""

from __future__ import annotations

import re

import numpy as np
import pytest
from sklearn.metrics import roc_curve

from trainkit.judging.scoring import cascade_block, cascade_pass_threshold


def _brute_force(scores, flagged, crack, share):
    """Every distinct score tried as a threshold; the highest meeting both shares."""
    best = None
    for t in np.unique(scores):
        ok = all(np.mean(scores[m] >= t) >= share for m in (flagged, crack) if m.any())
        if ok:
            best = t
    return best


def _roc_highest(scores, positives, share):
    """scikit-learn's roc_curve: tpr[i] is the share of positives with score >= thresholds[i];
    the highest threshold whose tpr reaches ``share`` (thresholds decrease along the curve)."""
    fpr, tpr, thr = roc_curve(positives, scores, drop_intermediate=False)
    return float(thr[np.argmax(tpr >= share - 1e-12)])


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("share", [0.995, 0.9, 1.0])
def test_pass_threshold_matches_brute_force_and_roc_curve(seed, share):
    rng = np.random.default_rng(seed)
    n = 600
    crack = rng.random(n) < 0.2
    scores = np.clip(rng.normal(0.3 + 0.4 * crack, 0.2), 0, 1).round(3)  # rounding makes ties
    flagged = (scores + rng.normal(0, 0.1, n) > 0.55) & (rng.random(n) < 0.95)
    t, source = cascade_pass_threshold(scores, flagged, crack, share=share)
    assert t == pytest.approx(_brute_force(scores, flagged, crack, share))
    # each set alone as a binary problem in scikit-learn; the threshold is the lower of the two
    expected = min(_roc_highest(scores, m, share) for m in (flagged, crack))
    assert t == pytest.approx(expected)
    for m in (flagged, crack):
        assert np.mean(scores[m] >= t) >= share
    assert f"{share:g}" in source and str(int(crack.sum())) in source


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("spare", [0.05, 0.2])
def test_the_spare_share_lowers_the_threshold_to_pass_that_share_of_other_cells(seed, spare):
    rng = np.random.default_rng(seed)
    n = 800
    crack = rng.random(n) < 0.2
    scores = np.clip(rng.normal(0.2 + 0.6 * crack, 0.1), 0, 1).round(3)
    flagged = crack & (rng.random(n) < 0.9)
    others = ~(flagged | crack)
    t, source = cascade_pass_threshold(scores, flagged, crack, share=0.995, spare_share=spare)
    # brute force over every distinct score: the highest meeting all three shares
    best = None
    for c in np.unique(scores):
        shares = [np.mean(scores[m] >= c) for m in (flagged, crack)]
        if min(shares) >= 0.995 and np.mean(scores[others] >= c) >= spare:
            best = c
    assert t == pytest.approx(best)
    # scikit-learn's roc_curve on the other cells as positives gives the margin's limit
    plain = min(_roc_highest(scores, m, 0.995) for m in (flagged, crack))
    assert t == pytest.approx(min(plain, _roc_highest(scores, others, spare)))
    assert t <= plain and f"{spare:g} of the {int(others.sum())} other cells" in source
    # spare 0 keeps the rule without a margin
    assert cascade_pass_threshold(scores, flagged, crack, spare_share=0.0)[0] == pytest.approx(
        _brute_force(scores, flagged, crack, 0.995)
    )
    with pytest.raises(ValueError, match="spare_share must be in"):
        cascade_pass_threshold(scores, flagged, crack, spare_share=1.0)


def test_pass_threshold_without_positives_and_bad_input():
    s = np.linspace(0, 1, 10)
    none = np.zeros(10, bool)
    assert cascade_pass_threshold(s, none, none)[0] is None
    only_cracks = s > 0.5  # no flagged cell: the crack cells alone decide
    assert cascade_pass_threshold(s, none, only_cracks, share=1.0)[0] == pytest.approx(s[5])
    with pytest.raises(ValueError, match="one shape"):
        cascade_pass_threshold(s, none[:5], none)
    with pytest.raises(ValueError, match="share must be in"):
        cascade_pass_threshold(s, none, only_cracks, share=0.0)


def _cells(rng, n, p_crack):
    crack = rng.random(n) < p_crack
    main = np.where(crack, rng.uniform(0.6, 1.0, n), rng.uniform(0.0, 0.5, n))
    return crack, main


def test_cascade_gate_accepts_a_faithful_first_stage_and_refuses_a_bad_one():
    rng = np.random.default_rng(0)
    cv, pv = _cells(rng, 2000, 0.1)
    ct, pt = _cells(rng, 2000, 0.1)

    # a faithful first stage: high wherever the main network flags (0.55), low elsewhere
    def faithful(p):
        return np.where(p >= 0.55, 0.9, 0.1) + rng.uniform(-0.05, 0.05, p.size)

    good = cascade_block((faithful(pv), pv, cv), (faithful(pt) + 0.05, pt, ct), 0.55)
    assert good["gate"]["passed"] and good["gate"]["verdict"].startswith("ACCEPTED")
    assert good["recall_drop"] <= 0.005 and 0 < good["passed_share"] < 0.5
    assert good["validation"]["passed_of_flagged"] >= 0.995
    # a bad one: right on validation, but on the test cells it scores 3 % of the cracks low
    bad_test = np.clip(pt + 0.2, 0, 1)
    missed = np.flatnonzero(ct)[: max(1, int(0.03 * ct.sum()))]
    bad_test[missed] = 0.0
    bad = cascade_block((pv, pv, cv), (bad_test, pt, ct), 0.55)
    cas, main = bad["cascade"], bad["main"]
    assert cas["fn"] == main["fn"] + len(missed)  # counted by hand: each missed crack is lost
    assert not bad["gate"]["passed"]
    assert (
        bad["gate"]["verdict"].startswith("REFUSED")
        and "without the cascade" in (bad["gate"]["verdict"])
    )
    assert bad["recall_drop"] == pytest.approx(len(missed) / ct.sum())


def test_cascade_gate_refuses_when_the_threshold_cannot_be_chosen():
    z = np.zeros(5)
    block = cascade_block((z, z, z > 1), (z, z, z > 1), 0.5)
    assert block["pass_threshold"] is None and not block["gate"]["passed"]
    assert "cannot be chosen" in block["gate"]["verdict"]


@pytest.mark.parametrize("budget", [None, 0.2])
def test_an_adapted_models_threshold_names_both_candidates_and_which_is_used(budget):
    """The evaluation of an adapted model printed the job cells' threshold beside the one in
    use with no word on which applied; the source now says both and the one used."""
    from trainkit.judging.scoring import Scored, threshold_for_job_too

    rng = np.random.default_rng(3)
    labels = rng.integers(0, 2, 60)
    p_crack = np.clip(0.3 * labels + 0.7 * rng.random(60), 0, 1)
    probs = np.stack([1 - p_crack, p_crack], axis=1)
    job = Scored(labels=labels, probs=probs, logits=np.log(probs + 1e-9))
    t, source = threshold_for_job_too(
        0.5, "split rule", job, np.ones(60), target_recall=0.9, max_false_alarms=budget
    )
    m = re.fullmatch(
        r"split rule: 0\.5 from the split's validation patches, (\S+) from the job's 60 "
        r"validation cells \(weighted by inclusion probability\); the (lower|higher) of the "
        r"two, (\S+), is used so the rule holds on both",
        source,
    )
    assert m, source
    job_t, which, used = float(m[1]), m[2], float(m[3])
    assert which == ("higher" if budget else "lower")
    assert used == pytest.approx(t, abs=5e-4) == (max if budget else min)(0.5, job_t)
