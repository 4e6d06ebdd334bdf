"""Successes in future trials, per group and for a new, unseen group (posterior predictive).

For each posterior draw of a group's rate, y ~ Binomial(M, theta): the spread of y mixes what
is not known about the rate with the chance in M new trials. A new group draws its rate from
``theta_new`` (the population's predictive rate). The predicted mean is exact, M times the
posterior mean of the rate; the central interval is read from the simulated counts (the
smallest count whose cumulative share reaches each tail probability).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..io import atomic as _io
from .ranking import NEW_GROUP_LABEL, check_fraction, check_whole, update_record

PREDICTIONS_FILE = "predictions.csv"
#: draws x groups cells simulated at once
CHUNK_CELLS = 2_000_000
COLUMNS = [
    "group",
    "future_trials",
    "predicted_mean",
    "lower",
    "upper",
    "predicted_rate_mean",
    "is_new_group",
]


@dataclass
class Prediction:
    """predictions.csv and what run.json records about it."""

    table: pd.DataFrame
    record: dict
    final: bool = True


def predictions_table(
    theta: np.ndarray,
    theta_new: np.ndarray,
    names: np.ndarray,
    posterior_mean: np.ndarray,
    *,
    trials: int,
    level: float = 0.95,
    seed: int = 0,
    chunk_cells: int = CHUNK_CELLS,
) -> pd.DataFrame:
    """One row per group plus the new group: successes in ``trials`` future trials.

    ``theta`` is (draws, groups), ``theta_new`` (draws,). Simulated in chunks of groups, so
    memory stays bounded; the same seed gives the same table.
    """
    trials = check_whole(trials, "trials")
    level = check_fraction(level, "level", "0.95")
    rng = np.random.default_rng(seed)
    s, g = theta.shape
    probs = [(1 - level) / 2, (1 + level) / 2]
    lower = np.empty(g + 1)
    upper = np.empty(g + 1)
    step = max(1, chunk_cells // max(s, 1))
    for start in range(0, g, step):
        sl = slice(start, min(start + step, g))
        y = rng.binomial(trials, theta[:, sl])
        lower[sl], upper[sl] = np.quantile(y, probs, axis=0, method="inverted_cdf")
    y_new = rng.binomial(trials, np.asarray(theta_new, dtype=float).ravel())
    lower[g], upper[g] = np.quantile(y_new, probs, method="inverted_cdf")
    rate = np.append(np.asarray(posterior_mean, dtype=float), float(np.mean(theta_new)))
    return pd.DataFrame(
        {
            "group": np.append(np.asarray(names).astype(str), NEW_GROUP_LABEL),
            "future_trials": trials,
            "predicted_mean": trials * rate,
            "lower": lower.astype(np.int64),
            "upper": upper.astype(np.int64),
            "predicted_rate_mean": rate,
            "is_new_group": np.append(np.zeros(g, dtype=bool), True),
        },
        columns=COLUMNS,
    )


def _predict(idata, posterior_mean, *, trials, level, seed) -> Prediction:
    post = idata.posterior
    th = post["theta"].transpose("chain", "draw", "group").values
    theta = th.reshape(-1, th.shape[-1])
    table = predictions_table(
        theta,
        post["theta_new"].values.ravel(),
        post["group"].values,
        posterior_mean,
        trials=trials,
        level=level,
        seed=seed,
    )
    record = {
        "future_trials": int(table["future_trials"].iloc[0]),
        "level": float(level),
        "seed": int(seed),
        "groups": int(len(table) - 1),
        "draws": int(theta.shape[0]),
        "method": "y ~ Binomial(future_trials, theta draw); the new group uses theta_new",
    }
    return Prediction(table, record)


def predict_run(run, *, trials, level=None, seed=None) -> Prediction:
    """Predictions for a fitted :class:`workbench.api.Run` (also stored in ``run.tables``)."""
    level = run.settings["level"] if level is None else level
    level = check_fraction(level, "level", "0.95")
    seed = _seed(seed, run.settings.get("seed"))
    pred = _predict(
        run.idata, run.estimates["posterior_mean"].to_numpy(), trials=trials, level=level, seed=seed
    )
    run.tables["predictions"] = pred.table
    return pred


def _seed(seed, recorded) -> int:
    if seed is not None:
        return check_whole(seed, "seed", minimum=0)
    # repeatable by default: one past the run's own seed
    return int(recorded) + 1 if recorded is not None else 1


def predict_folder(path, *, trials, level=None, seed=None) -> Prediction:
    """Write predictions.csv into a run folder and record the settings in run.json.

    ``level`` defaults to the run's level; ``seed`` to one past the run's recorded seed.
    """
    from ..api import open_run

    trials = check_whole(trials, "trials")
    folder = open_run(path)
    level = folder.record.get("settings", {}).get("level", 0.95) if level is None else level
    level = check_fraction(level, "level", "0.95")
    seed = _seed(seed, folder.record.get("random_seed"))
    names = folder.idata.posterior["group"].values.astype(str)
    est = folder.estimates.set_index(folder.estimates["group"].astype(str))
    pred = _predict(
        folder.idata,
        est.loc[names, "posterior_mean"].to_numpy(dtype=float),
        trials=trials,
        level=level,
        seed=seed,
    )
    pred.final = folder.final
    out = Path(folder.path)
    _io.write_csv(out / PREDICTIONS_FILE, pred.table)
    update_record(out, folder.record, {"prediction": pred.record})
    return pred


def format_prediction(pred: Prediction, *, rows: int = 3) -> str:
    """A summary of the predictions readable in ten seconds."""
    t = pred.table
    m = pred.record["future_trials"]
    level = pred.record["level"]
    groups = t[~t["is_new_group"]].sort_values("predicted_mean", ascending=False)
    new = t[t["is_new_group"]].iloc[0]
    lines = [
        f"predictions: successes in {m} future trials, {level:.0%} intervals,"
        f" {pred.record['groups']} groups"
    ]
    shown = groups if len(groups) <= 2 * rows else pd.concat([groups.head(rows), groups.tail(rows)])
    for r in shown.itertuples():
        lines.append(f"  {str(r.group)[:28]:<28} {r.predicted_mean:9.1f}  [{r.lower}, {r.upper}]")
    lines.append(
        f"  {NEW_GROUP_LABEL:<28} {new['predicted_mean']:9.1f}  [{new['lower']}, {new['upper']}]"
    )
    return "\n".join(lines)


__all__ = [
    "PREDICTIONS_FILE",
    "Prediction",
    "format_prediction",
    "predict_folder",
    "predict_run",
    "predictions_table",
]
