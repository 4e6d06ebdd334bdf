"""Posterior predictive checks, leave-one-group-out comparison and their command line.

All data are simulated here. Fast tests use the exact engines; the one MCMC test is ``slow``.
Each check names its source in a comment or in its name.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from workbench.models import (
    ConvergenceWarning,
    DataError,
    GroupCounts,
    ParameterError,
    make_model,
)
from workbench.models._grid import HyperPrior, fit_grid
from workbench.models._posterior import make_idata

from workbench import api, cli
from workbench.analysis import checks as ppc
from workbench.analysis import loo as loo_module
from workbench.analysis.comparison import COLUMNS, compare_posteriors
from workbench.cli.text import format_checks, format_comparison
from workbench.io.runfolder import COMPARISON_FILES, FILES

CHECKS_FILE, REPLICATES_FILE, GROUP_CHECKS_FILE = (
    FILES[n] for n in ("checks", "ppc_statistics", "group_checks"))
COMPARISON_FILE, COMPARISON_TABLE, POINTWISE_TABLE = (
    COMPARISON_FILES[n] for n in ("comparison", "comparison_table", "comparison_pointwise"))

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

MODELS3 = ("beta-binomial", "complete-pooling", "no-pooling")


def simulate(seed: int, sd: float, groups: int = 40, mean: float = 0.2) -> GroupCounts:
    """Rates from a Beta with the given between-group sd (sd=0: one rate), trials 50-500."""
    rng = np.random.default_rng(seed)
    trials = rng.integers(50, 501, groups)
    if sd > 0:
        kappa = mean * (1 - mean) / sd**2 - 1
        rates = rng.beta(mean * kappa, (1 - mean) * kappa, groups)
    else:
        rates = np.full(groups, mean)
    names = [f"shop-{i:02d}" for i in range(groups)]
    return GroupCounts(names, rng.binomial(trials, rates), trials)


def fit_all(data: GroupCounts) -> dict:
    return {m: make_model(m, random_seed=11).fit(data).idata_ for m in MODELS3}


@pytest.fixture(scope="module")
def spread():
    """Over-dispersed: between-group sd 0.08 around 0.2."""
    data = simulate(3, 0.08)
    return data, fit_all(data)


@pytest.fixture(scope="module")
def alike():
    """Homogeneous: every group's rate is 0.2."""
    data = simulate(3, 0.0)
    posts = {m: make_model(m, random_seed=11).fit(data).idata_
             for m in ("beta-binomial", "complete-pooling")}
    return data, posts


@pytest.fixture(scope="module")
def spread_checks(spread):
    _, posts = spread
    return {m: ppc.check_posterior(posts[m]) for m in MODELS3}


def _p(checks: ppc.Checks, statistic: str) -> float:
    return float(checks.statistics.set_index("statistic").loc[statistic, "p_value"])


# -- done-when: posterior predictive p-values ------------------------------------------------


def test_dispersion_misfits_complete_pooling_not_beta_binomial(spread_checks):
    # Gelman, Meng & Stern (1996) posterior predictive p-value; binomial noise alone cannot
    # produce the simulated between-group sd of 0.08, a shared rate must fail the standardised
    # dispersion, which the beta-binomial population reproduces.
    cp = spread_checks["complete-pooling"]
    bb = spread_checks["beta-binomial"]
    low, high = cp.bounds
    p_cp, p_bb = _p(cp, "dispersion"), _p(bb, "dispersion")
    assert p_cp < low or p_cp > high
    assert low <= p_bb <= high
    row = cp.statistics.set_index("statistic").loc["dispersion"]
    assert row["verdict"] == ppc.MISFIT and cp.verdict == ppc.MISFIT
    assert bb.statistics.set_index("statistic").loc["dispersion", "verdict"] == ppc.CONSISTENT
    # mean of z^2 with z standardised by the replicates' own mean and sd averages 1 over
    # replicated data sets (by construction of the standardisation; common practice)
    assert abs(row["replicated_mean"] - 1) < 0.1
    assert row["observed"] > 2 * row["replicated_upper"]
    assert bb.verdict == ppc.CONSISTENT


def test_bounds_split_the_nominal_level_over_the_statistics(spread_checks):
    # Bonferroni: K statistics each held to lower / K, so the family level is lower + 1 - upper
    doc = spread_checks["beta-binomial"].to_dict()
    k = sum(r["verdict"] != ppc.NOT_COMPUTED for r in doc["statistics"])
    assert k == 5
    assert doc["statistic_bounds"] == pytest.approx([0.01 / k, 1 - 0.01 / k])
    assert doc["nominal_level"] == pytest.approx(0.02)


def test_one_tiny_extreme_group_does_not_trip_the_checks():
    # 29 groups of 100-400 trials at one rate, and one group at 3/3: the old largest-observed-
    # rate statistic read misfit on this; each statistic now counts every group once.
    rng = np.random.default_rng(8)
    trials = np.append(rng.integers(100, 401, 29), 3)
    successes = np.append(rng.binomial(trials[:29], 0.2), 3)
    data = GroupCounts([f"unit-{i}" for i in range(30)], successes, trials)
    checks = ppc.check_posterior(make_model("beta-binomial", random_seed=3).fit(data).idata_)
    assert checks.verdict == ppc.CONSISTENT, checks.statistics[["statistic", "p_value"]]


