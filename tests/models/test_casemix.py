"""Trial-level covariates on the collapsed engine: the cell likelihood, O/E and known truth."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, special, stats
from workbench.models import CaseMix, ConvergenceWarning, GroupCounts, LogitNormal
from workbench.models import _casemix as cm


def _log_integral_by_quad(y, n, m, s):
    # scipy.integrate.quad on the integrand scaled by its peak (found on a fine grid)
    def logf(z):
        eta = m + s * z
        return float(np.sum(y * -np.logaddexp(0, -eta) + (n - y) * -np.logaddexp(0, eta))
                     - 0.5 * z * z)

    grid = np.linspace(-15, 15, 30001)
    values = np.array([logf(z) for z in grid])
    peak, top = grid[values.argmax()], values.max()
    area, _ = integrate.quad(lambda z: np.exp(logf(z) - top), peak - 15, peak + 15,
                             points=[peak], limit=200, epsabs=0, epsrel=1e-12)
    return top + np.log(area) - 0.5 * np.log(2 * np.pi)


@pytest.mark.slow
def test_cell_likelihood_matches_quadrature_and_its_gradient_matches_differences():
    rng = np.random.default_rng(3)
    n = rng.integers(1, 80, size=9).astype(float)
    y = rng.binomial(n.astype(int), 0.4).astype(float)
    m = rng.normal(-0.5, 1.5, size=9)
    starts = np.array([0, 3, 3, 4, 9])  # a group with no cells has log L = 0
    for s in (0.3, 1.0, 2.0):
        value, d_m, d_s = cm.integrated_loglik(y, n, m, starts, s)
        for g in range(4):
            a, b = starts[g], starts[g + 1]
            want = _log_integral_by_quad(y[a:b], n[a:b], m[a:b], s) if b > a else 0.0
            assert abs(value[g] - want) < (1e-6 if s <= 1 else 1e-4), (s, g, value[g], want)
        h = 1e-6
        for c in range(9):
            bumped = m.copy()
            bumped[c] += h
            diff = (cm.integrated_loglik(y, n, bumped, starts, s)[0] - value).sum() / h
            assert abs(d_m[c] - diff) < 1e-4 * max(1.0, abs(diff))
        diff = (cm.integrated_loglik(y, n, m, starts, s + h)[0] - value) / h
        assert np.allclose(d_s, diff, atol=1e-4)


def test_expected_counts_and_adjusted_rates_equal_a_hand_computation():
    # a fixed, known case-mix model: alpha, beta and the group effects given, one "draw"
    x = np.array([[0.0, 1.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0], [0.0, 0.0]])
    cells = CaseMix(np.array([0, 0, 1, 1, 1]), np.array([3, 5, 9, 2, 1]),
                    np.array([10, 20, 30, 8, 4]), pd.DataFrame(x, columns=["a", "b"]))
    alpha, beta, u = -0.7, np.array([0.9, -0.4]), np.array([0.3, -0.2])
    for spread in (0.0, 0.8):
        own, adjusted, expected = cm.rates(cells, 2, x, np.array([alpha]), beta[None, :],
                                           u[None, :], np.array([spread]))
        for g in (0, 1):
            mine = [c for c in range(5) if cells.group[c] == g]
            if spread == 0:  # expected = sum of predicted probabilities, by hand
                want = sum(cells.trials[c] / (1 + np.exp(-(alpha + x[c] @ beta))) for c in mine)
            else:  # the population-average group: the predicted probability integrated over u
                want = sum(cells.trials[c] * integrate.quad(
                    lambda v, c=c: special.expit(alpha + x[c] @ beta + v)
                    * stats.norm.pdf(v, 0, spread), -12 * spread, 12 * spread)[0] for c in mine)
            assert expected[0, g] == pytest.approx(want, rel=1e-9)
            own_want = sum(cells.trials[c] * special.expit(alpha + x[c] @ beta + u[g])
                           for c in mine) / cells.trials[mine].sum()
            assert own[0, g] == pytest.approx(own_want, rel=1e-12)
            # adjusted: the group's rate on the population's trials, pattern by pattern
            adj_want = sum(cells.trials[c] * special.expit(alpha + x[c] @ beta + u[g])
                           for c in range(5)) / cells.trials.sum()
            assert adjusted[0, g] == pytest.approx(adj_want, rel=1e-12)


def _simulate(seed, groups=40):
    """Trial-level data with known effects: a group-level numeric covariate, a trial-level
    numeric one, a two-level and a four-level factor; case mix differs between groups."""
    rng = np.random.default_rng(seed)
    truth = {"size": 0.4, "age": 0.5, "channel=phone": -0.6, "band=b": 0.4, "band=c": 0.9,
             "band=d": 1.5}
    alpha, sigma = -1.0, 0.5
    u = sigma * rng.standard_normal(groups)
    size = rng.normal(0, 1, size=groups)
    rows = []
    for g in range(groups):
        trials = int(rng.integers(60, 400))
        severe = rng.beta(1.2, 1.2)  # the group's share of the harder bands
        band = rng.choice(list("abcd"), size=trials,
                          p=[(1 - severe) * 0.7, (1 - severe) * 0.3, severe * 0.5, severe * 0.5])
        age = np.round(rng.normal(2 * severe, 1.0, size=trials))  # whole years (bands)
        phone = rng.random(trials) < 0.4
        eta = (alpha + u[g] + truth["size"] * size[g] + truth["age"] * age
               + truth["channel=phone"] * phone
               + np.select([band == "b", band == "c", band == "d"],
                           [truth["band=b"], truth["band=c"], truth["band=d"]], 0.0))
        ok = rng.random(trials) < special.expit(eta)
        rows.append(pd.DataFrame({"group": f"unit-{g:02d}", "size": size[g],
                                  "age": age, "band": band,
                                  "channel": np.where(phone, "phone", "web"), "ok": ok}))
    return pd.concat(rows, ignore_index=True), truth, u


@pytest.mark.slow  # about 100 s on 2 shared cores (six fits)
def test_known_truth_effects_covered_and_adjusted_ranking_beats_unadjusted():
    from workbench import api

    covered = total = 0
    spearman = []
    for seed in range(6):
        table, truth, u = _simulate(seed)
        with warnings.catch_warnings():  # 2 x 500 draws: R-hat may miss 1.01 by a little
            warnings.simplefilter("ignore", ConvergenceWarning)
            run = api.fit(table, outcome="ok", covariates=["size", "age", "band", "channel"],
                          reference_level=["band=a", "channel=web"], model="logit-normal",
                          draws=500, tune=500, chains=2, seed=seed, checks=False)
        assert run.loaded.counts.cells is not None
        assert int(run.idata.sample_stats["diverging"].sum()) == 0
        eff = run.tables["effects"]
        for _, row in eff.iterrows():
            key = row["term"] if row["kind"] == "numeric" else f"{row['term']}={row['level']}"
            total += 1
            covered += row["log_odds_lower"] <= truth[key] <= row["log_odds_upper"]
        adj = run.tables["adjusted_rates"].set_index("group").loc[run.estimates["group"]]
        true_u = u[np.array([int(g[-2:]) for g in adj.index])]
        s_adj = stats.spearmanr(adj["adjusted_mean"].to_numpy(), true_u).statistic
        s_raw = stats.spearmanr(adj["observed_rate"].to_numpy(), true_u).statistic
        spearman.append((s_adj, s_raw))
        assert len(adj) == 40
    assert total == 36
    # 95% intervals: under nominal coverage P(covered <= 29 of 36) = 0.002 (scipy.stats.binom)
    assert covered >= 30, (covered, total)
    s_adj, s_raw = np.mean(spearman, axis=0)
    print(f"coverage {covered}/{total}; Spearman adjusted {s_adj:.3f}, unadjusted {s_raw:.3f}")
    assert s_adj > s_raw + 0.1, spearman
    assert all(a > r for a, r in spearman), spearman


@pytest.mark.slow  # about 25 s
def test_trial_level_fit_at_default_settings_has_no_divergences_and_exact_group_draws():
    table, _, _ = _simulate(11, groups=25)
    frame = table.assign(y=table["ok"].astype(int), n=1)
    from workbench.io.inputs import load_groups

    loaded = load_groups(frame, outcome="ok", covariates=["age", "band"])
    counts = loaded.counts
    assert counts.cells.n_cells < len(frame) / 3  # aggregated by (group, pattern)
    m = LogitNormal(random_seed=2, progress=False).fit(counts)
    post = m.idata_.posterior
    assert int(m.idata_.sample_stats["diverging"].sum()) == 0
    assert 0.85 < post.attrs["group_draw_acceptance"] <= 1.0
    # theta is the own-mix rate: its posterior mean tracks the observed rate of large groups
    own = post["theta"].mean(("chain", "draw")).values
    assert np.corrcoef(own, counts.observed_rate)[0, 1] > 0.9
    assert {"adjusted_rate", "expected", "group_shift"} <= set(post.data_vars)
    assert "log_likelihood" in m.idata_.groups()


def test_cells_must_split_the_group_counts():
    from workbench.models import DataError, ParameterError

    cells = CaseMix(np.array([0, 0, 1]), np.array([1, 2, 3]), np.array([4, 4, 5]),
                    pd.DataFrame({"a": [0.0, 1.0, 0.0]}))
    GroupCounts(["a", "b"], [3, 3], [8, 5], cells=cells)
    with pytest.raises(DataError, match="cells of group 'b' sum to 3/5"):
        GroupCounts(["a", "b"], [3, 3], [8, 6], cells=cells)
    with pytest.raises(ParameterError, match="collapsed engine only"):
        counts = GroupCounts(["a", "b"], [3, 3], [8, 5], cells=cells)
        LogitNormal(engine="latent", draws=10, tune=10, chains=1, progress=False).fit(counts)
