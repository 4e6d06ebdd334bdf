"""CDFs of many (successes, trials) pairs under many components at once, by walks.

betabinom_cdf_pairs walks each distinct trials count's mass function upward once per (a, b);
every value is held to scipy.stats.betabinom.cdf, which sums the mass function itself.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats
from workbench.models._mixture import beta_mixture_cdf_walk, log_gamma_ratio
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


@pytest.mark.parametrize(
    ("y", "n", "a", "b"),
    [
        (100, 10**6, 0.5, 0.5),
        (900_000, 10**6, 3.0, 20.0),
        (4_000_000, 5 * 10**6, 200.0, 30.0),
        (2, 3_000, 5e4, 1e6),
    ],
)
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


@pytest.mark.parametrize("x", [1e-4, 0.02, 0.15, 0.5, 0.93])
def test_mixture_cdf_walk_matches_betainc(x):
    # reference: scipy.special.betainc, one call per pair and component
    rng = np.random.default_rng(1)
    n = rng.integers(0, 2500, 1500)
    y = rng.binomial(n, rng.uniform(0, 1, 1500))
    a, b = rng.uniform(0.2, 400, 40), rng.uniform(0.2, 1500, 40)
    w = rng.dirichlet(np.ones(40))
    ref = special.betainc(a[None, :] + y[:, None], b[None, :] + (n - y)[:, None], x) @ w
    np.testing.assert_allclose(beta_mixture_cdf_walk(y, n, w, a, b, x), ref, rtol=0, atol=1e-11)


def test_mixture_cdf_walk_of_a_million_trials_keeps_its_scale():
    # a million trials: the first term is far below the smallest double and is rescaled, and
    # its logarithm is a sum of numbers near 1e5 (reference: scipy.special.betainc, which an
    # mpmath sum of the integer-parameter binomial tail confirmed to 3e-16 here; the walk
    # with plain gammaln differences was 5e-10 off)
    y, n = np.array([0, 150_000, 152_000, 10**6]), np.array([10**6] * 4)
    a, b, w = np.array([30.0, 3.0]), np.array([170.0, 17.0]), np.array([0.6, 0.4])
    ref = special.betainc(a[None, :] + y[:, None], b[None, :] + (n - y)[:, None], 0.151) @ w
    walked = beta_mixture_cdf_walk(y, n, w, a, b, 0.151)
    np.testing.assert_allclose(walked, ref, rtol=0, atol=1e-10)


def test_mixture_cdf_walk_declines_where_its_error_bound_is_too_wide():
    # a billion trials: the first term's logarithm is near 1.6e8, rounded to about 1e-8
    y, n = np.array([150_000_000]), np.array([10**9])
    assert beta_mixture_cdf_walk(y, n, np.ones(1), np.array([3.0]), np.array([17.0]), 0.15) is None


def test_log_gamma_ratio_matches_the_gamma_recurrence():
    # reference: Gamma(z + a) / Gamma(z) = z (z + 1) ... (z + a - 1) for whole a (the Gamma
    # function's recurrence), summed as logs by math.fsum; gammaln differences lose 1e-8 at
    # z = 1e7, so they are no reference there
    import math

    rng = np.random.default_rng(3)
    z = np.concatenate([rng.uniform(1, 1000, 20), np.geomspace(1e3, 1e9, 40)])
    a = rng.integers(1, 600, len(z)).astype(float)
    ref = [math.fsum(math.log(zi + i) for i in range(int(ai))) for zi, ai in zip(z, a, strict=True)]
    np.testing.assert_allclose(log_gamma_ratio(z, a), ref, rtol=1e-13, atol=2e-12)
