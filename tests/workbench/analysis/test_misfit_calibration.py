"""Calibration of the misfit rule of the posterior predictive checks.

The rule (``Checks.verdict``: misfit when any statistic's p-value is below ``lower`` or above
``upper``) is run on posteriors built here, independently of the project's engines:

- complete pooling: the conjugate Beta(a + sum y, b + sum (n - y)) posterior (closed form,
  common practice);
- beta-binomial: a dense grid over (logit mu, log kappa) with ``scipy.stats.betabinom``
  (the marginal likelihood of each group), hyperparameters drawn from the grid weights and
  each theta_j from its conjugate Beta(y_j + mu kappa, n_j - y_j + (1 - mu) kappa).

Calibration (null): data sets simulated from the fitted model itself (hyperparameters drawn
from the posterior of a base data set, then rates and counts), refitted and checked; the share
flagged must be at most the nominal level ``lower + (1 - upper)``. Power: complete pooling
fitted to over-dispersed data, and the beta-binomial fitted to a two-cluster mixture of rates,
must be flagged in at least 90% of data sets. 200 data sets per design.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats
from workbench.models import GroupCounts
from workbench.models._posterior import make_idata

from workbench.analysis.checks import predictive_pvalues, replicate_statistics
from workbench.analysis.settings import MISFIT, CheckSettings

DATA_SETS = 200
CHAINS, DRAWS = 4, 100  # 400 posterior draws -> 400 replicated data sets per check
SETTINGS = CheckSettings(draws=400).validate()
NOMINAL = SETTINGS.lower + (1 - SETTINGS.upper)

_LOGIT_MU = np.linspace(-4.0, 4.0, 81)
_LOG_KAPPA = np.linspace(np.log(0.5), np.log(5e4), 81)


def _counts(y, n) -> GroupCounts:
    return GroupCounts(np.array([f"g{j}" for j in range(len(n))]), np.asarray(y), np.asarray(n))


def complete_pooling_idata(y, n, rng, a=1.0, b=1.0):
    """Conjugate posterior of one shared rate, in the project's posterior layout."""
    rate = rng.beta(a + y.sum(), b + (n - y).sum(), size=(CHAINS, DRAWS))
    theta = np.repeat(rate[:, :, None], len(n), axis=2)
    return make_idata(_counts(y, n), theta, theta_new=rate, hyper={"rate": rate},
                      attrs={"model": "complete-pooling", "engine": "exact"})


def beta_binomial_hyper(y, n, rng, size):
    """(mu, kappa) draws from a dense grid posterior: flat on logit mu, flat on log kappa."""
    lm, lk = np.meshgrid(_LOGIT_MU, _LOG_KAPPA, indexing="ij")
    mu, kappa = special.expit(lm), np.exp(lk)
    a, b = (mu * kappa)[..., None], ((1 - mu) * kappa)[..., None]
    loglik = stats.betabinom.logpmf(y, n, a, b).sum(axis=-1)
    logw = loglik + np.log(mu * (1 - mu))  # flat on mu, expressed on logit mu
    w = np.exp(logw - logw.max()).ravel()
    pick = rng.choice(w.size, size=size, p=w / w.sum())
    step_m, step_k = _LOGIT_MU[1] - _LOGIT_MU[0], _LOG_KAPPA[1] - _LOG_KAPPA[0]
    m = lm.ravel()[pick] + rng.uniform(-0.5, 0.5, size) * step_m
    k = lk.ravel()[pick] + rng.uniform(-0.5, 0.5, size) * step_k
    return special.expit(m), np.exp(k)


def beta_binomial_idata(y, n, rng):
    mu, kappa = beta_binomial_hyper(y, n, rng, CHAINS * DRAWS)
    theta = rng.beta(y[None, :] + (mu * kappa)[:, None], (n - y)[None, :]
                     + ((1 - mu) * kappa)[:, None])
    new = rng.beta(mu * kappa, (1 - mu) * kappa)
    shape = (CHAINS, DRAWS)
    return make_idata(_counts(y, n), theta.reshape(*shape, len(n)), theta_new=new,
                      hyper={"mu": mu, "kappa": kappa},
                      attrs={"model": "beta-binomial", "engine": "exact"})


