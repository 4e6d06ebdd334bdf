"""Quadrature over a grid posterior: the refinement test and the population quantities.

Every number the exact engine prints is checked here, between a grid and the one with nodes
halfway between (``refinement_changes``), and the population quantities are integrated here
(``population_summary``) rather than read from draws.
"""

from __future__ import annotations

import numpy as np
from scipy import special, stats

from ._gridposterior import (
    KAPPA_RELATIVE_TOLERANCE,
    PROBE_PAIRS,
    PROBE_PROBABILITIES,
    RATE_TOLERANCE_SD,
    REFINE_RATE_SD,
    REFINE_TOLERANCE,
    U_BOUNDS,
    GridPosterior,
    distinct_pairs,
)


def _probe_pairs(pairs: np.ndarray, means: np.ndarray) -> np.ndarray:
    """Rows of the distinct pairs whose CDFs the refinement compares: all, or PROBE_PAIRS
    spread evenly over the order of posterior means and over the order of trials."""
    if len(pairs) <= PROBE_PAIRS:
        return np.arange(len(pairs))
    half = PROBE_PAIRS // 2
    by_mean = np.argsort(means, kind="stable")
    by_trials = np.argsort(pairs[:, 1], kind="stable")
    picks = np.linspace(0, len(pairs) - 1, half).round().astype(int)
    return np.unique(np.concatenate([by_mean[picks], by_trials[picks]]))


def refinement_changes(coarse: GridPosterior, fine: GridPosterior, successes, trials, *,
                       full: bool = True, means_only: bool = False):
    """How much the reported quantities move from ``coarse`` to ``fine`` (nodes halfway).

    Returns the largest change of a group's posterior mean (absolute); of a rate in posterior
    sds (group means and sds; each probed group's quantiles at PROBE_PROBABILITIES, as the
    CDF change there over density x sd; the population quantities); and of a probability
    (the probed CDFs, shrinkage). Unless ``full``, the costly probes are skipped (the
    probability is then inf) when the means or sds alone already ask for a finer grid.
    ``means_only``: the means alone (the rate and probability are then nan), for refits
    that use only sums over the grid (leaving one group out).
    """
    mc = coarse.mixture(successes, trials, quantile_stride=None)
    mf = fine.mixture(successes, trials, quantile_stride=None)
    m_c, var_c = mc._pair_moments()
    m_f, var_f = mf._pair_moments()
    sd_f = np.sqrt(np.maximum(var_f, 1e-300))
    mean_change = float(np.max(np.abs(m_c - m_f)))
    if means_only:
        return mean_change, np.nan, np.nan
    rate = max(float(np.max(np.abs(m_c - m_f) / sd_f)),
               float(np.max(np.abs(np.sqrt(np.maximum(var_c, 0)) - sd_f) / sd_f)))
    if not full and (mean_change >= REFINE_TOLERANCE or rate >= REFINE_RATE_SD):
        return mean_change, rate, np.inf
    pairs, _ = distinct_pairs(successes, trials)
    rows = _probe_pairs(pairs, m_f)
    sub_y, sub_n = pairs[rows, 0], pairs[rows, 1]
    pc = coarse.mixture(sub_y, sub_n, quantile_stride=None)
    pf = fine.mixture(sub_y, sub_n, quantile_stride=None)
    m1, var = pf._pair_moments()
    var = np.maximum(var, 1e-300)
    common = np.maximum(m1 * (1 - m1) / var - 1, 1e-8)
    prob = 0.0
    for q in PROBE_PROBABILITIES:
        x = np.clip(stats.beta.ppf(q, m1 * common, (1 - m1) * common), 1e-300, 1 - 1e-16)
        delta = np.abs(pc._pair_cdf(x) - pf._pair_cdf(x))
        density = pf._pair_pdf(x)
        prob = max(prob, float(delta.max()))
        with np.errstate(divide="ignore", invalid="ignore"):
            shift = np.where(density > 0, delta / (density * np.sqrt(var)), 0.0)
        rate = max(rate, float(np.nanmax(shift)))
    trial_values = np.unique(np.asarray(trials, dtype=float))
    prob = max(prob, float(np.max(np.abs(coarse.shrinkage(trial_values)
                                         - fine.shrinkage(trial_values)))))
    pop_c, pop_f = population_summary(coarse), population_summary(fine)
    for name, f in pop_f.items():
        c = pop_c[name]
        if name == "kappa":  # relative, on its log scale
            moved = np.abs(np.log(np.asarray(c[:4])) - np.log(np.asarray(f[:4])))
            rate = max(rate, float(np.max(moved)) * RATE_TOLERANCE_SD / KAPPA_RELATIVE_TOLERANCE)
        else:
            moved = np.abs(np.asarray(c[:4]) - np.asarray(f[:4])) / max(f[4], 1e-300)
            rate = max(rate, float(np.max(moved)))
    return mean_change, rate, prob


#: Nodes per axis (about) of the finer grid on which population quantiles are read, from a
#: bicubic spline of the log density: a quantile to a small share of a cell, where reading it
#: off the nodes would be off by up to half a cell.
QUANTILE_NODES = 600


#: Bins by which _weighted_quantiles finds where each quantile lies before sorting only there.
QUANTILE_BINS = 1024


def _sorted_quantiles(values, weights, probs, mass_below=0.0, total=None):
    order = np.argsort(values, kind="stable")
    v, w = values[order], weights[order]
    cdf = mass_below + np.cumsum(w) - 0.5 * w  # each sub-node's mass centred on its value
    return np.interp(np.asarray(probs) * (w.sum() if total is None else total), cdf, v)


