"""The estimators: settings in __init__, learning in fit, learned state ends in ``_``."""

from __future__ import annotations

import inspect
import time
from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from ._data import GroupCounts
from ._grid import HyperPrior, fit_grid
from ._mcmc import SamplerSettings, sample_hyper
from ._mixture import BetaPosteriors
from ._posterior import add_log_likelihood, make_idata
from .exceptions import NotFittedError, ParameterError

#: Columns of summary(), in order; later tables append their own.
SUMMARY_COLUMNS = [
    "group",
    "successes",
    "trials",
    "observed_rate",
    "posterior_mean",
    "posterior_median",
    "lower",
    "upper",
    "shrinkage",
]


def _check_level(level: float) -> float:
    if not (isinstance(level, int | float) and 0 < level < 1):
        raise ParameterError(f"level={level!r} is not between 0 and 1; use e.g. 0.95.")
    return float(level)


def _check_rate(value: float, what: str) -> float:
    if not (isinstance(value, int | float) and 0 < value < 1):
        raise ParameterError(f"{what}={value!r} is not strictly between 0 and 1.")
    return float(value)


def _check_sampler(est) -> None:
    """NUTS settings shared by every model with an mcmc engine."""
    if not isinstance(est.tune, int | np.integer) or est.tune < 0:
        raise ParameterError(f"tune={est.tune!r} must be a whole number >= 0.")
    if not (isinstance(est.target_accept, float | int) and 0.5 <= est.target_accept < 1):
        raise ParameterError(
            f"target_accept={est.target_accept!r} must be in [0.5, 1); 0.9 or 0.99 are usual."
        )


