"""The Python API: notes in words, default draws, covariates and parents checks."""

from __future__ import annotations

import math

import numpy as np
from workbench.models import GroupCounts

from workbench import api, steps
from workbench.analysis.diagnostics import Thresholds
from workbench.io.inputs import LoadedData
from workbench.options import FitSettings
from workbench.pipeline import default_draws


def _loaded(y, n):
    counts = GroupCounts([f"g{i}" for i in range(len(n))], y, n)
    return LoadedData(counts, {"rows_read": len(n), "rows_used": len(n), "groups": len(n),
                               "total_successes": int(np.sum(y)), "total_trials": int(np.sum(n))})


def test_no_detectable_spread_is_said_in_words():
    # simulation with known truth: 50 groups sharing one rate, 2,000 trials each
    rng = np.random.default_rng(3)
    n = np.full(50, 2000)
    run = api.fit(_loaded(rng.binomial(n, 0.1), n), seed=1, checks=False)
    assert any("no clearly detectable between-group spread" in m for m in run.messages)
    assert any("between-group spread" in note for note in steps.record_of(run)["notes"])


def test_real_spread_gets_no_such_note():
    rng = np.random.default_rng(4)
    n = rng.integers(50, 500, size=40)
    y = rng.binomial(n, rng.beta(2, 8, size=40))
    run = api.fit(_loaded(y, n), seed=1, checks=False)
    assert not any("between-group spread" in m for m in run.messages)


def test_default_draws_bound_exact_storage():
    settings = FitSettings.from_options(model="beta-binomial", engine="auto")
    assert default_draws(settings, 1000) == 1000
    assert default_draws(settings, 100_000) == 250
    # never fewer draws in all than a final verdict needs (the pass mark for independent draws)
    mark = Thresholds().independent_draws
    assert default_draws(settings, 1_000_000) == mark / 4
    assert default_draws(settings.replace(chains=2), 1_000_000) == mark / 2
    assert default_draws(settings.replace(chains=3), 10_000_000) == math.ceil(mark / 3)
    assert default_draws(settings.replace(engine="mcmc"), 100_000) == 1000
    assert default_draws(settings.replace(draws=77), 100_000) == 77
