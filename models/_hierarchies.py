"""Hierarchies on the log-odds scale: the logit-normal model and groups within parents."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import special

from ._data import GroupCounts
from ._estimator import _check_level, _check_sampler, _Estimator
from .exceptions import ParameterError


class LogitNormal(_Estimator):
    """Partial pooling on the log-odds scale, with optional group-level covariates.

    logit theta_j = alpha + x_j . beta + sigma z_j, z_j ~ Normal(0, 1); covariates are
    standardised (mean 0, sd 1), so ``alpha`` is the log-odds of a group with average
    covariates, ``sigma`` the between-group sd of log-odds left after the covariates, and each
    ``beta_<column>`` the change in log-odds per sd of that column. Priors:
    alpha ~ Normal(0, 2.5), sigma ~ HalfNormal(1), beta ~ Normal(0, 1) (weakly informative on
    the log-odds scale, common practice).

    Engines: ``mcmc`` (``auto``) samples only the population parameters with PyMC NUTS,
    each group's log-odds integrated out by adaptive Gauss-Hermite, then draws every group's
    log-odds exactly from its conditional posterior (see ``models._collapsed``); ``latent``
    samples every group's log-odds jointly with NUTS, each group centred or non-centred by
    its information content (see ``models._logit``). Both give the same posterior; ``--verify``
    fits the other one.
    """

    name = "logit-normal"
    engines = ("mcmc", "latent")

    def __init__(
        self,
        *,
        engine: str = "auto",
        draws: int = 1000,
        chains: int = 4,
        tune: int = 1000,
        target_accept: float = 0.9,
        alpha_prior: tuple[float, float] = (0.0, 2.5),
        sigma_prior: float = 1.0,
        effect_prior: float = 1.0,
        random_seed: int | None = None,
        progress: bool | None = None,
    ) -> None:
        super().__init__(engine=engine, draws=draws, chains=chains, random_seed=random_seed)
        self.tune = tune
        self.target_accept = target_accept
        self.alpha_prior = alpha_prior
        self.sigma_prior = sigma_prior
        self.effect_prior = effect_prior
        self.progress = progress

    def _check_params(self) -> None:
        super()._check_params()
        _check_sampler(self)
        for what in ("sigma_prior", "effect_prior"):
            v = getattr(self, what)
            if not (isinstance(v, int | float) and v > 0 and np.isfinite(v)):
                raise ParameterError(f"{what}={v!r} must be a positive number.")

    def _priors(self) -> dict:
        a, b = self.alpha_prior
        return {
            "alpha": f"Normal({a:g}, {b:g})",
            "sigma": f"HalfNormal({self.sigma_prior:g})",
            "beta": f"Normal(0, {self.effect_prior:g}) per sd of each covariate",
            "alpha_mean": float(a),
            "alpha_sd": float(b),
            "sigma_scale": float(self.sigma_prior),
            "effect_sd": float(self.effect_prior),
        }

    def _fit(self, data, engine, seed):
        from . import _casemix, _collapsed
        from ._logit import covariate_names, population_rates, sample, standardise

        self._group_vars = self._cell_data = None
        if data.cells is not None:
            return _casemix.fit_cells(self, data, engine, seed)
        x, info = standardise(data.covariates, data.n_groups)
        parent_index = self._parent_index(data)
        run = _collapsed.sample if engine == "mcmc" else sample
        hyper, eta, stats_, facts = run(
            data.successes,
            data.trials,
            x,
            alpha_prior=tuple(map(float, self.alpha_prior)),
            sigma_prior=float(self.sigma_prior),
            beta_prior=float(self.effect_prior),
            draws=self.draws,
            tune=self.tune,
            chains=self.chains,
            target_accept=float(self.target_accept),
            seed=seed,
            progress=self.progress,
            parent_index=parent_index,
            tau_prior=float(getattr(self, "tau_prior", 1.0)),
        )
        rng = np.random.default_rng(seed + 1)
        alpha, sigma = hyper["alpha"], hyper["sigma"]
        tau = hyper.get("tau")
        theta = special.expit(eta)
        spread = sigma if tau is None else np.sqrt(sigma**2 + tau**2)
        theta_new = special.expit(alpha + spread * rng.standard_normal(alpha.shape))
        mean, sd = population_rates(alpha, sigma, tau)
        out = {"alpha": alpha, "sigma": sigma, "mu": mean, "between_group_sd": sd}
        if tau is not None:
            out["tau"] = tau
            self._parent_effects = hyper["parent_effect"]
        names = covariate_names(info["columns"])
        for k, name in enumerate(names):
            out[name] = hyper["beta"][..., k]
        self._covariates = (x, tuple(info["columns"]))
        if engine == "mcmc":
            sampler = (
                "pymc-nuts on the population parameters, group log-odds integrated out"
                " (adaptive Gauss-Hermite) and drawn exactly given each draw"
            )
        else:
            sampler = "pymc-nuts, per-group centred / non-centred log-odds"
            facts = {"centred_groups": int(facts.sum())}
        extra = {
            "tune": self.tune,
            "target_accept": float(self.target_accept),
            "sampler": sampler,
            **facts,
            "covariates": info,
            "covariate_effects": names,
        }
        return theta, theta_new, out, extra, stats_

    def _parent_index(self, data: GroupCounts) -> np.ndarray | None:
        return None

    def _shrinkage(self) -> np.ndarray:
        # share of the way from the observed rate to the group's population-model mean
        from ._logit import _GH_W, _GH_X
        from ._posterior import logit_means

        post = self.idata_.posterior
        if "expected" in post:  # trial-level case mix: the average group on these cases
            obs = self.data_.observed_rate
            est = post["theta"].mean(("chain", "draw")).values
            prior = post["expected"].mean(("chain", "draw")).values / np.maximum(
                self.data_.trials, 1)
            with np.errstate(invalid="ignore", divide="ignore"):
                share = (obs - est) / (obs - prior)
            return np.where(np.isnan(obs), 1.0,
                            np.clip(np.nan_to_num(share, nan=0.0), 0.0, 1.0))
        m = logit_means(self.idata_).reshape(-1, self.data_.n_groups)
        sigma = post["sigma"].values.ravel()
        keep = np.linspace(0, len(sigma) - 1, min(len(sigma), 200)).astype(int)
        prior_mean = np.zeros(self.data_.n_groups)
        for i in keep:
            prior_mean += special.expit(m[i][:, None] + sigma[i] * _GH_X) @ _GH_W
        prior_mean /= len(keep)
        obs = self.data_.observed_rate
        est = post["theta"].mean(("chain", "draw")).values
        with np.errstate(invalid="ignore", divide="ignore"):
            share = (obs - est) / (obs - prior_mean)
        return np.where(np.isnan(obs), 1.0, np.clip(np.nan_to_num(share, nan=0.0), 0.0, 1.0))


class Nested(LogitNormal):
    """Groups within parents (stores within regions), on the log-odds scale.

    logit theta_j = alpha + x_j . beta + u_p(j) + sigma z_j, with parent effects
    u_p = tau z_p, z_p ~ Normal(0, 1): groups borrow first from their parent, parents from the
    whole. ``tau`` is the between-parent sd of log-odds, ``sigma`` the between-group sd within
    a parent. Priors as for :class:`LogitNormal`, tau ~ HalfNormal(1). Needs
    ``GroupCounts.parents``. The new-group rate is that of a new group in a new parent.
    """

    name = "nested"

    def __init__(self, *, tau_prior: float = 1.0, target_accept: float = 0.99, **kwargs) -> None:
        super().__init__(target_accept=target_accept, **kwargs)
        self.tau_prior = tau_prior

    def _check_params(self) -> None:
        super()._check_params()
        v = self.tau_prior
        if not (isinstance(v, int | float) and v > 0 and np.isfinite(v)):
            raise ParameterError(f"tau_prior={v!r} must be a positive number.")

    def _priors(self) -> dict:
        return {**super()._priors(), "tau": f"HalfNormal({self.tau_prior:g})",
                "tau_scale": float(self.tau_prior)}

    def _parent_index(self, data: GroupCounts) -> np.ndarray:
        if data.parents is None:
            raise ParameterError(
                "the nested model needs each group's parent: pass parents to GroupCounts"
                " (on the command line, --parent COLUMN)."
            )
        _, index = np.unique(data.parents.astype(str), return_inverse=True)
        return index.ravel()

    def parent_summary(self, level: float = 0.95) -> pd.DataFrame:
        """One row per parent: its effect on the log-odds and the rate of its typical group."""
        self._require_fitted()
        level = _check_level(level)
        post = self.idata_.posterior
        effect = post["parent_effect"].stack(sample=("chain", "draw")).values
        rate = special.expit(effect + post["alpha"].values.ravel()[None, :])
        q = [(1 - level) / 2, 0.5, (1 + level) / 2]
        lo, med, hi = np.quantile(effect, q, axis=1)
        rlo, rmed, rhi = np.quantile(rate, q, axis=1)
        parents = self.data_.parents.astype(str)
        labels = post["parent"].values.astype(str)
        return pd.DataFrame(
            {
                "parent": labels,
                "groups": [int((parents == p).sum()) for p in labels],
                "effect_mean": effect.mean(axis=1),
                "effect_lower": lo,
                "effect_upper": hi,
                "typical_rate_median": rmed,
                "typical_rate_lower": rlo,
                "typical_rate_upper": rhi,
            }
        )
