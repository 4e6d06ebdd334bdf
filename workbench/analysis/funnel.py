"""Funnel-plot data: each group's observed rate against exact binomial control limits."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import stats

#: control-limit levels, by the label used in column names
FUNNEL_LEVELS = {"95": 0.95, "998": 0.998}
FUNNEL_CURVE_POINTS = 200

if TYPE_CHECKING:
    from .draws import GroupDraws


def control_limits(trials: np.ndarray, benchmark: float) -> dict[str, np.ndarray]:
    """Exact binomial control limits as rates: ppf(alpha/2) / n and ppf(1 - alpha/2) / n."""
    n = np.asarray(trials, dtype=float)
    out = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        for label, mass in FUNNEL_LEVELS.items():
            alpha = 1 - mass
            lo = stats.binom.ppf(alpha / 2, n, benchmark) / n
            hi = stats.binom.ppf(1 - alpha / 2, n, benchmark) / n
            out[f"lower_{label}"] = np.where(n > 0, lo, np.nan)
            out[f"upper_{label}"] = np.where(n > 0, hi, np.nan)
    return out


def funnel_tables(inp: GroupDraws, benchmark: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """funnel.csv (one row per group) and funnel_curve.csv (limits on a log grid of trials)."""
    n = inp.trials
    with np.errstate(divide="ignore", invalid="ignore"):
        observed = np.where(n > 0, inp.successes / np.maximum(n, 1), np.nan)
    limits = control_limits(n, benchmark)
    table = pd.DataFrame(
        {
            "group": inp.names.astype(str),
            "successes": inp.successes,
            "trials": n,
            "observed_rate": observed,
            "benchmark": benchmark,
            **limits,
        }
    )
    for label in FUNNEL_LEVELS:
        lo, hi = limits[f"lower_{label}"], limits[f"upper_{label}"]
        side = np.where(observed > hi, "high", np.where(observed < lo, "low", ""))
        table[f"outside_{label}"] = np.where(n > 0, side, "")
    table["posterior_mean"] = inp.posterior_mean
    table["prob_above_benchmark"] = inp.prob_above(benchmark)
    top = int(max(n.max(initial=0), 1))
    grid = np.unique(np.round(np.geomspace(1, top, FUNNEL_CURVE_POINTS)).astype(np.int64))
    curve = pd.DataFrame(
        {"trials": grid, "benchmark": benchmark, **control_limits(grid, benchmark)}
    )
    return table, curve
