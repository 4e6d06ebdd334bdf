"""Posterior predictive checks, leave-one-group-out PSIS-LOO and LOO-PIT for one fitted run.

Three questions, one table each:

1. *Can the model reproduce the data it was fitted to?* Replicated successes
   ``y_rep_j ~ Binomial(trials_j, theta_j)`` for every group, one replicate per posterior draw
   (thinned evenly to at most ``CheckSettings.draws`` draws, computed in chunks of groups so no
   draws x groups array of the whole data is held). Five test statistics (``STATISTICS``) are
   computed on the observed and on every replicated data set, and each gets a posterior
   predictive p-value (Gelman, Meng & Stern 1996).

   Reading of the p-value: ``p_value`` is the *mid-p* upper tail
   ``P(T_rep > T_obs) + 0.5 P(T_rep = T_obs)``. Near 0: the data show more of the statistic
   than the model replicates; near 1: less; 0.5: the data sit in the middle. The half weight on
   ties keeps discrete statistics (the count of groups without successes is often 0 in every
   replicate) at 0.5 instead of 1. Both tails count: the verdict is ``misfit`` when
   ``p_value < lower`` or ``p_value > upper`` (defaults 0.01 and 0.99), else ``consistent``.
   The classical ``P(T_rep >= T_obs)`` is kept as ``p_at_least``; ``p_two_sided`` is
   ``min(1, 2 min(p, 1 - p))``. The chi-square discrepancy depends on theta, so its observed
   value is recomputed with the same draw as each replicate (a realised discrepancy).

2. *How well does the model predict a group it has not seen?* PSIS-LOO (ArviZ ``az.loo``;
   Vehtari, Gelman & Gabry 2017) over whole groups. With one aggregated row per group, leaving
   out a row leaves out a group, so the log-likelihood used is the group-integrated
   ``y_group`` (theta_j integrated out given the hyperparameters), never the conditional ``y``,
   whose importance ratios are mostly unusable (Pareto k > 0.7). Groups whose Pareto k exceeds
   ``min(1 - 1/log10(S), 0.7)`` (S = posterior draws) are named. Where the model allows it
   cheaply, their value is replaced by the exact leave-one-group-out predictive:

   - no pooling: the prior predictive Beta-binomial(trials_j, a, b); the left-out group
     learns nothing from the others, every draw gives the same ``y_group``, importance
     sampling is exact and its Pareto k is undefined (ArviZ reports inf; here blank);
   - complete pooling: Beta-binomial(trials_j, a + sum of the other successes,
     b + sum of the other failures);
   - beta-binomial, exact engine: the hyper-posterior grid is fitted again without the group
     (``models._grid.fit_grid``) and ``p(y_j | y_-j) = sum_p w_p BetaBinomial(y_j | n_j, mu_p,
     kappa_p)`` over the new grid's weights;
   - beta-binomial with the MCMC engine, logit-normal: no refit; such groups are named as
     unresolved.

   At most ``refit_limit`` high-k groups (worst k first) get exact values; 0 keeps PSIS
   throughout (but no pooling's constant ratios, whose PSIS value is already exact).

   The table says which value (``psis`` or ``exact``) each group uses.

3. *Are those held-out predictions calibrated?* LOO-PIT: ``P(y_new < y_j)`` and
   ``P(y_new <= y_j)`` under the leave-one-group-out predictive, from ``az.loo_pit`` with PSIS
   weights of ``y_group`` and a new-group replicate ``y_new`` drawn to match it (a fresh rate from
   the population for the beta-binomial model, ``expit(alpha + x_j beta + sigma z)`` with a fresh
   z for the logit-normal model, the prior for no pooling, the shared rate for complete
   pooling), on the same thinned draws as the replicates (PSIS weights recomputed on
   them), or exactly for the groups given exact values above. Counts are discrete, so the
   value reported is the randomised PIT ``lower + U (upper - lower)``, U ~ Uniform(0, 1) with a
   recorded seed (Czado, Gneiting & Held 2009); calibrated predictions give uniform values. Their
   uniformity is summarised by a Kolmogorov-Smirnov test (``scipy.stats.kstest``), a rough reading
   because LOO-PIT values are not exactly independent.

Groups with zero trials carry no data: they are left out of every statistic and of the LOO sums.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from ..models import attr, counts_of, theta_draws
from .loo import (
    _THETA_EPS,
    GroupLoo,
    column_chunks,
    leave_one_group_out,
    pit_uniformity,
    thinned_draws,
)
from .settings import CONSISTENT, MISFIT, NOT_COMPUTED, CheckSettings
from .settings import seed_of as _seed

#: Test statistics: name -> what it measures.
STATISTICS: dict[str, str] = {
    "sd_rate": "between-group sd of the observed rates (groups with trials > 0)",
    "max_rate": "largest observed rate",
    "min_rate": "smallest observed rate",
    "zero_success_groups": "number of groups with trials > 0 and no successes",
    "chi_square": "sum_j (y_j - n_j theta_j)^2 / (n_j theta_j (1 - theta_j)), same theta draw"
    " for observed and replicated",
}


# -- posterior predictive replicates -------------------------------------------------------


def replicate_statistics(
    idata, settings: CheckSettings, rng: np.random.Generator
) -> tuple[pd.DataFrame, dict[str, float]]:
    """Observed and replicated test statistics, one row per (statistic, draw).

    Returns the long table (columns ``statistic, draw, observed, replicated``; ``draw`` is the
    position of the posterior draw used, chains stacked: ``chain * draws_per_chain + draw``)
    and the observed values (for ``chi_square`` the mean realised value over the draws).
    """
    data = counts_of(idata)
    seen = np.flatnonzero(data.trials > 0)
    m = len(seen)
    theta = theta_draws(idata)
    draws = thinned_draws(theta.shape[0], settings.draws)
    s = len(draws)
    if m == 0:
        return pd.DataFrame(columns=["statistic", "draw", "observed", "replicated"]), {}
    y_all = data.successes[seen].astype(float)
    n_all = data.trials[seen].astype(float)
    rate_obs = y_all / n_all
    centre = float(rate_obs.mean())  # shift for a numerically stable running variance
    total = np.zeros(s)
    total_sq = np.zeros(s)
    top = np.full(s, -np.inf)
    bottom = np.full(s, np.inf)
    zeros = np.zeros(s)
    chi_rep = np.zeros(s)
    chi_obs = np.zeros(s)
    for cols in column_chunks(np.arange(m), s, settings.chunk_cells):
        th = theta[np.ix_(draws, seen[cols])]
        n = n_all[cols]
        y = y_all[cols]
        y_rep = rng.binomial(data.trials[seen[cols]][None, :], th).astype(float)
        rate = y_rep / n
        total += (rate - centre).sum(axis=1)
        total_sq += ((rate - centre) ** 2).sum(axis=1)
        top = np.maximum(top, rate.max(axis=1))
        bottom = np.minimum(bottom, rate.min(axis=1))
        zeros += (y_rep == 0).sum(axis=1)
        t = np.clip(th, _THETA_EPS, 1 - _THETA_EPS)
        expected = n * t
        scale = expected * (1 - t)
        chi_rep += ((y_rep - expected) ** 2 / scale).sum(axis=1)
        chi_obs += ((y - expected) ** 2 / scale).sum(axis=1)
    observed = {
        "max_rate": float(rate_obs.max()),
        "min_rate": float(rate_obs.min()),
        "zero_success_groups": float(np.sum(y_all == 0)),
        "chi_square": float(chi_obs.mean()),
    }
    replicated = {
        "max_rate": top,
        "min_rate": bottom,
        "zero_success_groups": zeros,
        "chi_square": chi_rep,
    }
    per_draw_observed = {"chi_square": chi_obs}
    if m >= 2:
        observed["sd_rate"] = float(np.std(rate_obs, ddof=1))
        var = (total_sq - total**2 / m) / (m - 1)
        replicated["sd_rate"] = np.sqrt(np.maximum(var, 0.0))
    frames = []
    for name in STATISTICS:
        if name not in replicated:
            continue
        obs = per_draw_observed.get(name, np.full(s, observed[name]))
        frames.append(
            pd.DataFrame(
                {"statistic": name, "draw": draws, "observed": obs, "replicated": replicated[name]}
            )
        )
    return pd.concat(frames, ignore_index=True), observed


def predictive_pvalues(
    replicates: pd.DataFrame, observed: dict[str, float], settings: CheckSettings
) -> pd.DataFrame:
    """One row per statistic: observed, replicated summary, p-values and verdict."""
    rows = []
    for name, what in STATISTICS.items():
        part = replicates[replicates["statistic"] == name]
        if part.empty:
            rows.append({"statistic": name, "description": what, "verdict": NOT_COMPUTED})
            continue
        rep = part["replicated"].to_numpy()
        obs = part["observed"].to_numpy()
        above = float(np.mean(rep > obs))
        tie = float(np.mean(rep == obs))
        p = above + 0.5 * tie
        extreme = p < settings.lower or p > settings.upper
        lo, hi = np.quantile(rep, [0.05, 0.95])
        rows.append(
            {
                "statistic": name,
                "description": what,
                "observed": observed[name],
                "replicated_mean": float(rep.mean()),
                "replicated_sd": float(rep.std()),
                "replicated_lower": float(lo),
                "replicated_upper": float(hi),
                "p_value": p,
                "p_at_least": above + tie,
                "p_two_sided": min(1.0, 2 * min(p, 1 - p)),
                "p_mcse": float(np.sqrt(max(p * (1 - p), 0.0) / len(rep))),
                "replicates": int(len(rep)),
                "verdict": MISFIT if extreme else CONSISTENT,
            }
        )
    columns = [
        "statistic", "description", "observed", "replicated_mean", "replicated_sd",
        "replicated_lower", "replicated_upper", "p_value", "p_at_least", "p_two_sided",
        "p_mcse", "replicates", "verdict",
    ]
    return pd.DataFrame(rows).reindex(columns=columns)


# -- all checks of one run -------------------------------------------------------------------


@dataclass
class Checks:
    """Posterior predictive checks, leave-one-group-out predictive and LOO-PIT of one run."""

    statistics: pd.DataFrame
    replicates: pd.DataFrame
    loo: GroupLoo
    calibration: dict
    settings: CheckSettings
    info: dict

    @property
    def verdict(self) -> str:
        """``misfit`` when any test statistic is extreme, else ``consistent``."""
        return MISFIT if (self.statistics["verdict"] == MISFIT).any() else CONSISTENT

    @property
    def groups(self) -> pd.DataFrame:
        """Per-group table (group_checks.csv)."""
        return self.loo.table

    def to_dict(self) -> dict:
        """The content of checks.json."""
        stats_rows = self.statistics.replace({np.nan: None}).to_dict(orient="records")
        misfits = self.statistics.loc[self.statistics["verdict"] == MISFIT, "statistic"].tolist()
        return {
            "workbench_checks": 1,
            **self.info,
            "verdict": self.verdict,
            "misfit_statistics": misfits,
            "settings": asdict(self.settings),
            "p_value_reading": (
                "p_value is the mid-p P(T_rep > T_obs) + 0.5 P(T_rep = T_obs) over replicated"
                f" data sets; misfit when below {self.settings.lower:g} (the data show more of"
                f" the statistic than the model replicates) or above {self.settings.upper:g}"
                " (less). p_at_least is the classical P(T_rep >= T_obs)."
            ),
            "statistics": stats_rows,
            "loo": self.loo.to_dict(),
            "loo_pit": self.calibration,
                    }


def check_posterior(idata, settings: CheckSettings | None = None) -> Checks:
    """Run every check on a posterior (an ``InferenceData`` in the project's currency)."""
    settings = (settings or CheckSettings()).validate()
    seed = _seed(idata, settings)
    rng = np.random.default_rng(seed)
    replicates, observed = replicate_statistics(idata, settings, rng)
    table = predictive_pvalues(replicates, observed, settings)
    loo = leave_one_group_out(idata, settings, rng)
    calibration = pit_uniformity(loo.table, settings) if loo.available else {
        "verdict": NOT_COMPUTED, "note": "leave-one-group-out predictive not available"}
    info = {
        "model": attr(idata, "model"),
        "engine": attr(idata, "engine"),
        "data_fingerprint": attr(idata, "data_fingerprint"),
        "groups": int(idata.posterior.sizes["group"]),
        "groups_with_trials": int((idata.constant_data["trials"].values > 0).sum()),
        "replicated_draws": int(replicates["draw"].nunique()) if len(replicates) else 0,
        "seed": seed,
    }
    return Checks(table, replicates, loo, calibration, settings, info)
