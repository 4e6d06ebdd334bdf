"""Test helpers: simulated data with known truth (invented)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from scipy import stats
from workbench.models import GroupCounts


def simulate(groups=40, mean=0.2, concentration=30.0, trials=(5, 300), seed=0):
    """Rates from Beta(mean*concentration, (1-mean)*concentration), counts Binomial."""
    rng = np.random.default_rng(seed)
    theta = rng.beta(mean * concentration, (1 - mean) * concentration, size=groups)
    n = rng.integers(trials[0], trials[1] + 1, size=groups)
    y = rng.binomial(n, theta)
    return GroupCounts([f"unit-{i:03d}" for i in range(groups)], y, n), theta


def recorded_exit_code(folder) -> int:
    """The exit code a command on ``folder`` must give by the README's rule: 0 when its
    run.json records the run as final, 3 when not (read from the file, not from the code)."""
    return 0 if json.loads((Path(folder) / "run.json").read_text())["final"] else 3


class BetaGroups:
    """Groups whose posteriors are Beta(a, b): what trials_needed_table reads."""

    def __init__(self, a, b):
        self.a, self.b = np.asarray(a, float), np.asarray(b, float)
        self.names = np.array([f"g{i}" for i in range(len(self.a))])

    def moments(self):
        s = self.a + self.b
        return self.a / s, self.a * self.b / (s * s * (s + 1))

    def prob_above(self, value):
        return stats.beta.sf(value, self.a, self.b)


def estimates_like(n: int, rng):
    """An invented table shaped like estimates.csv: a text group column, 2 int, 15 float
    columns (one with NaN) and 2 bool (for the CSV writer's tests and benchmark)."""
    import pandas as pd

    cols = {"group": pd.array(np.char.add("branch ", np.arange(n).astype(str)), dtype="str"),
            "successes": rng.integers(0, 500, n), "trials": rng.integers(500, 1000, n)}
    for j in range(15):
        cols[f"q{j}"] = rng.beta(2, 30, n) * 10.0 ** (j % 5 - 2)
    cols["q3"][::50] = np.nan
    cols["outside"] = rng.random(n) < 0.1
    cols["high_k"] = rng.random(n) < 0.01
    return pd.DataFrame(cols)
