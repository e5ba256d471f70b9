"""Tests for trainkit.jobs.design: strata, allocation and seeded stratified sampling."""

from __future__ import annotations

import numpy as np
import pytest

from trainkit.jobs.design import (
    STRATA,
    DesignError,
    allocate,
    assign_strata,
    design_codes,
    draw_more,
    draw_sample,
    rest_band_edges,
)

COCHRAN = "Cochran, W. G. (1977). Sampling Techniques, 3rd ed., ch. 5"


def _probabilities(n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    p = rng.beta(0.5, 8.0, n)
    p[rng.random(n) < 0.05] = rng.uniform(0.5, 1.0)
    return p


def test_strata_edges_belong_upward():
    # p == t is flagged (the Screener flags p >= t); p == t * f is in the near band.
    codes = assign_strata([0.5, 0.4999, 0.1, 0.0999, 0.0, 1.0], 0.5, near_fraction=0.2)
    assert [STRATA[c] for c in codes] == ["flagged", "near", "near", "rest", "rest", "flagged"]


def test_same_seed_same_sample_and_other_seed_another():
    p = _probabilities(5000)
    a = draw_sample(p, 0.5, 300, seed=11)
    b = draw_sample(p, 0.5, 300, seed=11)
    c = draw_sample(p, 0.5, 300, seed=12)
    assert np.array_equal(a.index, b.index) and np.array_equal(a.stratum, b.stratum)
    assert not np.array_equal(a.index, c.index)


def test_sample_is_within_strata_without_replacement_with_recorded_inclusion_probability():
    p = _probabilities(5000)
    s = draw_sample(p, 0.5, 300, seed=3)
    # The default design cuts `rest` into bands whose edges it records (adapted from the
    # three-stratum layout: the codes are recomputed from the recorded edges).
    assert len(s.rest_edges) == 2
    codes = assign_strata(p, 0.5, rest_edges=s.rest_edges)
    assert s.index.size == 300 == int(s.allocated.sum())
    assert np.unique(s.index).size == s.index.size  # without replacement
    assert np.array_equal(codes[s.index], s.stratum)
    assert np.array_equal(s.population, np.bincount(codes, minlength=len(STRATA)))
    assert [r["stratum"] for r in s.strata_table()] == ["flagged", "near"] + [
        f"rest-{j}" for j in (1, 2, 3)
    ]
    for h in design_codes(s.rest_edges):
        in_h = s.stratum == h
        assert in_h.sum() == s.allocated[h]
        # Inclusion probability of SRS without replacement in a stratum: n_h / N_h (COCHRAN).
        assert np.allclose(s.inclusion_probability[in_h], s.allocated[h] / s.population[h])
    assert s.to_dict()["strata"][0]["sampled"] == int(s.allocated[0])


def test_empirical_inclusion_frequency_matches_n_h_over_N_h():
    # Every cell of stratum h is included with probability n_h / N_h (COCHRAN, SRSWOR): the
    # frequency over 3000 seeds lies within 4.5 binomial standard errors of it for every cell.
    p = np.concatenate([np.full(6, 0.9), np.full(9, 0.3), np.full(30, 0.01)])
    hits = np.zeros(p.size)
    reps = 3000
    for seed in range(reps):
        s = draw_sample(p, 0.5, 12, seed=seed, min_per_stratum=2, rest_bands=1)
        hits[s.index] += 1
    prob = s.inclusion_probability[np.searchsorted(s.stratum, assign_strata(p, 0.5))]
    se = np.sqrt(prob * (1 - prob) / reps)
    assert np.all(np.abs(hits / reps - prob) < 4.5 * se)


@pytest.mark.parametrize("seed", range(30))
def test_allocation_sums_to_n_respects_sizes_and_floor(seed):
    rng = np.random.default_rng(seed)
    big = rng.integers(0, 60, size=3)
    big[rng.integers(0, 3)] += 1  # at least one cell
    n = int(rng.integers(1, big.sum() + 1))
    sd = rng.uniform(0.05, 0.5, size=3)
    alloc = allocate(big, n, prior_sd=sd, min_per_stratum=5)
    assert alloc.sum() == n
    assert np.all(alloc <= big) and np.all(alloc >= 0)
    if n >= 5 * 3:
        assert np.all(alloc >= np.minimum(big, 5))


def test_neyman_share_follows_size_times_prior_sd():
    # Neyman allocation n_h proportional to N_h S_h (COCHRAN, optimum allocation; the rule
    # after the floors is this module's own, see its docstring):
    # sizes (1000, 1000, 2000), S (0.1, 0.3, 0.2): weights 100, 300, 400 of 800.
    alloc = allocate(
        np.array([1000, 1000, 2000]), 830, prior_sd=[0.1, 0.3, 0.2], min_per_stratum=10
    )
    # 30 go to the floors; the other 800 split 100 : 300 : 400.
    assert alloc.tolist() == [110, 310, 410]


def test_full_census_and_errors_name_the_value():
    p = _probabilities(200)
    s = draw_sample(p, 0.5, 200, seed=0)
    assert np.array_equal(np.sort(s.index), np.arange(200))
    assert np.allclose(s.inclusion_probability, 1.0)
    with pytest.raises(DesignError, match=r"\[1, 200\].*201"):
        draw_sample(p, 0.5, 201, seed=0)
    with pytest.raises(DesignError, match="threshold"):
        draw_sample(p, 1.5, 10, seed=0)
    with pytest.raises(DesignError, match="in \\[0, 1\\]"):
        draw_sample(np.array([0.2, 1.2]), 0.5, 1, seed=0)
    with pytest.raises(DesignError, match="seed"):
        draw_sample(p, 0.5, 10, seed=-1)


def test_a_million_cells_draw_in_one_pass():
    p = _probabilities(1_000_000, seed=5)
    s = draw_sample(p, 0.5, 1000, seed=1)
    assert s.index.size == 1000 and np.all(np.diff(s.index[s.stratum == 5]) > 0)


def test_rest_bands_are_tertiles_of_the_rest_pile_and_recorded_for_later():
    # Equal-count bands: each of the 3 bands holds a third of the rest pile, to within the
    # one cell an interpolated quantile may move (definition of tertiles; distinct p here).
    p = _probabilities(3000, seed=7)
    s = draw_sample(p, 0.5, 200, seed=1)
    rest = p[p < 0.1]
    assert rest_band_edges(p, 0.5, bands=3) == s.rest_edges
    low, high = s.rest_edges
    sizes = [(rest >= high).sum(), ((rest >= low) & (rest < high)).sum(), (rest < low).sum()]
    assert all(abs(k - rest.size / 3) <= 1 for k in sizes)
    table = {r["stratum"]: r["cells"] for r in s.strata_table()}
    assert [table["rest-1"], table["rest-2"], table["rest-3"]] == sizes
    # A stored sample can be re-stratified from its JSON: same codes for every cell.
    d = s.to_dict()
    codes = assign_strata(p, d["threshold"], near_fraction=0.2, rest_edges=d["rest_edges"])
    assert [STRATA[c] for c in codes[s.index]] == [c["stratum"] for c in d["cells"]]
    # One band is the original three-stratum design, with no edges.
    old = draw_sample(p, 0.5, 200, seed=1, rest_bands=1)
    assert old.rest_edges == () and [r["stratum"] for r in old.strata_table()] == [
        "flagged",
        "near",
        "rest",
    ]
    with pytest.raises(DesignError, match="rest_bands in \\[1, 4\\], got 5"):
        draw_sample(p, 0.5, 200, seed=1, rest_bands=5)
    with pytest.raises(DesignError, match="rest_edges"):
        assign_strata(p, 0.5, rest_edges=[0.05, 0.01])


def test_banded_design_empirical_inclusion_frequency_matches_n_h_over_N_h():
    # Every cell of every band is included with probability n_h / N_h (COCHRAN, SRSWOR):
    # the frequency over 3000 seeds lies within 4.5 binomial standard errors of it.
    p = np.concatenate([np.full(6, 0.9), np.full(9, 0.3), np.linspace(0.001, 0.09, 30)])
    hits = np.zeros(p.size)
    reps = 3000
    for seed in range(reps):
        s = draw_sample(p, 0.5, 15, seed=seed, min_per_stratum=2)
        hits[s.index] += 1
    codes = assign_strata(p, 0.5, rest_edges=s.rest_edges)
    assert sorted(set(codes.tolist())) == [0, 1, 3, 4, 5]
    prob = (s.allocated / np.maximum(s.population, 1))[codes]
    se = np.sqrt(prob * (1 - prob) / reps)
    assert np.all(np.abs(hits / reps - prob) < 4.5 * se)


@pytest.mark.parametrize("seed", range(20))
def test_banded_allocation_within_sizes_reaches_every_stratum_and_is_seeded(seed):
    rng = np.random.default_rng(seed)
    size = int(rng.integers(12, 400))
    p = rng.beta(0.5, 6.0, size)
    n = int(rng.integers(5, size + 1))
    s = draw_sample(p, 0.5, n, seed=seed)
    assert s.allocated.sum() == n == s.index.size
    assert np.all(s.allocated <= s.population) and np.all(s.allocated >= 0)
    nonempty = s.population > 0
    if n >= nonempty.sum():  # the floor is lowered for a small n so no stratum is skipped
        assert np.all(s.allocated[nonempty] >= 1)
    again = draw_sample(p, 0.5, n, seed=seed)
    assert np.array_equal(s.index, again.index) and s.rest_edges == again.rest_edges


# ----- a sample that grows (draw_more) ------------------------------------------------------


def test_union_of_two_draws_is_one_srswor_by_enumeration():
    """Within a stratum of N cells, n1 drawn and then n2 of the N - n1 left: every set of
    n1 + n2 cells has chance 1 / C(N, n1 + n2), as one simple random sample without
    replacement of that size (COCHRAN; checked here by enumerating every pair of draws)."""
    from fractions import Fraction
    from itertools import combinations
    from math import comb

    N, n1, n2 = 7, 3, 2
    chance: dict[frozenset, Fraction] = {}
    for first in combinations(range(N), n1):
        left = [i for i in range(N) if i not in first]
        for second in combinations(left, n2):
            u = frozenset(first + second)
            chance[u] = chance.get(u, 0) + Fraction(1, comb(N, n1) * comb(N - n1, n2))
    assert len(chance) == comb(N, n1 + n2)
    assert set(chance.values()) == {Fraction(1, comb(N, n1 + n2))}


def test_draw_more_gives_every_union_the_same_chance_by_seeded_simulation():
    """draw_sample then draw_more, 6,000 seeds: within each stratum every set of the combined
    size turns up equally often (chi-square against uniform, scipy.stats.chisquare), each
    cell with frequency (n1_h + n2_h) / N_h, the inclusion probability recorded."""
    from collections import Counter
    from math import comb

    from scipy.stats import chisquare

    p = np.array([0.9] * 4 + [0.02] * 5)  # flagged: 4 cells; rest: 5 cells (near empty)
    flagged, rest = Counter(), Counter()
    hits = np.zeros(p.size)
    runs = 6000
    for seed in range(runs):
        a = draw_sample(p, 0.5, 4, seed=seed, rest_bands=1)
        taken = np.zeros(p.size, dtype=bool)
        taken[a.index] = True
        b = draw_more(p, 0.5, 2, seed=seed + runs, sampled=taken, rest_edges=a.rest_edges)
        assert not taken[b.index].any()  # a cell drawn before is never drawn again
        union = np.concatenate([a.index, b.index])
        hits[union] += 1
        flagged[frozenset(i for i in union if i < 4)] += 1
        rest[frozenset(i for i in union if i >= 4)] += 1
        assert b.inclusion_probability.tolist() == [3 / 4, 3 / 5]
    assert len(flagged) == comb(4, 3) and len(rest) == comb(5, 3)
    assert chisquare(list(flagged.values())).pvalue > 1e-3
    assert chisquare(list(rest.values())).pvalue > 1e-3
    assert np.allclose(hits / runs, [3 / 4] * 4 + [3 / 5] * 5, atol=0.03)


def test_draw_more_counts_every_draw_and_refuses_what_is_not_left():
    p = _probabilities(2000, seed=4)
    a = draw_sample(p, 0.5, 100, seed=1)
    taken = np.zeros(p.size, dtype=bool)
    taken[a.index] = True
    b = draw_more(p, 0.5, 150, seed=2, sampled=taken, rest_edges=a.rest_edges)
    assert b.index.size == 150 and int(b.allocated.sum()) == 250
    assert np.array_equal(b.population, a.population)  # the first draw's strata, its edges
    codes = assign_strata(p, 0.5, rest_edges=a.rest_edges)
    assert np.array_equal(codes[b.index], b.stratum)
    both = np.concatenate([a.index, b.index])
    for h in design_codes(a.rest_edges):
        n_h = int((codes[both] == h).sum())
        assert b.allocated[h] == n_h
        assert np.allclose(b.inclusion_probability[b.stratum == h], n_h / a.population[h])
    with pytest.raises(DesignError, match=r"n in \[1, 1900\]"):
        draw_more(p, 0.5, 1901, seed=2, sampled=taken, rest_edges=a.rest_edges)
    with pytest.raises(DesignError, match="sampled as a bool array"):
        draw_more(p, 0.5, 10, seed=2, sampled=taken[:-1], rest_edges=a.rest_edges)
