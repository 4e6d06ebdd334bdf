"""No pooling and complete pooling: closed forms checked against scipy and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from workbench.models import CompletePooling, GroupCounts, NoPooling

COUNTS = GroupCounts(["a", "b", "c", "d", "e"], [0, 3, 10, 7, 0], [10, 10, 10, 40, 0])


@pytest.mark.reference
def test_quantiles_equal_scipy_beta():
    # reference library: scipy.stats.beta gives the conjugate posterior's quantiles
    m = NoPooling(a=2.0, b=3.0, random_seed=0).fit(COUNTS)
    table = m.summary(level=0.9)
    y, n = COUNTS.successes, COUNTS.trials
    post = stats.beta(2.0 + y, 3.0 + n - y)
    np.testing.assert_allclose(table["lower"], post.ppf(0.05), rtol=1e-10)
    np.testing.assert_allclose(table["upper"], post.ppf(0.95), rtol=1e-10)
    np.testing.assert_allclose(table["posterior_median"], post.median(), rtol=1e-10)
    np.testing.assert_allclose(table["posterior_mean"], post.mean(), rtol=1e-12)


@pytest.mark.reference
def test_uniform_prior_gives_beta_y_plus_one():
    # common practice: a uniform prior and y successes in n trials give Beta(y + 1, n - y + 1)
    m = NoPooling(random_seed=0).fit(COUNTS)
    table = m.summary(target=0.25)
    y, n = COUNTS.successes, COUNTS.trials
    np.testing.assert_allclose(table["posterior_mean"], (y + 1) / (n + 2), rtol=1e-12)
    np.testing.assert_allclose(table["prob_above_target"], stats.beta.sf(0.25, y + 1, n - y + 1))


@pytest.mark.reference
def test_jeffreys_interval_brown_cai_dasgupta_2001():
    # Brown, Cai & DasGupta (2001), Statistical Science 16:101-133: the Jeffreys interval,
    # as implemented by statsmodels' proportion_confint(method="jeffreys")
    from statsmodels.stats.proportion import proportion_confint

    counts = GroupCounts(["a", "b", "c", "d"], [0, 3, 10, 17], [10, 10, 10, 40])
    table = NoPooling(a=0.5, b=0.5, random_seed=0).fit(counts).summary(level=0.95)
    for row in table.itertuples():
        lo, hi = proportion_confint(row.successes, row.trials, alpha=0.05, method="jeffreys")
        assert row.lower == pytest.approx(lo, rel=1e-9)
        assert row.upper == pytest.approx(hi, rel=1e-9)


@pytest.mark.reference
def test_complete_pooling_is_one_beta():
    # common practice: pooling all trials into one binomial gives Beta(a + sum y, b + sum(n - y))
    m = CompletePooling(random_seed=0).fit(COUNTS)
    table = m.summary()
    shared = stats.beta(1 + COUNTS.successes.sum(), 1 + (COUNTS.trials - COUNTS.successes).sum())
    np.testing.assert_allclose(table["posterior_mean"], shared.mean())
    np.testing.assert_allclose(table["lower"], shared.ppf(0.025))
    th = m.idata_.posterior["theta"].values
    assert np.all(th == th[..., :1])  # the same draw for every group
    assert (table["shrinkage"] == 1).all()


def test_draws_match_closed_form_within_mcse():
    # the engine's own draws must agree with the closed form (a self-check, in MCSE units)
    m = NoPooling(random_seed=5, draws=2000).fit(COUNTS)
    th = m.idata_.posterior["theta"].values.reshape(-1, COUNTS.n_groups)
    exact = m.summary()["posterior_mean"].to_numpy()
    z = (th.mean(axis=0) - exact) / (th.std(axis=0) / np.sqrt(th.shape[0]))
    assert np.all(np.abs(z) < 4.5)


def test_zero_trial_group_gets_the_prior():
    table = NoPooling(a=0.5, b=0.5, random_seed=0).fit(COUNTS).summary()
    row = table.set_index("group").loc["e"]
    assert np.isnan(row["observed_rate"])
    assert row["posterior_mean"] == pytest.approx(0.5)
    assert np.isnan(row["shrinkage"])  # no population to shrink towards (issue 10)
