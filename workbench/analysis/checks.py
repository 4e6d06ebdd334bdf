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

import json
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from scipy import special, stats

from ..models import ParameterError, attr, counts_of, log_likelihood_arrays
from ..models._grid import HyperPrior, fit_grid
from ..models._posterior import logit_means

from ..io import atomic as _io

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

CHECKS_FILE = "checks.json"
REPLICATES_FILE = "ppc_statistics.csv"
GROUP_CHECKS_FILE = "group_checks.csv"

CONSISTENT = "consistent"
MISFIT = "misfit"
NOT_COMPUTED = "not computed"

#: Test statistics: name -> what it measures.
STATISTICS: dict[str, str] = {
    "sd_rate": "between-group sd of the observed rates (groups with trials > 0)",
    "max_rate": "largest observed rate",
    "min_rate": "smallest observed rate",
    "zero_success_groups": "number of groups with trials > 0 and no successes",
    "chi_square": "sum_j (y_j - n_j theta_j)^2 / (n_j theta_j (1 - theta_j)), same theta draw"
    " for observed and replicated",
}

#: Columns of group_checks.csv, in order.
GROUP_COLUMNS = [
    "group",
    "successes",
    "trials",
    "elpd_loo",
    "loo_method",
    "elpd_psis",
    "elpd_exact",
    "pareto_k",
    "high_k",
    "p_loo",
    "loo_pit",
    "loo_pit_lower",
    "loo_pit_upper",
]

#: Models whose ``y_group`` integrates the group's own rate out (complete pooling has none).
INTEGRATED_MODELS = (
    "beta-binomial",
    "no-pooling",
    "complete-pooling",
    "logit-normal",
    "nested",
)

#: Fewest posterior draws for which PSIS-LOO is attempted.
MIN_LOO_DRAWS = 50
_THETA_EPS = 1e-12


@dataclass(frozen=True)
class CheckSettings:
    """How the checks run.

    Parameters
    ----------
    draws : int, default=1000
        Posterior draws used for replicated data sets, thinned evenly (at most this many).
    lower, upper : float, default=0.01, 0.99
        A posterior predictive p-value below ``lower`` or above ``upper`` reads ``misfit``;
        ``lower`` is also the level below which the LOO-PIT uniformity test reads
        ``miscalibrated``.
    refit_limit : int, default=50
        Most high-Pareto-k groups given their exact leave-one-group-out value (worst k first).
    chunk_cells : int, default=2_000_000
        Largest draws x groups block computed at once.
    seed : int or None, default=None
        Seed of the replicates and of the PIT randomisation; None derives it from the run's seed.
    """

    draws: int = 1000
    lower: float = 0.01
    upper: float = 0.99
    refit_limit: int = 50
    chunk_cells: int = 2_000_000
    seed: int | None = None

    def validate(self) -> CheckSettings:
        """Return self, or raise ParameterError naming the bad setting and the fix."""
        if not isinstance(self.draws, int | np.integer) or self.draws < 1:
            raise ParameterError(f"check draws={self.draws!r} must be a whole number >= 1.")
        if not (0 < self.lower < 0.5 < self.upper < 1):
            raise ParameterError(
                f"check bounds lower={self.lower!r}, upper={self.upper!r} need"
                " 0 < lower < 0.5 < upper < 1; the usual pair is 0.01 0.99."
            )
        if not isinstance(self.refit_limit, int | np.integer) or self.refit_limit < 0:
            raise ParameterError(f"refit_limit={self.refit_limit!r} must be a whole number >= 0.")
        if not isinstance(self.chunk_cells, int | np.integer) or self.chunk_cells < 1:
            raise ParameterError(f"chunk_cells={self.chunk_cells!r} must be a whole number >= 1.")
        if self.seed is not None and (not isinstance(self.seed, int | np.integer) or self.seed < 0):
            raise ParameterError(f"check seed={self.seed!r} must be an integer >= 0.")
        return self


