"""Simulation-based calibration (Talts et al. 2018) on the data's own trial counts.

The reference is the theorem itself: under a correct engine the rank of a prior draw among
posterior draws is uniform, and central intervals cover at their nominal rate. The engine
under test is the exact beta-binomial engine on the invented demo data; a deliberately
widened posterior (a wrapper that doubles every group's spread) must be caught.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from workbench.models import GroupCounts

from workbench import api, steps
from workbench.analysis import calibration
from workbench.io import runfolder


def _plan(trials, **kw):
    estimator = {"engine": "exact", "draws": 50, "chains": 2, "mu_prior": (1.0, 1.0),
                 "kappa_prior": (20.0, 3.0)}
    return calibration.make_plan("beta-binomial", estimator, [f"g{i}" for i in range(len(trials))],
                                 trials, **kw)


def test_rank_counts_draws_below_and_splits_ties():
    rng = np.random.default_rng(0)
    draws = np.array([0.1, 0.2, 0.2, 0.3])
    assert calibration.rank_of(0.25, draws, rng) == 3
    assert calibration.rank_of(0.05, draws, rng) == 0
    tied = {calibration.rank_of(0.2, draws, rng) for _ in range(200)}
    assert tied == {1, 2, 3}  # one draw below, two tied: ranks 1..3 at random


def test_prior_draws_follow_the_prior_and_its_truncation():
    plan = _plan([10, 20, 30], seed=1)
    rng = np.random.default_rng(4)
    truths = [calibration.draw_truth(plan, rng) for _ in range(2000)]
    mu = np.array([t["mu"] for t in truths])
    log_kappa = np.log([t["kappa"] for t in truths])
    # mu ~ Beta(1, 1), log kappa ~ Normal(log 20, 3) truncated to [1e-6, 1e8]
    # (scipy.stats.kstest against scipy.stats.uniform and scipy.stats.truncnorm)
    assert stats.kstest(mu, stats.uniform.cdf).pvalue > 0.001
    lo, hi = (np.log(calibration.KAPPA_RANGE) - np.log(20)) / 3
    assert stats.kstest(log_kappa, stats.truncnorm(lo, hi, np.log(20), 3).cdf).pvalue > 0.001
    y = np.array([t["successes"] for t in truths])
    assert (y >= 0).all() and (y <= np.array([10, 20, 30])).all()


def test_seeds_and_plan_keys_do_not_depend_on_order():
    plan = _plan([5, 6, 7], seed=3)
    assert calibration.replicate_seed(plan, 4) == calibration.replicate_seed(plan, 4)
    assert calibration.replicate_seed(plan, 4) != calibration.replicate_seed(plan, 5)
    assert plan.key() == _plan([5, 6, 7], seed=3).key()
    assert plan.key() != _plan([5, 6, 8], seed=3).key()


def test_tracked_groups_span_the_trial_counts():
    plan = _plan(list(range(100, 0, -1)), groups=5)
    tracked = [plan.trials[j] for j in plan.tracked]
    assert min(tracked) == 1 and max(tracked) == 100 and len(tracked) == 5


def test_chi_square_and_coverage_on_known_replicates():
    # replicates whose ranks are exactly uniform and whose coverage is exactly nominal read
    # "calibrated"; the chi-square statistic is scipy.stats.chisquare's
    plan = _plan([10, 10], groups=1, draws=9)
    results = [
        {"index": i, "seed": i, "seconds": 0.0,
         "truth": {"mu": 0.5, "kappa": 1.0, "between_group_sd": 0.1},
         "ranks": {"mu": i % 10, "kappa": (3 * i) % 10, "between_group_sd": (7 * i) % 10,
                   "theta[g0]": i % 10},
         "coverage": {"0.5": [0.5, 0.5][i % 2], "0.8": 0.8, "0.95": [1.0, 0.9][i % 2]},
         "flags": None}
        for i in range(100)
    ]
    doc = calibration.summarise(plan, results, engine="exact").summary
    assert doc["verdict"] == "calibrated", doc["sentence"]
    assert all(r["chi_square"] == 0 for r in doc["ranks"])
    skewed = [{**r, "ranks": {**r["ranks"], "mu": min(r["ranks"]["mu"], 4)}} for r in results]
    doc = calibration.summarise(plan, skewed, engine="exact").summary
    mu = next(r for r in doc["ranks"] if r["quantity"] == "mu")
    counts = np.bincount([min(i % 10, 4) for i in range(100)], minlength=10)
    assert mu["chi_square"] == pytest.approx(stats.chisquare(counts).statistic)
    assert doc["verdict"] == "miscalibrated" and "ranks of mu" in doc["sentence"]


@pytest.fixture(scope="module")
def demo_folder(tmp_path_factory):
    out = tmp_path_factory.mktemp("cal") / "demo-run"
    api.fit(api.demo_data_path(), group="branch", successes="signups", trials="visitors",
            seed=1, target=0.2, checks=False, out=out)
    return out


class _Widened:
    """A broken engine: every group's posterior spread doubled around its mean."""

    def __init__(self, fitted) -> None:
        self.idata_ = fitted.idata_.copy()
        theta = self.idata_.posterior["theta"]
        mean = theta.mean(("chain", "draw"))
        self.idata_.posterior["theta"] = (mean + 2.0 * (theta - mean)).clip(0.0, 1.0)


