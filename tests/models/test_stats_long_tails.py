"""The Beta-binomial CDF for huge trial counts (issue 13: 1e15 trials tried to sum 3.55 PiB).

Beyond MAX_TAIL_TERMS terms in the shorter tail, betabinom_cdf uses the Beta identity and
Gauss-Hermite quadrature; each value is checked against scipy.stats.betabinom.cdf (which sums
every term) at sizes scipy can reach, with the term limit lowered to force the long path.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from workbench.models._stats import MAX_TAIL_TERMS, betabinom_cdf


@pytest.mark.parametrize(
    ("y", "n", "a", "b"),
    [(100_000, 200_000, 3.0, 4.0), (30_000, 200_000, 0.5, 2.0), (150_000, 200_000, 20.0, 5.0),
     (1_999, 200_000, 2e3, 2e5), (2_100, 200_000, 2e3, 2e5), (3_000, 200_000, 0.3, 50.0),
     (50_000, 100_001, 1.0, 1.0)],
)
def test_long_tail_path_matches_scipy_betabinom(y, n, a, b):
    # reference: scipy.stats.betabinom.cdf (exact sum of the pmf)
    assert betabinom_cdf(y, n, a, b, max_terms=1_000) == pytest.approx(
        stats.betabinom.cdf(y, n, a, b), abs=1e-8)


def test_long_tail_mixture_matches_scipy():
    a, b, w = np.array([2.0, 30.0, 0.7]), np.array([5.0, 60.0, 0.9]), np.array([0.2, 0.5, 0.3])
    y, n = 61_000, 180_000
    ref = sum(wi * stats.betabinom.cdf(y, n, ai, bi) for ai, bi, wi in zip(a, b, w, strict=True))
    assert betabinom_cdf(y, n, a, b, w, max_terms=500) == pytest.approx(ref, abs=1e-8)


def test_the_exact_sum_is_kept_below_the_limit():
    # the short tail (4 terms here) is summed exactly even at 1e15 trials
    y, n, a, b = 3, 10**15, 2.0, 5.0
    ref = stats.betabinom.cdf(y, n, a, b)  # scipy sums 4 terms too
    assert betabinom_cdf(y, n, a, b) == pytest.approx(ref, rel=1e-9)
    assert min(y + 1, n - y) <= MAX_TAIL_TERMS


@pytest.mark.parametrize(("share", "a", "b"), [(0.3, 2.0, 5.0), (0.5, 1.0, 1.0), (0.01, 0.5, 30.0)])
def test_trillions_of_trials_give_the_beta_limit(share, a, b):
    # as n grows, Y/n -> p ~ Beta(a, b): P(Y <= share*n) -> scipy.stats.beta.cdf(share, a, b)
    n = 10**15
    value = betabinom_cdf(share * n, n, a, b)
    assert value == pytest.approx(stats.beta.cdf(share, a, b), abs=1e-6)


def test_three_million_trials_long_path_matches_scipy():
    # scipy can still sum 2 million terms; the long path is forced below that size
    y, n, a, b = 1_000_000, 3_000_000, 40.0, 80.0
    ref = stats.betabinom.cdf(y, n, a, b)
    assert betabinom_cdf(y, n, a, b, max_terms=10_000) == pytest.approx(ref, abs=1e-8)