def test_tail_areas_match_a_direct_count():
    # mid-p tail areas P(Y < y) + 0.5 P(Y = y), counted here with plain comparisons
    rng = np.random.default_rng(5)
    y_rep = rng.integers(0, 6, size=(7, 50)).astype(float)
    y_obs = rng.integers(0, 6, size=7).astype(float)
    obs, rep = ppc._mid_tail_areas(y_obs, y_rep)
    j, i = 3, 17
    others = np.delete(y_rep[j], i)
    v = y_rep[j, i]
    assert rep[j, i] == pytest.approx((others < v).mean() + 0.5 * (others == v).mean())
    assert obs[j, i] == pytest.approx((others < y_obs[j]).mean()
                                      + 0.5 * (others == y_obs[j]).mean())
    # every draw: counts over the row's other 49 replicates (a value equals itself once)
    value, other = y_rep[:, :, None], y_rep[:, None, :]
    want_rep = ((value > other).sum(-1) + 0.5 * ((value == other).sum(-1) - 1)) / 49
    np.testing.assert_allclose(rep, want_rep)
    less = (y_rep < y_obs[:, None]).sum(1, keepdims=True) - (y_rep < y_obs[:, None])
    same = (y_rep == y_obs[:, None]).sum(1, keepdims=True) - (y_rep == y_obs[:, None])
    np.testing.assert_allclose(obs, (less + 0.5 * same) / 49)


def test_standardised_squares_use_the_other_replicates_moments():
    # direct: numpy's mean and std (ddof 0) of the row with replicate d deleted; rows with
    # one value, and rows where one replicate alone differs, take z as the plain difference
    rng = np.random.default_rng(9)
    y_rep = rng.integers(0, 5, size=(6, 12)).astype(float)
    y_rep[0] = 2.0  # constant
    y_rep[1] = 0.0
    y_rep[1, 4] = 3.0  # the others of draw 4 are all equal; every other draw's are not
    y_obs = np.array([2.0, 1.0, 0.0, 4.0, 3.0, 1.0])
    z2_obs, z2_rep = ppc._standardised_squares(y_obs, y_rep)
    for j in range(6):
        for d in range(12):
            rest = np.delete(y_rep[j], d)
            sd = rest.std() if rest.std() > 0 else 1.0
            assert z2_obs[j, d] == pytest.approx(((y_obs[j] - rest.mean()) / sd) ** 2)
            assert z2_rep[j, d] == pytest.approx(((y_rep[j, d] - rest.mean()) / sd) ** 2)


def test_population_statistics_are_unbiased_when_the_data_are_replicates():
    # Simulation with known truth: each group's observed count and its 50 replicates are
    # independent draws of one distribution, so observed and replicated statistics are
    # exchangeable at every draw and their mean difference is zero. Comparing the observed
    # count with all 50 replicates but each replicate with its 49 others (as before) biased
    # the dispersion by about 3 / 50 and read a false misfit at many groups.
    rng = np.random.default_rng(12)
    g, s = 40_000, 50
    n = rng.integers(1, 30, size=g)
    rate = rng.beta(3, 12, size=(g, s + 1))
    counts = rng.binomial(n[:, None], rate).astype(float)
    y_obs, y_rep = counts[:, 0], counts[:, 1:]
    z2_obs, z2_rep = ppc._standardised_squares(y_obs, y_rep)
    p_obs, p_rep = ppc._mid_tail_areas(y_obs, y_rep)

    def bias_in_se(obs, rep):
        # groups are independent: the mean over groups of each group's mean difference over
        # draws, in units of its standard error
        a = (np.asarray(obs, dtype=float) - rep).mean(axis=1)
        return a.mean() / (a.std(ddof=1) / np.sqrt(len(a)))

    central = (0.25, 0.75)
    for obs, rep in ((z2_obs, z2_rep), (p_obs, p_rep),
                     (p_obs < ppc.TAIL, p_rep < ppc.TAIL),
                     ((p_obs >= central[0]) & (p_obs <= central[1]),
                      (p_rep >= central[0]) & (p_rep <= central[1]))):
        assert abs(bias_in_se(obs, rep)) < 4
    # the check can fail: moments from all 50 replicates for the observed count (as before)
    centre, sd = y_rep.mean(axis=1, keepdims=True), y_rep.std(axis=1, keepdims=True)
    ok = sd[:, 0] > 0
    old_obs = ((y_obs[:, None] - centre) / np.where(sd > 0, sd, 1.0)) ** 2
    old_rep = ((y_rep - centre) / np.where(sd > 0, sd, 1.0)) ** 2
    assert bias_in_se(old_obs[ok], old_rep[ok]) > 4