def _widened_fitter(plan, counts, seed):
    return _Widened(calibration.default_fitter(plan, counts, seed))


@pytest.mark.slow  # 40 exact fits in one process: 10 s on an idle machine, minutes under load
def test_a_widened_posterior_is_caught(demo_folder):
    folder, result = steps.calibrate_folder(demo_folder, simulations=40, workers=1,
                                            fitter=_widened_fitter)
    doc = result.summary
    assert doc["verdict"] == "miscalibrated", doc["sentence"]
    cover = {c["level"]: c for c in doc["coverage"]}
    assert cover[0.5]["realised"] > 0.6 and not cover[0.5]["within"]
    bad = [r["quantity"] for r in doc["ranks"] if r["uniform"] is False]
    assert bad and all(q.startswith("theta[") for q in bad)
    assert folder.record["calibration"]["verdict"] == "miscalibrated"


@pytest.mark.slow  # 100 exact fits, two workers: 32 s on idle cores, minutes under load
def test_exact_engine_is_calibrated_on_the_demo_trials(demo_folder):
    folder, result = steps.calibrate_folder(demo_folder, simulations=100, workers=2)
    doc = result.summary
    assert doc["verdict"] == "calibrated", doc["sentence"]
    assert all(r["uniform"] for r in doc["ranks"])
    for c in doc["coverage"]:
        assert abs(c["realised"] - c["level"]) <= c["tolerance"]
    flags = doc["false_flags"]
    assert flags["within"] and flags["realised_false_share"] <= 0.10 + flags["tolerance"]
    # the tables land in the folder, the staging file is gone, run.json records the verdict
    assert runfolder.path_of(demo_folder, "calibration_summary").exists()
    assert not steps.calibration_staging(demo_folder).exists()
    ranks = runfolder.read_table(runfolder.path_of(demo_folder, "calibration"))
    assert len(ranks) == 100 * len(doc["ranks"])
    assert folder.record["calibration"]["verdict"] == "calibrated"


class _StopAt:
    """Stops (as Ctrl-C would) when it reaches replicate ``stop``; counts the fits it made."""

    def __init__(self, stop: int | None) -> None:
        self.stop, self.fits = stop, 0

    def __call__(self, plan, counts, seed):
        if self.stop is not None and self.fits == self.stop:
            raise KeyboardInterrupt
        self.fits += 1
        return calibration.default_fitter(plan, counts, seed)


def _small_folder(tmp_path):
    table = pd.DataFrame({"group": [f"s{i}" for i in range(8)],
                          "successes": [1, 2, 0, 3, 2, 1, 4, 2],
                          "trials": [6, 8, 5, 9, 7, 6, 10, 8]})
    out = tmp_path / "small-run"
    api.fit(table, seed=2, checks=False, out=out)
    return out


@pytest.mark.slow  # seven exact fits: 2 s on an idle machine, three minutes at load 10
def test_a_stopped_calibration_resumes_with_the_same_replicates(tmp_path):
    out = _small_folder(tmp_path)
    stopper = _StopAt(2)
    with pytest.raises(steps.CalibrationInterrupted) as stop:
        steps.calibrate_folder(out, simulations=3, workers=1, fitter=stopper, groups=2)
    assert stop.value.done == 2
    staging = steps.calibration_staging(out)
    lines = staging.read_text().splitlines()
    assert len(lines) == 2 and all(json.loads(x)["result"]["index"] in (0, 1) for x in lines)
    # a torn last line (a write killed half-way) is ignored
    with staging.open("a") as fh:
        fh.write('{"plan": "x", "res')
    resumed = _StopAt(None)
    _, result = steps.calibrate_folder(out, simulations=3, workers=1, fitter=resumed, groups=2)
    assert resumed.fits == 1  # only replicate 2 was left
    assert not staging.exists()
    fresh_dir = tmp_path / "fresh"
    fresh_dir.mkdir()
    again = _small_folder(fresh_dir)
    _, fresh = steps.calibrate_folder(again, simulations=3, workers=1, groups=2)
    pd.testing.assert_frame_equal(result.ranks, fresh.ranks)


def test_other_models_are_refused_in_one_line():
    from workbench.models import ParameterError

    with pytest.raises(ParameterError, match="beta-binomial prior only"):
        calibration.make_plan("no-pooling", {}, ["a"], [3])
    counts = GroupCounts(["a"], [1], [3])
    assert counts.n_groups == 1