class _Estimator:
    """Shared fit/summary machinery. Subclasses fill ``_fit`` and the closed forms."""

    name: ClassVar[str]
    engines: ClassVar[tuple[str, ...]]

    def __init__(
        self,
        *,
        engine: str = "auto",
        draws: int = 1000,
        chains: int = 4,
        random_seed: int | None = None,
    ) -> None:
        self.engine = engine
        self.draws = draws
        self.chains = chains
        self.random_seed = random_seed

    # -- settings -------------------------------------------------------------------------
    @classmethod
    def _param_names(cls) -> list[str]:
        """The keyword settings of ``__init__``, through the class hierarchy (as scikit-learn)."""
        names: list[str] = []
        for klass in cls.__mro__:
            init = klass.__dict__.get("__init__")
            if init is None:
                continue
            for p in inspect.signature(init).parameters.values():
                if p.kind is p.KEYWORD_ONLY and p.name not in names:
                    names.append(p.name)
        return names

    def get_params(self) -> dict:
        """The settings as given (one attribute per ``__init__`` keyword)."""
        return {name: getattr(self, name) for name in self._param_names() if hasattr(self, name)}

    def __repr__(self) -> str:
        shown = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        fitted = f", fitted to {self.data_.n_groups} groups" if hasattr(self, "data_") else ""
        return f"{type(self).__name__}({shown}){fitted}"

    def _check_params(self) -> None:
        allowed = ("auto",) + self.engines
        if self.engine not in allowed:
            quoted = ", ".join(repr(e) for e in allowed)
            raise ParameterError(f"engine={self.engine!r} is not one of {quoted} for {self.name}.")
        for what in ("draws", "chains"):
            value = getattr(self, what)
            if not isinstance(value, int | np.integer) or value < 1:
                raise ParameterError(f"{what}={value!r} must be a whole number >= 1.")
        if self.random_seed is not None and (
            not isinstance(self.random_seed, int | np.integer) or self.random_seed < 0
        ):
            raise ParameterError(f"random_seed={self.random_seed!r} must be an integer >= 0.")

    @property
    def engine_(self) -> str:
        self._require_fitted()
        return self._engine_used

    def _require_fitted(self) -> None:
        if not hasattr(self, "idata_"):
            raise NotFittedError(f"this {type(self).__name__} is not fitted yet; call fit(data).")

    # -- fit ------------------------------------------------------------------------------
    def fit(self, data: GroupCounts) -> _Estimator:
        """Fit to ``data`` and return ``self``."""
        self._check_params()
        if not isinstance(data, GroupCounts):
            raise ParameterError(f"fit() needs a GroupCounts; got {type(data).__name__}.")
        seed = (
            int(self.random_seed)
            if self.random_seed is not None
            else int(np.random.SeedSequence().generate_state(1)[0] % (2**31))
        )
        engine = self.engines[0] if self.engine == "auto" else self.engine
        started = time.perf_counter()
        theta, theta_new, hyper, extra_attrs, sample_stats = self._fit(data, engine, seed)
        attrs = {
            "model": self.name,
            "engine": engine,
            "priors": self._priors(),
            "random_seed": seed,
            "draws": self.draws,
            "chains": self.chains,
            "independent_draws": engine == "exact",
            **extra_attrs,
        }
        x, columns = getattr(self, "_covariates", (None, ()))
        parent_effects = getattr(self, "_parent_effects", None)
        idata = make_idata(
            data,
            theta,
            theta_new=theta_new,
            hyper=hyper,
            attrs=attrs,
            sample_stats=sample_stats,
            covariates=x,
            covariate_columns=columns,
            parent_effects=parent_effects,
        )
        add_log_likelihood(idata)
        self.fit_seconds_ = time.perf_counter() - started
        self.seed_ = seed
        self.groups_ = data.names
        self.data_ = data
        self._engine_used = engine
        self.idata_ = idata
        return self

    # -- results --------------------------------------------------------------------------
    def summary(self, level: float = 0.95, *, target: float | None = None) -> pd.DataFrame:
        """One row per group, columns ``SUMMARY_COLUMNS`` then ``prob_above_target``.

        Exact fits use closed forms (``exact_``); MCMC fits use the draws.
        """
        self._require_fitted()
        level = _check_level(level)
        data = self.data_
        lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
        exact = getattr(self, "exact_", None)
        if exact is not None and exact.exact_quantiles:
            mean = exact.mean()
            median, lower, upper = exact.ppf(0.5), exact.ppf(lo_q), exact.ppf(hi_q)
        else:
            th = self.idata_.posterior["theta"].stack(sample=("chain", "draw")).values
            mean = exact.mean() if exact is not None else th.mean(axis=1)
            lower, median, upper = np.quantile(th, [lo_q, 0.5, hi_q], axis=1)
        table = pd.DataFrame(
            {
                "group": data.names.astype(str),
                "successes": data.successes,
                "trials": data.trials,
                "observed_rate": data.observed_rate,
                "posterior_mean": mean,
                "posterior_median": median,
                "lower": lower,
                "upper": upper,
                "shrinkage": self._shrinkage(),
            }
        )
        if target is not None:
            target = _check_rate(target, "target")
            if exact is not None:
                above = exact.sf(target)
            else:
                th = self.idata_.posterior["theta"].stack(sample=("chain", "draw")).values
                above = (th > target).mean(axis=1)
            table["prob_above_target"] = np.clip(above, 0.0, 1.0)
        return table

    def population(self, level: float = 0.95) -> pd.DataFrame:
        """Population quantities with central intervals: one row each.

        ``population_mean`` (mu), ``concentration`` (kappa; larger = groups more alike),
        ``between_group_sd`` (sd of true rates across groups), ``new_group_rate`` (the rate of
        a new, unseen group: the posterior predictive).
        """
        self._require_fitted()
        level = _check_level(level)
        post = self.idata_.posterior
        rows = []
        extra = [v for v in post.data_vars if v.startswith("beta_")]
        names = ("mu", "kappa", "between_group_sd", "theta_new", "alpha", "sigma", "tau", *extra)
        for name in names:
            if name not in post:
                continue
            x = post[name].values.ravel()
            lo, med, hi = np.quantile(x, [(1 - level) / 2, 0.5, (1 + level) / 2])
            rows.append((name, float(x.mean()), float(med), float(lo), float(hi)))
        labels = {
            "mu": "population_mean",
            "kappa": "concentration",
            "between_group_sd": "between_group_sd",
            "theta_new": "new_group_rate",
            "alpha": "logit_mean",
            "sigma": "logit_between_group_sd",
            "tau": "logit_between_parent_sd",
            **{name: f"effect_per_sd_{name[5:]}" for name in extra},
        }
        table = pd.DataFrame(rows, columns=["quantity", "mean", "median", "lower", "upper"])
        table.insert(1, "parameter", table["quantity"])
        table["quantity"] = table["quantity"].map(labels)
        return table

    def _shrinkage(self) -> np.ndarray:
        """Posterior mean of kappa / (kappa + n_j): weight on the population mean."""
        raise NotImplementedError

    def _priors(self) -> dict:
        raise NotImplementedError

    def _fit(self, data, engine, seed):
        raise NotImplementedError


