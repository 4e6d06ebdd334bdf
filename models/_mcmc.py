"""MCMC engine: PyMC's NUTS on the collapsed beta-binomial posterior.

The sampler works on (mu, log kappa) with every theta_j integrated out (a Beta-binomial
likelihood per distinct (successes, trials) pair, weighted by how many groups share it).
Two free parameters whatever the number of groups, no funnel between kappa and the group
rates, and a cost per gradient set by the distinct pairs. theta_j is then drawn from its
conditional Beta(mu kappa + y_j, (1 - mu) kappa + n_j - y_j), one per hyper-draw: this is an
exact draw from the joint posterior, not an approximation. log kappa's prior is truncated to
the exact engine's bounds (kappa from 1e-6 to 1e8), so the two engines fit the same model.
"""

from __future__ import annotations

import logging
import sys
import warnings
from dataclasses import dataclass

import numpy as np

from ._grid import V_BOUNDS, HyperPrior
from .exceptions import SamplingError


@dataclass(frozen=True)
class SamplerSettings:
    draws: int = 1000
    tune: int = 1000
    chains: int = 4
    target_accept: float = 0.9
    progress: bool | None = None  # None: a progress bar only when stderr is a terminal


#: Sampler statistics kept in the posterior's sample_stats group.
SAMPLE_STATS = (
    "diverging",
    "tree_depth",
    "reached_max_treedepth",
    "energy",
    "acceptance_rate",
    "step_size",
    "n_steps",
)


def run_nuts(settings: SamplerSettings, seed: int):
    """pm.sample on the model in context, quietly; (posterior dataset, sampler statistics).

    One process (cores=1: forked workers fail at random on Linux, per the field notes), a
    progress bar only on a terminal, PyMC's own convergence checks off (ours judge).
    """
    import pymc as pm

    progress = sys.stderr.isatty() if settings.progress is None else settings.progress
    logger = logging.getLogger("pymc")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            trace = pm.sample(
                draws=settings.draws,
                tune=settings.tune,
                chains=settings.chains,
                cores=1,
                target_accept=settings.target_accept,
                random_seed=seed,
                progressbar=progress,
                compute_convergence_checks=False,
                return_inferencedata=True,
            )
    except Exception as exc:  # noqa: BLE001 - any sampler failure becomes ours
        raise SamplingError(f"the NUTS sampler failed: {exc}") from exc
    finally:
        logger.setLevel(level)
    stats = {n: trace.sample_stats[n].values for n in SAMPLE_STATS if n in trace.sample_stats}
    return trace.posterior, stats


def sample_hyper(
    successes: np.ndarray,
    trials: np.ndarray,
    prior: HyperPrior,
    settings: SamplerSettings,
    seed: int,
) -> tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]]:
    """mu and kappa draws as (chain, draw) arrays, plus the sampler's statistics."""
    import pymc as pm

    pairs, counts = np.unique(np.stack([successes, trials], axis=1), axis=0, return_counts=True)
    seen = pairs[:, 1] > 0
    pairs, counts = pairs[seen], counts[seen]
    with pm.Model():
        mu = pm.Beta("mu", prior.mu_a, prior.mu_b)
        # the exact engine's cap on kappa (1e-6 to 1e8), so both engines fit one model
        log_kappa = pm.TruncatedNormal(
            "log_kappa", np.log(prior.kappa_median), prior.kappa_log_sd,
            lower=V_BOUNDS[0], upper=V_BOUNDS[1],
        )
        kappa = pm.math.exp(log_kappa)
        if len(pairs):
            dist = pm.BetaBinomial.dist(n=pairs[:, 1], alpha=mu * kappa, beta=(1 - mu) * kappa)
            pm.Potential("likelihood", (counts * pm.logp(dist, pairs[:, 0])).sum())
        post, stats = run_nuts(settings, seed)
    return post["mu"].values, np.exp(post["log_kappa"].values), stats
