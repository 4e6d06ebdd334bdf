"""Successes in future trials, per group and for a new, unseen group (posterior predictive).

For each posterior draw of a group's rate, y ~ Binomial(M, theta): the spread of y mixes what
is not known about the rate with the chance in M new trials. A new group draws its rate from
``theta_new`` (the population's predictive rate). The predicted mean is exact, M times the
posterior mean of the rate; the central interval is read from the simulated counts (the
smallest count whose cumulative share reaches each tail probability).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..io.runfolder import NEW_GROUP_LABEL
from ..models import theta_draws

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
    keys: np.ndarray | None = None,
) -> pd.DataFrame:
    """One row per group plus the new group: successes in ``trials`` future trials.

    ``theta`` is (draws, groups), ``theta_new`` (draws,). ``keys`` (one integer per group)
    marks groups whose posteriors are the same by construction (the same successes, trials
    and covariates): their draws are pooled and they get one interval, so identical data
    never read as different predictions. Simulated in chunks of groups, so memory stays
    bounded; the same seed gives the same table.
    """
    rng = np.random.default_rng(seed)
    s, g = theta.shape
    probs = [(1 - level) / 2, (1 + level) / 2]
    lower = np.empty(g + 1)
    upper = np.empty(g + 1)
    codes = np.arange(g) if keys is None else np.asarray(keys)
    uniq, first, inverse, sizes = np.unique(
        codes, return_index=True, return_inverse=True, return_counts=True)
    inverse = inverse.ravel()
    by_key = np.argsort(inverse, kind="stable")  # the members of each key side by side
    ends = np.cumsum(sizes)
    starts = ends - sizes
    step = max(1, chunk_cells // max(s, 1))
    k = 0
    while k < len(uniq):  # whole keys per chunk, about ``step`` groups each
        stop = int(np.searchsorted(ends, ends[k] - sizes[k] + step, side="right"))
        stop = max(stop, k + 1)
        cols = by_key[starts[k] : ends[stop - 1]]
        y = rng.binomial(trials, theta[:, cols])
        lo, hi = np.quantile(y, probs, axis=0, method="inverted_cdf")
        at = 0
        for key in range(k, stop):
            n = sizes[key]
            members = cols[at : at + n]
            if n > 1:  # one interval from the pooled draws of every member
                lo[at : at + n], hi[at : at + n] = np.quantile(
                    y[:, at : at + n].ravel(), probs, method="inverted_cdf")
            lower[members], upper[members] = lo[at : at + n], hi[at : at + n]
            at += n
        k = stop
    y_new = rng.binomial(trials, np.asarray(theta_new, dtype=float).ravel())
    lower[g], upper[g] = np.quantile(y_new, probs, method="inverted_cdf")
    rate = np.append(np.asarray(posterior_mean, dtype=float), float(np.mean(theta_new)))
    if keys is not None:  # identical data: one predicted mean too (the pooled posterior mean)
        pooled = np.bincount(inverse, weights=rate[:g]) / sizes
        rate[:g] = pooled[inverse]
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


def identical_data_keys(idata) -> np.ndarray:
    """One integer per group; equal for groups with the same successes, trials, covariates
    and parent, whose posteriors are therefore the same."""
    const = idata.constant_data
    parts = {
        "successes": idata.observed_data["successes"].values,
        "trials": const["trials"].values,
    }
    if "covariates" in const:
        x = np.asarray(const["covariates"].values, dtype=float).reshape(len(parts["trials"]), -1)
        for j in range(x.shape[1]):
            parts[f"x{j}"] = x[:, j]
    if "parent" in const:
        parts["parent"] = const["parent"].values.astype(str)
    return pd.DataFrame(parts).groupby(list(parts), sort=False).ngroup().to_numpy()


def predict(idata, posterior_mean, *, trials: int, level: float, seed: int) -> Prediction:
    """Successes in ``trials`` future trials per group and for a new group (checked options)."""
    post = idata.posterior
    theta = theta_draws(idata)
    table = predictions_table(
        theta,
        post["theta_new"].values.ravel(),
        post["group"].values,
        posterior_mean,
        trials=trials,
        level=level,
        seed=seed,
        keys=identical_data_keys(idata),
    )
    record = {
        "future_trials": int(table["future_trials"].iloc[0]),
        "level": float(level),
        "seed": int(seed),
        "groups": int(len(table) - 1),
        "draws": int(theta.shape[0]),
        "method": "y ~ Binomial(future_trials, theta draw); the new group uses theta_new;"
        " groups with the same successes, trials (and covariates, parent) share one interval"
        " from their pooled draws",
    }
    return Prediction(table, record)


def default_seed(recorded: int | None) -> int:
    """Repeatable by default: one past the run's own seed (1 when none was recorded)."""
    return int(recorded) + 1 if recorded is not None else 1
