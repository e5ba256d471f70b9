"""Tests for trainkit.core.familiarity: the Mahalanobis detector of Lee et al. (NeurIPS 2018)."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from scipy.spatial.distance import mahalanobis
from sklearn.covariance import ledoit_wolf
from sklearn.metrics import roc_auc_score

from trainkit.core import familiarity as F

LEE = "Lee, Lee, Lee, Shin (2018), NeurIPS: min over classes of the Mahalanobis distance"


def _clouds(n: int, d: int, seed: int, shift: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Two classes of correlated Gaussian vectors, optionally shifted as a whole."""
    rng = np.random.default_rng(seed)
    mix = np.random.default_rng(100).normal(size=(d, d)) / np.sqrt(d)
    labels = rng.integers(0, 2, size=n)
    centres = np.random.default_rng(101).normal(scale=2.0, size=(2, d))
    x = rng.normal(size=(n, d)) @ mix + centres[labels] + shift
    return x, labels


def test_distances_match_scipy_mahalanobis_without_projection():
    # LEE, checked against scipy.spatial.distance.mahalanobis(u, v, VI) with the fitted
    # class means and precision matrix (no projection, no shrinkage: the pooled covariance).
    x, y = _clouds(400, 8, seed=0)
    s = F.fit(x, y, k=None, shrink=False)
    probe = np.random.default_rng(1).normal(scale=3.0, size=(25, 8))
    ours = F.scores(s, probe)
    prec = s.precision.astype(np.float64)
    means = s.class_means.astype(np.float64) + s.mean.astype(np.float64)
    ref = [min(mahalanobis(u, m, prec) for m in means) for u in probe]
    assert np.allclose(ours, ref, rtol=1e-6)
    # The precision is the inverse of the pooled within-class covariance (divisor n).
    resid = x - np.stack([x[y == c].mean(0) for c in (0, 1)])[y]
    assert np.allclose(np.linalg.inv(resid.T @ resid / len(x)), prec, rtol=1e-4, atol=1e-5)


def test_distances_match_scipy_in_the_projected_space():
    x, y = _clouds(300, 40, seed=2)
    s = F.fit(x, y, k=6)
    probe = _clouds(20, 40, seed=3, shift=0.5)[0]
    z = s.project(probe)
    ref = [
        min(mahalanobis(u, m, s.precision.astype(np.float64)) for m in s.class_means.astype(float))
        for u in z
    ]
    assert np.allclose(F.scores(s, probe), ref, rtol=1e-6)
    # The projection is PCA: its rows are the top principal directions of the centred data
    # (checked up to sign against numpy's eigendecomposition of the covariance).
    w, v = np.linalg.eigh(np.cov(x.T))
    top = v[:, np.argsort(w)[::-1][:6]].T
    assert np.allclose(np.abs(np.sum(top * s.components, axis=1)), 1.0, atol=1e-4)


def test_shrinkage_matches_sklearn_ledoit_wolf():
    # Ledoit and Wolf (2004) shrinkage, checked against sklearn.covariance.ledoit_wolf.
    rng = np.random.default_rng(4)
    x = rng.normal(size=(30, 25)) @ rng.normal(size=(25, 25))
    x -= x.mean(0)
    cov, delta = F.ledoit_wolf_shrinkage(x)
    ref_cov, ref_delta = ledoit_wolf(x, assume_centered=True)
    assert delta == pytest.approx(ref_delta, rel=1e-9)
    assert np.allclose(cov, ref_cov)


def test_shifted_cloud_separates_and_conformal_threshold_flags_about_one_percent():
    x, y = _clouds(3000, 128, seed=5)
    s = F.fit(x, y, k=32)
    val = F.scores(s, _clouds(3000, 128, seed=6)[0])
    thr, bound = F.frame_threshold(val, alpha=0.01)
    held_out = F.scores(s, _clouds(5000, 128, seed=7)[0])
    shifted = F.scores(s, _clouds(1000, 128, seed=8, shift=2.0)[0])
    # Sanity check: the shifted cloud is told apart (AUC from sklearn's roc_auc_score).
    auc = roc_auc_score(
        np.r_[np.zeros(held_out.size), np.ones(shifted.size)], np.r_[held_out, shifted]
    )
    assert auc > 0.99
    # About 1 % of held-out in-distribution vectors exceed it; binomial sd with n = 5000
    # is 0.0014, so [0.4 %, 1.8 %] is about 4 sd either side.
    assert bound == pytest.approx(1 - 2971 / 3001)  # k = ceil(3001 * 0.99) = 2971
    assert 0.004 <= np.mean(held_out > thr) <= 0.018
    assert np.mean(shifted > thr) > 0.9


CONFORMAL = (
    "split-conformal threshold: the ceil((n + 1)(1 - alpha))-th smallest calibration score "
    "(Lei et al. 2018, JASA; Angelopoulos and Bates 2021, 'A gentle introduction to "
    "conformal prediction', section 1), i.e. numpy's quantile at k / n with "
    "method='inverted_cdf' (Hyndman and Fan 1996, definition 1: smallest x with F_n(x) >= q)"
)


@pytest.mark.parametrize("n", [19, 20, 57, 200])
def test_frame_threshold_is_the_conformal_quantile(n):
    # CONFORMAL, the reference computed with numpy's quantile as in that paper's code.
    s = np.random.default_rng(n).gamma(3.0, size=n)
    thr, bound = F.frame_threshold(s, alpha=0.05)
    q = np.ceil((n + 1) * 0.95) / n
    assert thr == np.quantile(s, q, method="inverted_cdf")
    assert 0.0 < bound <= 0.05 + 1e-12


