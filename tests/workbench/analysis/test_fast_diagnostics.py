"""Vectorised R-hat / ESS / MCSE held equal to ArviZ 0.23's own functions (the reference)."""

from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pytest

from workbench.analysis import fast_diagnostics as fast


def _draws(chains: int = 4, draws: int = 203, k: int = 24, seed: int = 0) -> np.ndarray:
    """Autocorrelated, tied, constant, NaN and badly mixed quantities side by side."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(chains, draws, k)).cumsum(axis=1) * 0.1 + rng.normal(size=(chains,
                                                                                  draws, k))
    x[:, :, 1] = 2.5  # constant
    x[0, 7, 2] = np.nan  # a NaN
    x[:, :, 3] = np.round(x[:, :, 3])  # many ties
    x[chains - 1, :, 4] += 3.0  # one chain elsewhere
    x[:, :, 5] = rng.beta(2, 30, size=(chains, draws))  # skewed, like a rate
    ar = np.zeros((chains, draws))
    for t in range(1, draws):  # strongly autocorrelated AR(1)
        ar[:, t] = 0.95 * ar[:, t - 1] + rng.normal(size=chains)
    x[:, :, 6] = ar
    return x


def _arviz(x: np.ndarray) -> dict[str, np.ndarray]:
    ds = az.convert_to_dataset({"v": x})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return {
            "r_hat": az.rhat(ds, method="rank")["v"].values,
            "ess_bulk": az.ess(ds, method="bulk")["v"].values,
            "ess_tail": az.ess(ds, method="tail")["v"].values,
            "mcse_mean": az.mcse(ds, method="mean")["v"].values,
            "mcse_lower": az.mcse(ds, method="quantile", prob=0.025)["v"].values,
            "mcse_upper": az.mcse(ds, method="quantile", prob=0.975)["v"].values,
        }


@pytest.mark.parametrize("shape", [(4, 203), (2, 50), (1, 100)])
def test_equal_to_arviz_to_1e8(shape):
    # reference: arviz.rhat(method="rank"), arviz.ess(method="bulk"/"tail"),
    # arviz.mcse(method="mean"/"quantile") on the same draws
    x = _draws(*shape)
    got, want = fast.summary(x), _arviz(x)
    for key, ref in want.items():
        np.testing.assert_allclose(got[key], ref, rtol=1e-8, atol=1e-8, equal_nan=True,
                                   err_msg=key)
    assert np.isnan(got["r_hat"][2]) and np.isnan(got["ess_bulk"][2])  # the NaN quantity
    # constant: ESS is the count of split draws (an odd chain loses its middle draw)
    assert got["ess_bulk"][1] == shape[0] * 2 * (shape[1] // 2)


def test_single_figures_match_the_summary():
    x = _draws()
    whole = fast.summary(x)
    np.testing.assert_array_equal(fast.rhat(x), whole["r_hat"])
    np.testing.assert_array_equal(fast.ess_bulk(x), whole["ess_bulk"])
    np.testing.assert_array_equal(fast.mcse_quantile(x, 0.025), whole["mcse_lower"])
    scalar = fast.summary(x[:, :, 5])  # a (chain, draw) array is one quantity
    assert scalar["ess_tail"].shape == (1,)
    assert scalar["ess_tail"][0] == pytest.approx(whole["ess_tail"][5], rel=1e-12)


def test_independent_summary_on_independent_draws():
    rng = np.random.default_rng(5)
    x = rng.beta(3, 17, size=(4, 500, 30))
    got = fast.independent_summary(x)
    size = 4 * 500
    assert np.all(got["ess_bulk"] == size) and np.all(got["ess_tail"] == size)
    # independent draws: MCSE of the mean is sd / sqrt(S) (common practice)
    flat = x.reshape(size, 30)
    np.testing.assert_allclose(got["mcse_mean"], flat.std(axis=0, ddof=1) / np.sqrt(size))
    # plain split R-hat: arviz.rhat(method="split")
    ds = az.convert_to_dataset({"v": x})
    np.testing.assert_allclose(got["r_hat"], az.rhat(ds, method="split")["v"].values,
                               rtol=1e-10)
    # on truly independent draws ArviZ's own estimates land near these (its ESS is near S)
    ref = _arviz(x)
    for key in ("mcse_mean", "mcse_lower", "mcse_upper"):
        ratio = np.median(got[key] / ref[key])
        assert 0.8 < ratio < 1.25, key


def test_independent_summary_by_blocks_equals_one_block(monkeypatch):
    # the blocks of quantities that bound its copies change no number
    x = np.random.default_rng(6).beta(3, 17, size=(4, 100, 23))
    whole = fast.independent_summary(x)
    monkeypatch.setattr(fast, "INDEPENDENT_BLOCK_CELLS", 4 * 100 * 5)  # blocks of 5, one of 3
    for key, value in fast.independent_summary(x).items():
        np.testing.assert_array_equal(value, whole[key], err_msg=key)