class _Conjugate(_Estimator):
    """A Beta(a, b) prior on each rate; exact closed forms."""

    engines = ("exact",)

    def __init__(self, *, a: float = 1.0, b: float = 1.0, **kwargs) -> None:
        super().__init__(**kwargs)
        self.a = a
        self.b = b

    def _check_params(self) -> None:
        super()._check_params()
        for what in ("a", "b"):
            value = getattr(self, what)
            if not (isinstance(value, int | float) and value > 0 and np.isfinite(value)):
                raise ParameterError(f"{what}={value!r} must be a positive number.")

    def _priors(self) -> dict:
        return {"theta": f"Beta({self.a:g}, {self.b:g})", "a": self.a, "b": self.b}


class NoPooling(_Conjugate):
    """Every group on its own: theta_j ~ Beta(a, b) independently, conjugate and exact.

    ``a = b = 1`` is the uniform prior; ``a = b = 0.5`` the Jeffreys prior.
    """

    name = "no-pooling"

    def _fit(self, data, engine, seed):
        rng = np.random.default_rng(seed)
        alpha = self.a + data.successes
        beta = self.b + data.trials - data.successes
        self.exact_ = BetaPosteriors(alpha, beta)
        size = (self.chains, self.draws, data.n_groups)
        theta = rng.beta(alpha, beta, size=size)
        theta_new = rng.beta(self.a, self.b, size=(self.chains, self.draws))
        return theta, theta_new, {}, {}, None

    def _shrinkage(self) -> np.ndarray:
        k = self.a + self.b
        return k / (k + self.data_.trials)


class CompletePooling(_Conjugate):
    """One shared rate for every group: theta ~ Beta(a + sum y, b + sum (n - y))."""

    name = "complete-pooling"

    def _fit(self, data, engine, seed):
        rng = np.random.default_rng(seed)
        alpha = self.a + data.successes.sum()
        beta = self.b + (data.trials - data.successes).sum()
        self.exact_ = BetaPosteriors(
            np.full(data.n_groups, float(alpha)), np.full(data.n_groups, float(beta))
        )
        shared = rng.beta(alpha, beta, size=(self.chains, self.draws))
        theta = np.repeat(shared[:, :, None], data.n_groups, axis=2)
        hyper = {"mu": shared, "between_group_sd": np.zeros_like(shared)}
        return theta, shared.copy(), hyper, {}, None

    def _shrinkage(self) -> np.ndarray:
        return np.ones(self.data_.n_groups)


