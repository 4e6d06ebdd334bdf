"""The estimators: settings in __init__, learning in fit, learned state ends in ``_``."""

from __future__ import annotations

import numpy as np

#: Columns of summary(), in order; later tables append their own.
from ._estimator import (  # noqa: F401  (SUMMARY_COLUMNS is re-exported)
    SUMMARY_COLUMNS,
    _check_level,
    _check_rate,
    _check_sampler,
    _Estimator,
)
from ._grid import V_BOUNDS, HyperPrior, fit_grid, population_summary
from ._gridposterior import mean_shrinkage
from ._hierarchies import LogitNormal, Nested
from ._mcmc import SamplerSettings, sample_hyper
from ._mixture import BetaPosteriors
from .exceptions import ParameterError


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
        # no population: nothing to shrink towards, so no number (the pull of the Beta(a, b)
        # prior is not pooling, and reading it as such misleads)
        return np.full(self.data_.n_groups, np.nan)


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
    #: Refine the exact grid on the means only, skipping the tolerance checks of printed
    #: numbers: for internal bulk refits that use draws (simulation-based calibration's
    #: replicates), never for a user's fit. Not a setting: it is not in get_params.
    _grid_means_only = False

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
            grid = fit_grid(data.successes, data.trials, self.prior_,
                            means_only=self._grid_means_only)
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
                "grid_refinement_rate_sd": grid.refinement_rate_sd,
                "grid_refinement_probability": grid.refinement_probability,
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

    def _exact_grid(self):
        return getattr(self, "grid_", None) if self._engine_used == "exact" else None

    def _population_by_quadrature(self, level: float) -> dict[str, tuple]:
        grid = self._exact_grid()
        return {} if grid is None else population_summary(grid, level)

    def _tail_note(self, name: str, mean: float, sd: float) -> str:
        note = super()._tail_note(name, mean, sd)
        grid = self._exact_grid()
        if name == "kappa" and grid is not None and grid.v[-1] >= V_BOUNDS[1] - 1e-9:
            edge = grid.weights.sum(axis=0)
            if edge[-1] > 1e-6 * edge.max():
                note += ("; " if note else "") + (
                    f"the posterior reaches kappa's cap ({np.exp(V_BOUNDS[1]):.0e}): its mean"
                    " and upper end depend on that cap")
        return note

    def _shrinkage(self) -> np.ndarray:
        n = self.data_.trials.astype(float)
        grid = self._exact_grid()
        if grid is not None:
            return grid.shrinkage(n)
        kappa = self.idata_.posterior["kappa"].values.ravel()
        return mean_shrinkage(kappa, np.full(len(kappa), 1.0 / len(kappa)), n)


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
