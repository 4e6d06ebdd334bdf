"""The nested model: groups within parents; data checks and recovery of a known truth."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import special, stats
from workbench.models import GroupCounts, Nested, ParameterError


def test_parent_column_checks(tmp_path):
    from workbench.models import DataError

    from workbench.io.inputs import load_groups

    path = tmp_path / "d.csv"
    path.write_text("shop,ok,n,area\na,1,5,N\nb,2,5,S\na,1,5,N\n")
    loaded = load_groups(path, group="shop", successes="ok", trials="n", parent="area")
    assert loaded.counts.parents.tolist() == ["N", "S"]
    path.write_text("shop,ok,n,area\na,1,5,N\nb,2,5,S\na,1,5,S\n")
    with pytest.raises(DataError, match=r"row 3 .*group 'a'.*'area' is 'S' but an earlier row"):
        load_groups(path, group="shop", successes="ok", trials="n", parent="area")
    path.write_text("shop,ok,n,area\na,1,5,N\nb,2,5,\n")
    with pytest.raises(DataError, match=r"row 2 .*column 'area' is blank"):
        load_groups(path, group="shop", successes="ok", trials="n", parent="area")


def test_nested_needs_parents_and_parents_need_nested(tmp_path):
    from workbench import api
    from workbench.io.inputs import load_groups

    counts = GroupCounts(["a", "b"], [1, 2], [5, 5])
    with pytest.raises(ParameterError, match="needs each group's parent"):
        Nested().fit(counts)
    path = tmp_path / "d.csv"
    path.write_text("group,successes,trials,area\na,1,5,N\nb,2,5,S\n")
    loaded = load_groups(path, parent="area")
    with pytest.raises(ParameterError, match="a parent column is used only by nested"):
        api.fit(loaded, model="beta-binomial")
    with pytest.raises(ParameterError, match="needs each group's parent"):
        api.fit(load_groups(path), model="nested")


@pytest.mark.slow
def test_nested_recovers_parent_effects(tmp_path):
    # simulation with known truth: 6 parents with clearly different log-odds, 10 groups each;
    # the 95% intervals of tau, sigma and most parent effects cover the values drawn
    rng = np.random.default_rng(8)
    parents = np.repeat([f"area-{k}" for k in range(6)], 10)
    effect = np.array([-0.8, -0.4, 0.0, 0.2, 0.5, 0.9])
    alpha, sigma = -1.2, 0.3
    eta = alpha + np.repeat(effect, 10) + sigma * rng.normal(size=60)
    n = rng.integers(20, 400, size=60)
    y = rng.binomial(n, special.expit(eta))
    counts = GroupCounts([f"g{i}" for i in range(60)], y, n, parents=parents)
    m = Nested(random_seed=4, progress=False).fit(counts)
    assert int(m.idata_.sample_stats["diverging"].sum()) == 0
    pop = m.population().set_index("parameter")
    assert pop.loc["sigma", "lower"] <= sigma <= pop.loc["sigma", "upper"]
    tau_hat = np.std(effect)
    assert pop.loc["tau", "lower"] <= tau_hat <= pop.loc["tau", "upper"] * 1.5
    table = m.parent_summary().set_index("parent")
    # the identified quantity: each parent's typical rate, expit(alpha + u_parent)
    truth = special.expit(alpha + effect)
    covered = (table["typical_rate_lower"].to_numpy() <= truth) & (
        truth <= table["typical_rate_upper"].to_numpy()
    )
    assert covered.sum() >= 5
    # the parents come out in nearly their true order (neighbours 0.2 apart may swap)
    assert stats.spearmanr(table["effect_mean"].to_numpy(), effect).statistic >= 0.8


@pytest.mark.slow
def test_nested_through_the_cli(tmp_path, demo_csv):
    from workbench.cli import main

    out = tmp_path / "nested"
    code = main(["fit", str(demo_csv), "--group", "branch", "--successes", "signups",
                 "--trials", "visitors", "--model", "nested", "--parent", "region",
                 "--seed", "1", "--out", str(out)])
    assert code == (0 if json.loads((out / "run.json").read_text())["final"] else 3)
    assert (out / "parents.csv").exists()
    record = json.loads((out / "run.json").read_text())
    assert record["settings"]["parent"] == "region"
    checks = json.loads((out / "checks.json").read_text())
    assert checks["loo"]["elpd_loo"] is not None
