"""Short cuts inside the exact engine give the same numbers as the plain computation."""

from __future__ import annotations

import numpy as np
import pytest
from workbench.models import _quadrature
from workbench.models._grid import HyperPrior, fit_grid


def _quantiles_by_full_sort(values, weights, probs):
    # the definition: every point's mass centred on its value, the CDF linear between points
    order = np.argsort(values, kind="stable")
    v, w = values[order], weights[order]
    return np.interp(probs, (np.cumsum(w) - 0.5 * w) / w.sum(), v)


@pytest.mark.parametrize("shape", ["normal", "lognormal", "ties", "two clusters"])
def test_binned_weighted_quantiles_equal_a_full_sort(shape):
    rng = np.random.default_rng(7)
    for _ in range(6):
        n = int(rng.integers(9_000, 60_000))
        if shape == "normal":
            values = rng.normal(size=n)
        elif shape == "lognormal":
            values = np.exp(5 * rng.normal(size=n))
        elif shape == "ties":  # many empty bins, equal values
            values = np.round(rng.normal(size=n), 1)
        else:
            values = np.concatenate([rng.normal(size=n // 2), 1e6 + rng.normal(size=n - n // 2)])
        weights = rng.exponential(size=n) ** 3 + 1e-300  # uneven, some nearly massless
        probs = np.concatenate([[0.0005, 0.025, 0.5, 0.975, 0.9995], rng.random(3)])
        got = _quadrature._weighted_quantiles(values, weights, probs)
        want = _quantiles_by_full_sort(values, weights, probs)
        # the same points in the same order; only the order of the float sums differs
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12)


def test_population_summary_is_computed_once_per_grid_and_level():
    y, n = np.array([3, 5, 9, 1]), np.array([10, 20, 30, 8])
    grid = fit_grid(y, n, HyperPrior())
    # the refinement already summarised the returned grid at the default level
    assert ("population", 0.95) in grid.memo
    first = _quadrature.population_summary(grid)
    assert _quadrature.population_summary(grid) is first
    other = _quadrature.population_summary(grid, level=0.8)
    assert other is not first and other["mu"][0] == first["mu"][0]
    assert other["mu"][2] > first["mu"][2]  # a narrower interval: its lower end is higher
    # the same numbers as a summary computed afresh on the same nodes
    fresh = _quadrature._population_summary(grid, 0.95)
    for name, values in first.items():
        np.testing.assert_allclose(values, fresh[name], rtol=1e-12)


@pytest.mark.parametrize("successes,trials", [
    pytest.param([3], [10], marks=pytest.mark.slow),  # one group: kappa left to its prior (2 s)
    ([0, 0, 0, 3, 3], [4, 4, 4, 3, 3]),            # rates piled at 0 and 1
    ([1, 2, 3, 4, 300_000_000], [5, 6, 7, 8, 10**9]),  # one huge group among small ones
    ([4, 9, 15, 2, 30, 11, 7, 0], [20, 40, 60, 15, 90, 50, 35, 12]),
])
def test_polished_quantiles_are_the_full_grids_own(successes, trials):
    # quantiles are solved on the grid before its last refinement and polished by Newton on
    # the full grid; they must equal the full grid's own safeguarded solution far inside the
    # stated tolerance (0.01 posterior sd)
    y, n = np.array(successes), np.array(trials)
    mixture = fit_grid(y, n, HyperPrior()).mixture(y, n)
    _, var = mixture._pair_moments()
    for q in (0.005, 0.025, 0.5, 0.975, 0.995):
        polished = mixture.ppf(q)
        own = mixture._pair_ppf(q, tol=1e-13, max_iter=100)[mixture.index]
        assert np.max(np.abs(polished - own) / np.sqrt(var[mixture.index])) < 1e-5
