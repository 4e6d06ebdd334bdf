"""Block-wise Pareto-smoothed importance sampling against ArviZ's per-group functions.

The reference throughout is ArviZ itself (``az.psislw``, ``az.loo(pointwise=True)`` and
``az.loo_pit``, ArviZ 0.23): every figure fast_psis returns is compared with the one ArviZ
computes on the same rows, to 1e-10 relative. The log-ratios are invented (normal,
Student-t, log-Pareto draws with planted edge cases) or the y_group log-likelihood of small
fits of invented counts.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from workbench.models import GroupCounts, make_model

from workbench.analysis import fast_psis
from workbench.analysis import loo as loo_module

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

RTOL = 1e-10


def same(mine, reference) -> None:
    """Equal to ArviZ within RTOL (relative only), NaN and inf in the same places."""
    np.testing.assert_allclose(mine, reference, rtol=RTOL, atol=0)


def arviz_psislw(log_ratios, reff):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return az.psislw(np.array(log_ratios), reff)


def arviz_loo(ll, reff):
    frame = az.InferenceData(log_likelihood=xr.Dataset(
        {"y": (("chain", "draw", "group"), ll.T.reshape(1, *ll.T.shape))}))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # high-k warnings
        return az.loo(frame, pointwise=True, reff=reff, var_name="y")


def arviz_loo_pit(y, y_hat, log_weights):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(az.loo_pit(y=y, y_hat=y_hat, log_weights=log_weights))


def invented_log_lik(samples: int, seed: int) -> np.ndarray:
    """(groups, samples) log-likelihoods with every case PSIS treats on its own."""
    rng = np.random.default_rng(seed)
    scale = rng.uniform(0.05, 4.0, (24, 1))
    rows = [
        -3 + scale * rng.standard_normal((24, samples)),  # light tails, k from low to high
        -2 - np.abs(rng.standard_t(2, (12, samples))),  # heavy right tail of the ratios
        -np.log(rng.pareto(0.8, (8, samples)) + 1),  # ratios so heavy k is above 0.7
    ]
    ll = np.vstack(rows)
    ll[0] = -1.25  # constant row: no tail at all (k = inf, equal weights)
    ll[1, : samples // 2] = ll[1].min()  # half the draws tied at the top ratio: no tail
    ll[2, :3] = -np.inf  # an impossible draw: ArviZ gives NaN weights and k = inf
    ll[3, 7] = np.inf  # a ratio of -inf (zero weight), the rest smoothed as usual
    ll[4] = np.round(ll[4], 1)  # ties inside the tail: ArviZ's placement of smoothed values
    ll[5] = np.full(samples, -np.inf)  # every draw impossible
    ll[6] = -2.0
    ll[6, [5, 9, 40]] = (-5.0, -6.0, -7.0)  # a tail of three draws: too short to fit (inf)
    ll[7] = np.round(2 * ll[7]) / 2  # coarse values: ties at the cut shorten the tail
    return ll


CASES = [(s, r) for s in (100, 400, 1000, 4000) for r in (0.35, 0.8, 1.0)]


@pytest.mark.reference
@pytest.mark.parametrize(("samples", "reff"), CASES)
def test_log_weights_and_k_equal_arviz_psislw(samples, reff):
    ll = invented_log_lik(samples, seed=samples)
    mine_lw, mine_k = fast_psis.psis_log_weights(-ll, reff)
    ref_lw, ref_k = arviz_psislw(-ll, reff)  # reference: ArviZ
    same(mine_k, ref_k)
    same(mine_lw, ref_lw)
    # the planted cases are there: no tail (inf), k both below and above ArviZ's threshold
    assert np.isinf(ref_k[[0, 1, 2, 5, 6]]).all() and np.isnan(ref_lw[[2, 5]]).all()
    assert np.isfinite(ref_k[[3, 4, 7]]).all()
    good = min(1 - 1 / np.log10(samples), 0.7)
    assert (ref_k[6:] < good).any() and (ref_k[np.isfinite(ref_k)] > good).any()


@pytest.mark.reference
@pytest.mark.parametrize("reff", [0.6, 1.0])
def test_unnormalised_and_blocked_weights_equal_arviz(reff):
    ll = invented_log_lik(400, seed=9)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref_lw, ref_k = az.psislw(-ll, reff, normalize=False)  # reference: ArviZ
    # a block of 3 rows at a time gives the same as the whole array at once
    mine_lw, mine_k = fast_psis.psis_log_weights(-ll, reff, normalize=False, cells=3 * 400)
    same(mine_k, ref_k)
    same(mine_lw, ref_lw)


@pytest.mark.reference
@pytest.mark.parametrize(("samples", "reff"), CASES)
def test_pointwise_loo_equals_arviz_loo(samples, reff):
    ll = invented_log_lik(samples, seed=samples + 1)
    mine = fast_psis.psis_loo(ll, reff, cells=7 * samples)
    ref = arviz_loo(ll, reff)  # reference: ArviZ's az.loo(pointwise=True)
    same(mine.elpd_i, ref.loo_i.values)
    same(mine.pareto_k, ref.pareto_k.values)
    assert mine.good_k == ref.good_k
    assert mine.elpd_i[0] == pytest.approx(-1.25, rel=1e-12)  # constant row: its own value


@pytest.mark.reference
@pytest.mark.parametrize(("samples", "reff"), [(100, 1.0), (1000, 0.5), (4000, 0.9)])
def test_loo_pit_equals_arviz_loo_pit(samples, reff):
    rng = np.random.default_rng(samples)
    ll = invented_log_lik(samples, seed=samples + 2)
    y_hat = rng.binomial(30, 0.3, ll.shape).astype(float)
    y = rng.binomial(30, 0.3, len(ll)).astype(float)
    y[6], y[7] = -1.0, 31.0  # no replicate at or below; every replicate at or below
    ref_lw, _ = arviz_psislw(-ll, reff)
    for obs in (y, y - 0.5):
        ref = arviz_loo_pit(obs, y_hat, ref_lw)  # reference: ArviZ's az.loo_pit
        same(fast_psis.loo_pit(obs, y_hat, fast_psis.psis_log_weights(-ll, reff)[0]), ref)
        assert ref[6] == 0 and ref[7] == pytest.approx(1, rel=1e-12)  # none; all at or below
        assert ref[2] == 1  # NaN weights (a -inf log-likelihood): ArviZ's min(1, NaN) is 1


def test_loo_pit_refuses_integer_counts():
    # ArviZ spline-smooths integer inputs; fast_psis does not, so it asks for floats
    with pytest.raises(TypeError, match="float"):
        fast_psis.loo_pit(np.array([1, 2]), np.ones((2, 5), dtype=int), np.zeros((2, 5)))


def counts(groups: int, seed: int) -> GroupCounts:
    """Invented counts: rates around 0.3, trials 5 to 400, one group with no trials."""
    rng = np.random.default_rng(seed)
    trials = rng.integers(5, 401, groups)
    trials[3] = 0
    successes = rng.binomial(trials, rng.beta(6, 14, groups))
    successes[0] = trials[0]  # an extreme group: large Pareto k
    return GroupCounts([f"unit-{i:03d}" for i in range(groups)], successes, trials)


@pytest.fixture(scope="module")
def fits():
    data = counts(40, seed=4)
    return {m: make_model(m, random_seed=8).fit(data).idata_
            for m in ("beta-binomial", "no-pooling", "complete-pooling")}


@pytest.mark.reference
@pytest.mark.parametrize("reff", [0.5, 1.0])
def test_beta_binomial_group_log_likelihood_equals_arviz(fits, reff):
    idata = fits["beta-binomial"]
    seen = np.flatnonzero(idata.constant_data["trials"].values > 0)
    ll = loo_module._group_loglik(idata, seen)
    ref = arviz_loo(ll, reff)  # reference: ArviZ
    mine = fast_psis.psis_loo(ll, reff)
    same(mine.elpd_i, ref.loo_i.values)
    same(mine.pareto_k, ref.pareto_k.values)
    draws = loo_module.thinned_draws(ll.shape[1], 1000)
    y_new = loo_module._new_group_replicates(idata, seen, draws, np.random.default_rng(1))
    y = idata.observed_data["successes"].values[seen].astype(float)
    ref_lw, ref_k = arviz_psislw(-ll[:, draws], reff)
    mine_lw, mine_k = fast_psis.psis_log_weights(-ll[:, draws], reff)
    same(mine_lw, ref_lw)
    same(mine_k, ref_k)
    same(fast_psis.loo_pit(y, y_new, mine_lw), arviz_loo_pit(y, y_new, ref_lw))


def both_ways(idata, monkeypatch):
    fast = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(3))
    monkeypatch.setattr(loo_module, "USE_ARVIZ_PSIS", True)
    ref = loo_module.leave_one_group_out(idata, rng=np.random.default_rng(3))
    monkeypatch.setattr(loo_module, "USE_ARVIZ_PSIS", False)
    return fast, ref


def assert_same_result(fast, ref) -> None:
    # reference: the same function on ArviZ's az.loo / az.psislw / az.loo_pit
    pd.testing.assert_frame_equal(fast.table, ref.table, check_exact=False, rtol=RTOL, atol=0)
    for name in ("elpd_loo", "se", "p_loo", "good_k"):
        assert getattr(fast, name) == pytest.approx(getattr(ref, name), rel=RTOL)
    assert fast.notes == ref.notes and fast.to_dict().keys() == ref.to_dict().keys()


@pytest.mark.reference
@pytest.mark.parametrize("model", ["beta-binomial", "no-pooling", "complete-pooling"])
def test_leave_one_group_out_table_is_unchanged(fits, model, monkeypatch):
    fast, ref = both_ways(fits[model], monkeypatch)
    assert_same_result(fast, ref)
    assert len(fast.table) == 39 and fast.table["loo_pit"].notna().all()


@pytest.mark.slow  # an MCMC fit (about 10 s)
@pytest.mark.reference
def test_leave_one_group_out_unchanged_for_logit_normal(monkeypatch):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        idata = make_model("logit-normal", random_seed=8).fit(counts(20, seed=6)).idata_
    assert loo_module._relative_efficiency(idata) != 1.0  # MCMC: reff from the ESS
    fast, ref = both_ways(idata, monkeypatch)
    assert_same_result(fast, ref)