class BetaBinomial(_Estimator):
    """Partial pooling: theta_j ~ Beta(mu kappa, (1 - mu) kappa).

    ``mu`` is the population mean rate; ``kappa`` the concentration: how alike the groups
    are (the prior weight, in trials, that the population carries in each group's estimate;
    a group's estimate moves toward ``mu`` by ``kappa / (kappa + trials)``). Default priors:
    mu ~ Beta(1, 1) (uniform: no view on the typical rate) and
    log kappa ~ Normal(log 20, 3), whose central 95% runs from kappa 0.06 (groups almost
    unrelated: weak pooling) to 7,000 (groups nearly identical: strong pooling), with
    essentially no mass above 1e8, where the Beta-binomial log-probability loses accuracy.

    Parameters
    ----------
    engine : {"auto", "exact", "mcmc"}, default="auto"
        ``exact`` (``auto``): quadrature over (logit mu, log kappa), independent draws.
        ``mcmc``: PyMC NUTS on the collapsed posterior, theta drawn conditionally.
    draws, chains : int
        Draws per chain and number of chains (independent draws for ``exact``).
    tune : int, default=1000
        NUTS warm-up steps per chain (``mcmc``).
    target_accept : float, default=0.9
        NUTS target acceptance (``mcmc``).
    mu_prior : (float, float), default=(1, 1)
        Beta prior on the population mean rate.
    kappa_prior : (float, float), default=(20, 3)
        Median and log-scale sd of the LogNormal prior on the concentration.

    Attributes
    ----------
    idata_ : arviz.InferenceData
    exact_ : BetaMixturePosteriors (exact engine)
    grid_ : GridPosterior (exact engine)
    """

    name = "beta-binomial"
    engines = ("exact", "mcmc")

    def __init__(
        self,
        *,
        engine: str = "auto",
        draws: int = 1000,
        chains: int = 4,
        tune: int = 1000,
        target_accept: float = 0.9,
        mu_prior: tuple[float, float] = (1.0, 1.0),
        kappa_prior: tuple[float, float] = (20.0, 3.0),
        random_seed: int | None = None,
        progress: bool | None = None,
    ) -> None:
        super().__init__(engine=engine, draws=draws, chains=chains, random_seed=random_seed)
        self.tune = tune
        self.target_accept = target_accept
        self.mu_prior = mu_prior
        self.kappa_prior = kappa_prior
        self.progress = progress

    def _check_params(self) -> None:
        super()._check_params()
        _check_sampler(self)
        try:
            a, b = (float(x) for x in self.mu_prior)
            med, sd = (float(x) for x in self.kappa_prior)
        except (TypeError, ValueError) as exc:
            raise ParameterError(
                f"mu_prior={self.mu_prior!r} and kappa_prior={self.kappa_prior!r} must each be"
                " two numbers."
            ) from exc
        if not all(np.isfinite([a, b, med, sd])) or min(a, b, med, sd) <= 0:
            raise ParameterError(
                f"mu_prior={self.mu_prior!r} and kappa_prior={self.kappa_prior!r} need positive"
                " finite numbers."
            )

    @property
    def prior_(self) -> HyperPrior:
        return HyperPrior(*map(float, self.mu_prior), *map(float, self.kappa_prior))

    def _priors(self) -> dict:
        return self.prior_.as_dict()

    def _fit(self, data, engine, seed):
        rng = np.random.default_rng(seed)
        size = self.chains * self.draws
        extra: dict = {}
        stats_ = None
        if engine == "exact":
            grid = fit_grid(data.successes, data.trials, self.prior_)
            self.grid_ = grid
            self.exact_ = grid.mixture(data.successes, data.trials)
            mu, kappa = grid.draw(size, rng)
            mu = mu.reshape(self.chains, self.draws)
            kappa = kappa.reshape(self.chains, self.draws)
            extra = {
                "log_marginal_likelihood": grid.log_marginal_likelihood,
                "grid_points": int(grid.log_density.size),
                "grid_edge_density": grid.edge_density,
                "grid_refinement_change": grid.refinement_change,
                "interval_method": "exact" if self.exact_.exact_quantiles else "draws",
            }
        else:
            settings = SamplerSettings(
                self.draws, self.tune, self.chains, float(self.target_accept), self.progress
            )
            mu, kappa, stats_ = sample_hyper(
                data.successes, data.trials, self.prior_, settings, seed
            )
            self.exact_ = None
            extra = {
                "tune": self.tune,
                "target_accept": float(self.target_accept),
                "sampler": "pymc-nuts, collapsed (mu, log kappa)",
            }
        a = mu * kappa
        b = (1 - mu) * kappa
        y = data.successes[None, :]
        f = (data.trials - data.successes)[None, :]
        theta = np.empty((self.chains, self.draws, data.n_groups))
        for c in range(self.chains):  # one chain at a time bounds the temporaries
            theta[c] = rng.beta(a[c][:, None] + y, b[c][:, None] + f)
        theta_new = rng.beta(a, b)
        sd = np.sqrt(mu * (1 - mu) / (kappa + 1))
        hyper = {"mu": mu, "kappa": kappa, "between_group_sd": sd}
        return theta, theta_new, hyper, extra, stats_

    def _shrinkage(self) -> np.ndarray:
        n = self.data_.trials.astype(float)
        exact = getattr(self, "grid_", None) if self._engine_used == "exact" else None
        if exact is not None:
            _, kappa, w = exact.points()
            out = np.empty(len(n))
            uniq, inv = np.unique(n, return_inverse=True)
            out = ((kappa[None, :] / (kappa[None, :] + uniq[:, None])) @ w)[inv.ravel()]
            return out
        kappa = self.idata_.posterior["kappa"].values.ravel()
        uniq, inv = np.unique(n, return_inverse=True)
        return (kappa[None, :] / (kappa[None, :] + uniq[:, None])).mean(axis=1)[inv.ravel()]


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
        from . import _collapsed
        from ._logit import covariate_names, population_rates, sample, standardise

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


MODELS: dict[str, type[_Estimator]] = {
    cls.name: cls for cls in (BetaBinomial, NoPooling, CompletePooling, LogitNormal, Nested)
}


def make_model(name: str, **settings) -> _Estimator:
    """An unfitted estimator by its model name.

    Raises
    ------
    ParameterError
        ``name`` is not a model, or a setting is not one the model takes (the error lists
        the ones it does).
    """
    if name not in MODELS:
        quoted = ", ".join(repr(m) for m in MODELS)
        raise ParameterError(f"model={name!r} is not one of {quoted}.")
    cls = MODELS[name]
    accepted = cls._param_names()
    unknown = [k for k in settings if k not in accepted]
    if unknown:
        raise ParameterError(
            f"model {name!r} takes no setting {unknown[0]!r}; it takes: {', '.join(accepted)}."
        )
    return cls(**{k: v for k, v in settings.items() if v is not None})
