"""Beta-binomial CDFs of many (successes, trials) pairs under many (a, b) at once.

betabinom_cdf_pairs walks each distinct trials count's mass function upward once per (a, b);
every value is held to scipy.stats.betabinom.cdf, which sums the mass function itself.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from workbench.models._stats import betabinom_cdf_pairs, betabinom_cdf_steps


def reference(y, n, a, b):
    # reference: scipy.stats.betabinom.cdf
    yy, nn = y[:, None], n[:, None]
    return stats.betabinom.cdf(yy - 1, nn, a, b), stats.betabinom.cdf(yy, nn, a, b)


def test_many_pairs_and_draws_match_scipy():
    rng = np.random.default_rng(0)
    n = rng.integers(0, 400, 600)  # repeats of n and of (y, n), zero trials, y = 0 and y = n
    y = rng.binomial(n, rng.uniform(0, 1, 600))
    y[:5], y[5:10] = 0, n[5:10]
    a = rng.uniform(0.05, 40, 9)  # U-shaped (a, b < 1) and peaked mass functions
    b = rng.uniform(0.05, 80, 9)
    below, at = betabinom_cdf_pairs(y, n, a, b)
    ref_below, ref_at = reference(y, n, a, b)
    np.testing.assert_allclose(below, ref_below, rtol=0, atol=1e-11)
    np.testing.assert_allclose(at, ref_at, rtol=0, atol=1e-11)


@pytest.mark.parametrize(("y", "n", "a", "b"), [
    (100, 10**6, 0.5, 0.5), (900_000, 10**6, 3.0, 20.0), (4_000_000, 5 * 10**6, 200.0, 30.0),
    (2, 3_000, 5e4, 1e6)])
def test_long_walks_rescale_without_losing_mass(y, n, a, b):
    # P(0) is far below the smallest double in some of these; the walk rescales its term
    below, at = betabinom_cdf_pairs([y], [n], [a], [b])
    ref_below, ref_at = reference(np.array([y]), np.array([n]), a, b)
    assert at[0, 0] == pytest.approx(ref_at[0, 0], abs=1e-8)
    assert below[0, 0] == pytest.approx(ref_below[0, 0], abs=1e-8)


def test_steps_count_the_longest_walk_per_distinct_trials():
    # n = 10 walks to its largest y (7), n = 4 to 1: (8 + 2) steps per draw
    assert betabinom_cdf_steps([3, 7, 1, 0], [10, 10, 4, 4], draws=5) == 50


def test_impossible_counts_are_refused():
    with pytest.raises(ValueError, match="successes"):
        betabinom_cdf_pairs([5], [3], [1.0], [1.0])