def test_observed_statistics_are_the_data_own(spread, spread_checks):
    # recomputed directly from the counts with numpy (common practice: ddof=1 sample sd)
    data, _ = spread
    rate = data.successes / data.trials
    doc = spread_checks["beta-binomial"].to_dict()
    obs = {r["statistic"]: r["observed"] for r in doc["statistics"]}
    assert 0 <= obs["tail_share"] <= 1 and 0 <= obs["central_share"] <= 1
    assert obs["tail_share"] * len(rate) == pytest.approx(round(obs["tail_share"] * len(rate)))
    assert obs["zero_success_groups"] == np.sum(data.successes == 0)


def test_mean_replicated_chi_square_is_number_of_groups(spread_checks):
    # E[(y - n theta)^2] = n theta (1 - theta) for a Binomial (common practice), so with the
    # replicate drawn from the same theta the discrepancy averages to the number of groups.
    for model in ("beta-binomial", "no-pooling"):
        reps = spread_checks[model].replicates
        chi = reps.loc[reps["statistic"] == "chi_square", "replicated"].to_numpy()
        groups = spread_checks[model].info["groups_with_trials"]
        assert abs(chi.mean() - groups) < 4 * chi.std() / np.sqrt(len(chi))


def test_mid_p_gives_one_half_when_every_replicate_ties(spread_checks, alike):
    # mid-p (Lancaster 1961): P(T_rep > T_obs) + 0.5 P(T_rep = T_obs), and P(T_rep >= T_obs),
    # recomputed here from the replicates themselves
    _, posts = alike
    for checks in (spread_checks["beta-binomial"], ppc.check_posterior(posts["beta-binomial"])):
        zero = checks.statistics.set_index("statistic").loc["zero_success_groups"]
        reps = checks.replicates
        rep = reps.loc[reps["statistic"] == "zero_success_groups", "replicated"].to_numpy()
        obs = zero["observed"]
        assert zero["p_value"] == pytest.approx(np.mean(rep > obs) + 0.5 * np.mean(rep == obs))
        assert zero["p_at_least"] == pytest.approx(np.mean(rep >= obs))
    # every group at 0.2 with 50 or more trials: no group is without a success, observed or
    # replicated (P = 0.8^50 = 1.4e-5 per group and replicate), so every replicate ties
    assert obs == 0 and (rep == 0).all()
    assert zero["p_value"] == 0.5 and zero["p_at_least"] == 1.0
    assert zero["verdict"] == ppc.CONSISTENT


def test_verdict_follows_configurable_bounds(spread):
    _, posts = spread
    narrow = ppc.CheckSettings(lower=0.45, upper=0.55, draws=300)
    table = ppc.check_posterior(posts["beta-binomial"], narrow).statistics
    p = table["p_value"].to_numpy()
    low, high = ppc.statistic_bounds(narrow, int((table["verdict"] != ppc.NOT_COMPUTED).sum()))
    expected = np.where((p < low) | (p > high), ppc.MISFIT, ppc.CONSISTENT)
    assert (table["verdict"].to_numpy() == expected).all()
    assert (table["replicates"] <= 300).all()
    with pytest.raises(ParameterError, match="lower=0.6"):
        ppc.CheckSettings(lower=0.6, upper=0.9).validate()


def test_chunked_statistics_match_direct_numpy():
    # theta of exactly 0 or 1 makes every replicate deterministic (y_rep = 0 or n), so the
    # chunked running sums can be checked against numpy on the full replicated matrix.
    rng = np.random.default_rng(4)
    groups, draws = 9, 60
    trials = rng.integers(1, 30, groups)
    data = GroupCounts([f"m{i}" for i in range(groups)], rng.binomial(trials, 0.4), trials)
    theta = rng.integers(0, 2, size=(1, draws, groups)).astype(float)
    idata = make_idata(data, theta, theta_new=np.full(draws, 0.5), hyper={},
                       attrs={"model": "no-pooling", "random_seed": 1,
                              "priors": {"a": 1.0, "b": 1.0}})
    y_rep = theta[0] * trials
    for cells in (1, 17, 10_000):
        reps, _ = ppc.replicate_statistics(idata, ppc.CheckSettings(chunk_cells=cells),
                                           np.random.default_rng(0))
        got = reps.pivot(index="draw", columns="statistic", values="replicated")
        np.testing.assert_allclose(got["zero_success_groups"], (y_rep == 0).sum(axis=1))


def test_thinning_keeps_at_most_the_asked_draws():
    assert len(loo_module.thinned_draws(4000, 1000)) == 1000
    assert loo_module.thinned_draws(4000, 1000)[[0, -1]].tolist() == [0, 3999]
    assert loo_module.thinned_draws(300, 1000).tolist() == list(range(300))


# -- done-when: comparison ---------------------------------------------------------------


def test_compare_prefers_beta_binomial_beyond_two_se_on_overdispersed(spread):
    _, posts = spread
    comparison = compare_posteriors(posts)
    t = comparison.table.set_index("run")
    assert comparison.best == "beta-binomial"
    cp = t.loc["complete-pooling"]
    assert cp["elpd_difference"] < -2 * cp["difference_se"]
    assert cp["preference"] == "clear"
    assert any("beta-binomial predicts held-out groups better than complete-pooling" in r
               for r in comparison.readings)
    assert list(comparison.table.columns) == COLUMNS


