"""Trials still needed: the smallest m from which the chance of settling stays at or above
the settle chance, checked against a brute force over every m written here with
``scipy.stats.beta`` and ``scipy.stats.betabinom`` (not the project's code)."""

from __future__ import annotations

import numpy as np
import pytest
from helpers import BetaGroups
from scipy import stats

from workbench.analysis.decisions import trials_needed_table


def brute_chances(a, b, most, target, bounds=(0.05, 0.95)):
    """For m = 1..most: P(P(theta > target | m more trials) ends outside bounds), enumerating
    every y of every m on one (m, y) grid."""
    m = np.arange(1, most + 1)[:, None]
    y = np.arange(most + 1)[None, :]
    inside = y <= m
    yy, mm = np.where(inside, y, 0), np.broadcast_to(m, inside.shape)
    above = stats.beta.sf(target, a + yy, b + mm - yy)
    settled = inside & ((above < bounds[0]) | (above > bounds[1]))
    pmf = stats.betabinom.pmf(yy, mm, a, b)
    return np.where(settled, pmf, 0.0).sum(axis=1)


# posteriors near a 0.2 target; each zig-zags across 0.8 before it holds (found by the brute
# force below: a first crossing earlier than the m from which the chance stays up)
# (measured: first reached at 191, 46, 110, 171, 189; held from 212, 64, 127, 188, 209)
GROUPS = [(3.0, 6.0), (6.0, 10.0), (1.0, 8.0), (2.0, 4.0), (4.0, 8.0)]
TARGET, CHANCE = 0.2, 0.8


@pytest.fixture(scope="module")
def table():
    a, b = zip(*GROUPS)
    out, doc = trials_needed_table(BetaGroups(a, b), TARGET, chance=CHANCE, max_trials=5000)
    assert "stays at or above" in doc["definition"]
    return out


@pytest.mark.slow
@pytest.mark.parametrize("k", range(len(GROUPS)))
def test_reported_m_is_where_the_chance_stays_up(table, k):
    a, b = GROUPS[k]
    m = int(table["trials_needed"].iloc[k])
    horizon = 3 * m + 100  # brute force looks well past the engine's own horizon (2 m + 20)
    chance = brute_chances(a, b, horizon, TARGET)
    below = np.flatnonzero(chance < CHANCE)
    stays_from = int(below[-1]) + 2 if below.size else 1
    assert m == stays_from
    assert table["prob_settled"].iloc[k] == pytest.approx(chance[m - 1], abs=1e-9)


def test_the_groups_zig_zag(table):
    # at least some of the groups reach the chance first well before it holds: the case the
    # old search could land on
    zig = 0
    for (a, b), m in zip(GROUPS, table["trials_needed"], strict=True):
        first = int(np.argmax(brute_chances(a, b, int(m), TARGET) >= CHANCE)) + 1
        zig += first < int(m)
    assert zig >= 3


@pytest.mark.slow
def test_walk_down_finds_the_last_short_m_of_the_every_m_brute_force():
    # the walk down from the horizon (decisions._last_short) against the brute force above, on
    # posteriors of several sizes around the target (scipy.stats enumerates every m and y)
    from workbench.analysis.decisions import _last_short

    rng = np.random.default_rng(7)
    size = rng.uniform(5, 300, 12)
    mean = TARGET + rng.uniform(-0.08, 0.08, 12)
    a, b = mean * size, (1 - mean) * size
    horizon = np.full(12, 400)
    got = _last_short(a, b, horizon, TARGET, CHANCE)
    for i in range(12):
        below = np.flatnonzero(brute_chances(a[i], b[i], 400, TARGET) < CHANCE)
        assert got[i] == (int(below[-1]) + 1 if below.size else 0)