def _weighted_quantiles(values: np.ndarray, weights: np.ndarray, probs) -> np.ndarray:
    """Quantiles of the weighted points, each point's mass centred on its value and the CDF
    interpolated linearly between them.

    The same as sorting every point, but only the points of the bins around each quantile
    are sorted (with the bins' mass below them): the two points around a quantile lie in its
    bin or in the nearest non-empty bins on either side.
    """
    lo, hi = float(values.min()), float(values.max())
    if values.size <= 8 * QUANTILE_BINS or not hi > lo:
        return _sorted_quantiles(values, weights, probs)
    scaled = (values - lo) * (QUANTILE_BINS / (hi - lo))
    bins = np.minimum(scaled.astype(np.intp), QUANTILE_BINS - 1)
    mass = np.bincount(bins, weights=weights, minlength=QUANTILE_BINS)
    below = np.concatenate([[0.0], np.cumsum(mass)])
    total = below[-1]
    filled = np.flatnonzero(mass > 0)
    out = np.empty(len(probs))
    for i, p in enumerate(probs):
        at = min(int(np.searchsorted(below, p * total, side="right")) - 1, QUANTILE_BINS - 1)
        # the nearest non-empty bins strictly below and strictly above the quantile's bin
        first = filled[max(int(np.searchsorted(filled, at)) - 1, 0)]
        last = filled[min(int(np.searchsorted(filled, at, side="right")), len(filled) - 1)]
        inside = (bins >= first) & (bins <= last)
        out[i] = _sorted_quantiles(values[inside], weights[inside], [p], below[first],
                                   total)[0]
    return out


def population_summary(grid: GridPosterior, level: float = 0.95) -> dict[str, tuple]:
    """Mean, median, central interval and sd of mu, kappa, between-group sd and new_group_rate.

    By quadrature over the grid, not from draws. Means and sds are sums over the nodes (the
    trapezoid rule on a density that vanishes at the grid's edges). Quantiles are read on a
    finer grid (QUANTILE_NODES per axis) weighted by a bicubic spline of the log density,
    the ridge between nodes by cubic splines (kappa from its marginal, mu and the
    between-group sd from their values there); the new group's rate is the exact Beta
    mixture of a group with no trials. Kept in ``grid.memo``: computed once per grid and level.
    """
    key = ("population", float(level))
    if key not in grid.memo:
        grid.memo[key] = _population_summary(grid, level)
    return grid.memo[key]


def _population_summary(grid: GridPosterior, level: float) -> dict[str, tuple]:
    from scipy.interpolate import CubicSpline, RectBivariateSpline

    w = grid.weights
    probs = np.array([0.5, (1 - level) / 2, (1 + level) / 2])
    mu = special.expit(grid.u)
    kappa = np.broadcast_to(np.exp(grid.v)[None, :], mu.shape)
    spread = mu * (1 - mu) / (kappa + 1)

    def moments(x):
        mean = float((w * x).sum())
        return mean, float(np.sqrt(max((w * x * x).sum() - mean**2, 0.0)))

    k = max(2, -(-QUANTILE_NODES // (len(grid.z) - 1)))
    fine_z = np.linspace(grid.z[0], grid.z[-1], (len(grid.z) - 1) * k + 1)
    fine_v = np.linspace(grid.v[0], grid.v[-1], (len(grid.v) - 1) * k + 1)
    rel = np.maximum(grid.log_density - grid.log_density.max(), -80.0)
    order = min(3, len(grid.z) - 1, len(grid.v) - 1)
    spline = RectBivariateSpline(grid.z, grid.v, rel, kx=order, ky=order)
    fine_w = np.exp(np.minimum(spline(fine_z, fine_v), 0.0))
    fine_w[:, [0, -1]] *= 0.5  # trapezoid weights: the edges are half cells
    fine_w[[0, -1], :] *= 0.5
    fine_w /= fine_w.sum()
    # the ridge between the nodes: cubic splines of its centre and log scale in log kappa
    centre = CubicSpline(grid.v, grid.centre)(fine_v)
    scale = np.exp(CubicSpline(grid.v, np.log(grid.scale))(fine_v))
    fine_mu = special.expit(np.clip(centre[None, :] + scale[None, :] * fine_z[:, None],
                                    *U_BOUNDS))

    out: dict[str, tuple] = {}
    mean, sd = moments(mu)
    q = _weighted_quantiles(fine_mu.ravel(), fine_w.ravel(), probs)
    out["mu"] = (mean, *map(float, q), sd)
    mean, sd = moments(kappa)
    q = np.exp(_weighted_quantiles(fine_v, fine_w.sum(axis=0), probs))
    out["kappa"] = (mean, *map(float, q), sd)
    mean, sd = moments(np.sqrt(spread))
    fine_sd = np.sqrt(fine_mu * (1 - fine_mu) / (np.exp(fine_v)[None, :] + 1))
    q = _weighted_quantiles(fine_sd.ravel(), fine_w.ravel(), probs)
    out["between_group_sd"] = (mean, *map(float, q), sd)
    # solved on the grid before its last refinement and polished on this one, as the groups'
    new = grid.mixture(np.zeros(1, dtype=np.int64), np.zeros(1, dtype=np.int64))
    mean, var = new.moments()
    out["theta_new"] = (float(mean[0]), *(float(new.ppf(q)[0]) for q in probs),
                        float(np.sqrt(var[0])))
    return out
