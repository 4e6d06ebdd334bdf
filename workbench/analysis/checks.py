"""Posterior predictive checks, leave-one-group-out PSIS-LOO and LOO-PIT for one fitted run.

Three questions, one table each:

1. *Can the model reproduce the data it was fitted to?* Replicated successes
   ``y_rep_j ~ Binomial(trials_j, theta_j)`` for every group, one replicate per posterior draw
   (thinned evenly to at most ``CheckSettings.draws`` draws, computed in chunks of groups so no
   draws x groups array of the whole data is held), and, for the population statistics, a
   *new* group's successes with the same trials and a fresh rate from the fitted population.
   Five test statistics (``STATISTICS``) are computed on the observed and on every replicated
   data set, and each gets a posterior predictive p-value (Gelman, Meng & Stern 1996). Each
   group counts once in every statistic, however few its trials: three compare each group
   with its own predictive (a standardised dispersion and two tail-area shares), so a 3/3
   group among groups of hundreds cannot trip them the way the largest observed rate could.

   Reading of the p-value: ``p_value`` is the *mid-p* upper tail
   ``P(T_rep > T_obs) + 0.5 P(T_rep = T_obs)``. Near 0: the data show more of the statistic
   than the model replicates; near 1: less; 0.5: the data sit in the middle. The half weight on
   ties keeps discrete statistics (the count of groups without successes is often 0 in every
   replicate) at 0.5 instead of 1. Both tails count. The misfit rule has a nominal level
   ``lower + (1 - upper)`` (defaults 0.01 and 0.99: 0.02) for the checks *as a whole*: each of
   the K statistics computed reads ``misfit`` when ``p_value < lower / K`` or
   ``p_value > 1 - (1 - upper) / K`` (Bonferroni), else ``consistent``. Measured on 200 data
   sets simulated from the fitted model (tests/workbench/analysis/test_misfit_calibration.py):
   0% (beta-binomial) and 1% (complete pooling) flagged; complete pooling on over-dispersed
   data 100% flagged, the beta-binomial on a two-cluster mixture of rates 99%.
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
from .draws import tied_runs
from .loo import (
    _THETA_EPS,
    GroupLoo,
    _new_group_replicates,
    column_chunks,
    leave_one_group_out,
    pit_uniformity,
    thinned_draws,
)
from .settings import CONSISTENT, MISFIT, NOT_COMPUTED, CheckSettings
from .settings import seed_of as _seed

#: Test statistics: name -> what it measures. Each group counts once, whatever its trials, so
#: no statistic is dominated by the groups with a handful of trials: the first three compare
#: each group with its *own* predictive distribution (a new group with the same trials, drawn
#: from the fitted population), the last two use the group's own rate.
STATISTICS: dict[str, str] = {
    "dispersion": "mean over groups of z_j^2, z_j = (y_j - E_j) / S_j with E_j, S_j the mean and"
    " sd of a new group's successes in trials_j under the fitted population (from the"
    " replicates other than the one compared; S_j = 1 where they are all equal)",
    "tail_share": "share of groups outside the central 95% of their own predictive"
    " (mid-p tail area below 0.025 or above 0.975, against the other replicates)",
    "central_share": "share of groups inside the central 50% of their own predictive"
    " (mid-p tail area between 0.25 and 0.75, against the other replicates)",
    "zero_success_groups": "number of groups with trials > 0 and no successes",
    "chi_square": "sum_j (y_j - n_j theta_j)^2 / (n_j theta_j (1 - theta_j)), same theta draw"
    " for observed and replicated",
}

#: Bounds of the tail-area statistics: outer 95% and central 50% of each group's predictive.
TAIL = 0.025
CENTRAL = (0.25, 0.75)


# -- posterior predictive replicates -------------------------------------------------------


def _mid_tail_areas(y_obs: np.ndarray, y_rep: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mid-p tail areas, per draw, of each observed count and of each replicate.

    ``y_rep`` is (groups, draws) of whole numbers; the reference of group j is its row. At
    draw d both the observed count and the replicate d are compared with the row's *other*
    replicates: ``P(Y < y) + 0.5 P(Y = y)`` over those s - 1 values. The same reference for
    both keeps them exchangeable when the data come from the model (comparing the observed
    count with all s values but a replicate with s - 1 biases their difference by about 1 / s,
    which a million groups turn into a false misfit). Both are (groups, draws); the
    replicates' are read from the row sorted (a run of equal values at sorted positions
    first..last has first values below it and last - first others equal to it).
    """
    g, s = y_rep.shape
    column = y_obs[:, None]
    below, equal = y_rep < column, y_rep == column
    others = max(s - 1, 1)
    observed = ((below.sum(axis=1, keepdims=True) - below)
                + 0.5 * (equal.sum(axis=1, keepdims=True) - equal)) / others
    order = np.argsort(y_rep, axis=1)
    first, last = tied_runs(np.take_along_axis(y_rep, order, axis=1))
    replicated = np.empty((g, s))
    np.put_along_axis(replicated, order, (first + 0.5 * (last - first)) / others, axis=1)
    return observed, replicated


