"""benchmarks/threshold_promise.py on invented scores: the resplit logic, not a model."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import threshold_promise  # noqa: E402


def test_resplits_deal_whole_photos_and_the_promise_rule_flags_more():
    """120 invented photos, each with 3 cracks (scores Beta(5, 1)) and 5 clean patches
    (Beta(1, 5)); the promise rule's threshold is never above the edge rule's, so it keeps
    the target at least as often (scipy's Beta is the truth behind the scores)."""
    rng = np.random.default_rng(3)
    photos = np.repeat([f"p{i:03d}" for i in range(120)], 8)
    crack = np.tile([True] * 3 + [False] * 5, 120)
    score = np.where(crack, rng.beta(5, 1, crack.size), rng.beta(1, 5, crack.size))
    res = threshold_promise.resplits(
        {"photos": photos, "crack": crack, "score": score},
        draws=200, target=0.95, confidence=0.9, seed=1,
    )  # fmt: skip
    p, e = res["promise"], res["edge"]
    assert p["draws"] == e["draws"] == 200
    assert p["promise_made_share"] == 1.0  # 180 cracks per half: more than the 45 needed
    assert p["threshold_median"] <= e["threshold_median"]
    assert p["target_reached_share"] >= e["target_reached_share"]
    assert p["target_reached_share"] >= 0.85 and e["target_reached_share"] < 0.75
