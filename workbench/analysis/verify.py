"""Agreement of two posteriors of one model: the ``--verify`` self-check, as a table.

Posterior means are compared in units of the Monte Carlo standard error of the sampled side
(of both sides, combined, for two independent MCMC runs); interval ends as differences. A
share of at least 99% of groups within 4 MCSE reads "agree" (common practice: |z| > 4 is
about 6e-5 likely for one group under agreement).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from ..models import theta_draws

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

AGREE_SHARE = 0.99
AGREE_Z = 4.0


def theta_mcse(idata) -> np.ndarray:
    """Monte Carlo standard error of each group's posterior mean (ArviZ)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return az.mcse(idata.posterior[["theta"]], method="mean")["theta"].values


def draw_summary(idata, level: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean and central interval of each group's draws."""
    draws = theta_draws(idata)
    lower, upper = np.quantile(draws, [(1 - level) / 2, (1 + level) / 2], axis=0)
    return draws.mean(axis=0), lower, upper


def agreement(what: str, reference: pd.DataFrame, mean, lower, upper, mcse
              ) -> tuple[pd.DataFrame, dict]:
    """The verification table (verification.csv) and its summary (run.json "verification")."""
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (np.asarray(mean) - reference["posterior_mean"].to_numpy()) / mcse
    z = np.where(np.isfinite(z), z, 0.0)
    table = pd.DataFrame(
        {
            "group": reference["group"].to_numpy(),
            "mean_reference": reference["posterior_mean"].to_numpy(),
            "mean_sampled": mean,
            "mcse": mcse,
            "z": z,
            "lower_difference": lower - reference["lower"].to_numpy(),
            "upper_difference": upper - reference["upper"].to_numpy(),
        }
    )
    within = float(np.mean(np.abs(z) <= AGREE_Z))
    doc = {
        "what": what,
        "groups": int(len(table)),
        "share_within_4_mcse": within,
        "max_abs_z": float(np.max(np.abs(z))),
        "max_abs_interval_difference": float(
            np.max(np.abs(table[["lower_difference", "upper_difference"]].to_numpy()))
        ),
        "agree": within >= AGREE_SHARE,
    }
    return table, doc
