"""The convergence gate: thresholds, reasons, remedies, and the exact engine's own checks."""

from __future__ import annotations

import numpy as np
import pytest
from workbench.models import BetaBinomial, GroupCounts
from workbench.models._posterior import make_idata

from workbench.analysis.diagnostics import (
    NOT_READY,
    READY,
    Thresholds,
    diagnose,
    first_remedy_settings,
)
from workbench.cli.text import format_diagnostics

COUNTS = GroupCounts(["a", "b", "c"], [1, 5, 9], [10, 10, 10])
#: for the exact engine's gate: groups that pin kappa down (three groups of ten leave it to
#: the prior, and the grid then refines four times: seconds for a test of the gate)
EXACT_COUNTS = GroupCounts(["a", "b", "c", "d"], [2, 15, 30, 8], [40, 60, 80, 30])


def fake_mcmc(offset: float, draws=500, seed=0, diverging=0):
    """Four chains of iid draws; chain 0 shifted by ``offset`` (stuck in another place)."""
    rng = np.random.default_rng(seed)
    theta = rng.beta(5, 5, size=(4, draws, 3))
    theta[0] = np.clip(theta[0] + offset, 1e-6, 1 - 1e-6)
    mu = theta.mean(axis=2)
    div = np.zeros((4, draws), dtype=bool)
    div.flat[:diverging] = True
    stats = {
        "diverging": div,
        "reached_max_treedepth": np.zeros((4, draws), dtype=bool),
        "energy": rng.normal(size=(4, draws)),
    }
    return make_idata(
        COUNTS,
        theta,
        theta_new=mu,
        hyper={"mu": mu, "kappa": mu * 0 + 10},
        attrs={
            "model": "beta-binomial",
            "engine": "mcmc",
            "independent_draws": False,
            "tune": draws,
        },
        sample_stats=stats,
    )


def test_mixed_chains_are_ready():
    d = diagnose(fake_mcmc(0.0))
    assert d.verdict == READY and d.reasons == []
    assert set(d.table.columns) >= {"r_hat", "ess_bulk", "ess_tail", "mcse_mean", "mcse_lower"}
    assert len(d.table) == 3 + 2  # every theta_j and each hyperparameter


def test_stuck_chain_fails_r_hat_with_remedy():
    # common practice: a chain centred elsewhere than the others inflates split R-hat
    d = diagnose(fake_mcmc(0.3))
    assert d.verdict == NOT_READY
    checks = {r["check"] for r in d.reasons}
    assert "R-hat" in checks
    r = next(r for r in d.reasons if r["check"] == "R-hat")
    assert r["value"] > 1.01 and r["by"] == pytest.approx(r["value"] - 1.01)
    assert d.remedies[0].startswith("run longer")
    assert any("--engine exact" in m for m in d.remedies)
    new, said = first_remedy_settings(d, {"draws": 500, "tune": 500})
    assert new["draws"] == 1000 and "retried with" in said
    assert "NOT-READY" in format_diagnostics(d)


def test_divergences_and_thresholds_are_configurable():
    idata = fake_mcmc(0.0, diverging=3)
    d = diagnose(idata)
    assert d.verdict == NOT_READY
    assert d.remedies[0].startswith("raise the target acceptance")
    assert diagnose(idata, Thresholds(divergences=5)).verdict == READY
    assert diagnose(fake_mcmc(0.0), Thresholds(ess_bulk=10**6)).verdict == NOT_READY


def test_exact_engine_passes_by_construction_and_says_so():
    m = BetaBinomial(random_seed=0).fit(EXACT_COUNTS)
    d = diagnose(m.idata_)
    assert d.verdict == READY
    assert any("by construction" in n for n in d.notes)
    assert d.to_dict()["summary"]["max_r_hat"] < 1.01


def test_exact_grid_problems_fail_the_gate():
    m = BetaBinomial(random_seed=0).fit(EXACT_COUNTS)
    m.idata_.posterior.attrs["grid_refinement_change"] = 1e-3
    d = diagnose(m.idata_)
    assert d.verdict == NOT_READY
    assert d.reasons[0]["check"] == "change of posterior means under refinement"