def test_homogeneous_data_within_two_se(alike):
    _, posts = alike
    comparison = compare_posteriors(posts)
    other = comparison.table.iloc[1]
    assert abs(other["elpd_difference"]) <= 2 * other["difference_se"]
    assert other["preference"] == "within-two-se"
    assert "no clear preference" in comparison.readings[0]


def test_tiny_difference_reads_as_no_preference():
    # Homogeneous data where complete pooling wins by a fraction of a nat in nearly every
    # group: the standard error of the difference is tinier still. Differences under 4 are
    # read as no clear preference (Sivula et al. 2020).
    data = simulate(4, 0.0)
    posts = {m: make_model(m, random_seed=11).fit(data).idata_
             for m in ("beta-binomial", "complete-pooling")}
    comparison = compare_posteriors(posts)
    other = comparison.table.iloc[1]
    assert abs(other["elpd_difference"]) < 4
    assert abs(other["elpd_difference"]) > 2 * other["difference_se"]
    assert other["preference"] == "small-difference"
    assert "no clear preference" in comparison.readings[0]


def test_difference_se_is_the_paired_formula(spread):
    # Vehtari, Gelman & Gabry (2017), eq. 24: se = sqrt(G var(d_j)); az.compare uses the same
    # formula, so with no exact replacements (refit_limit=0) both must agree.
    _, posts = spread
    pair = {m: posts[m] for m in ("beta-binomial", "complete-pooling")}
    psis_only = ppc.CheckSettings(refit_limit=0)
    ours = compare_posteriors(pair, settings=psis_only).table.set_index("run")
    ours = ours.loc["complete-pooling"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # exact draws are independent: relative efficiency 1, as workbench uses
        loos = {m: az.loo(idata, var_name="y_group", pointwise=True, reff=1.0)
                for m, idata in pair.items()}
        theirs = az.compare(loos, method="BB-pseudo-BMA", seed=1)
    assert ours["exact_groups"] == 0
    assert ours["difference_se"] == pytest.approx(theirs.loc["complete-pooling", "dse"], rel=1e-6)
    assert -ours["elpd_difference"] == pytest.approx(
        theirs.loc["complete-pooling", "elpd_diff"], rel=1e-9
    )


# -- done-when: PSIS-LOO against values from outside the project -----------------------------


def _importance_se(idata) -> np.ndarray:
    """Monte Carlo se of log p(y_j | y_-j) from self-normalised PSIS weights (common practice:
    the delta-method variance of a self-normalised importance sampling mean)."""
    ll = idata.log_likelihood["y_group"].transpose("chain", "draw", "group").values
    ll = ll.reshape(-1, ll.shape[-1]).T
    log_w, _ = az.psislw(-ll, 1.0)
    w, p = np.exp(log_w), np.exp(ll)
    mean = (w * p).sum(axis=1)
    return np.sqrt((w**2 * (p - mean[:, None]) ** 2).sum(axis=1)) / mean


def test_no_pooling_loo_is_prior_predictive_scipy_betabinom(spread):
    # A no-pooling group left out has only its Beta(a, b) prior: its predictive is
    # scipy.stats.betabinom(n, a, b), log pmf and cdf.
    data, posts = spread
    loo = loo_module.leave_one_group_out(posts["no-pooling"])
    y, n = data.successes, data.trials
    np.testing.assert_allclose(loo.table["elpd_loo"], stats.betabinom.logpmf(y, n, 1, 1),
                               rtol=1e-10)
    np.testing.assert_allclose(loo.table["loo_pit_upper"], stats.betabinom.cdf(y, n, 1, 1),
                               rtol=1e-9)
    np.testing.assert_allclose(loo.table["loo_pit_lower"], stats.betabinom.cdf(y - 1, n, 1, 1),
                               rtol=1e-9, atol=1e-14)
    assert (loo.table["loo_method"] == "exact").all()
    assert loo.table["pareto_k"].isna().all() and not loo.high_k
    assert loo.elpd_loo == pytest.approx(stats.betabinom.logpmf(y, n, 1, 1).sum(), rel=1e-12)


def test_complete_pooling_exact_matches_scipy_and_psis(spread):
    # Conjugacy: leaving group j out of a shared Beta(1, 1) rate gives
    # betabinom(n_j, 1 + sum y_-j, 1 + sum f_-j) (scipy.stats.betabinom).
    data, posts = spread
    idata = posts["complete-pooling"]
    exact = loo_module.exact_leave_one_out(idata, np.arange(data.n_groups))
    y, n = data.successes, data.trials
    a = 1 + y.sum() - y
    b = 1 + (n - y).sum() - (n - y)
    np.testing.assert_allclose(exact["elpd_exact"], stats.betabinom.logpmf(y, n, a, b),
                               rtol=1e-10)
    np.testing.assert_allclose(exact["cdf_at"], stats.betabinom.cdf(y, n, a, b), rtol=1e-8)
    loo = loo_module.leave_one_group_out(idata)
    low = loo.table["pareto_k"].to_numpy() < 0.5
    gap = np.abs(exact["elpd_exact"].to_numpy() - loo.table["elpd_psis"].to_numpy())
    assert low.sum() >= 30
    assert (gap[low] <= 4 * _importance_se(idata)[low] + 1e-9).all()


def test_beta_binomial_exact_refit_agrees_with_psis_where_k_low(spread):
    # The refit value is checked two ways: against PSIS (within 4 Monte Carlo se where k < 0.5)
    # and against the ratio of marginal likelihoods p(y) / p(y_-j) of two grid fits.
    data, posts = spread
    idata = posts["beta-binomial"]
    loo = loo_module.leave_one_group_out(idata)
    k = loo.table["pareto_k"].to_numpy()
    picks = np.flatnonzero(k < 0.5)[[0, 20]]
    exact = loo_module.exact_leave_one_out(idata, picks)["elpd_exact"].to_numpy()
    se = _importance_se(idata)[picks]
    psis = loo.table["elpd_psis"].to_numpy()[picks]
    assert (np.abs(exact - psis) <= 4 * se + 1e-4).all()
    prior = HyperPrior()
    whole = fit_grid(data.successes, data.trials, prior).log_marginal_likelihood
    keep = np.ones(data.n_groups, dtype=bool)
    keep[picks[0]] = False
    rest = fit_grid(data.successes[keep], data.trials[keep], prior).log_marginal_likelihood
    assert exact[0] == pytest.approx(whole - rest, abs=1e-3)


def test_high_k_group_is_named_and_refitted_exactly():
    # One group far from the others (150 of 200 among rates near 0.2): leaving it out moves
    # the hyper-posterior a lot, PSIS breaks down (k > 0.7) and is optimistic.
    rng = np.random.default_rng(5)
    trials = np.full(30, 200)
    successes = rng.binomial(trials, 0.2)
    successes[0] = 150
    data = GroupCounts([f"site-{i}" for i in range(30)], successes, trials)
    idata = make_model("beta-binomial", random_seed=2).fit(data).idata_
    checks = ppc.check_posterior(idata)
    loo = checks.loo
    row = loo.table.iloc[0]
    assert loo.high_k == ["site-0"] and row["pareto_k"] > loo.good_k
    assert row["loo_method"] == "exact" and row["elpd_loo"] == row["elpd_exact"]
    assert row["elpd_exact"] < row["elpd_psis"] - 1  # PSIS was optimistic
    assert loo.elpd_loo == pytest.approx(loo.table["elpd_loo"].sum())
    assert loo.unresolved == []
    none = loo_module.leave_one_group_out(idata, ppc.CheckSettings(refit_limit=0))
    assert none.unresolved == ["site-0"] and "refit_limit=0" in none.notes[0]
    text = format_checks(checks)
    assert "site-0" in text and "exact" in text


def test_group_integrated_likelihood_is_the_one_psis_can_use(spread):
    # One row per group: leaving a row out leaves a group out. On the conditional likelihood
    # most Pareto k exceed 0.7; on the group-integrated one none do (common practice for
    # hierarchical models; the reason checks use y_group).
    _, posts = spread
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cond = az.loo(posts["beta-binomial"], var_name="y", pointwise=True, reff=1.0)
    assert np.mean(cond.pareto_k.values > 0.7) > 0.5
    assert not loo_module.leave_one_group_out(posts["beta-binomial"]).high_k


def test_loo_pit_calibrated_for_beta_binomial_not_complete_pooling(spread_checks):
    # randomised PIT for counts (Czado, Gneiting & Held 2009); uniformity by scipy.stats.kstest
    assert spread_checks["beta-binomial"].calibration["verdict"] == "calibrated"
    cp = spread_checks["complete-pooling"].calibration
    assert cp["verdict"] == "miscalibrated"
    assert cp["share_below_0.05"] + cp["share_above_0.95"] > 0.3  # U-shaped: too narrow
    pit = spread_checks["beta-binomial"].groups
    assert (pit["loo_pit_lower"] <= pit["loo_pit"]).all()
    assert (pit["loo_pit"] <= pit["loo_pit_upper"]).all()


def test_groups_without_trials_are_left_out():
    data = GroupCounts(["a", "b", "c", "d", "e", "f"], [3, 0, 5, 2, 9, 4], [10, 0, 12, 8, 20, 9])
    idata = make_model("beta-binomial", random_seed=3).fit(data).idata_
    checks = ppc.check_posterior(idata)
    assert checks.loo.groups == 5 and "b" not in checks.groups["group"].tolist()
    assert checks.info["groups_with_trials"] == 5


@pytest.mark.slow  # six whole fits of a one-group table (about 1.5 s each: kappa spans its range)
def test_single_group_fit_still_gets_its_checks():
    # nothing is left to refit when the only group is left out: PSIS stays, and a Pareto k
    # above the threshold names the group as unresolved. With one group k hovers near 0.7
    # from seed to seed (0.28 to 0.84 over these six), so the seeds see both sides of it.
    seen = set()
    for seed in range(1, 7):
        run = api.fit(pd.DataFrame({"group": ["a"], "successes": [3], "trials": [10]}),
                      seed=seed)
        loo = run.documents["checks"]["loo"]
        high = loo["max_pareto_k"] > loo["good_k"]
        seen.add(high)
        assert loo["groups"] == 1 and loo["exact_groups"] == 0
        assert loo["unresolved_groups"] == (["a"] if high else [])
        assert run.documents["checks"]["loo_pit"]["verdict"] == ppc.NOT_COMPUTED
    assert seen == {True, False}


# -- files, atomic writes, fit integration --------------------------------------------------


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    root = tmp_path_factory.mktemp("runs")
    data = simulate(3, 0.08).to_frame()
    csv = root / "spread.csv"
    data.to_csv(csv, index=False)
    other = simulate(8, 0.08).to_frame()
    other_csv = root / "other.csv"
    other.to_csv(other_csv, index=False)
    out = {}
    for name, model, source in (("bb", "beta-binomial", csv), ("cp", "complete-pooling", csv),
                                ("elsewhere", "complete-pooling", other_csv)):
        with warnings.catch_warnings():  # complete pooling misfits these data, as it should
            warnings.simplefilter("ignore", ConvergenceWarning)
            run = api.fit(source, model=model, seed=5)
        api.write_run(run, root / name)
        out[name] = root / name
    out["csv"] = csv
    return out


@pytest.mark.slow
def test_fit_records_checks_and_writes_them(folders):
    folder = folders["bb"]
    doc = json.loads((folder / CHECKS_FILE).read_text())
    assert doc["verdict"] == ppc.CONSISTENT and doc["model"] == "beta-binomial"
    assert {r["statistic"] for r in doc["statistics"]} == set(ppc.STATISTICS)
    reps = pd.read_csv(folder / REPLICATES_FILE)
    assert list(reps.columns) == ["statistic", "draw", "observed", "replicated"]
    assert reps.groupby("statistic").size().max() <= 1000
    groups = pd.read_csv(folder / GROUP_CHECKS_FILE)
    assert list(groups.columns) == loo_module.GROUP_COLUMNS
    record = json.loads((folder / "run.json").read_text())
    assert {CHECKS_FILE, REPLICATES_FILE, GROUP_CHECKS_FILE} <= set(record["files"])


@pytest.mark.slow
def test_check_and_compare_updates_are_atomic(folders, tmp_path, monkeypatch):
    # A write that fails half-way leaves the earlier folder byte for byte, and no staging.
    import shutil

    target = tmp_path / "run"
    shutil.copytree(folders["bb"], target)
    before = {p.name: p.read_bytes() for p in target.iterdir() if p.is_file()}
    original = Path.write_text

    def half_then_fail(self, text, *args, **kwargs):
        original(self, text[: len(text) // 2], *args, **kwargs)
        raise OSError("disk full")

    monkeypatch.setattr(Path, "write_text", half_then_fail)
    with pytest.raises(OSError):
        api.check_folder(target, ppc.CheckSettings(draws=50))
    with pytest.raises(OSError):
        api.compare_folders([folders["bb"], folders["cp"]], tmp_path / "cmp")
    monkeypatch.undo()
    assert {p.name: p.read_bytes() for p in target.iterdir() if p.is_file()} == before
    assert not (tmp_path / "cmp").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.endswith((".part", ".old"))]
    folder, checks = api.check_folder(target, ppc.CheckSettings(draws=50))
    assert json.loads((target / CHECKS_FILE).read_text())["replicated_draws"] == 50
    api.compare_folders([folders["bb"], folders["cp"]], tmp_path / "cmp")
    assert len(pd.read_csv(tmp_path / "cmp" / COMPARISON_TABLE)) == 2
    assert len(pd.read_csv(tmp_path / "cmp" / POINTWISE_TABLE)) == 2 * 40


def test_format_functions_are_short_and_say_the_verdict(spread, spread_checks):
    text = format_checks(spread_checks["complete-pooling"])
    assert text.startswith("checks: MISFIT") and "dispersion" in text
    assert len(text.splitlines()) <= 12
    _, posts = spread
    summary = format_comparison(compare_posteriors(posts))
    assert "1  beta-binomial" in summary and "standard errors" in summary
    assert len(summary.splitlines()) <= 12


# -- command line -------------------------------------------------------------------------


def _one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ")
    return err[0]


def test_cli_check_writes_and_prints(folders, capsys):
    before = json.loads((folders["cp"] / CHECKS_FILE).read_text())
    assert before["replicated_draws"] == 1000  # the fit's default
    assert cli.main(["check", str(folders["cp"]), "--replicates", "200"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("checks: MISFIT") and "wrote" in out
    doc = json.loads((folders["cp"] / CHECKS_FILE).read_text())
    assert doc["replicated_draws"] == 200  # rewritten, not left as it was
    record = json.loads((folders["cp"] / "run.json").read_text())
    assert record["steps"][-1]["command"].startswith("workbench check")


def test_cli_compare_two_folders(folders, tmp_path, capsys):
    out = tmp_path / "cmp"
    assert cli.main(["compare", str(folders["bb"]), str(folders["cp"]), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "bb predicts held-out groups better than cp" in text
    doc = json.loads((out / COMPARISON_FILE).read_text())
    assert doc["best"] == "bb" and len(doc["models"]) == 2
    assert pd.read_csv(out / COMPARISON_TABLE)["run"].tolist() == ["bb", "cp"]


@pytest.mark.slow
def test_cli_compare_fits_several_models(folders, tmp_path, capsys):
    out = tmp_path / "three"
    argv = ["compare", "--data", str(folders["csv"]), "--models",
            "beta-binomial,complete-pooling", "--seed", "3", "--out", str(out)]
    assert cli.main(argv) == 0
    text = capsys.readouterr().out
    assert "beta-binomial predicts held-out groups better than complete-pooling" in text
    for model in ("beta-binomial", "complete-pooling"):
        assert (out / model / "run.json").exists() and (out / model / CHECKS_FILE).exists()
    assert (out / COMPARISON_FILE).exists()


def test_comparison_folder_replaced_whole_only_if_it_is_one(tmp_path):
    from workbench.io import runfolder

    out = tmp_path / "cmp"
    runfolder.replace_folder(out, lambda f: (f / COMPARISON_FILE).write_text("{}"),
                             marker=COMPARISON_FILE, kind="comparison")
    (out / "stale.csv").write_text("x\n")
    runfolder.replace_folder(out, lambda f: (f / COMPARISON_FILE).write_text("{}"),
                             marker=COMPARISON_FILE, kind="comparison")
    assert sorted(p.name for p in out.iterdir()) == [COMPARISON_FILE]
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "notes.txt").write_text("keep")
    with pytest.raises(DataError, match="not a comparison folder"):
        runfolder.check_replaceable(tmp_path / "mine", marker=COMPARISON_FILE, kind="comparison")


@pytest.mark.parametrize(
    ("argv", "needle"),
    [
        (["check", "{tmp}"], "is not a run folder"),
        (["compare", "{bb}", "{tmp}"], "is not a run folder"),
        (["compare", "{bb}", "{elsewhere}"], "different data"),
        (["compare", "{bb}"], "two or more run folders"),
        (["compare", "{bb}", "{bb}"], "given twice"),
        (["compare", "{bb}", "{cp}", "--data", "{csv}"], "not both"),
        (["compare", "--data", "{csv}", "--out", "{bb}"], "not a comparison folder"),
    ],
)
def test_cli_bad_input_is_one_error_line(folders, tmp_path, capsys, argv, needle):
    names = {k: str(v) for k, v in folders.items()} | {"tmp": str(tmp_path)}
    assert cli.main([a.format(**names) for a in argv]) == 2
    assert needle in _one_error_line(capsys)


def test_cli_inconsistent_run_folder(folders, tmp_path, capsys):
    import shutil

    copy = tmp_path / "edited"
    shutil.copytree(folders["bb"], copy)
    record = json.loads((copy / "run.json").read_text())
    record["input"]["fingerprint"] = "0" * 64
    (copy / "run.json").write_text(json.dumps(record))
    assert cli.main(["check", str(copy)]) == 2
    assert "inconsistent" in _one_error_line(capsys)


# -- MCMC -----------------------------------------------------------------------------------


@pytest.mark.slow
def test_mcmc_loo_agrees_with_exact_engine(spread):
    # Same model, two engines: PSIS-LOO from NUTS draws (ArviZ's relative efficiency) should
    # match the exact engine's within a few tenths of a nat in total.
    data, posts = spread
    mcmc = make_model("beta-binomial", engine="mcmc", draws=1000, tune=1000, chains=2,
                      random_seed=7, progress=False).fit(data).idata_
    a = loo_module.leave_one_group_out(mcmc)
    b = loo_module.leave_one_group_out(posts["beta-binomial"])
    assert not a.high_k
    assert a.elpd_loo == pytest.approx(b.elpd_loo, abs=0.5)
    comparison = compare_posteriors({"mcmc": mcmc, "exact": posts["beta-binomial"]})
    assert comparison.table.iloc[1]["preference"] in ("within-two-se", "small-difference")


@pytest.mark.slow
def test_logit_normal_is_checked_and_compared_on_held_out_groups(spread):
    # Its y_group integrates the group effect out (adaptive Gauss-Hermite), so PSIS-LOO over
    # groups works; on data with real spread it must, like the beta-binomial model, beat
    # complete pooling clearly, and sit close to the beta-binomial model.
    data, posts = spread
    idata = make_model("logit-normal", draws=1000, tune=1000, chains=2, random_seed=7,
                       progress=False).fit(data).idata_
    checks = ppc.check_posterior(idata)
    assert checks.loo.available and checks.calibration["verdict"] == "calibrated"
    assert checks.statistics.set_index("statistic").loc["dispersion", "verdict"] == ppc.CONSISTENT
    comparison = compare_posteriors({"logit-normal": idata, **posts})
    t = comparison.table.set_index("run")
    assert t.loc["complete-pooling", "preference"] == "clear"
    gap = abs(t.loc["logit-normal", "elpd_loo"] - t.loc["beta-binomial", "elpd_loo"])
    assert gap < 4


@pytest.mark.parametrize("model", ["beta-binomial", "complete-pooling", "no-pooling"])
def test_groups_sharing_counts_share_one_psis_pass_with_the_same_values(model, monkeypatch):
    # where y_group depends on a group's (successes, trials) alone, PSIS runs once per
    # distinct pair; the table must equal the group-by-group computation, LOO-PIT included
    # (its ends are exact given the weights: no replicate noise tells the two apart)
    rng = np.random.default_rng(11)
    n = rng.integers(1, 6, 400)
    counts = GroupCounts([f"g{i}" for i in range(400)], rng.binomial(n, 0.3), n)
    idata = make_model(model, random_seed=2, draws=250).fit(counts).idata_
    shared = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(5))
    monkeypatch.setattr(loo_module, "_pair_keys", lambda idata, data: None)
    alone = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(5))
    pd.testing.assert_frame_equal(shared.table, alone.table, check_exact=False, rtol=1e-12)
    assert shared.elpd_loo == pytest.approx(alone.elpd_loo, rel=1e-12)
    ends = shared.table.groupby(["successes", "trials"])[["loo_pit_lower", "loo_pit_upper"]]
    assert (ends.nunique() == 1).all().all()  # one value per pair
    # and the pairs really repeat: 400 groups, at most 20 distinct (successes, trials)
    assert shared.table[["successes", "trials"]].drop_duplicates().shape[0] <= 20


def test_no_pooling_pit_ends_are_the_prior_predictive_cdf():
    # A left-out group learns nothing from the others under no pooling: its LOO predictive is
    # the prior predictive Beta-binomial(n, a, b) whatever the weights.
    # reference: scipy.stats.betabinom.cdf
    rng = np.random.default_rng(3)
    n = rng.integers(1, 300, 150)
    counts = GroupCounts([f"g{i}" for i in range(150)], rng.binomial(n, 0.2), n)
    idata = make_model("no-pooling", random_seed=1, draws=200, a=2.0, b=3.0).fit(counts).idata_
    t = loo_module.leave_one_group_out(idata).table
    y, trials = t["successes"].to_numpy(), t["trials"].to_numpy()
    np.testing.assert_allclose(t["loo_pit_lower"], stats.betabinom.cdf(y - 1, trials, 2.0, 3.0),
                               atol=1e-10)
    np.testing.assert_allclose(t["loo_pit_upper"], stats.betabinom.cdf(y, trials, 2.0, 3.0),
                               atol=1e-10)


def test_beta_binomial_pit_ends_agree_with_refitting_without_the_group():
    # PSIS-weighted exact CDFs against the leave-one-group-out predictive computed by refitting
    # the grid without each group (exact_leave_one_out): they differ only by PSIS's error and
    # the draws' Monte Carlo error (400 independent draws)
    rng = np.random.default_rng(8)
    n = rng.integers(5, 200, 60)
    counts = GroupCounts([f"g{i}" for i in range(60)], rng.binomial(n, rng.beta(3, 12, 60)), n)
    idata = make_model("beta-binomial", random_seed=3, draws=100, chains=4).fit(counts).idata_
    t = loo_module.leave_one_group_out(idata).table
    picked = np.arange(0, 60, 6)
    refit = loo_module.exact_leave_one_out(idata, picked)
    np.testing.assert_allclose(t["loo_pit_lower"].to_numpy()[picked], refit["cdf_below"],
                               atol=0.02)
    np.testing.assert_allclose(t["loo_pit_upper"].to_numpy()[picked], refit["cdf_at"],
                               atol=0.02)


def test_pit_ends_fall_back_to_replicates_past_the_walk_budget(monkeypatch):
    # when the exact CDF walk would take too long (huge trial counts), the replicates are used
    rng = np.random.default_rng(4)
    n = rng.integers(1, 50, 80)
    counts = GroupCounts([f"g{i}" for i in range(80)], rng.binomial(n, 0.3), n)
    idata = make_model("beta-binomial", random_seed=2, draws=100).fit(counts).idata_
    exact = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(1)).table
    monkeypatch.setattr(loo_module, "PAIR_CDF_STEPS", 0)
    sampled = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(1)).table
    assert not np.allclose(exact["loo_pit_upper"], sampled["loo_pit_upper"])
    # replicate shares are multiples of the (equal) weights; within their noise of the exact
    np.testing.assert_allclose(exact["loo_pit_upper"], sampled["loo_pit_upper"], atol=0.15)


@pytest.mark.parametrize("model", ["beta-binomial", "complete-pooling", "no-pooling"])
def test_leaving_groups_out_without_a_stored_log_likelihood_gives_the_same_table(model):
    # past LOG_LIKELIHOOD_CELLS the fit stores no log_likelihood group and y_group is computed
    # by chunks of groups (without the conditional one); reference: the stored arrays
    rng = np.random.default_rng(21)
    n = rng.integers(1, 40, 120)
    counts = GroupCounts([f"g{i}" for i in range(120)], rng.binomial(n, 0.3), n)
    idata = make_model(model, random_seed=4, draws=200).fit(counts).idata_
    stored = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(1))
    del idata.log_likelihood
    assert "log_likelihood" not in idata.groups()
    computed = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(1))
    pd.testing.assert_frame_equal(stored.table, computed.table, check_exact=False, rtol=1e-12)
