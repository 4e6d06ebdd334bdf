"""Prior sensitivity: alternatives, per-group movement, named groups and the verdict.

The tables are invented; the reference for posterior means is Beta-binomial conjugacy
(scipy.stats.beta), and the rest is checked on tables built so that the answer is known.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from workbench.models import GroupCounts, make_model

from workbench.analysis import sensitivity
from workbench.options import FitSettings


def _conclusions(counts, model="beta-binomial", *, target, top=3, **priors):
    est = make_model(model, engine="exact", draws=200, chains=2, random_seed=5, **priors)
    est.fit(counts)
    return sensitivity.conclusions(est, level=0.95, target=target, fdr=0.10, top=top,
                                   better="higher")


def _audit(counts, *, target, top=3):
    settings = FitSettings.from_options(target=target, top=top)
    base = _conclusions(counts, target=target, top=top)
    alts = {}
    for v in sensitivity.prior_variants(settings):
        priors = {k: tuple(v.changes.get(k, settings[k])) for k in ("mu_prior", "kappa_prior")}
        alts[v.name] = (v, _conclusions(counts, target=target, top=top, **priors))
    return sensitivity.compare(base, alts, top=top, target=target)


def test_documented_alternatives_of_the_default_prior():
    names = [v.name for v in sensitivity.prior_variants(FitSettings.from_options())]
    assert names == ["weaker pooling", "stronger pooling", "weaker pooling, confident",
                     "stronger pooling, confident", "Jeffreys mean prior",
                     "firmer mean prior"]
    changes = {v.name: v.changes for v in sensitivity.prior_variants(FitSettings.from_options())}
    assert changes["weaker pooling"] == {"kappa_prior": (2.0, 3.0)}
    assert changes["stronger pooling, confident"] == {"kappa_prior": (200.0, 1.5)}
    assert changes["firmer mean prior"] == {"mu_prior": (5.0, 5.0)}
    # a Jeffreys prior already in use is not offered again
    jeff = FitSettings.from_options(mu_prior=(0.5, 0.5))
    assert "Jeffreys mean prior" not in [v.name for v in sensitivity.prior_variants(jeff)]


def test_mean_shift_matches_beta_conjugacy_for_no_pooling():
    # no pooling: theta_j | y ~ Beta(a + y_j, b + n_j - y_j) (scipy.stats.beta is the reference)
    y = np.array([0, 3, 7, 12])
    n = np.array([4, 10, 20, 30])
    counts = GroupCounts(["a", "b", "c", "d"], y, n)
    base = _conclusions(counts, "no-pooling", target=None, a=1.0, b=1.0)
    alt = _conclusions(counts, "no-pooling", target=None, a=0.5, b=0.5)
    variant = sensitivity.Variant("Jeffreys rate prior", "rate ~ Beta(0.5, 0.5)",
                                  {"beta_prior": (0.5, 0.5)})
    table, doc = sensitivity.compare(base, {variant.name: (variant, alt)}, top=2, target=None)
    want = stats.beta(0.5 + y, 0.5 + n - y).mean() - stats.beta(1 + y, 1 + n - y).mean()
    np.testing.assert_allclose(table["mean_shift"], want, rtol=1e-9, atol=1e-12)
    sd = stats.beta(1 + y, 1 + n - y).std()
    np.testing.assert_allclose(table["mean_shift_sd"], np.abs(want) / sd, rtol=1e-9)
    # the 0/4 group moves by 0.083 of a rate, 0.46 sd: just under the limit of 0.5
    assert doc["verdict"] == "robust", doc["sentence"]


@pytest.mark.slow  # seven exact fits: seconds idle, about a minute on busy shared cores
def test_names_the_group_whose_flag_hinges_on_the_prior():
    # 11 invented groups near 0.20 with 20 trials each and one at 30/100: with little
    # information on how alike groups are, the pooling prior decides whether 30/100 clears a
    # target of 0.22 (P(above) 0.82 under the default prior, 0.93 under weaker pooling with a
    # confident prior; a lone flag needs P >= 0.9 at fdr 0.10)
    y = np.array([4, 3, 5, 4, 4, 3, 5, 4, 4, 3, 5, 30])
    n = np.array([20] * 11 + [100])
    names = [f"g{i:02d}" for i in range(11)] + ["hinge"]
    table, doc = _audit(GroupCounts(names, y, n), target=0.22)
    assert doc["verdict"] == "sensitive"
    assert doc["flag_change_groups"] == ["hinge"], doc["sentence"]
    assert "hinge" in doc["sentence"]
    row = table[(table["group"] == "hinge") & (table["alternative"] == "weaker pooling, confident")]
    assert bool(row["flag_changes"].iloc[0])
    assert row["alternative_flag"].iloc[0] == "above target (better)"
    # weaker pooling pulls the estimate less toward the population mean: it moves up
    assert row["mean_shift"].iloc[0] > 0


@pytest.mark.slow  # seven exact fits of 40 large groups: two minutes on busy shared cores
def test_large_well_identified_table_is_robust():
    # 40 invented groups with 5,000 trials each, rates spread from 0.05 to 0.60 and none within
    # 0.03 of the target 0.3: the data, not the prior, decide every conclusion
    rates = np.linspace(0.05, 0.60, 44)
    rates = rates[np.abs(rates - 0.3) > 0.03][:40]
    n = np.full(len(rates), 5000)
    y = np.round(rates * n).astype(int)
    table, doc = _audit(GroupCounts([f"s{i:02d}" for i in range(len(y))], y, n), target=0.3)
    assert doc["verdict"] == "robust", doc["sentence"]
    assert doc["flag_change_groups"] == [] and doc["top_k_change_groups"] == []
    assert table["mean_shift_sd"].max() < sensitivity.SHIFT_LIMIT
    assert len(table) == len(y) * 6


@pytest.mark.parametrize("model", ["logit-normal", "nested"])
def test_spread_priors_of_log_odds_models(model):
    settings = FitSettings.from_options(model=model)
    changes = [v.changes for v in sensitivity.prior_variants(settings)]
    assert {"sigma_prior": 1 / 3} in changes and {"sigma_prior": 3.0} in changes
    assert ({"tau_prior": 3.0} in changes) == (model == "nested")
