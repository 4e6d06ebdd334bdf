"""Words that follow the meaning (issue 10, item 5): flags say better or worse, groups with no
trials are not ranked, no pooling has no shrinkage, identical data predict identically.

Data are invented; each check says what it holds the code to.
"""

from __future__ import annotations

import numpy as np
import pytest
from workbench.models import BetaBinomial, GroupCounts, NoPooling

from workbench.analysis import draws, predictions, ranking, targets
from workbench.cli import text


def _draws(model, counts) -> draws.GroupDraws:
    th = model.idata_.posterior["theta"].values
    return draws.GroupDraws(
        names=np.asarray(counts.names).astype(str),
        successes=counts.successes,
        trials=counts.trials,
        theta=th.reshape(-1, th.shape[-1]),
        posterior_mean=model.exact_.mean(),
        closed=model.exact_,
    )


#: invented counts: one group with no trials, two clear highs, two clear lows
COUNTS = GroupCounts(
    ["empty", "high-1", "high-2", "mid-1", "mid-2", "mid-3", "low-1", "low-2"],
    np.array([0, 45, 48, 20, 22, 19, 3, 2]),
    np.array([0, 60, 60, 80, 90, 75, 70, 80]),
)


@pytest.fixture(scope="module")
def fitted():
    model = BetaBinomial(draws=500, chains=2, random_seed=3).fit(COUNTS)
    return model, _draws(model, COUNTS)


@pytest.mark.parametrize("better, above, below", [
    ("higher", "above target (better)", "below target (worse)"),
    ("lower", "above target (worse)", "below target (better)"),
])
def test_flags_say_better_or_worse_as_better_says(fitted, better, above, below):
    # with --better lower a rate above the target is bad: the flag must say so in words,
    # not read "above target" in both runs
    _, inp = fitted
    opts = ranking.rank_options(target=0.3, better=better)
    result = ranking.compute(inp, opts)
    flags = result.estimate_columns.set_index("group")["target_flag"]
    assert flags["high-1"] == above and flags["high-2"] == above
    assert flags["low-1"] == below and flags["low-2"] == below
    assert result.targets["flag_words"] == {"above": above, "below": below}
    line = text.format_ranking(result.tables, result.record, result.targets)
    assert f"2 flagged {above}," in line and f"5 {below}," in line


def test_a_group_with_no_trials_is_never_flagged():
    # a group with no trials carries the population's probability, not its own evidence
    prob = np.array([0.999, 0.999, 0.998, 0.5])
    table, doc = targets.target_tables(["a", "b", "none", "c"], prob, 0.2, 0.1,
                                       trials=np.array([50, 40, 0, 30]))
    assert list(table["target_flag"]) == ["above target (better)"] * 2 + ["", ""]
    assert doc["above"]["flagged"] == 2 and doc["not_flagged_no_data"] == 1


def test_groups_with_no_trials_get_no_rank(fitted):
    # the demo's 0/0 group read "rank 30 of 64, interval [3, 63]": a rank of the population
    _, inp = fitted
    result = ranking.compute(inp, ranking.rank_options(top=2))
    ranks = result.tables["ranks"].set_index("group")
    assert ranks.loc["empty"].isna().all()
    est = result.estimate_columns.set_index("group")
    assert est.loc["empty", ["rank_median", "rank_lower", "rank_upper"]].isna().all()
    ranked = ranks.drop(index="empty")
    assert ranked["rank_median"].between(1, 7).all() and ranked["rank_upper"].max() <= 7
    assert ranked["prob_best_k"].sum() == pytest.approx(2)  # P(best k) sums to k over 7
    assert result.record["ranked_groups"] == 7
    assert "1 group(s) with no trials not ranked" in result.record["ranking_note"]
    assert "empty" not in set(result.tables["pairwise"]["group_a"])
    line = text.format_ranking(result.tables, result.record)
    assert line.startswith("ranks: 7 groups") and "not ranked (no data)" in line


@pytest.mark.parametrize("trials", [[12, 0, 0], [12]])
def test_fewer_than_two_groups_with_trials_make_no_ranking(trials):
    # a one-group file used to be "ranked" without a word
    n = len(trials)
    counts = GroupCounts([f"g{i}" for i in range(n)], np.array([5] + [0] * (n - 1)),
                         np.array(trials))
    model = BetaBinomial(draws=300, chains=2, random_seed=1).fit(counts)
    result = ranking.compute(_draws(model, counts), ranking.rank_options())
    ranks = result.tables["ranks"]
    assert len(ranks) == n and ranks[["rank_median", "prob_best_k"]].isna().all().all()
    assert result.record["ranked_groups"] == 0
    assert result.record["ranking_note"].startswith("not ranked: 1 of")
    assert result.tables["pairwise"].empty
    line = text.format_ranking(result.tables, result.record)
    assert line.startswith("ranks: none: not ranked")


def test_no_pooling_has_no_shrinkage():
    # no pooling has no population: a 3/3 group read "shrinkage 0.4" (the prior's weight)
    counts = GroupCounts(["a", "b"], np.array([3, 4]), np.array([3, 10]))
    table = NoPooling(random_seed=0).fit(counts).summary()
    assert table["shrinkage"].isna().all()


def test_identical_data_get_identical_prediction_intervals():
    # two identical 0/3 groups read [0, 10] and [0, 11]: their posteriors are the same, so
    # their predictions must be too (twelve copies make a difference almost sure on old code)
    counts = GroupCounts([f"same-{i}" for i in range(12)] + ["other"],
                         np.array([0] * 12 + [9]), np.array([3] * 12 + [40]))
    model = NoPooling(draws=1000, chains=4, random_seed=2).fit(counts)
    got = predictions.predict(model.idata_, model.exact_.mean(), trials=100, level=0.95,
                              seed=4).table
    same = got[got["group"].str.startswith("same-")]
    assert same["lower"].nunique() == 1 and same["upper"].nunique() == 1
    assert same["predicted_mean"].nunique() == 1
    # and the shared interval is the exact predictive's: Beta(1, 4) posterior of a 0/3 group
    # under the Beta(1, 1) prior gives a Beta-binomial(100, 1, 4) count (scipy.stats.betabinom)
    from scipy import stats

    hi = stats.betabinom.ppf(0.975, 100, 1, 4)
    assert abs(int(same["upper"].iloc[0]) - hi) <= 1
    assert int(same["lower"].iloc[0]) == 0


def test_groups_differing_only_in_covariate_keep_their_own_interval():
    # the pooling key holds every input of a group's posterior: a covariate tells them apart
    import xarray as xr

    counts = GroupCounts(["a", "b"], np.array([0, 0]), np.array([3, 3]))
    idata = NoPooling(draws=200, chains=2, random_seed=1).fit(counts).idata_
    assert predictions.identical_data_keys(idata).tolist() == [0, 0]
    idata.constant_data["covariates"] = xr.DataArray(
        np.array([[0.0], [1.0]]), dims=("group", "covariate"))
    assert predictions.identical_data_keys(idata).tolist() == [0, 1]


def test_ranks_table_puts_unranked_groups_last():
    from workbench.analysis import ranks

    theta = np.random.default_rng(0).beta(2, 5, size=(200, 3))
    s = ranks.informative_rank_summary(theta, np.array([0, 10, 10]))
    out = ranks.ranks_table(np.array(["none", "p", "q"]), s)
    assert out["group"].iloc[-1] == "none" and np.isnan(out["rank_median"].iloc[-1])
    assert out["rank_median"].iloc[:2].between(1, 2).all()
