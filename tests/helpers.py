"""Test helpers: simulated data with known truth (invented)."""

from __future__ import annotations

import numpy as np

from workbench.models import GroupCounts


def simulate(groups=40, mean=0.2, concentration=30.0, trials=(5, 300), seed=0):
    """Rates from Beta(mean*concentration, (1-mean)*concentration), counts Binomial."""
    rng = np.random.default_rng(seed)
    theta = rng.beta(mean * concentration, (1 - mean) * concentration, size=groups)
    n = rng.integers(trials[0], trials[1] + 1, size=groups)
    y = rng.binomial(n, theta)
    return GroupCounts([f"unit-{i:03d}" for i in range(groups)], y, n), theta
