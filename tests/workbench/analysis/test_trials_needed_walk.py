"""The walk down m behind trials_needed (decisions._last_short and _walk.walk_down) against a
plain evaluation of the settle chance at every m with ``scipy.stats.beta`` and
``scipy.stats.betabinom`` (not the project's code), and its recurrences against the state
computed afresh at the same m (betainc, log-gamma), held against scipy in the same way."""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from helpers import BetaGroups
from scipy import stats

from workbench.analysis import _walk, decisions


def scipy_chances(a, b, most, target):
    """Settle chance at m = 1..most by scipy.stats alone: the Beta-binomial(m, a, b) mass of
    the y whose updated P(theta > target) (beta.sf) is outside (0.05, 0.95)."""
    return np.array([scipy_chance_at(a, b, m, target) for m in range(1, most + 1)])


def scipy_chance_at(a, b, m, target):
    y = np.arange(m + 1)
    above = stats.beta.sf(target, a + y, b + m - y)
    settled = (above < 0.05) | (above > 0.95)
    return stats.betabinom.pmf(y, m, a, b)[settled].sum()


def scipy_last_short(a, b, horizon, target, chance):
    below = np.flatnonzero(scipy_chances(a, b, horizon, target) < chance)
    return int(below[-1]) + 1 if below.size else 0


def random_cases(n, seed):
    """(a, b, target, chance, horizon): mostly posteriors straddling the target, with edges:
    a or b tiny or huge, targets near 0 and 1, and any posterior against any target."""
    rng = np.random.default_rng(seed)
    cases = []
    for i in range(n):
        kind = i % 5
        target = rng.uniform(0.02, 0.98)
        size = np.exp(rng.uniform(np.log(0.5), np.log(3000)))
        if kind == 0:  # near the target, of any size
            mean = np.clip(target + rng.normal(0, 0.1), 1e-3, 1 - 1e-3)
            a, b = mean * size, (1 - mean) * size
        elif kind == 1:  # one shape tiny
            a, b = (10 ** rng.uniform(-3, -0.5), rng.uniform(0.5, 50))[:: rng.choice([1, -1])]
        elif kind == 2:  # huge shapes (a posterior of many trials)
            mean = np.clip(target + rng.normal(0, 0.01), 1e-3, 1 - 1e-3)
            size = 10 ** rng.uniform(4, 6)
            a, b = mean * size, (1 - mean) * size
        elif kind == 3:  # target near 0 or 1
            target = rng.choice([rng.uniform(1e-3, 0.02), rng.uniform(0.98, 0.999)])
            mean = np.clip(target + rng.normal(0, 0.01), 1e-4, 1 - 1e-4)
            a, b = mean * size, (1 - mean) * size
        else:  # anything
            a, b = 10 ** rng.uniform(-2, 3, 2)
        chance = rng.choice([0.5, 0.8, 0.9, rng.uniform(0.05, 0.99)])
        cases.append((float(a), float(b), float(target), float(chance), int(rng.integers(2, 90))))
    return cases


@pytest.mark.parametrize("seed", [1, pytest.param(2, marks=pytest.mark.slow),
                                  pytest.param(3, marks=pytest.mark.slow)])
def test_last_short_equals_every_m_scipy_evaluation(seed):
    # 3 x 100 random cases; each group's answer is checked on its own against scipy.stats
    cases = random_cases(100, seed)
    for target in {c[2] for c in cases}:
        for chance in {c[3] for c in cases if c[2] == target}:
            own = [c for c in cases if c[2] == target and c[3] == chance]
            a, b, _, _, horizon = (np.array(v) for v in zip(*own, strict=True))
            got = decisions._last_short(a, b, horizon, target, chance)
            want = [scipy_last_short(*c[:2], c[4], target, chance) for c in own]
            assert list(got) == want, own


@pytest.mark.parametrize("a,b,target", [(30.0, 170.0, 0.15), (0.3, 2.0, 0.1), (400.0, 600.0, 0.4),
                                        (2.0, 0.05, 0.9)])
