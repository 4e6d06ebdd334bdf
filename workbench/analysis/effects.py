"""Covariate effects on the scale users read: odds ratios with intervals, one row per term.

The model works with standardised covariates (beta per sd). A numeric column's row gives the
odds ratio per unit of the column (exp(beta / sd)) and per sd (exp(beta)); a factor's rows,
one per level other than the reference, give the odds ratio of that level against the
reference (its 0/1 indicator's effect per unit). Intervals are central posterior intervals
of the draws, so an odds ratio's interval is exp of the log-odds interval.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..models import attr

COLUMNS = [
    "term", "level", "reference", "kind", "column_sd",
    "log_odds_mean", "log_odds_lower", "log_odds_upper",
    "odds_ratio_mean", "odds_ratio_median", "odds_ratio_lower", "odds_ratio_upper",
    "odds_ratio_per_sd_median", "odds_ratio_per_sd_lower", "odds_ratio_per_sd_upper",
    "prob_positive",
]


def _source_of(column: str, coding: dict) -> tuple[str, str, str, str]:
    """(term, level, reference, kind) of one model column."""
    for term, record in coding.items():
        if record.get("kind") == "factor" and column in record.get("indicators", []):
            level = record["levels"][record["indicators"].index(column)]
            return term, level, record["reference"], "factor"
    return column, "", "", "numeric"


def effects_table(idata, coding: dict | None, level: float = 0.95) -> pd.DataFrame | None:
    """The effects table (odds ratios), or None when the fit has no covariates.

    ``coding`` is the input's record of how each covariate was coded (run.json's
    ``input.covariate_coding``); without it every column reads as numeric.
    """
    info = attr(idata, "covariates") or {}
    names = attr(idata, "covariate_effects") or []
    if not names:
        return None
    post = idata.posterior
    q = [(1 - level) / 2, 0.5, (1 + level) / 2]
    rows = []
    for name, column, scale in zip(names, info["columns"], info["scale"], strict=True):
        per_sd = post[name].values.ravel()
        unit = per_sd / float(scale)
        term, lev, ref, kind = _source_of(column, coding or {})
        lo, med, hi = np.quantile(unit, q)
        sd_lo, sd_med, sd_hi = np.exp(np.quantile(per_sd, q))
        numeric = kind == "numeric"
        rows.append({
            "term": term, "level": lev, "reference": ref, "kind": kind,
            "column_sd": float(scale),
            "log_odds_mean": float(unit.mean()), "log_odds_lower": float(lo),
            "log_odds_upper": float(hi),
            "odds_ratio_mean": float(np.exp(unit).mean()), "odds_ratio_median": float(np.exp(med)),
            "odds_ratio_lower": float(np.exp(lo)), "odds_ratio_upper": float(np.exp(hi)),
            "odds_ratio_per_sd_median": float(sd_med) if numeric else np.nan,
            "odds_ratio_per_sd_lower": float(sd_lo) if numeric else np.nan,
            "odds_ratio_per_sd_upper": float(sd_hi) if numeric else np.nan,
            "prob_positive": float((unit > 0).mean()),
        })
    return pd.DataFrame(rows, columns=COLUMNS)
