"""Closed-form group posteriors rebuilt from a stored posterior (exact engines only).

An exact fit keeps its closed forms on the estimator (``exact_``); a run folder keeps only the
draws. The exact engines are deterministic given the counts and the priors (the conjugate
Betas trivially, the beta-binomial grid because laying and refining it uses no random
numbers), so the same closed forms can be rebuilt from ``posterior.nc`` alone.
"""

from __future__ import annotations

import numpy as np

from ._grid import HyperPrior, fit_grid
from ._mixture import BetaMixturePosteriors, BetaPosteriors
from ._posterior import attr, counts_of


def closed_form(idata) -> BetaPosteriors | BetaMixturePosteriors | None:
    """The exact engine's group posteriors for ``idata``; ``None`` for a sampled (MCMC) fit.

    Returns an object with ``mean()``, ``sf(x)``, ``cdf(x)``, ``ppf(q)`` per group, identical
    to the fitted estimator's ``exact_``.
    """
    if attr(idata, "engine") != "exact":
        return None
    data = counts_of(idata)
    model = attr(idata, "model")
    priors = attr(idata, "priors") or {}
    y = data.successes.astype(float)
    n = data.trials.astype(float)
    if model == "no-pooling":
        a, b = float(priors["a"]), float(priors["b"])
        return BetaPosteriors(a + y, b + n - y)
    if model == "complete-pooling":
        a, b = float(priors["a"]), float(priors["b"])
        alpha = a + y.sum()
        beta = b + (n - y).sum()
        return BetaPosteriors(np.full(len(y), alpha), np.full(len(y), beta))
    if model == "beta-binomial":
        prior = HyperPrior(
            float(priors["mu_a"]),
            float(priors["mu_b"]),
            float(priors["kappa_median"]),
            float(priors["kappa_log_sd"]),
        )
        grid = fit_grid(data.successes, data.trials, prior)
        return grid.mixture(data.successes, data.trials)
    return None
