"""Group estimates scored in partitions on a Dask cluster, the hyper-posterior broadcast.

The beta-binomial exact engine fits its hyper-posterior once, on this machine, from the
distinct (successes, trials) pairs: a grid of weights over (logit mu, log kappa). Given that
grid, each group's posterior is a Beta mixture over the grid points, so its closed forms
(posterior mean, median and interval, probability above the target, shrinkage) need only
the grid and the group's own counts. The grid is sent once to every worker; the distinct
pairs are cut into partitions and scored where they land; small per-pair tables come back
and are mapped onto the groups.

The columns equal the estimator's own :meth:`summary` (the same formulas on the same grid;
a pair's arithmetic does not depend on which pairs share its partition, up to the rounding
of a matrix product). Only the closed forms are computed on the cluster: when the
estimator takes its intervals from draws (too many pairs for exact quantiles), those come
from the draws here, as the summary takes them. No files, no printing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..models import attr, draw_quantiles
from ..models._grid import distinct_pairs

#: Partitions per worker thread when none are asked for.
PARTITIONS_PER_THREAD = 2


def can_score(estimator) -> bool:
    """Whether the estimator's group posteriors are a grid mixture (beta-binomial, exact)."""
    grid = getattr(estimator, "grid_", None)
    return (grid is not None and getattr(estimator, "exact_", None) is not None
            and attr(estimator.idata_, "engine") == "exact")


def score_pairs(grid, successes: np.ndarray, trials: np.ndarray, *, level: float,
                target: float | None, quantiles: bool) -> dict[str, np.ndarray]:
    """Closed forms for distinct (successes, trials) pairs under the grid hyper-posterior."""
    mixture = grid.mixture(successes, trials)
    _, kappa, w = grid.points()
    n = np.asarray(trials, dtype=float)
    out = {"posterior_mean": mixture.mean(),
           "shrinkage": (kappa[None, :] / (kappa[None, :] + n[:, None])) @ w}
    if quantiles:
        lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
        out["posterior_median"] = mixture.ppf(0.5)
        out["lower"] = mixture.ppf(lo_q)
        out["upper"] = mixture.ppf(hi_q)
    if target is not None:
        out["prob_above_target"] = np.clip(mixture.sf(target), 0.0, 1.0)
    return out


def score_on_cluster(client, estimator, level: float, target: float | None = None, *,
                     partitions: int | None = None) -> tuple[pd.DataFrame, dict]:
    """The estimator's summary table, its closed forms scored in partitions on the cluster.

    Returns ``(table, record)``: the table has the columns and rows of
    ``estimator.summary(level, target=target)``; the record says how it was cut.
    """
    data = estimator.data_
    pairs, index = distinct_pairs(data.successes, data.trials)
    if partitions is None:
        threads = int(sum(client.nthreads().values()))
        partitions = max(1, PARTITIONS_PER_THREAD * threads)
    cuts = np.array_split(np.arange(len(pairs)), min(int(partitions), len(pairs)))
    quantiles = bool(estimator.exact_.exact_quantiles)
    grid = client.scatter(estimator.grid_, broadcast=True)
    futures = [client.submit(score_pairs, grid, pairs[c, 0], pairs[c, 1], level=level,
                             target=target, quantiles=quantiles, pure=False) for c in cuts]
    parts = client.gather(futures)
    per_pair = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    if not quantiles:  # the summary's own rule: intervals from the draws
        lower, median, upper = draw_quantiles(estimator.idata_,
                                              [(1 - level) / 2, 0.5, (1 + level) / 2])
        per_group = {"posterior_median": median, "lower": lower, "upper": upper}
    else:
        per_group = {}
    column = {k: v[index] for k, v in per_pair.items()} | per_group
    table = pd.DataFrame({
        "group": data.names.astype(str), "successes": data.successes, "trials": data.trials,
        "observed_rate": data.observed_rate,
        **{k: column[k] for k in ("posterior_mean", "posterior_median", "lower", "upper",
                                  "shrinkage")},
    })
    if target is not None:
        table["prob_above_target"] = column["prob_above_target"]
    record = {"scored_on": "cluster", "partitions": len(cuts), "distinct_pairs": len(pairs),
              "intervals": "closed form" if quantiles else "draws, on this machine"}
    return table, record
