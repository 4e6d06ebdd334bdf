"""Successes in future trials (issue 5): posterior predictive per group and for a new group.

Data are simulated with known truth (tests/helpers.py); each check names its source.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from helpers import simulate
from scipy import stats
from workbench.models import NoPooling

from workbench import cli
from workbench.analysis import predictions as predict


@pytest.fixture(scope="module")
def no_pooling():
    counts, _ = simulate(groups=25, trials=(5, 120), seed=41)
    model = NoPooling(draws=2000, chains=2, random_seed=6).fit(counts)
    return counts, model


def _table(model, trials, level=0.9, seed=3):
    post = model.idata_.posterior
    th = post["theta"].values
    return predict.predictions_table(
        th.reshape(-1, th.shape[-1]),
        post["theta_new"].values.ravel(),
        post["group"].values,
        model.exact_.mean(),
        trials=trials,
        level=level,
        seed=seed,
    )


def test_predictions_match_beta_binomial(no_pooling):
    # reference: with a Beta(alpha, beta) posterior the predictive count in m trials is
    # Beta-binomial(m, alpha, beta) (scipy.stats.betabinom); the mean is exact, the interval
    # ends are simulated and so agree within one count
    counts, model = no_pooling
    m = 60
    table = _table(model, m)
    groups = table[~table["is_new_group"]]
    al, be = model.exact_.alpha, model.exact_.beta
    np.testing.assert_allclose(groups["predicted_mean"], m * al / (al + be), rtol=1e-12)
    np.testing.assert_allclose(groups["predicted_rate_mean"], al / (al + be), rtol=1e-12)
    lo = stats.betabinom.ppf(0.05, m, al, be)
    hi = stats.betabinom.ppf(0.95, m, al, be)
    assert np.max(np.abs(groups["lower"] - lo)) <= 1
    assert np.max(np.abs(groups["upper"] - hi)) <= 1
    assert np.mean(groups["lower"] == lo) >= 0.6


def test_new_group_is_prior_predictive_under_no_pooling(no_pooling):
    # reference: under no pooling a new group learns nothing from the others, so its count is
    # Beta-binomial(m, a, b) with the prior's a = b = 1 (scipy.stats.betabinom)
    _, model = no_pooling
    m = 40
    new = _table(model, m, level=0.8).query("is_new_group").iloc[0]
    assert new["group"] == "(new group)"
    assert new["predicted_mean"] == pytest.approx(m * 0.5, abs=4 * m * np.sqrt(1 / 12 / 4000))
    assert abs(new["lower"] - stats.betabinom.ppf(0.1, m, 1, 1)) <= 1
    assert abs(new["upper"] - stats.betabinom.ppf(0.9, m, 1, 1)) <= 1


def test_same_seed_same_table(no_pooling):
    _, model = no_pooling
    pd.testing.assert_frame_equal(_table(model, 15, seed=8), _table(model, 15, seed=8))


# -- command line, run folders from every model -------------------------------------------------

MODELS = [("no-pooling", "exact"), ("complete-pooling", "exact"), ("beta-binomial", "exact")]
#: the simulated groups differ, so one shared rate misfits them: its run is written, not final
EXPECTED_EXIT = {"no-pooling": 0, "complete-pooling": 3, "beta-binomial": 0}


@pytest.fixture(scope="module")
def data_csv(tmp_path_factory):
    counts, _ = simulate(groups=20, seed=43)
    path = tmp_path_factory.mktemp("data") / "units.csv"
    counts.to_frame().to_csv(path, index=False)
    return path


def _fit(data_csv, folder, model, engine, *extra):
    return cli.main(
        [
            "fit",
            str(data_csv),
            "--model",
            model,
            "--engine",
            engine,
            "--draws",
            "200",
            "--chains",
            "2",
            "--seed",
            "2",
            "--out",
            str(folder),
            *extra,
        ]
    )


@pytest.mark.slow
@pytest.mark.parametrize("model, engine", MODELS)
def test_cli_predict_every_model(data_csv, tmp_path, capsys, model, engine):
    folder = tmp_path / "run"
    assert _fit(data_csv, folder, model, engine) == EXPECTED_EXIT[model]
    code = cli.main(["predict", str(folder), "--trials", "50", "--level", "0.8"])
    assert code == EXPECTED_EXIT[model]  # a step on a folder that is not final is not final
    out = capsys.readouterr().out
    assert "(new group)" in out and "predictions.csv" in out
    table = pd.read_csv(folder / "predictions.csv")
    assert list(table.columns) == predict.COLUMNS
    assert len(table) == 21 and table["is_new_group"].sum() == 1
    assert (table["future_trials"] == 50).all()
    assert (
        (0 <= table["lower"]) & (table["lower"] <= table["upper"]) & (table["upper"] <= 50)
    ).all()
    est = pd.read_csv(folder / "estimates.csv")
    np.testing.assert_allclose(table["predicted_mean"].iloc[:-1], 50 * est["posterior_mean"])
    record = json.loads((folder / "run.json").read_text())
    assert record["prediction"]["future_trials"] == 50 and "predictions.csv" in record["files"]


@pytest.mark.parametrize(
    "argv, match",
    [
        (["predict", "{folder}", "--trials", "ten"], "--trials ten"),
        (["predict", "{folder}", "--trials", "0"], "--trials 0"),
        (["predict", "{folder}", "--trials", "5", "--level", "95"], "--level 95"),
        (["predict", "{missing}", "--trials", "5"], "is not a run folder"),
    ],
)
def test_cli_predict_bad_input_one_error_line(data_csv, tmp_path, capsys, argv, match):
    folder = tmp_path / "run"
    if "{folder}" in argv:
        assert _fit(data_csv, folder, "no-pooling", "exact") == 0
        capsys.readouterr()
    argv = [a.format(folder=folder, missing=tmp_path / "nowhere") for a in argv]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and match in err[0]
    assert not (folder / "predictions.csv").exists()


@pytest.mark.slow
def test_cli_predict_mcmc_folder(data_csv, tmp_path):
    folder = tmp_path / "run"
    code = _fit(data_csv, folder, "beta-binomial", "mcmc")
    import json as _json

    _final = _json.loads((folder / "run.json").read_text())["final"]
    assert code == (0 if _final else 3)  # the exit code follows the recorded verdict
    assert cli.main(["predict", str(folder), "--trials", "30"]) == code
    table = pd.read_csv(folder / "predictions.csv")
    assert table["is_new_group"].sum() == 1 and len(table) == 21