def flagged(idata, seed) -> tuple[bool, list[str]]:
    rng = np.random.default_rng(seed)
    reps, observed = replicate_statistics(idata, SETTINGS, rng)
    table = predictive_pvalues(reps, observed, SETTINGS)
    bad = table.loc[table["verdict"] == MISFIT, "statistic"].tolist()
    return bool(bad), bad


def share_flagged(make_data, fit, seed) -> tuple[float, dict]:
    rng = np.random.default_rng(seed)
    hits = 0
    by_stat: dict[str, int] = {}
    for i in range(DATA_SETS):
        y, n = make_data(rng)
        hit, names = flagged(fit(y, n, rng), seed * 1000 + i)
        hits += hit
        for name in names:
            by_stat[name] = by_stat.get(name, 0) + 1
    return hits / DATA_SETS, by_stat


def _trials(rng, groups, low, high):
    return rng.integers(low, high + 1, size=groups)


@pytest.mark.slow
def test_beta_binomial_on_its_own_data_is_flagged_at_most_nominally():
    base_rng = np.random.default_rng(11)
    n0 = np.concatenate([_trials(base_rng, 25, 20, 300), [3, 3, 2, 5, 4]])  # tiny groups too
    y0 = base_rng.binomial(n0, base_rng.beta(3, 9, size=len(n0)))
    mu, kappa = beta_binomial_hyper(y0, n0, base_rng, DATA_SETS)
    it = iter(range(DATA_SETS))

    def make(rng):
        i = next(it)
        theta = rng.beta(mu[i] * kappa[i], (1 - mu[i]) * kappa[i], size=len(n0))
        return rng.binomial(n0, theta), n0

    share, by_stat = share_flagged(make, beta_binomial_idata, 1)
    print(f"beta-binomial null: {share:.3f} of {DATA_SETS} flagged {by_stat}")
    assert share <= NOMINAL


@pytest.mark.slow
def test_complete_pooling_on_its_own_data_is_flagged_at_most_nominally():
    base_rng = np.random.default_rng(12)
    n0 = np.concatenate([_trials(base_rng, 27, 10, 400), [3, 2, 4]])
    rates = base_rng.beta(1 + 0.2 * n0.sum(), 1 + 0.8 * n0.sum(), size=DATA_SETS)
    it = iter(range(DATA_SETS))

    def make(rng):
        return rng.binomial(n0, rates[next(it)]), n0

    share, by_stat = share_flagged(make, complete_pooling_idata, 2)
    print(f"complete-pooling null: {share:.3f} of {DATA_SETS} flagged {by_stat}")
    assert share <= NOMINAL


@pytest.mark.slow
def test_complete_pooling_on_over_dispersed_data_is_flagged():
    def make(rng):
        n = _trials(rng, 30, 50, 200)
        return rng.binomial(n, rng.beta(0.3 * 20, 0.7 * 20, size=30)), n  # between sd ~0.1

    share, by_stat = share_flagged(make, complete_pooling_idata, 3)
    print(f"complete pooling, over-dispersed: {share:.3f} of {DATA_SETS} flagged {by_stat}")
    assert share >= 0.9


@pytest.mark.slow
def test_beta_binomial_on_two_clusters_is_flagged():
    def make(rng):
        n = _trials(rng, 40, 100, 300)
        rate = np.where(np.arange(40) % 2 == 0, 0.15, 0.45)
        return rng.binomial(n, rate), n

    share, by_stat = share_flagged(make, beta_binomial_idata, 4)
    print(f"beta-binomial, two clusters: {share:.3f} of {DATA_SETS} flagged {by_stat}")
    assert share >= 0.9
