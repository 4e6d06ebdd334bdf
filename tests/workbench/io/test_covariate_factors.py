"""Text covariates become indicators against a reference level; effects as odds ratios."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

from workbench.models import DataError, ParameterError

from workbench.analysis.effects import effects_table
from workbench.io.inputs import load_groups
from workbench.options import FitSettings


def _table():
    return pd.DataFrame({
        "group": ["a", "b", "c", "d", "e"],
        "successes": [3, 4, 5, 6, 7],
        "trials": [10, 40, 30, 20, 12],
        "channel": ["web", "phone", "phone", "post", "web"],
        "load": ["1.5", "2", "0.5", "3", "1"],
    })


def test_text_column_becomes_indicators_against_the_level_with_most_trials():
    loaded = load_groups(_table(), covariates=["channel", "load"])
    x = loaded.counts.covariates
    # phone has 70 trials, web 22, post 20: phone is the reference
    assert list(x.columns) == ["channel=post", "channel=web", "load"]
    assert x["channel=post"].tolist() == [0, 0, 0, 1, 0]
    assert x["channel=web"].tolist() == [1, 0, 0, 0, 1]
    assert x["load"].tolist() == [1.5, 2.0, 0.5, 3.0, 1.0]
    coding = loaded.reconciliation["covariate_coding"]
    assert coding["channel"]["reference"] == "phone"
    assert coding["channel"]["reference_from"] == "the level with the most trials"
    assert coding["load"] == {"kind": "numeric"}
    assert loaded.reconciliation["case_mix"] == "group-level"


def test_named_reference_level_and_its_errors():
    loaded = load_groups(_table(), covariates=["channel"], reference_level=["channel=web"])
    assert list(loaded.counts.covariates.columns) == ["channel=phone", "channel=post"]
    assert loaded.reconciliation["covariate_coding"]["channel"]["reference_from"] == "given"
    with pytest.raises(DataError, match=r"'fax' is not a level of 'channel'.*\['phone', 'post'"):
        load_groups(_table(), covariates=["channel"], reference_level=["channel=fax"])
    with pytest.raises(DataError, match="write COLUMN=LEVEL"):
        load_groups(_table(), covariates=["channel"], reference_level=["channel"])
    with pytest.raises(ParameterError, match="'region' is not among the covariates"):
        FitSettings.from_options(covariates=["channel"], reference_level=["region=north"])
    # a number given a reference level reads every value as a level
    loaded = load_groups(_table(), covariates=["load"], reference_level=["load=2"])
    assert loaded.reconciliation["covariate_coding"]["load"]["kind"] == "factor"


def test_mixed_and_blank_covariate_values_are_refused_by_row():
    t = _table()
    t.loc[2, "load"] = "lots"
    with pytest.raises(DataError, match=r"row 3 \(group 'c'\): covariate column 'load' has"
                                        r" 'lots' where its other values are numbers"):
        load_groups(t, covariates=["load"])
    t = _table()
    t.loc[1, "channel"] = " "
    with pytest.raises(DataError, match=r"row 2 .*covariate column 'channel' is blank"):
        load_groups(t, covariates=["channel"])
    t = _table().assign(channel="web")
    with pytest.raises(DataError, match="one level"):
        load_groups(t, covariates=["channel"])


def test_trial_rows_with_a_varying_factor_are_summed_by_group_and_pattern():
    rng = np.random.default_rng(0)
    rows = pd.DataFrame({"group": rng.choice(["g1", "g2", "g3"], 5000),
                         "band": rng.choice(["low", "mid", "high"], 5000),
                         "ok": rng.random(5000) < 0.3})
    loaded = load_groups(rows, outcome="ok", covariates=["band"], reference_level=["band=high"])
    cells = loaded.counts.cells
    assert cells.n_cells == 9 and cells.trials.sum() == 5000
    # each cell's counts are the rows of that group and level (pandas crosstab)
    want = pd.crosstab(rows["group"], rows["band"])
    names = loaded.counts.names
    got = {}
    for g, n, x_low, x_mid in zip(cells.group, cells.trials, cells.x["band=low"],
                                  cells.x["band=mid"], strict=True):
        level = "low" if x_low else "mid" if x_mid else "high"
        got[(names[g], level)] = n
    assert got == {(g, b): want.loc[g, b] for g in want.index for b in want.columns}
    assert loaded.reconciliation["trial_level_covariates"] == ["band"]


def test_effects_table_odds_ratios_per_unit_per_sd_and_per_level():
    rng = np.random.default_rng(1)
    per_sd = {"beta_load": rng.normal(0.5, 0.1, (2, 400)),
              "beta_channel_web": rng.normal(-0.3, 0.05, (2, 400))}
    idata = az.from_dict(posterior=per_sd)
    idata.posterior.attrs["covariates"] = json.dumps(
        {"columns": ["load", "channel=web"], "center": [1.0, 0.4], "scale": [2.0, 0.5]})
    idata.posterior.attrs["covariate_effects"] = json.dumps(["beta_load", "beta_channel_web"])
    coding = {"load": {"kind": "numeric"},
              "channel": {"kind": "factor", "reference": "phone", "levels": ["web"],
                          "indicators": ["channel=web"]}}
    table = effects_table(idata, coding, level=0.9).set_index("term")
    load = per_sd["beta_load"].ravel()
    assert table.loc["load", "odds_ratio_median"] == pytest.approx(np.exp(np.median(load / 2)))
    assert table.loc["load", "odds_ratio_per_sd_lower"] == pytest.approx(
        np.exp(np.quantile(load, 0.05)))
    web = per_sd["beta_channel_web"].ravel() / 0.5
    row = table.loc["channel"]
    assert (row["level"], row["reference"], row["kind"]) == ("web", "phone", "factor")
    assert row["odds_ratio_upper"] == pytest.approx(np.exp(np.quantile(web, 0.95)))
    assert np.isnan(row["odds_ratio_per_sd_median"])
    assert row["prob_positive"] == pytest.approx((web > 0).mean())