def test_long_walk_without_resync_equals_settle_chance_at_every_m(a, b, target, monkeypatch):
    # no direct recomputation between 3000 and 1: the recurrences carry every step; the
    # reference is settle_chance at every m (itself held to scipy.stats.betabinom in
    # test_ranking.test_settle_chance_equals_summed_betabinomial_pmf), and spot checks by scipy
    monkeypatch.setattr(decisions, "WALK_RESYNC", 10**9)
    most = 3000
    chances = decisions.settle_chance(np.full(most, a), np.full(most, b),
                                      np.arange(1, most + 1), target)
    for m in (1, 7, 150, 2999):
        assert chances[m - 1] == pytest.approx(scipy_chance_at(a, b, m, target), abs=1e-10)
    for chance in np.unique(np.round(chances[[10, 100, 1000, 2500]], 3)) + [0.0005]:
        below = np.flatnonzero(chances < chance)
        want = int(below[-1]) + 1 if below.size else 0
        got = decisions._last_short(np.array([a]), np.array([b]), np.array([most]), target, chance)
        assert int(got[0]) == want


@pytest.mark.parametrize("a,b,target", [(30.0, 170.0, 0.15), (5.0, 3.0, 0.5), (0.4, 9.0, 0.05),
                                        (2500.0, 7500.0, 0.25)])
def test_walked_state_matches_state_computed_afresh(a, b, target):
    # walk 2000 steps down by the recurrences alone (chance -1: never short), then compare
    # the window mass, edge probabilities, tests and their terms with the direct state at
    # the same m (betainc and log-gamma; its window mass is settle_chance's, held to scipy)
    top, walked = 4000, 2000
    A, B = np.array([a]), np.array([b])
    un, f, h = decisions._settle_parts(A, B, np.array([top]), target)
    s, bad = decisions._walk_state(A, B, np.array([top]), f, h, target)
    assert not bad.any()
    m, W = np.array([float(top)]), un.copy()
    event = _walk.walk_down(A, B, m, s, W, target, -1.0, (0.95, 0.05), decisions.WALK_GUARD,
                            decisions.WALK_TINY, walked)
    assert event[0] == _walk.DIRECT and m[0] == top - walked  # the budget ran out, no doubt
    un2, f2, h2 = decisions._settle_parts(A, B, m.astype(np.int64), target)
    fresh, _ = decisions._walk_state(A, B, m.astype(np.int64), f2, h2, target)
    np.testing.assert_array_equal(s[0], fresh[0])  # the thresholds
    np.testing.assert_allclose(s[1:], fresh[1:], rtol=1e-9, atol=1e-13)
    # both window masses against scipy: the unsettled y's Beta-binomial probabilities (the
    # walk inherits the start's summation error, ~1e-11 on long windows, and adds little;
    # WALK_GUARD, 1e-9, is far above either)
    mm = int(m[0])
    y = np.arange(mm + 1)
    above = stats.beta.sf(target, a + y, b + mm - y)
    inside = (above >= 0.05) & (above <= 0.95)
    want = math.fsum(stats.betabinom.pmf(y, mm, a, b)[inside])
    assert W[0] == pytest.approx(want, abs=1e-10)
    assert un2[0] == pytest.approx(want, abs=1e-10)


@pytest.mark.slow  # the whole table by scipy at every m (about 6 s)
def test_trials_needed_table_equals_its_definition_by_scipy():
    # the whole table on groups near a target: each m is, by scipy.stats at every m, the
    # smallest from which the chance stays at or above 0.8 through the horizon (twice the
    # first doubling m reaching it plus 20, doubled while short there), prob_settled its chance
    rng = np.random.default_rng(11)
    size = np.exp(rng.uniform(np.log(2), np.log(30), 20))
    mean = 0.3 + rng.uniform(-0.15, 0.15, 20)
    a, b = mean * size, (1 - mean) * size
    table, _ = decisions.trials_needed_table(BetaGroups(a, b), 0.3, chance=0.8, max_trials=600)
    checked = 0
    for i, row in table.iterrows():
        if row["status"] != "settles with more trials":
            continue
        chance = functools.cache(lambda m, i=i: scipy_chance_at(a[i], b[i], m, 0.3))
        first = next(m for m in [2**k for k in range(10)] + [600] if chance(m) >= 0.8)
        horizon = min(600, 2 * first + 20)
        while chance(horizon) < 0.8:
            horizon = min(600, 2 * horizon)
        chances = np.array([chance(m) for m in range(1, horizon + 1)])
        below = np.flatnonzero(chances[:horizon] < 0.8)
        assert int(row["trials_needed"]) == (int(below[-1]) + 2 if below.size else 1)
        assert row["prob_settled"] == pytest.approx(chances[int(row["trials_needed"]) - 1],
                                                    abs=1e-10)
        checked += 1
    assert checked >= 8
