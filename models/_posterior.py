"""The one posterior currency: build and read ArviZ InferenceData.

Every model and engine returns an ``InferenceData`` with
``posterior["theta"]`` (dims chain, draw, group), ``posterior["theta_new"]`` (the rate of a
new, unseen group), the model's hyperparameters, ``observed_data["successes"]``,
``constant_data["trials"]`` and ``attrs`` naming model, engine, priors, seed and versions.
The per-group log-likelihood (``y`` conditional on theta, ``y_group`` with the group's rate
integrated out) is added by :func:`add_log_likelihood`, in chunks, when it fits in memory.
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Mapping
from importlib import metadata

import numpy as np
import xarray as xr
from scipy import special

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

from ._data import GroupCounts
from ._gridposterior import distinct_pairs
from ._stats import betabinom_logpmf, log_choose

#: Largest draws x groups array stored in memory for a log-likelihood (float64 cells).
LOG_LIKELIHOOD_CELLS = 40_000_000


def versions() -> dict[str, str]:
    """Versions of this package and of the numerical libraries it stands on."""
    out = {}
    for name in ("workbench", "numpy", "scipy", "pandas", "pymc", "pytensor", "arviz"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def make_idata(
    data: GroupCounts,
    theta: np.ndarray,
    *,
    theta_new: np.ndarray,
    hyper: Mapping[str, np.ndarray],
    attrs: Mapping[str, object],
    sample_stats: Mapping[str, np.ndarray] | None = None,
    covariates: np.ndarray | None = None,
    covariate_columns: tuple[str, ...] = (),
    parent_effects: np.ndarray | None = None,
    group_vars: Mapping[str, np.ndarray] | None = None,
    cell_data: tuple | None = None,
) -> az.InferenceData:
    """Assemble the posterior currency from arrays laid out as (chain, draw[, group]).

    ``covariates`` (groups, k), standardised, go to ``constant_data["covariates"]``;
    ``parent_effects`` (chain, draw, parent) to ``posterior["parent_effect"]``, with each
    group's parent in ``constant_data["parent"]`` (the nested model).
    """
    if theta.ndim != 3 or theta.shape[2] != data.n_groups:
        raise ValueError(f"theta must be (chain, draw, {data.n_groups}); got {theta.shape}")
    chains, draws = theta.shape[:2]
    coords = {
        "chain": np.arange(chains),
        "draw": np.arange(draws),
        "group": data.names.astype(str),
    }
    post = {"theta": (("chain", "draw", "group"), theta)}
    post["theta_new"] = (("chain", "draw"), theta_new.reshape(chains, draws))
    for name, value in hyper.items():
        post[name] = (("chain", "draw"), np.asarray(value, dtype=float).reshape(chains, draws))
    if parent_effects is not None:
        labels = np.unique(data.parents.astype(str))
        coords["parent"] = labels
        post["parent_effect"] = (("chain", "draw", "parent"), parent_effects)
    for name, value in (group_vars or {}).items():
        post[name] = (("chain", "draw", "group"), np.asarray(value, dtype=float))
    posterior = xr.Dataset(post, coords=coords)
    observed = xr.Dataset(
        {"successes": (("group",), data.successes)}, coords={"group": coords["group"]}
    )
    constant = xr.Dataset({"trials": (("group",), data.trials)}, coords={"group": coords["group"]})
    if data.parents is not None:
        constant["parent"] = xr.DataArray(
            data.parents.astype(str), dims=("group",), coords={"group": coords["group"]}
        )
    if covariates is not None and covariates.shape[1]:
        constant["covariates"] = xr.DataArray(
            covariates,
            dims=("group", "covariate"),
            coords={"group": coords["group"], "covariate": list(covariate_columns)},
        )
    if cell_data is not None:
        cells, x, columns = cell_data
        constant["cell_group"] = ("cell", cells.group)
        constant["cell_successes"] = ("cell", cells.successes)
        constant["cell_trials"] = ("cell", cells.trials)
        constant["cell_covariates"] = xr.DataArray(
            x, dims=("cell", "covariate"), coords={"covariate": list(columns)})
    groups = {"posterior": posterior, "observed_data": observed, "constant_data": constant}
    if sample_stats:
        groups["sample_stats"] = xr.Dataset(
            {k: (("chain", "draw"), np.asarray(v)) for k, v in sample_stats.items()},
            coords={"chain": coords["chain"], "draw": coords["draw"]},
        )
    idata = az.InferenceData(**groups)
    flat = {k: _attr_value(v) for k, v in attrs.items()}
    flat["versions"] = json.dumps(versions())
    flat["data_fingerprint"] = data.fingerprint()
    for group in idata.groups():
        idata[group].attrs.update(flat)
    return idata


def _attr_value(v: object) -> object:
    # netCDF attributes hold numbers and strings only
    if isinstance(v, bool | np.bool_):
        return int(v)
    if isinstance(v, dict | list | tuple):
        return json.dumps(v)
    if v is None:
        return ""
    return v


def counts_of(idata: az.InferenceData) -> GroupCounts:
    """The GroupCounts a posterior was fitted to."""
    names = idata.posterior["group"].values
    return GroupCounts(
        names,
        idata.observed_data["successes"].values,
        idata.constant_data["trials"].values,
    )


def attr(idata: az.InferenceData, key: str, default: object = None) -> object:
    """One attribute of the posterior, JSON-decoded when it was stored as JSON."""
    value = idata.posterior.attrs.get(key, default)
    if isinstance(value, str) and value[:1] in "[{":
        try:
            return json.loads(value)
        except json.JSONDecodeError:
            return value
    return value


def theta_draws(idata: az.InferenceData) -> np.ndarray:
    """theta as a (samples, groups) float array, chains stacked."""
    th = idata.posterior["theta"].transpose("chain", "draw", "group").values
    return th.reshape(-1, th.shape[-1])


#: most draws x groups values :func:`draw_quantiles` copies at once
QUANTILE_CHUNK_CELLS = 4_000_000


def draw_quantiles(idata: az.InferenceData, probs) -> np.ndarray:
    """Each group's quantiles of its theta draws (numpy's default linear method),
    (len(probs), groups), by chunks of groups: never a sorted copy of every draw."""
    th = theta_draws(idata)
    probs = np.asarray(probs, dtype=float)
    out = np.empty((len(probs), th.shape[1]))
    step = max(1, QUANTILE_CHUNK_CELLS // max(th.shape[0], 1))
    for start in range(0, th.shape[1], step):
        out[:, start : start + step] = np.quantile(th[:, start : start + step], probs, axis=0)
    return out


def draw_share_above(theta: np.ndarray, value: float) -> np.ndarray:
    """Each group's share of draws above ``value``; ``theta`` is (samples, groups), counted
    by chunks of draws."""
    total = np.zeros(theta.shape[1])
    step = max(1, QUANTILE_CHUNK_CELLS // max(theta.shape[1], 1))
    for start in range(0, theta.shape[0], step):
        total += (theta[start : start + step] > value).sum(axis=0)
    return total / theta.shape[0]


def log_likelihood_arrays(idata: az.InferenceData,
                          names: tuple[str, ...] = ("y", "y_group")) -> dict[str, np.ndarray]:
    """Conditional (``y``) and group-integrated (``y_group``) log-likelihood, (chain, draw, group).

    ``y`` is log Binomial(successes | trials, theta_j). ``y_group`` integrates theta_j out
    given the hyperparameters: Beta-binomial given (mu, kappa) for the beta-binomial model,
    the prior predictive Beta-binomial(a, b) for no pooling (whose left-out group learns
    nothing from the others), and the Binomial given the shared rate for complete pooling.
    Only the ``names`` asked for are returned (``y`` is not computed where it is not asked
    for and ``y_group`` does not need it).
    """
    data = counts_of(idata)
    y = data.successes.astype(float)
    n = data.trials.astype(float)
    th = idata.posterior["theta"].transpose("chain", "draw", "group").values
    lc = log_choose(n, y)

    def conditional():
        with np.errstate(divide="ignore", invalid="ignore"):
            return lc + special.xlogy(y, th) + special.xlog1py(n - y, -th)

    cond = None
    model = attr(idata, "model")
    if model == "beta-binomial":
        mu = idata.posterior["mu"].values[..., None]
        kappa = idata.posterior["kappa"].values[..., None]
        a = mu * kappa
        b = (1 - mu) * kappa
        # a function of the group's (successes, trials) alone: once per distinct pair
        pairs, row = distinct_pairs(data.successes, data.trials)
        pairs = pairs.astype(float)
        integrated = np.take(betabinom_logpmf(pairs[:, 0], pairs[:, 1], a, b), row, axis=-1)
    elif model in ("logit-normal", "nested") and "cell_trials" in idata.constant_data:
        from ._casemix import cell_log_likelihood

        cond, integrated = cell_log_likelihood(idata)
    elif model in ("logit-normal", "nested"):
        integrated = _logit_normal_integrated(idata, y, n, lc)
    elif model == "no-pooling":
        prior = attr(idata, "priors")
        a, b = prior["a"], prior["b"]
        one = betabinom_logpmf(y, n, a, b)
        integrated = np.broadcast_to(one, th.shape).copy()
    else:
        cond = conditional()
        integrated = cond.copy()
    out = {}
    if "y" in names:
        out["y"] = cond if cond is not None else conditional()
    if "y_group" in names:
        out["y_group"] = integrated
    return out


_AGH_T, _AGH_W = np.polynomial.hermite_e.hermegauss(12)


def logit_means(idata: az.InferenceData) -> np.ndarray:
    """alpha + x_j . beta (+ the parent's effect) per draw and group, (chain, draw, group)."""
    post = idata.posterior
    m = post["alpha"].values[..., None] * np.ones(post.sizes["group"])
    if "covariates" in idata.constant_data:
        x = idata.constant_data["covariates"].values
        names = attr(idata, "covariate_effects") or []
        for k, name in enumerate(names):
            m = m + post[name].values[..., None] * x[:, k]
    if "parent_effect" in post:
        parent = idata.constant_data["parent"].values.astype(str)
        effects = post["parent_effect"].sel(parent=xr.DataArray(parent, dims="group"))
        m = m + effects.transpose("chain", "draw", "group").values
    return m


def _logit_normal_integrated(idata, y, n, log_choose) -> np.ndarray:
    """log of the integral over z ~ N(0, 1) of Binomial(y | n, expit(m + sigma z)).

    Adaptive Gauss-Hermite (common practice for mixed models): Newton steps find the
    integrand's mode per draw and group, 12 nodes are scaled by its curvature there.
    """
    m = logit_means(idata)
    s = idata.posterior["sigma"].values[..., None] * np.ones_like(m)
    z = np.zeros_like(m)
    for _ in range(30):
        p = special.expit(m + s * z)
        grad = s * (y - n * p) - z
        hess = -(s**2) * n * p * (1 - p) - 1.0
        step = grad / hess
        z = z - np.clip(step, -5, 5)
        if np.max(np.abs(step)) < 1e-10:
            break
    p = special.expit(m + s * z)
    tau = 1.0 / np.sqrt(s**2 * n * p * (1 - p) + 1.0)
    nodes = z[..., None] + tau[..., None] * _AGH_T
    eta = m[..., None] + s[..., None] * nodes
    logf = (
        y[:, None] * -np.logaddexp(0.0, -eta)
        + (n - y)[:, None] * -np.logaddexp(0.0, eta)
        - 0.5 * nodes**2
    )
    terms = logf + np.log(_AGH_W) + 0.5 * _AGH_T**2
    top = terms.max(axis=-1, keepdims=True)
    lse = top[..., 0] + np.log(np.exp(terms - top).sum(axis=-1))
    return log_choose + np.log(tau) + lse - 0.5 * np.log(2 * np.pi)


def add_log_likelihood(idata: az.InferenceData, *, force: bool = False) -> bool:
    """Add the ``log_likelihood`` group when it fits in memory (or ``force``); say if added."""
    if "log_likelihood" in idata.groups():
        return True
    th = idata.posterior["theta"]
    if not force and th.size > LOG_LIKELIHOOD_CELLS:
        return False
    arrays = log_likelihood_arrays(idata)
    ds = xr.Dataset(
        {k: (("chain", "draw", "group"), v) for k, v in arrays.items()},
        coords={c: th[c].values for c in ("chain", "draw", "group")},
    )
    idata.add_groups({"log_likelihood": ds})
    idata.log_likelihood.attrs.update(idata.posterior.attrs)
    return True
