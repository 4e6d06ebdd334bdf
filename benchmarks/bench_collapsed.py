"""Collapsed (engine="mcmc") against full-latent (engine="latent") logit-normal NUTS.

Prints, for 30, 300 and 3,000 invented groups with one covariate, each engine's wall time,
divergences, worst R-hat and smallest bulk ESS over the hyperparameters, and the agreement of
the two: hyperparameter means and every group's posterior mean in units of the combined
Monte Carlo standard error (ArviZ mcse), plus the largest difference in group means.

    python benchmarks/bench_collapsed.py [--groups 30 300 3000] [--draws 500] [--chains 2]
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import pandas as pd
from scipy import special

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

from workbench.models import GroupCounts, LogitNormal

HYPER = ("alpha", "sigma", "beta_score")


def simulate(groups: int, seed: int) -> GroupCounts:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=groups)
    eta = -1.2 + 0.5 * x + 0.6 * rng.normal(size=groups)
    n = rng.integers(5, 400, size=groups)
    y = rng.binomial(n, special.expit(eta))
    return GroupCounts(
        [f"site-{i:05d}" for i in range(groups)], y, n, covariates=pd.DataFrame({"score": x})
    )


def fit(counts: GroupCounts, engine: str, args) -> tuple[LogitNormal, float]:
    started = time.perf_counter()
    m = LogitNormal(
        engine=engine,
        draws=args.draws,
        tune=args.draws,
        chains=args.chains,
        random_seed=args.seed,
        progress=False,
    ).fit(counts)
    return m, time.perf_counter() - started


def figures(m: LogitNormal) -> dict:
    post = m.idata_.posterior[list(HYPER)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rhat = az.rhat(post).to_array().values
        ess = az.ess(post, method="bulk").to_array().values
    return {
        "divergences": int(m.idata_.sample_stats["diverging"].sum()),
        "max_rhat": float(np.max(rhat)),
        "min_ess_bulk": float(np.min(ess)),
    }


def mcse(m: LogitNormal, name: str) -> np.ndarray:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return az.mcse(m.idata_.posterior[[name]], method="mean")[name].values


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--groups", type=int, nargs="+", default=[30, 300, 3000])
    parser.add_argument("--draws", type=int, default=500, help="draws and tuning steps per chain")
    parser.add_argument("--chains", type=int, default=2)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    print(f"draws {args.draws} + tune {args.draws} per chain, {args.chains} chains, one core")
    for groups in args.groups:
        counts = simulate(groups, seed=groups)
        fits = {e: fit(counts, e, args) for e in ("mcmc", "latent")}
        for engine, (m, seconds) in fits.items():
            f = figures(m)
            print(
                f"{groups:>6} groups  {engine:<6} {seconds:7.1f} s  divergences"
                f" {f['divergences']:>4}  max R-hat {f['max_rhat']:.3f}"
                f"  min bulk ESS {f['min_ess_bulk']:.0f}"
            )
        a, b = fits["mcmc"][0], fits["latent"][0]
        for name in (*HYPER, "theta"):
            diff = (
                a.idata_.posterior[name].mean(("chain", "draw")).values
                - b.idata_.posterior[name].mean(("chain", "draw")).values
            )
            z = np.abs(diff) / np.hypot(mcse(a, name), mcse(b, name))
            if name == "theta":
                print(
                    f"{'':>14}theta: {np.mean(z <= 4):.3f} of groups within 4 MCSE,"
                    f" max |z| {np.max(z):.2f}, max |difference| {np.max(np.abs(diff)):.4f}"
                )
            else:
                print(f"{'':>14}{name}: difference {float(diff):+.4f}, |z| {float(z):.2f}")
        print(f"{'':>14}speed-up {fits['latent'][1] / fits['mcmc'][1]:.1f}x", flush=True)


if __name__ == "__main__":
    main()
