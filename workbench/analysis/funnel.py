"""Funnel-plot data: each group's observed rate against exact binomial control limits.

funnel.csv holds the exact limits at each group's trials (``binom.ppf``, which flag the
groups). funnel_curve.csv holds the same limits as smooth curves for the plot: the binomial
CDF P(X <= r) = I_{1-p}(n - r, r + 1) (the regularised incomplete Beta function) is smooth
in r and n, so solving it for a real r_c at each real n gives limits without the steps of
the integer quantile. The lower curve is r_c(a/2) / n and the upper (r_c(1 - a/2) + 1) / n:
since ppf - 1 < r_c <= ppf, a group lies below the lower curve exactly when it is flagged
low and on or above the upper curve exactly when it is flagged high, at any trials.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import special, stats

#: control-limit levels, by the label used in column names
FUNNEL_LEVELS = {"95": 0.95, "998": 0.998}
FUNNEL_CURVE_POINTS = 200
#: the curve runs past the largest group by this factor, so the plot's band spans its axis
FUNNEL_CURVE_REACH = 1.25

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


def continuous_quantile(trials: np.ndarray, benchmark: float, prob: float) -> np.ndarray:
    """The real r in (-1, n) with I_{1-p}(n - r, r + 1) = prob: the binomial quantile made
    smooth in n (it equals ppf where ppf is hit exactly, and ppf - 1 < r <= ppf always)."""
    n = np.asarray(trials, dtype=float)
    lo = np.full(n.shape, -1.0)
    hi = n.copy()
    for _ in range(60):  # bisection: the CDF rises from 0 at r = -1 to 1 at r = n
        mid = (lo + hi) / 2
        below = special.betainc(np.maximum(n - mid, 1e-300), mid + 1, 1 - benchmark) < prob
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return hi


def smooth_limits(trials: np.ndarray, benchmark: float) -> dict[str, np.ndarray]:
    """The control limits as smooth curves of (real) trials; see the module's note."""
    n = np.asarray(trials, dtype=float)
    out = {}
    for label, mass in FUNNEL_LEVELS.items():
        alpha = 1 - mass
        low = continuous_quantile(n, benchmark, alpha / 2) / n
        high = (continuous_quantile(n, benchmark, 1 - alpha / 2) + 1) / n
        out[f"lower_{label}"] = np.clip(low, 0.0, 1.0)
        out[f"upper_{label}"] = np.clip(high, 0.0, 1.0)
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
    top = float(max(n.max(initial=0), 1)) * FUNNEL_CURVE_REACH
    grid = np.geomspace(1.0, top, FUNNEL_CURVE_POINTS)
    curve = pd.DataFrame(
        {"trials": grid, "benchmark": benchmark, **smooth_limits(grid, benchmark)}
    )
    return table, curve
