"""Risk adjustment: adjusted rates, observed/expected ratios and their funnel.

For a fit with trial-level covariates (see ``models._casemix``) the posterior holds, per
draw and group, the group's own-mix rate (theta), its adjusted rate (its rate for the
population's case mix) and its expected successes (those of the population-average group on
this group's cases: the sum of predicted probabilities, indirect standardisation). From them:

- ``observed_expected`` = O / E with E the posterior mean of expected; its interval is the
  exact Poisson interval of O (chi-square form, common practice for standardised ratios)
  divided by E;
- the funnel: O/E against E with control limits around 1 from O ~ Poisson(E) (the exact
  Poisson limits in chi-square form, 95% and 99.8%, common practice for institutional
  comparisons);
- rank and flags on the adjusted rate: :func:`adjusted_draws` hands the ranking step the
  adjusted rates in place of theta.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
from scipy import stats

from ..models import theta_draws
from .funnel import FUNNEL_CURVE_POINTS, FUNNEL_LEVELS

ADJUSTED = "adjusted_rate"


def has_case_mix(idata) -> bool:
    return ADJUSTED in idata.posterior


def _draws(idata, name: str) -> np.ndarray:
    values = idata.posterior[name].transpose("chain", "draw", "group").values
    return values.reshape(-1, values.shape[-1])


def adjusted_draws(idata, draws):
    """The GroupDraws the ranking reads: adjusted rates where the fit adjusts for case mix."""
    if not has_case_mix(idata):
        return draws
    adjusted = _draws(idata, ADJUSTED)
    return dataclasses.replace(draws, theta=adjusted, posterior_mean=adjusted.mean(axis=0),
                               closed=None, known_prob_above={})


def poisson_interval(observed, level: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact (Garwood) interval of a Poisson mean given an observed count."""
    o = np.asarray(observed, dtype=float)
    a = 1 - level
    lower = np.where(o > 0, stats.chi2.ppf(a / 2, 2 * np.maximum(o, 1e-300)) / 2, 0.0)
    upper = stats.chi2.ppf(1 - a / 2, 2 * o + 2) / 2
    return lower, upper


def oe_limits(expected, mass: float) -> tuple[np.ndarray, np.ndarray]:
    """Control limits of O/E at expected E, from O ~ Poisson(E) (continuous chi-square form)."""
    e = np.asarray(expected, dtype=float)
    a = 1 - mass
    with np.errstate(divide="ignore", invalid="ignore"):
        lower = np.where(e > 0, stats.chi2.ppf(a / 2, 2 * e) / (2 * e), np.nan)
        upper = np.where(e > 0, stats.chi2.ppf(1 - a / 2, 2 * e + 2) / (2 * e), np.nan)
    return lower, upper


def observed_expected(observed, expected, level: float) -> pd.DataFrame:
    """O, E, O/E and its interval (exact Poisson interval of O over E)."""
    o = np.asarray(observed, dtype=float)
    e = np.asarray(expected, dtype=float)
    lo, hi = poisson_interval(o, level)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(e > 0, o / e, np.nan)
        return pd.DataFrame({"observed": o, "expected": e, "observed_expected": ratio,
                             "oe_lower": np.where(e > 0, lo / e, np.nan),
                             "oe_upper": np.where(e > 0, hi / e, np.nan)})


def case_mix_tables(idata, level: float = 0.95) -> dict[str, pd.DataFrame]:
    """The adjusted-rates table (one row per group) and the O/E funnel curve, or {} without
    case mix."""
    if not has_case_mix(idata):
        return {}
    names = idata.posterior["group"].values.astype(str)
    y = idata.observed_data["successes"].values
    n = idata.constant_data["trials"].values
    q = [(1 - level) / 2, 0.5, (1 + level) / 2]
    adjusted = _draws(idata, ADJUSTED)
    expected = _draws(idata, "expected")
    own = theta_draws(idata)
    alo, amed, ahi = np.quantile(adjusted, q, axis=0)
    e = expected.mean(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        observed_rate = np.where(n > 0, y / np.maximum(n, 1), np.nan)
        # the model's ratio: the group's own-mix successes over the expected, per draw
        model_ratio = np.where(n > 0, own * n / np.where(expected > 0, expected, np.nan), np.nan)
    rlo, rmed, rhi = np.quantile(model_ratio, q, axis=0)
    oe = observed_expected(y, e, level)
    table = pd.DataFrame({
        "group": names, "successes": y, "trials": n, "observed_rate": observed_rate,
        "own_mix_rate_mean": own.mean(axis=0),
        "adjusted_mean": adjusted.mean(axis=0), "adjusted_median": amed,
        "adjusted_lower": alo, "adjusted_upper": ahi,
        "expected": e, "expected_rate": np.where(n > 0, e / np.maximum(n, 1), np.nan),
        "observed_expected": oe["observed_expected"].to_numpy(),
        "oe_lower": oe["oe_lower"].to_numpy(), "oe_upper": oe["oe_upper"].to_numpy(),
        "model_ratio_median": rmed, "model_ratio_lower": rlo, "model_ratio_upper": rhi,
    })
    for label, mass in FUNNEL_LEVELS.items():
        lo, hi = oe_limits(e, mass)
        ratio = table["observed_expected"].to_numpy()
        side = np.where(ratio > hi, "high", np.where(ratio < lo, "low", ""))
        table[f"oe_outside_{label}"] = np.where(n > 0, side, "")
    seen = e[e > 0]
    low = float(seen.min()) * 0.8 if len(seen) else 0.5
    top = float(seen.max()) * 1.2 if len(seen) else 1.0
    grid = np.geomspace(low, max(top, low * 1.01), FUNNEL_CURVE_POINTS)
    curve = {"expected": grid}
    for label, mass in FUNNEL_LEVELS.items():
        curve[f"lower_{label}"], curve[f"upper_{label}"] = oe_limits(grid, mass)
    return {"adjusted_rates": table, "oe_funnel_curve": pd.DataFrame(curve)}


def adjusted_ranking_columns(table: pd.DataFrame, ranks: pd.DataFrame) -> pd.DataFrame:
    """The adjusted-rates table with the rank interval of the adjusted rate beside each group."""
    keep = [c for c in ("group", "rank_median", "rank_lower", "rank_upper") if c in ranks]
    return table.merge(ranks[keep], on="group", how="left") if len(keep) > 1 else table
