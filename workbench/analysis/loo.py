"""Leave one group out: PSIS-LOO on the group-integrated log-likelihood, exact where cheap.

With one aggregated row per group, leaving a row out leaves a whole group out. PSIS-LOO
(Vehtari, Gelman & Gabry 2017; cited from memory) is run on ``y_group``, the log-likelihood with
the group's own rate integrated out; where Pareto k says PSIS is unreliable and an exact value
is cheap (closed forms, or a refit of the grid), the exact value replaces it. LOO-PIT values
come from the same weights applied to a new group's predictive CDF given each draw (exact for
the Beta-binomial and binomial predictives, else replicates; randomised for the discrete
outcome).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr
from scipy import special, stats

from ..models import GroupCounts, attr, counts_of, log_likelihood_arrays, theta_draws
from ..models._grid import HyperPrior, fit_grid
from ..models._gridposterior import distinct_pairs
from ..models._posterior import logit_means
from ..models._stats import (
    PAIR_CDF_STEPS,
    betabinom_cdf,
    betabinom_cdf_pairs,
    betabinom_cdf_steps,
    betabinom_logpmf,
)
from . import fast_psis
from .settings import NOT_COMPUTED, CheckSettings
from .settings import seed_of as _seed

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

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


def thinned_draws(total: int, most: int) -> np.ndarray:
    """At most ``most`` evenly spaced positions among ``total`` stacked draws."""
    if total <= most:
        return np.arange(total)
    return np.unique(np.linspace(0, total - 1, most).round().astype(int))


def column_chunks(columns: np.ndarray, rows: int, cells: int):
    step = max(1, cells // max(rows, 1))
    for s in range(0, len(columns), step):
        yield columns[s : s + step]


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


def _relative_efficiency(idata) -> float:
    """ESS / S for PSIS: 1 for independent draws; otherwise the mean ESS over the posterior.

    This is the reading ``az.loo`` makes itself when given a posterior; it is computed here
    once because PSIS runs on chunks of groups that carry no posterior of their own.
    """
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
        ll = log_likelihood_arrays(_subset(idata, cols), names=("y_group",))["y_group"]
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
        rate = theta_draws(idata)[np.ix_(draws, cols)]
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
        logp = betabinom_logpmf(y, n, a, b)
        one = np.ones(1)
        below = np.array([betabinom_cdf(yi - 1, ni, ai, bi, one)
                          for yi, ni, ai, bi in zip(y, n, a, b, strict=True)])
        at = np.array([betabinom_cdf(yi, ni, ai, bi, one)
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
            # only sums over the grid are used: the means' refinement suffices
            grid = fit_grid(data.successes[rest], data.trials[rest], prior, means_only=True)
            mu, kappa, w = grid.points()
            a, b = mu * kappa, (1 - mu) * kappa
            logp[i] = special.logsumexp(np.log(w) + betabinom_logpmf(y[i], n[i], a, b))
            below[i] = betabinom_cdf(y[i] - 1, n[i], a, b, w)
            at[i] = betabinom_cdf(y[i], n[i], a, b, w)
    else:
        return None
    return pd.DataFrame(
        {"position": positions, "elpd_exact": logp, "cdf_below": below, "cdf_at": at}
    )


def _unavailable(idata, samples: int, seen: np.ndarray) -> str | None:
    """Why leaving one group out cannot be computed for this posterior (None: it can)."""
    if len(seen) == 0:
        return "no group has any trials: nothing to predict."
    if attr(idata, "model") not in INTEGRATED_MODELS:
        return (f"model {attr(idata, 'model')!r} has no group-integrated log-likelihood;"
                " leaving one group out needs one (PSIS on the conditional one fails"
                " for most groups).")
    if samples < MIN_LOO_DRAWS:
        return (f"only {samples} posterior draws; PSIS-LOO needs at least"
                f" {MIN_LOO_DRAWS}: fit with more draws.")
    return None


#: Models whose y_group, given the hyperparameter draws, depends on a group's successes and
#: trials alone (no group-specific parent or covariates).
EXCHANGEABLE_MODELS = ("beta-binomial", "no-pooling", "complete-pooling")


def _pair_keys(idata, data: GroupCounts) -> np.ndarray | None:
    """One key per group for its (successes, trials) pair where equal pairs give equal
    y_group draws (EXCHANGEABLE_MODELS); None where they need not."""
    if attr(idata, "model") not in EXCHANGEABLE_MODELS:
        return None
    return distinct_pairs(data.successes, data.trials)[1]


#: Smooth with ArviZ's own per-group functions instead of fast_psis (the same numbers, one
#: Python call per group); kept so the two can be compared.
USE_ARVIZ_PSIS = False


def _pointwise_loo(ll: np.ndarray, reff: float) -> tuple[np.ndarray, np.ndarray, float]:
    """PSIS-LOO of (groups, samples) ``ll``: elpd_loo and Pareto k per group, and good_k
    (min(1 - 1/log10(S), 0.7), Vehtari et al. 2024), as ``az.loo(pointwise=True)`` gives."""
    if not USE_ARVIZ_PSIS:
        loo = fast_psis.psis_loo(ll, reff)
        return loo.elpd_i, loo.pareto_k, float(loo.good_k)
    samples = ll.shape[1]
    frame = az.InferenceData(
        log_likelihood=xr.Dataset(
            {"y_group": (("chain", "draw", "group"), ll.T.reshape(1, samples, len(ll)))}
        )
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # high k is reported in the table, not as a warning
        loo = az.loo(frame, pointwise=True, reff=reff, var_name="y_group")
    return loo.loo_i.values, loo.pareto_k.values, float(loo.good_k)


def _new_group_cdfs(idata, data: GroupCounts, cols: np.ndarray, draws: np.ndarray):
    """P(y_new < y_j) and P(y_new <= y_j) for a *new* group with each group's trials, given
    each posterior draw (positions ``draws``): two (len(cols), len(draws)) arrays, exactly,
    where the model's new-group predictive has a closed form and the walk is affordable
    (EXCHANGEABLE_MODELS: a Beta-binomial, or a binomial for complete pooling); else None.

    They replace the replicates of :func:`_new_group_replicates` in LOO-PIT, so its ends
    carry no replicate noise: at a million groups 400 replicates per group moved the PIT
    values' distribution by about 0.002, which the uniformity test detected.
    """
    model = attr(idata, "model")
    y = data.successes[cols]
    n = data.trials[cols]
    post = idata.posterior
    if model == "complete-pooling":
        rate = theta_draws(idata)[draws][:, cols[:1]].ravel()  # one shared rate per draw
        yf, nf, q = y.astype(float)[:, None], n.astype(float)[:, None], 1 - rate[None, :]
        # P(X <= k) = I_{1-p}(n - k, k + 1) for X ~ Binomial(n, p), k < n
        with np.errstate(invalid="ignore", divide="ignore"):
            at = np.where(yf >= nf, 1.0, special.betainc(np.maximum(nf - yf, 1), yf + 1, q))
            below = np.where(yf > 0, special.betainc(nf - yf + 1, np.maximum(yf, 1), q), 0.0)
        return below, at
    if model == "beta-binomial":
        mu = post["mu"].transpose("chain", "draw").values.ravel()[draws]
        kappa = post["kappa"].transpose("chain", "draw").values.ravel()[draws]
        a, b = mu * kappa, (1 - mu) * kappa
    elif model == "no-pooling":  # the prior predictive, the same at every draw
        prior = attr(idata, "priors")
        a, b = np.array([float(prior["a"])]), np.array([float(prior["b"])])
    else:
        return None
    if betabinom_cdf_steps(y, n, len(a)) > PAIR_CDF_STEPS:
        return None
    below, at = betabinom_cdf_pairs(y, n, a, b)
    if len(a) < len(draws):
        below, at = (np.repeat(x, len(draws), axis=1) for x in (below, at))
    return below, at


def _psis_log_weights(ll, reff: float) -> np.ndarray:
    """Normalised PSIS log-weights of leaving each row of (groups, draws) ``ll`` out."""
    if not USE_ARVIZ_PSIS:
        return fast_psis.psis_log_weights(-ll, reff)[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(az.psislw(-ll, reff)[0])


def _pit_ends(y_obs, y_new, ll, reff: float) -> tuple[np.ndarray, np.ndarray]:
    """LOO-PIT's two ends (the weighted share of replicates below and at ``y_obs``) from the
    PSIS weights of (groups, draws) ``ll``, as ``az.loo_pit`` gives them (float counts)."""
    log_w = _psis_log_weights(ll, reff)
    if not USE_ARVIZ_PSIS:
        return (fast_psis.loo_pit(y_obs - 0.5, y_new, log_w),
                fast_psis.loo_pit(y_obs, y_new, log_w))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        at = np.asarray(az.loo_pit(y=y_obs, y_hat=y_new, log_weights=log_w))
        below = np.asarray(az.loo_pit(y=y_obs - 0.5, y_hat=y_new, log_weights=log_w))
    return below, at


def _exact_pit_ends(cdfs, ll, reff: float) -> tuple[np.ndarray, np.ndarray]:
    """LOO-PIT's two ends: the PSIS-weighted means of the new group's exact CDFs."""
    weights = np.exp(_psis_log_weights(ll, reff))
    below, at = ((cdf * weights).sum(axis=1) for cdf in cdfs)
    return np.minimum(below, 1.0), np.minimum(at, 1.0)


def _psis_pass(idata, data: GroupCounts, seen, samples, settings: CheckSettings, rng) -> dict:
    """PSIS-LOO and PSIS LOO-PIT for every group with trials, by chunks of groups.

    Groups whose y_group depends on their counts alone share it (EXCHANGEABLE_MODELS): those
    are computed once per distinct (successes, trials) pair over the whole table, in (trials,
    successes) order, and broadcast back. LOO-PIT's ends are functions of the same weights and
    the counts, so they are per pair too (each group's randomisation between them is its own).
    """
    reff = _relative_efficiency(idata)
    y_all = data.successes.astype(float)
    pair = _pair_keys(idata, data)
    if pair is None:
        units, inv = seen, np.arange(len(seen))
    else:
        _, first, inv = np.unique(pair[seen], return_index=True, return_inverse=True)
        units = seen[first]
        order = np.lexsort((data.successes[units], data.trials[units]))
        rank = np.empty(len(order), dtype=np.int64)
        rank[order] = np.arange(len(order))
        units, inv = units[order], rank[inv.ravel()]
    out = {name: np.empty(len(units)) for name in ("elpd", "k", "lppd")}
    out["constant"] = np.zeros(len(units), dtype=bool)
    out["below"] = np.full(len(units), np.nan)
    out["at"] = np.full(len(units), np.nan)
    pit_possible = True
    good_k = float("nan")
    pit_draws = thinned_draws(samples, settings.draws)
    for cols in column_chunks(np.arange(len(units)), samples, settings.chunk_cells):
        reps = units[cols]
        ll = _group_loglik(idata, reps)  # (groups or distinct pairs, samples)
        out["elpd"][cols], out["k"][cols], good_k = _pointwise_loo(ll, reff)
        out["lppd"][cols] = special.logsumexp(ll, axis=1) - np.log(samples)
        out["constant"][cols] = np.ptp(ll, axis=1) == 0
        cdfs = _new_group_cdfs(idata, data, reps, pit_draws)
        if cdfs is not None:
            out["below"][cols], out["at"][cols] = _exact_pit_ends(cdfs, ll[:, pit_draws], reff)
            continue
        y_new = _new_group_replicates(idata, reps, pit_draws, rng)
        if y_new is None:
            pit_possible = False
            continue
        out["below"][cols], out["at"][cols] = _pit_ends(y_all[reps], y_new, ll[:, pit_draws],
                                                        reff)
    out = {name: value[inv] for name, value in out.items()}
    out["pit_possible"], out["good_k"] = pit_possible, good_k
    return out


def _refit_choice(pareto_k, high, constant, settings: CheckSettings, notes: list) -> np.ndarray:
    """The groups to give exact values: the worst high-k ones (up to the limit), and every
    constant-ratio group (no pooling: the exact value is PSIS's own, so it is always used)."""
    wanted = np.flatnonzero(high & ~constant)
    if len(wanted) > settings.refit_limit:
        order = np.argsort(-pareto_k[wanted])
        notes.append(
            f"{_groups(len(wanted))} with high Pareto k; refit_limit={settings.refit_limit}"
            f" allows exact values for the worst {settings.refit_limit} only; the rest keep"
            " their PSIS values."
        )
        wanted = wanted[order[: settings.refit_limit]]
    return np.union1d(wanted, np.flatnonzero(constant))


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
    why = _unavailable(idata, samples, seen)
    if why is not None:
        # ArviZ's own k threshold is read from its PSIS-LOO result, which is not computed here
        return GroupLoo(pd.DataFrame(columns=GROUP_COLUMNS), np.nan, np.nan, np.nan, samples,
                        float("nan"), len(seen), [why], available=False)
    psis = _psis_pass(idata, data, seen, samples, settings, rng)
    elpd_psis, pareto_k, lppd, constant = psis["elpd"], psis["k"], psis["lppd"], psis["constant"]
    pit_below, pit_at, good_k = psis["below"], psis["at"], psis["good_k"]
    pareto_k[constant] = np.nan  # undefined: every draw gives the same value
    high = constant | ~(pareto_k <= good_k)
    elpd_used = elpd_psis.copy()
    method = np.array(["psis"] * len(seen), dtype=object)
    exact_col = np.full(len(seen), np.nan)
    notes: list[str] = []
    model = attr(idata, "model")
    engine = attr(idata, "engine")
    wanted = _refit_choice(pareto_k, high, constant, settings, notes)
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
    if not psis["pit_possible"]:
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
        "method": "randomised LOO-PIT (lower + U (upper - lower)): the PSIS-weighted (on"
        " y_group; workbench's vectorised PSIS, equal to ArviZ's psislw) mean of a new group's"
        " predictive CDF given each draw, exact where the model has one (Beta-binomial or"
        " binomial), else the weighted share of one replicate per draw (as ArviZ's loo_pit);"
        " exact where refitted; Kolmogorov-Smirnov test against Uniform(0, 1)"
        " (scipy.stats.kstest)",
    }