def _standardised_squares(y_obs: np.ndarray, y_rep: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """z^2 per draw of each observed count and each replicate, (groups, draws).

    At draw d both are standardised by the mean and sd (ddof 0) of the row's other s - 1
    replicates, for the reason :func:`_mid_tail_areas` gives. Where those are all equal there
    is no spread to divide by: z is then the plain difference (at least 1 for whole numbers
    that differ). Leave-one-out moments come from the row's centred sums.
    """
    g, s = y_rep.shape
    others = max(s - 1, 1)
    mean = y_rep.mean(axis=1, keepdims=True)
    dev = y_rep - mean
    total = (dev**2).sum(axis=1, keepdims=True)
    centre = mean - dev / others
    var = np.maximum((total - dev**2) / others - (dev / others) ** 2, 0.0)
    # the others are all equal: the row is constant, or it holds two values and replicate d
    # is the only one with its value (exact, from counts, not from a rounded variance)
    low = y_rep.min(axis=1, keepdims=True)
    high = y_rep.max(axis=1, keepdims=True)
    at_low, at_high = y_rep == low, y_rep == high
    n_low = at_low.sum(axis=1, keepdims=True)
    n_high = at_high.sum(axis=1, keepdims=True)
    two_valued = (low < high) & (n_low + n_high == s)
    flat = (low == high) | (two_valued & ((at_low & (n_low == 1)) | (at_high & (n_high == 1))))
    spread = np.where(flat, 1.0, np.sqrt(var))
    return ((y_obs[:, None] - centre) / spread) ** 2, ((y_rep - centre) / spread) ** 2


def replicate_statistics(
    idata, settings: CheckSettings, rng: np.random.Generator
) -> tuple[pd.DataFrame, dict[str, float]]:
    """Observed and replicated test statistics, one row per (statistic, draw).

    Returns the long table (columns ``statistic, draw, observed, replicated``; ``draw`` is the
    position of the posterior draw used, chains stacked: ``chain * draws_per_chain + draw``)
    and the observed values (for ``chi_square`` and the three statistics against a new group's
    replicates, which are realised at each draw, their mean over the draws).

    Two kinds of replicate: ``y_rep_j ~ Binomial(n_j, theta_j)`` with the group's own rate
    (``zero_success_groups``, ``chi_square``), and a new group's successes in ``n_j`` trials
    with a fresh rate from the fitted population (``dispersion``, ``tail_share``,
    ``central_share``), which asks whether the population the model describes could have
    produced these groups. No pooling describes no population, so those three are not
    computed for it.
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
    zeros = np.zeros(s)
    chi_rep = np.zeros(s)
    chi_obs = np.zeros(s)
    # per draw, observed and replicated: dispersion, tail_share, central_share (sums)
    sums = {name: (np.zeros(s), np.zeros(s)) for name in ("dispersion", "tail_share",
                                                          "central_share")}
    # no pooling claims no population: its groups are checked against their own rates only;
    # a replicate's reference is the other replicates, so there must be at least two others
    population = attr(idata, "model") != "no-pooling" and s >= 3
    for cols in column_chunks(np.arange(m), s, settings.chunk_cells):
        th = theta[np.ix_(draws, seen[cols])]
        n = n_all[cols]
        y = y_all[cols]
        y_rep = rng.binomial(data.trials[seen[cols]][None, :], th).astype(float)
        zeros += (y_rep == 0).sum(axis=1)
        t = np.clip(th, _THETA_EPS, 1 - _THETA_EPS)
        expected = n * t
        scale = expected * (1 - t)
        chi_rep += ((y_rep - expected) ** 2 / scale).sum(axis=1)
        chi_obs += ((y - expected) ** 2 / scale).sum(axis=1)
        fresh = _new_group_replicates(idata, seen[cols], draws, rng) if population else None
        if fresh is None:
            population = False
            continue
        for k, z2 in enumerate(_standardised_squares(y, fresh)):
            sums["dispersion"][k][:] += z2.sum(axis=0)
        for k, p in enumerate(_mid_tail_areas(y, fresh)):
            sums["tail_share"][k][:] += ((p < TAIL) | (p > 1 - TAIL)).sum(axis=0)
            sums["central_share"][k][:] += ((p >= CENTRAL[0]) & (p <= CENTRAL[1])).sum(axis=0)
    per_draw_observed = {"chi_square": chi_obs}
    replicated = {"zero_success_groups": zeros, "chi_square": chi_rep}
    if population:
        for name, (obs, rep) in sums.items():
            per_draw_observed[name] = obs / m
            replicated[name] = rep / m
    observed = {name: float(value.mean()) for name, value in per_draw_observed.items()}
    observed["zero_success_groups"] = float(np.sum(y_all == 0))
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


def statistic_bounds(settings: CheckSettings, computed: int) -> tuple[float, float]:
    """The p-value bounds each statistic is held to: the family's bounds split over them.

    The checks as a whole should read ``misfit`` on data from the model itself at most
    ``lower + (1 - upper)`` of the time (the nominal level); with several statistics each is
    held to its share of it (Bonferroni): ``lower / K`` and ``1 - (1 - upper) / K``.
    """
    k = max(int(computed), 1)
    return settings.lower / k, 1 - (1 - settings.upper) / k


def predictive_pvalues(
    replicates: pd.DataFrame, observed: dict[str, float], settings: CheckSettings
) -> pd.DataFrame:
    """One row per statistic: observed, replicated summary, p-values and verdict."""
    rows = []
    computed = sum(1 for name in STATISTICS if name in observed)
    low, high = statistic_bounds(settings, computed)
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
        extreme = p < low or p > high
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
    def bounds(self) -> tuple[float, float]:
        """The p-value bounds each statistic is held to (the family's, split over them)."""
        computed = int((self.statistics["verdict"] != NOT_COMPUTED).sum())
        return statistic_bounds(self.settings, computed)

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
            "nominal_level": self.settings.lower + (1 - self.settings.upper),
            "statistic_bounds": list(self.bounds),
            "p_value_reading": (
                "p_value is the mid-p P(T_rep > T_obs) + 0.5 P(T_rep = T_obs) over replicated"
                f" data sets; a statistic reads misfit when below {self.bounds[0]:.4g} (the data"
                f" show more of it than the model replicates) or above {self.bounds[1]:.4g}"
                f" (less): the bounds {self.settings.lower:g} and {self.settings.upper:g} split"
                " over the statistics computed, so data from the model read misfit at most"
                f" {self.settings.lower + 1 - self.settings.upper:.3g} of the time."
                " p_at_least is the classical P(T_rep >= T_obs)."
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