# -- posterior predictive replicates -------------------------------------------------------


def _flat_theta(idata) -> np.ndarray:
    """theta as (samples, groups), chains stacked; a view where the layout allows."""
    th = idata.posterior["theta"].transpose("chain", "draw", "group").values
    return th.reshape(-1, th.shape[-1])


def thinned_draws(total: int, most: int) -> np.ndarray:
    """At most ``most`` evenly spaced positions among ``total`` stacked draws."""
    if total <= most:
        return np.arange(total)
    return np.unique(np.linspace(0, total - 1, most).round().astype(int))


def _column_chunks(columns: np.ndarray, rows: int, cells: int):
    step = max(1, cells // max(rows, 1))
    for s in range(0, len(columns), step):
        yield columns[s : s + step]


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
    theta = _flat_theta(idata)
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
    for cols in _column_chunks(np.arange(m), s, settings.chunk_cells):
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


# -- leave one group out ---------------------------------------------------------------------


@dataclass
class GroupLoo:
    """Leave-one-group-out PSIS-LOO of one posterior, per group and in total."""

    table: pd.DataFrame
    elpd_loo: float
    se: float
    p_loo: float
    draws: int
    good_k: float
    groups: int
    notes: list[str] = field(default_factory=list)
    available: bool = True

    @property
    def high_k(self) -> list[str]:
        """Groups whose Pareto k is above ``good_k``."""
        return self.table.loc[self.table["high_k"], "group"].tolist()

    @property
    def unresolved(self) -> list[str]:
        """High-k groups still using the PSIS value (no exact refit was made)."""
        t = self.table
        return t.loc[t["high_k"] & (t["loo_method"] == "psis"), "group"].tolist()

    def to_dict(self) -> dict:
        t = self.table
        refitted = t.loc[t["loo_method"] == "exact"]
        return {
            "available": self.available,
            "likelihood": "y_group (group-integrated: theta_j integrated out given the"
            " hyperparameters; leaves out a whole group)",
            "elpd_loo": self.elpd_loo,
            "se": self.se,
            "p_loo": self.p_loo,
            "draws": self.draws,
            "groups": self.groups,
            "good_k": self.good_k,
            "max_pareto_k": _finite_max(t["pareto_k"]) if len(t) else None,
            "high_k_groups": [
                {"group": r.group, "pareto_k": _num(r.pareto_k), "loo_method": r.loo_method}
                for r in t.loc[t["high_k"]].itertuples()
            ],
            "exact_groups": int(len(refitted)),
            "unresolved_groups": self.unresolved,
            "notes": self.notes,
        }


def _num(x) -> float | None:
    x = float(x)
    return x if np.isfinite(x) else None


def _finite_max(values: pd.Series) -> float | None:
    v = values.to_numpy(dtype=float)
    v = v[np.isfinite(v)]
    return float(v.max()) if len(v) else None


def good_k_threshold(draws: int) -> float:
    """Pareto k above which PSIS is unreliable: min(1 - 1/log10(S), 0.7) (Vehtari et al. 2024)."""
    return float(min(1 - 1 / np.log10(draws), 0.7))


def _relative_efficiency(idata) -> float:
    """ESS / S for PSIS: 1 for independent draws; otherwise ArviZ's mean-ESS reading."""
    post = idata.posterior
    if bool(attr(idata, "independent_draws", 0)) or post.sizes["chain"] == 1:
        return 1.0
    samples = post.sizes["chain"] * post.sizes["draw"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # constant quantities give NaN ESS, skipped below
        ess = az.ess(post, method="mean")
    values = np.hstack([ess[v].values.ravel() for v in ess.data_vars])
    values = values[np.isfinite(values)]
    return float(values.mean() / samples) if len(values) else 1.0


def _subset(idata, cols: np.ndarray):
    """A small InferenceData holding only the groups ``cols`` (no deep copy of the rest)."""
    post = idata.posterior
    keep = {v: post[v] for v in post.data_vars if "group" not in post[v].dims}
    keep["theta"] = post["theta"].isel(group=cols)
    return az.InferenceData(
        posterior=xr.Dataset(keep, attrs=post.attrs),
        observed_data=idata.observed_data.isel(group=cols),
        constant_data=idata.constant_data.isel(group=cols),
    )


def _group_loglik(idata, cols: np.ndarray) -> np.ndarray:
    """``y_group`` for the groups ``cols`` as (len(cols), samples)."""
    if "log_likelihood" in idata.groups() and "y_group" in idata.log_likelihood:
        ll = idata.log_likelihood["y_group"].transpose("chain", "draw", "group").values
        ll = ll.reshape(-1, ll.shape[-1])[:, cols]
    else:
        ll = log_likelihood_arrays(_subset(idata, cols))["y_group"]
        ll = ll.reshape(-1, ll.shape[-1])
    return np.ascontiguousarray(ll.T)


def _new_group_replicates(
    idata, cols: np.ndarray, draws: np.ndarray, rng: np.random.Generator
) -> np.ndarray | None:
    """Successes of a *new* group with each group's trials: (len(cols), len(draws)).

    The replicate that matches ``y_group``: drawn from what the model says about a group it
    has not seen, given each posterior draw (positions ``draws``, chains stacked).
    """
    model = attr(idata, "model")
    post = idata.posterior
    n = idata.constant_data["trials"].values[cols]
    if model == "beta-binomial":
        mu = post["mu"].transpose("chain", "draw").values.ravel()[draws, None]
        kappa = post["kappa"].transpose("chain", "draw").values.ravel()[draws, None]
        rate = rng.beta(mu * kappa, (1 - mu) * kappa, size=(len(draws), len(cols)))
    elif model == "no-pooling":
        prior = attr(idata, "priors")
        rate = rng.beta(prior["a"], prior["b"], size=(len(draws), len(cols)))
    elif model == "complete-pooling":
        rate = _flat_theta(idata)[np.ix_(draws, cols)]
    elif model in ("logit-normal", "nested"):
        m = logit_means(_subset(idata, cols))
        m = m.reshape(-1, len(cols))[draws]
        sigma = post["sigma"].transpose("chain", "draw").values.ravel()[draws, None]
        rate = special.expit(m + sigma * rng.standard_normal(size=m.shape))
    else:
        return None
    return rng.binomial(n[None, :], rate).T.astype(float)


def exact_leave_one_out(idata, positions: np.ndarray) -> pd.DataFrame | None:
    """The exact leave-one-group-out predictive of the groups at ``positions``, where cheap.

    Columns: ``position, elpd_exact`` (log p(y_j | y_-j)), ``cdf_below`` (P(y_new < y_j)) and
    ``cdf_at`` (P(y_new <= y_j)). None when the model has no cheap exact answer (MCMC fits,
    or a beta-binomial fit of a single group, which leaves nothing to refit).
    """
    data = counts_of(idata)
    model = attr(idata, "model")
    engine = attr(idata, "engine")
    positions = np.asarray(positions, dtype=int)
    y = data.successes[positions].astype(float)
    n = data.trials[positions].astype(float)
    if model in ("no-pooling", "complete-pooling"):
        prior = attr(idata, "priors")
        a = np.full(len(positions), float(prior["a"]))
        b = np.full(len(positions), float(prior["b"]))
        if model == "complete-pooling":
            a = a + data.successes.sum() - y
            b = b + (data.trials - data.successes).sum() - (n - y)
        logp = _log_beta_binomial(y, n, a, b)
        one = np.ones(1)
        below = np.array([_mixture_cdf(yi - 1, ni, ai, bi, one)
                          for yi, ni, ai, bi in zip(y, n, a, b, strict=True)])
        at = np.array([_mixture_cdf(yi, ni, ai, bi, one)
                       for yi, ni, ai, bi in zip(y, n, a, b, strict=True)])
    elif model == "beta-binomial" and engine == "exact" and data.n_groups > 1:
        prior = HyperPrior(**{k: float(attr(idata, "priors")[k]) for k in
                              ("mu_a", "mu_b", "kappa_median", "kappa_log_sd")})
        logp = np.empty(len(positions))
        below = np.empty(len(positions))
        at = np.empty(len(positions))
        for i, j in enumerate(positions):
            rest = np.ones(data.n_groups, dtype=bool)
            rest[j] = False
            grid = fit_grid(data.successes[rest], data.trials[rest], prior)
            mu, kappa, w = grid.points()
            a, b = mu * kappa, (1 - mu) * kappa
            logp[i] = special.logsumexp(np.log(w) + _log_beta_binomial(y[i], n[i], a, b))
            below[i] = _mixture_cdf(y[i] - 1, n[i], a, b, w)
            at[i] = _mixture_cdf(y[i], n[i], a, b, w)
    else:
        return None
    return pd.DataFrame(
        {"position": positions, "elpd_exact": logp, "cdf_below": below, "cdf_at": at}
    )


def _mixture_cdf(y: float, n: float, a, b, w: np.ndarray, cells: int = 2_000_000) -> float:
    """sum_p w_p P(Y_p <= y) with Y_p ~ Beta-binomial(n, a_p, b_p), summing the shorter tail."""
    if y < 0:
        return 0.0
    if y >= n:
        return 1.0
    a = np.atleast_1d(np.asarray(a, dtype=float))
    b = np.atleast_1d(np.asarray(b, dtype=float))
    lower_tail = y + 1 <= n - y
    ks = np.arange(0, y + 1) if lower_tail else np.arange(y + 1, n + 1)
    step = max(1, cells // len(a))
    mass = 0.0
    for s in range(0, len(ks), step):
        k = ks[s : s + step, None].astype(float)
        mass += float(np.exp(_log_beta_binomial(k, n, a[None, :], b[None, :])).sum(axis=0) @ w)
    return min(1.0, mass) if lower_tail else max(0.0, 1.0 - mass)


def _log_beta_binomial(y, n, a, b):
    log_choose = special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)
    return log_choose + special.betaln(y + a, n - y + b) - special.betaln(a, b)


def leave_one_group_out(
    idata, settings: CheckSettings | None = None, rng: np.random.Generator | None = None
) -> GroupLoo:
    """PSIS-LOO over groups on ``y_group``, exact values for high-k groups where cheap, LOO-PIT."""
    settings = (settings or CheckSettings()).validate()
    rng = rng if rng is not None else np.random.default_rng(_seed(idata, settings))
    data = counts_of(idata)
    post = idata.posterior
    samples = int(post.sizes["chain"] * post.sizes["draw"])
    seen = np.flatnonzero(data.trials > 0)
    good_k = good_k_threshold(max(samples, 11))
    empty = pd.DataFrame(columns=GROUP_COLUMNS)
    if len(seen) == 0:
        return GroupLoo(empty, np.nan, np.nan, np.nan, samples, good_k, 0,
                        ["no group has any trials: nothing to predict."], available=False)
    if attr(idata, "model") not in INTEGRATED_MODELS:
        return GroupLoo(empty, np.nan, np.nan, np.nan, samples, good_k, len(seen),
                        [f"model {attr(idata, 'model')!r} has no group-integrated log-likelihood;"
                         " leaving one group out needs one (PSIS on the conditional one fails"
                         " for most groups)."], available=False)
    if samples < MIN_LOO_DRAWS:
        return GroupLoo(empty, np.nan, np.nan, np.nan, samples, good_k, len(seen),
                        [f"only {samples} posterior draws; PSIS-LOO needs at least"
                         f" {MIN_LOO_DRAWS}: fit with more draws."], available=False)
    reff = _relative_efficiency(idata)
    y_all = data.successes.astype(float)
    elpd_psis = np.empty(len(seen))
    pareto_k = np.empty(len(seen))
    lppd = np.empty(len(seen))
    constant = np.zeros(len(seen), dtype=bool)
    pit_below = np.full(len(seen), np.nan)
    pit_at = np.full(len(seen), np.nan)
    pit_possible = True
    pit_draws = thinned_draws(samples, settings.draws)
    for cols in _column_chunks(np.arange(len(seen)), samples, settings.chunk_cells):
        groups = seen[cols]
        ll = _group_loglik(idata, groups)  # (groups, samples)
        frame = az.InferenceData(
            log_likelihood=xr.Dataset(
                {"y_group": (("chain", "draw", "group"), ll.T.reshape(1, samples, len(groups)))}
            )
        )
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # high k is reported in the table, not as a warning
            loo = az.loo(frame, pointwise=True, reff=reff, var_name="y_group")
        elpd_psis[cols] = loo.loo_i.values
        pareto_k[cols] = loo.pareto_k.values
        lppd[cols] = special.logsumexp(ll, axis=1) - np.log(samples)
        constant[cols] = np.ptp(ll, axis=1) == 0
        y_new = _new_group_replicates(idata, groups, pit_draws, rng)
        if y_new is None:
            pit_possible = False
            continue
        y_obs = y_all[groups]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            log_w, _ = az.psislw(-ll[:, pit_draws], reff)
            pit_at[cols] = np.asarray(az.loo_pit(y=y_obs, y_hat=y_new, log_weights=log_w))
            pit_below[cols] = np.asarray(
                az.loo_pit(y=y_obs - 0.5, y_hat=y_new, log_weights=log_w)
            )
    pareto_k[constant] = np.nan  # undefined: every draw gives the same value
    high = constant | ~(pareto_k <= good_k)
    elpd_used = elpd_psis.copy()
    method = np.array(["psis"] * len(seen), dtype=object)
    exact_col = np.full(len(seen), np.nan)
    notes: list[str] = []
    model = attr(idata, "model")
    engine = attr(idata, "engine")
    # constant ratios (no pooling): the exact value is PSIS's own, so it is always used
    wanted = np.flatnonzero(high & ~constant)
    if len(wanted) > settings.refit_limit:
        order = np.argsort(-pareto_k[wanted])
        notes.append(
            f"{_groups(len(wanted))} with high Pareto k; refit_limit={settings.refit_limit}"
            f" allows exact values for the worst {settings.refit_limit} only; the rest keep"
            " their PSIS values."
        )
        wanted = wanted[order[: settings.refit_limit]]
    wanted = np.union1d(wanted, np.flatnonzero(constant))
    exact = exact_leave_one_out(idata, seen[wanted]) if len(wanted) else None
    if exact is not None:
        exact_col[wanted] = exact["elpd_exact"].to_numpy()
        elpd_used[wanted] = exact_col[wanted]
        method[wanted] = "exact"
        pit_below[wanted] = exact["cdf_below"].to_numpy()
        pit_at[wanted] = exact["cdf_at"].to_numpy()
        notes.append(_exact_note(model, len(wanted)))
    elif len(wanted):
        notes.append(
            f"{_groups(len(wanted))} with Pareto k above {good_k:.2f} and no cheap exact refit"
            f" exists for {model} ({engine}); their PSIS values may be optimistic. Refit with"
            " the group left out to check"
            + (", or use the exact engine (--engine exact)." if engine == "mcmc" else ".")
        )
    u = rng.uniform(size=len(seen))
    pit = pit_below + u * (pit_at - pit_below)
    if not pit_possible:
        notes.append(f"LOO-PIT is not available for model {model!r}.")
    table = pd.DataFrame(
        {
            "group": data.names[seen].astype(str),
            "successes": data.successes[seen],
            "trials": data.trials[seen],
            "elpd_loo": elpd_used,
            "loo_method": method,
            "elpd_psis": elpd_psis,
            "elpd_exact": exact_col,
            "pareto_k": pareto_k,
            "high_k": high & ~constant,
            "p_loo": lppd - elpd_used,
            "loo_pit": np.clip(pit, 0.0, 1.0),
            "loo_pit_lower": pit_below,
            "loo_pit_upper": pit_at,
        }
    )[GROUP_COLUMNS]
    g = len(seen)
    return GroupLoo(
        table,
        float(elpd_used.sum()),
        float(np.sqrt(g * np.var(elpd_used))),  # az.loo's formula, on the values used
        float((lppd - elpd_used).sum()),
        samples,
        good_k,
        g,
        notes,
    )


def _exact_note(model: str, count: int) -> str:
    how = {
        "no-pooling": "the prior predictive Beta-binomial (a left-out group learns nothing from"
        " the others; importance sampling is exact, Pareto k undefined)",
        "complete-pooling": "the closed-form Beta-binomial given the other groups' counts",
        "beta-binomial": "refitting the hyper-posterior grid without the group",
    }[model]
    return f"{_groups(count)}: exact leave-one-group-out value used instead of PSIS: {how}."


def _groups(count: int) -> str:
    return f"{count} group" if count == 1 else f"{count} groups"


def pit_uniformity(table: pd.DataFrame, settings: CheckSettings) -> dict:
    """Kolmogorov-Smirnov distance of the LOO-PIT values from Uniform(0, 1), and a verdict."""
    pit = table["loo_pit"].to_numpy(dtype=float)
    pit = pit[np.isfinite(pit)]
    if len(pit) < 5:
        return {"groups": int(len(pit)), "verdict": NOT_COMPUTED,
                "note": "fewer than 5 groups with LOO-PIT values"}
    test = stats.kstest(pit, "uniform")
    return {
        "groups": int(len(pit)),
        "ks_statistic": float(test.statistic),
        "ks_p_value": float(test.pvalue),
        "share_below_0.05": float(np.mean(pit < 0.05)),
        "share_above_0.95": float(np.mean(pit > 0.95)),
        "verdict": "miscalibrated" if test.pvalue < settings.lower else "calibrated",
        "method": "randomised LOO-PIT (lower + U (upper - lower)) from az.loo_pit with PSIS"
        " weights of y_group, or exact where refitted; Kolmogorov-Smirnov test against"
        " Uniform(0, 1) (scipy.stats.kstest)",
    }


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
            "files": {"replicates": REPLICATES_FILE, "groups": GROUP_CHECKS_FILE},
        }


def _seed(idata, settings: CheckSettings) -> int:
    if settings.seed is not None:
        return int(settings.seed)
    base = attr(idata, "random_seed", 0)
    return int(np.random.SeedSequence([int(base or 0), 0x5EED]).generate_state(1)[0])


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


def attach_checks(run, settings: CheckSettings | None = None) -> Checks:
    """Compute the checks of a fitted ``api.Run`` and file them in its documents and tables."""
    checks = check_posterior(run.idata, settings)
    run.documents["checks"] = checks.to_dict()
    run.tables["ppc_statistics"] = checks.replicates
    run.tables["group_checks"] = checks.groups
    return checks


def write_checks(folder: str | Path, checks: Checks) -> list[Path]:
    """Write checks.json, ppc_statistics.csv and group_checks.csv into a run folder, atomically.

    checks.json is written last, so its presence means the tables beside it are complete.
    run.json's list of files is brought up to date.
    """
    folder = Path(folder)
    paths = [folder / REPLICATES_FILE, folder / GROUP_CHECKS_FILE, folder / CHECKS_FILE]
    _io.write_csv(paths[0], checks.replicates)
    _io.write_csv(paths[1], checks.groups)
    _io.write_json(paths[2], checks.to_dict())
    record_path = folder / "run.json"
    if record_path.exists():
        record = json.loads(record_path.read_text(encoding="utf-8"))
        files = set(record.get("files", [])) | {p.name for p in paths}
        record["files"] = sorted(files)
        _io.write_json(record_path, record)
    return paths


# -- terminal summary -----------------------------------------------------------------------

_LABELS = {
    "sd_rate": "sd of rates",
    "max_rate": "max rate",
    "min_rate": "min rate",
    "zero_success_groups": "groups with 0",
    "chi_square": "chi-square",
}


def format_checks(doc: Checks | dict) -> str:
    """Ten-second terminal summary of checks (a Checks or the content of checks.json)."""
    if isinstance(doc, Checks):
        doc = doc.to_dict()
    s = doc["settings"]
    lines = [
        f"checks: {doc['verdict'].upper()}  ({doc['model']}, {doc['replicated_draws']} replicated"
        f" data sets; misfit when p < {s['lower']:g} or p > {s['upper']:g})"
    ]
    lines.append(f"  {'statistic':<15}{'observed':>10}   {'replicated 90%':<22}{'p':>6}")
    for row in doc["statistics"]:
        label = _LABELS.get(row["statistic"], row["statistic"])
        if row["verdict"] == NOT_COMPUTED:
            lines.append(f"  {label:<15}{'-':>10}   {'(not computed)':<22}")
            continue
        span = f"[{row['replicated_lower']:.4g}, {row['replicated_upper']:.4g}]"
        mark = "  MISFIT" if row["verdict"] == MISFIT else ""
        lines.append(
            f"  {label:<15}{row['observed']:>10.4g}   {span:<22}{row['p_value']:>6.3f}{mark}"
        )
    loo = doc["loo"]
    if loo["available"]:
        high = loo["high_k_groups"]
        lines.append(
            f"held-out groups: elpd_loo {loo['elpd_loo']:.1f} ± {loo['se']:.1f}"
            f" (p_loo {loo['p_loo']:.1f}, {loo['groups']} groups, PSIS-LOO on y_group);"
            f" Pareto k above {loo['good_k']:.2f}: {len(high)}"
        )
        if high:
            shown = ", ".join(
                f"{h['group']} ({'-' if h['pareto_k'] is None else format(h['pareto_k'], '.2f')},"
                f" {h['loo_method']})" for h in high[:5]
            )
            more = f" and {len(high) - 5} more" if len(high) > 5 else ""
            lines.append(f"  high k: {shown}{more}")
        if loo["unresolved_groups"]:
            lines.append(
                f"  {len(loo['unresolved_groups'])} high-k groups not refitted: their elpd may be"
                " optimistic"
            )
    else:
        lines.append("held-out groups: " + "; ".join(loo["notes"]))
    cal = doc["loo_pit"]
    if cal.get("verdict") != NOT_COMPUTED:
        lines.append(
            f"LOO-PIT: {cal['verdict']} (KS distance {cal['ks_statistic']:.3f}, p"
            f" {cal['ks_p_value']:.3g}; {cal['share_below_0.05']:.0%} below 0.05,"
            f" {cal['share_above_0.95']:.0%} above 0.95)"
        )
    if doc["verdict"] == MISFIT:
        names = ", ".join(_LABELS.get(m, m) for m in doc["misfit_statistics"])
        lines.append(
            f"  the model does not reproduce the data's {names}; compare other pooling choices"
            " (workbench compare) before reporting."
        )
    return "\n".join(lines)


__all__ = [
    "CHECKS_FILE",
    "CheckSettings",
    "Checks",
    "GROUP_CHECKS_FILE",
    "GroupLoo",
    "REPLICATES_FILE",
    "STATISTICS",
    "attach_checks",
    "check_posterior",
    "exact_leave_one_out",
    "format_checks",
    "good_k_threshold",
    "leave_one_group_out",
    "predictive_pvalues",
    "replicate_statistics",
    "write_checks",
]
