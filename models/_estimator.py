"""The estimator contract every model follows: settings in __init__, fit returns self."""

from __future__ import annotations

import inspect
import time
from typing import ClassVar

import numpy as np
import pandas as pd

from ._data import GroupCounts
from ._posterior import (
    add_log_likelihood,
    draw_quantiles,
    draw_share_above,
    make_idata,
    theta_draws,
)
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
            group_vars=getattr(self, "_group_vars", None),
            cell_data=getattr(self, "_cell_data", None),
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
            mean = exact.mean() if exact is not None else theta_draws(self.idata_).mean(axis=0)
            lower, median, upper = draw_quantiles(self.idata_, [lo_q, 0.5, hi_q])
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
                above = draw_share_above(theta_draws(self.idata_), target)
            table["prob_above_target"] = np.clip(above, 0.0, 1.0)
        return table

    def population(self, level: float = 0.95) -> pd.DataFrame:
        """Population quantities with central intervals: one row each.

        ``population_mean`` (mu), ``concentration`` (kappa; larger = groups more alike),
        ``between_group_sd`` (sd of true rates across groups), ``new_group_rate`` (the rate of
        a new, unseen group: the posterior predictive). ``note`` warns where the mean is set by
        a heavy upper tail (posterior sd above the mean): read the median and interval there.
        """
        self._require_fitted()
        level = _check_level(level)
        post = self.idata_.posterior
        rows = []
        extra = [v for v in post.data_vars if v.startswith("beta_")]
        names = ("mu", "kappa", "between_group_sd", "theta_new", "alpha", "sigma", "tau", *extra)
        quadrature = self._population_by_quadrature(level)
        for name in names:
            if name not in post:
                continue
            if name in quadrature:
                mean, med, lo, hi, sd = quadrature[name]
            else:
                x = post[name].values.ravel()
                lo, med, hi = np.quantile(x, [(1 - level) / 2, 0.5, (1 + level) / 2])
                mean, sd = float(x.mean()), float(x.std())
            rows.append((name, float(mean), float(med), float(lo), float(hi),
                         self._tail_note(name, float(mean), float(sd))))
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
        table = pd.DataFrame(rows, columns=["quantity", "mean", "median", "lower", "upper",
                                            "note"])
        table.insert(1, "parameter", table["quantity"])
        table["quantity"] = table["quantity"].map(labels)
        return table

    def _population_by_quadrature(self, level: float) -> dict[str, tuple]:
        """(mean, median, lower, upper, sd) of population quantities known in closed form."""
        return {}

    def _tail_note(self, name: str, mean: float, sd: float) -> str:
        if name not in ("kappa", "sigma", "tau") or not sd > abs(mean) > 0:
            return ""
        return (f"heavy upper tail (posterior sd {sd:.3g} above the mean): the mean is set by"
                " the tail; read the median and interval")

    def _shrinkage(self) -> np.ndarray:
        """Posterior mean of kappa / (kappa + n_j): weight on the population mean."""
        raise NotImplementedError

    def _priors(self) -> dict:
        raise NotImplementedError

    def _fit(self, data, engine, seed):
        raise NotImplementedError