def test_frame_threshold_false_warnings_hold_the_bound_by_simulation():
    # The conformal guarantee (Vovk et al. 2005; Lei et al. 2018): a new exchangeable score
    # exceeds the threshold with probability 1 - k / (n + 1); with n = 19 and alpha 0.05,
    # k = 19 and that is exactly 0.05. 4000 seeded repetitions: sd 0.0034, checked +-3 sd.
    rng = np.random.default_rng(12)
    hits = []
    for _ in range(4000):
        cal = rng.lognormal(size=19)
        thr, bound = F.frame_threshold(cal)
        hits.append(rng.lognormal() > thr)
    assert bound == pytest.approx(0.05)
    assert 0.04 <= np.mean(hits) <= 0.06
    # Fewer frames than 1 / alpha - 1: the largest is used, the bound says 1 / (n + 1).
    assert F.frame_threshold([3.0, 1.0, 2.0]) == (3.0, 0.25)


def test_ensemble_is_the_mean_of_distances_over_layer_medians():
    # Lee et al. (2018) section 2, feature ensemble; the kit's normalisation (divide each
    # layer by its validation median, average) checked against scipy's mahalanobis per layer.
    layers = [_clouds(300, d, seed=20 + d) for d in (4, 10)]
    fits = [F.fit(x, y, k=None, shrink=False) for x, y in layers]
    val = [_clouds(50, d, seed=40 + d)[0] for d in (4, 10)]
    probe = [_clouds(7, d, seed=60 + d, shift=1.0)[0] for d in (4, 10)]

    def ref(summary, rows):
        means = summary.class_means.astype(float) + summary.mean.astype(float)
        prec = summary.precision.astype(float)
        return np.array([min(mahalanobis(u, m, prec) for m in means) for u in rows])

    scales = [F.layer_scale(F.scores(s, v)) for s, v in zip(fits, val, strict=True)]
    assert scales == pytest.approx([np.median(ref(s, v)) for s, v in zip(fits, val, strict=True)])
    got = F.ensemble_scores([F.scores(s, p) for s, p in zip(fits, probe, strict=True)], scales)
    want = (ref(fits[0], probe[0]) / scales[0] + ref(fits[1], probe[1]) / scales[1]) / 2
    assert np.allclose(got, want, rtol=1e-6)
    # Frames: the median of each photo's cells, photos in sorted order (a worked example).
    assert F.group_medians([1.0, 9.0, 2.0, 4.0, 3.0], ["b", "a", "b", "a", "b"]).tolist() == [
        6.5,
        2.0,
    ]
    with pytest.raises(F.FamiliarityError, match="one scale per layer, got 2 layers and 1"):
        F.ensemble_scores([np.ones(3), np.ones(3)], [1.0])


def test_summary_round_trips_through_json_and_frame_median():
    x, y = _clouds(200, 16, seed=9)
    s = F.fit(x, y, k=4)
    back = F.FamiliaritySummary.from_dict(json.loads(json.dumps(s.to_dict())))
    probe = _clouds(10, 16, seed=10)[0]
    assert np.array_equal(F.scores(s, probe), F.scores(back, probe))
    assert back.precision.dtype == np.float32 and back.components.shape == (4, 16)
    assert F.frame_score([1.0, 5.0, 2.0, 9.0, 3.0], 2.5) == (3.0, True)
    assert F.frame_score([[1.0, 2.0], [2.0, 9.0]], 2.5) == (2.0, False)


def test_errors_name_the_value():
    x, y = _clouds(50, 8, seed=11)
    s = F.fit(x, y, k=3)
    with pytest.raises(F.FamiliarityError, match="dimension 8.*got 7"):
        F.scores(s, x[:, :7])
    with pytest.raises(F.FamiliarityError, match="k to be an int >= 1"):
        F.fit(x, y, k=0)
    with pytest.raises(F.FamiliarityError, match="alpha in \\(0, 1\\), got 1.5"):
        F.frame_threshold([1.0, 2.0], alpha=1.5)
    with pytest.raises(F.FamiliarityError, match="format"):
        F.FamiliaritySummary.from_dict({"format": "other"})


def test_module_imports_without_scipy_sklearn_or_torch():
    code = (
        "import sys, trainkit.core.familiarity; "
        "bad = [m for m in ('scipy', 'sklearn', 'torch') if m in sys.modules]; print(bad)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_collapsed_features_keep_only_directions_with_spread():
    # Features of a weakly trained network can collapse onto a few directions (seen in the
    # job-trust benchmark: 20 of 1024 above 1e-3 of the largest singular value). The fit
    # keeps only those, so the scores stay stable under float32 rounding of the features.
    rng = np.random.default_rng(5)
    basis = rng.normal(size=(8, 256))
    feats = rng.normal(size=(600, 8)) @ basis + 1e-9 * rng.normal(size=(600, 256))
    labels = rng.integers(0, 3, 600)
    s = F.fit(feats, labels, k=64)
    assert s.class_means.shape[1] == 8  # numpy's SVD: 8 directions with real spread
    a = F.scores(s, feats[:50])
    b = F.scores(s, feats[:50].astype(np.float32).astype(np.float64))
    assert np.max(np.abs(a - b) / np.maximum(a, 1.0)) < 1e-3
