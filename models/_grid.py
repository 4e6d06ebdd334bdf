"""Exact engine for the beta-binomial hierarchy: quadrature over (logit mu, log kappa).

With theta_j integrated out, p(mu, kappa | data) is two-dimensional. The log marginal
likelihood of all groups at one (mu, kappa) needs only sums over the *distinct* values of
successes, failures and trials:

    sum_j [lgamma(y_j + a) + lgamma(f_j + b) - lgamma(n_j + kappa)]
      - G' [lgamma(a) + lgamma(b) - lgamma(kappa)]      (a = mu kappa, b = (1 - mu) kappa)

so a grid point costs the number of distinct counts, not the number of groups.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, special, stats

from ._mixture import BetaMixturePosteriors

#: Bounds of the transformed space: logit mu and log kappa (kappa capped at 1e8).
U_BOUNDS = (-30.0, 30.0)
V_BOUNDS = (np.log(1e-6), np.log(1e8))
EDGE_TOLERANCE = 1e-10  # largest density allowed on the grid's edge, relative to the mode
REFINE_TOLERANCE = 1e-6  # largest change of any posterior mean when the grid is refined

#: The engine's stated tolerance (README, "How exact is exact"): every printed rate (mean,
#: median, interval end, population quantity) within RATE_TOLERANCE_SD of its posterior sd,
#: every printed probability and shrinkage within PROBABILITY_TOLERANCE, kappa within
#: KAPPA_RELATIVE_TOLERANCE; held against an independent quadrature in
#: tests/models/test_exact_tolerance.py.
RATE_TOLERANCE_SD = 0.01
PROBABILITY_TOLERANCE = 2e-4
KAPPA_RELATIVE_TOLERANCE = 0.01
EXACT_TOLERANCE = {"rate_sd": RATE_TOLERANCE_SD, "probability": PROBABILITY_TOLERANCE,
                   "kappa_relative": KAPPA_RELATIVE_TOLERANCE}
#: The refinement test asks the same of the change between the last two grids: that change
#: bounds the error of the finer one, as long as the error falls at least twofold per halving
#: of the spacing (it falls fourfold or faster here; the independent test checks the result).
REFINE_RATE_SD = RATE_TOLERANCE_SD
REFINE_PROBABILITY = PROBABILITY_TOLERANCE
MAX_REFINEMENTS = 5
#: Posterior probabilities at which each group's CDF is compared under refinement (covers
#: every central interval up to 99% and any target inside the bulk).
PROBE_PROBABILITIES = (0.005, 0.025, 0.1, 0.25, 0.5, 0.75, 0.9, 0.975, 0.995)
#: Most distinct (successes, trials) pairs whose CDFs are compared (spread over the range of
#: posterior means and of trials); means and sds are compared for every pair.
PROBE_PAIRS = 256
#: Sub-nodes along logit mu per unit of (cell width / theta's conditional width in logit mu),
#: and at most this many per cell (see GridPosterior.cdf_points).
SUBNODE_SHARPNESS = 2.0
MAX_SUBNODES = 16


@dataclass(frozen=True)
class HyperPrior:
    """mu ~ Beta(mu_a, mu_b); log kappa ~ Normal(log(kappa_median), kappa_log_sd)."""

    mu_a: float = 1.0
    mu_b: float = 1.0
    kappa_median: float = 20.0
    kappa_log_sd: float = 3.0

    def as_dict(self) -> dict[str, float]:
        return {
            "mu": f"Beta({self.mu_a:g}, {self.mu_b:g})",
            "kappa": f"LogNormal(log {self.kappa_median:g}, {self.kappa_log_sd:g})",
            "mu_a": self.mu_a,
            "mu_b": self.mu_b,
            "kappa_median": self.kappa_median,
            "kappa_log_sd": self.kappa_log_sd,
        }


#: From here on lgamma(x + a) - lgamma(x) is taken from Stirling's series (its next term is
#: below 1e-25 there), where the two lgammas, each near x log x, would cancel to a few nats.
STIRLING_FROM = 1e6


def _lgamma_base(x: np.ndarray) -> np.ndarray:
    """lgamma(x) for x > 0 and 0 at x = 0 (the part of lgamma(x + a) that does not vary)."""
    x = np.asarray(x, dtype=float)
    return np.where(x > 0, special.gammaln(np.where(x > 0, x, 1.0)), 0.0)


def lgamma_shift(x: np.ndarray, a: np.ndarray) -> np.ndarray:
    """lgamma(x + a) - lgamma(x) (lgamma(a) at x = 0), stable for x up to 1e15 and beyond.

    Broadcasts ``x`` (counts, >= 0) against ``a`` (> 0). For x >= STIRLING_FROM the
    difference of Stirling's series: (x - 1/2) log1p(a/x) + a log(x + a) - a
    + 1/(12 (x + a)) - 1/(12 x), every term small or exact, so no cancellation.
    """
    x, a = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(a, dtype=float))
    big = x >= STIRLING_FROM
    out = special.gammaln(x + a) - _lgamma_base(x)
    if big.any():
        xb, ab = x[big], a[big]
        out[big] = ((xb - 0.5) * np.log1p(ab / xb) + ab * np.log(xb + ab) - ab
                    + 1.0 / (12.0 * (xb + ab)) - 1.0 / (12.0 * xb))
    return out


class _Counts:
    """Distinct successes, failures and trials with their multiplicities."""

    def __init__(self, successes: np.ndarray, trials: np.ndarray) -> None:
        seen = trials > 0
        y = successes[seen]
        n = trials[seen]
        self.n_informative = int(seen.sum())
        self.y_vals, self.y_counts = np.unique(y, return_counts=True)
        self.f_vals, self.f_counts = np.unique(n - y, return_counts=True)
        self.n_vals, self.n_counts = np.unique(n, return_counts=True)
        log_choose = special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)
        self.log_choose_total = float(log_choose.sum())
        # what loglik leaves out (it does not vary with mu and kappa): sum of lgamma(y) +
        # lgamma(f) - lgamma(n) over groups; the log marginal likelihood adds it back
        self.log_constant = float(_lgamma_base(self.y_vals) @ self.y_counts
                                  + _lgamma_base(self.f_vals) @ self.f_counts
                                  - _lgamma_base(self.n_vals) @ self.n_counts)

    def loglik(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Log marginal likelihood at points (u, v), less binomial coefficients and
        ``log_constant``: sums of lgamma shifts, so no large lgammas cancel."""
        u = np.asarray(u, dtype=float)
        v = np.asarray(v, dtype=float)
        shape = np.broadcast(u, v).shape
        u = np.broadcast_to(u, shape).ravel()
        v = np.broadcast_to(v, shape).ravel()
        kappa = np.exp(v)
        mu = special.expit(u)
        a = mu * kappa
        b = kappa - a
        out = np.zeros(len(u))
        step = max(1, 2_000_000 // max(len(self.y_vals), len(self.f_vals), len(self.n_vals), 1))
        for s in range(0, len(u), step):
            sl = slice(s, s + step)
            aa, bb, kk = a[sl], b[sl], kappa[sl]
            total = lgamma_shift(self.y_vals[:, None], aa).T @ self.y_counts
            total += lgamma_shift(self.f_vals[:, None], bb).T @ self.f_counts
            total -= lgamma_shift(self.n_vals[:, None], kk).T @ self.n_counts
            total -= self.n_informative * (special.gammaln(aa) + special.gammaln(bb))
            total += self.n_informative * special.gammaln(kk)
            out[sl] = total
        return out.reshape(shape)


def _log_prior(u: np.ndarray, v: np.ndarray, prior: HyperPrior) -> np.ndarray:
    # density of (logit mu, log kappa): Beta(mu) * |dmu/du| * Normal(v)
    log_mu = -np.logaddexp(0.0, -u)
    log_1m = -np.logaddexp(0.0, u)
    lp_u = prior.mu_a * log_mu + prior.mu_b * log_1m - special.betaln(prior.mu_a, prior.mu_b)
    z = (v - np.log(prior.kappa_median)) / prior.kappa_log_sd
    lp_v = -0.5 * z**2 - np.log(prior.kappa_log_sd * np.sqrt(2 * np.pi))
    return lp_u + lp_v


def distinct_pairs(successes, trials) -> tuple[np.ndarray, np.ndarray]:
    """The distinct (successes, trials) pairs, sorted, and each group's row among them.

    One int64 key per pair and a 1-D unique (about 40 times faster than ``axis=0`` at a
    million groups); the 2-D unique where the key would overflow int64 (trials near 1e15).
    """
    y = np.asarray(successes, dtype=np.int64).ravel()
    n = np.asarray(trials, dtype=np.int64).ravel()
    base = int(y.max(initial=0)) + 1
    if n.size and float(n.max()) * base + base < 2.0**62:
        keys, index = np.unique(n * base + y, return_inverse=True)
        return np.stack([keys % base, keys // base], axis=1), index.ravel()
    pairs, index = np.unique(np.stack([y, n], axis=1), axis=0, return_inverse=True)
    return pairs, index.ravel()


@dataclass
class GridPosterior:
    """The hyper-posterior on a grid, and what was checked about it."""

    u: np.ndarray  # grid nodes, logit mu
    v: np.ndarray  # grid nodes, log kappa
    log_density: np.ndarray  # (len(u), len(v)) unnormalised log posterior
    log_marginal_likelihood: float
    edge_density: float  # largest density on the grid edge, relative to the mode
    refinement_change: float  # largest change of a posterior mean under refinement
    widenings: int
    #: largest change under refinement of a rate (group CDF at its probes, population
    #: quantities), in posterior sds, and of a probability (group CDF, shrinkage)
    refinement_rate_sd: float = np.nan
    refinement_probability: float = np.nan
    refinements: int = 0

    @property
    def weights(self) -> np.ndarray:
        w = np.exp(self.log_density - self.log_density.max())
        return w / w.sum()

    def points(self, stride: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """mu, kappa and weight of every grid point carrying mass (flattened).

        ``stride=2`` takes every other node: the grid before its last refinement.
        """
        u, v = self.u[::stride], self.v[::stride]
        uu, vv = np.meshgrid(u, v, indexing="ij")
        ld = self.log_density[::stride, ::stride]
        w = np.exp(ld - ld.max()).ravel()
        w /= w.sum()
        keep = w > 1e-16
        return special.expit(uu.ravel()[keep]), np.exp(vv.ravel()[keep]), w[keep]

    def mixture(
        self,
        successes: np.ndarray,
        trials: np.ndarray,
        *,
        mass: float = 1 - 1e-12,
        stride: int = 1,
        quantile_stride: int | None = 2,
    ) -> BetaMixturePosteriors:
        """theta_j's exact posterior: a Beta mixture over the grid points carrying ``mass``.

        Quantiles are solved on the grid before its last refinement (``quantile_stride=2``,
        a quarter of the points), whose posterior means the refinement check showed to agree
        within 1e-6; means always use the full grid.
        """
        mu, kappa, w = self.points(stride)
        order = np.argsort(w)[::-1]
        keep = order[: int(np.searchsorted(np.cumsum(w[order]), mass)) + 1]
        pairs, index = distinct_pairs(successes, trials)
        coarse = None
        if quantile_stride and len(self.u) > 2 * quantile_stride:
            coarse = self.mixture(
                successes, trials, mass=1 - 1e-10, stride=quantile_stride, quantile_stride=None
            )
        sub_mu, sub_kappa, sub_w = self.cdf_points(stride, mass)
        return BetaMixturePosteriors(
            w[keep],
            mu[keep] * kappa[keep],
            (1 - mu[keep]) * kappa[keep],
            pairs[:, 0],
            pairs[:, 1],
            index.ravel(),
            quantile_source=coarse,
            cdf_components=(sub_w, sub_mu * sub_kappa, (1 - sub_mu) * sub_kappa),
        )

    def cdf_points(self, stride: int = 1, mass: float = 1 - 1e-12):
        """mu, kappa and weight of the points on which group CDFs are summed.

        Where kappa is large, theta given (mu, kappa) is much narrower than a grid cell in
        logit mu, so its CDF is nearly a step in mu and a sum over the nodes is a staircase.
        Each such row of the grid is split into sub-nodes along logit mu (their number grows
        with the cell's width over theta's conditional width, up to MAX_SUBNODES), weighted by
        a bicubic spline of the log density: the same posterior, finely enough for a CDF.
        """
        from scipy.interpolate import RectBivariateSpline

        u, v = self.u[::stride], self.v[::stride]
        rel = self.log_density[::stride, ::stride]
        rel = rel - rel.max()
        w = np.exp(rel)
        w /= w.sum()
        flat = np.sort(w.ravel())[::-1]
        floor = flat[min(int(np.searchsorted(np.cumsum(flat), mass)), flat.size - 1)]
        kept = w >= floor
        h = u[1] - u[0] if len(u) > 1 else 0.0
        splits = np.clip(np.ceil(SUBNODE_SHARPNESS * h * np.sqrt(np.exp(v) / 4.0)),
                         1, MAX_SUBNODES).astype(int)
        spline = None
        if splits.max() > 1 and min(len(u), len(v)) > 3:
            spline = RectBivariateSpline(u, v, np.maximum(rel, -80.0), kx=3, ky=3)
        else:
            splits[:] = 1
        out_u, out_v, out_w = [], [], []
        for count in np.unique(splits):
            iu, jv = np.nonzero(kept & (splits == count)[None, :])
            if count == 1:
                out_u.append(u[iu])
                out_v.append(v[jv])
                out_w.append(np.exp(rel[iu, jv]))
                continue
            offsets = (np.arange(count) + 0.5) / count - 0.5
            su = (u[iu][:, None] + h * offsets[None, :]).ravel()
            sv = np.repeat(v[jv], count)
            out_u.append(su)
            out_v.append(sv)
            out_w.append(np.exp(np.minimum(spline.ev(su, sv), 0.0)) / count)
        su, sv, sw = (np.concatenate(x) for x in (out_u, out_v, out_w))
        return special.expit(su), np.exp(sv), sw / sw.sum()

    def shrinkage(self, trials: np.ndarray) -> np.ndarray:
        """Posterior mean of kappa / (kappa + n) for each n in ``trials``."""
        _, kappa, w = self.points()
        n = np.asarray(trials, dtype=float)
        uniq, inv = np.unique(n, return_inverse=True)
        return ((kappa[None, :] / (kappa[None, :] + uniq[:, None])) @ w)[inv.ravel()]

    def draw(self, size: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Independent draws of (mu, kappa): a grid cell by weight, then uniform within it."""
        w = self.weights.ravel()
        cell = rng.choice(w.size, size=size, p=w)
        iu, iv = np.unravel_index(cell, self.log_density.shape)
        hu = self.u[1] - self.u[0]
        hv = self.v[1] - self.v[0]
        u = self.u[iu] + rng.uniform(-0.5, 0.5, size) * hu
        v = self.v[iv] + rng.uniform(-0.5, 0.5, size) * hv
        return special.expit(u), np.exp(v)


def _find_mode(counts: _Counts, prior: HyperPrior, start_u: float) -> tuple[np.ndarray, np.ndarray]:
    def neg(x):
        return -(counts.loglik(x[0], x[1]) + _log_prior(x[0], x[1], prior)).item()

    best = None
    for v0 in (np.log(prior.kappa_median), 0.0, 6.0, 12.0):
        res = optimize.minimize(
            neg, x0=[start_u, v0], method="L-BFGS-B", bounds=[U_BOUNDS, V_BOUNDS]
        )
        if best is None or res.fun < best.fun:
            best = res
    x = best.x
    # curvature by central differences, for the grid's size
    h = 1e-3
    hess = np.empty((2, 2))
    f0 = neg(x)
    for i in range(2):
        for j in range(2):
            ei = np.eye(2)[i] * h
            ej = np.eye(2)[j] * h
            if i == j:
                hess[i, i] = (neg(x + ei) - 2 * f0 + neg(x - ei)) / h**2
            else:
                hess[i, j] = (
                    neg(x + ei + ej) - neg(x + ei - ej) - neg(x - ei + ej) + neg(x - ei - ej)
                ) / (4 * h**2)
    try:
        cov = np.linalg.inv(hess)
        if not np.all(np.isfinite(np.diag(cov))) or np.any(np.diag(cov) <= 0):
            raise np.linalg.LinAlgError  # not a maximum's curvature: fall back on the prior
        sd = np.sqrt(np.diag(cov))
    except np.linalg.LinAlgError:
        sd = np.array([1.0, prior.kappa_log_sd])
    return x, np.clip(sd, 1e-4, [10.0, 2 * prior.kappa_log_sd])


def fit_grid(
    successes: np.ndarray,
    trials: np.ndarray,
    prior: HyperPrior,
    *,
    points: int = 25,
    width: float = 7.0,
) -> GridPosterior:
    """Lay, check and refine the grid; return the hyper-posterior on it."""
    counts = _Counts(successes, trials)
    pooled = (successes.sum() + 0.5) / (trials.sum() + 1.0)
    mode, sd = _find_mode(counts, prior, float(special.logit(pooled)))
    lo = np.maximum(mode - width * sd, [U_BOUNDS[0], V_BOUNDS[0]])
    hi = np.minimum(mode + width * sd, [U_BOUNDS[1], V_BOUNDS[1]])

    def evaluate(lo, hi, m):
        u = np.linspace(lo[0], hi[0], m)
        v = np.linspace(lo[1], hi[1], m)
        uu, vv = np.meshgrid(u, v, indexing="ij")
        ld = counts.loglik(uu, vv) + _log_prior(uu, vv, prior)
        return u, v, ld

    widenings = 0
    while True:
        u, v, ld = evaluate(lo, hi, points)
        rel = ld - ld.max()
        edges = {
            (0, 0): rel[0, :].max(),
            (0, 1): rel[-1, :].max(),
            (1, 0): rel[:, 0].max(),
            (1, 1): rel[:, -1].max(),
        }
        grew = False
        open_edges = []
        for (axis, side), value in edges.items():
            bounds = (U_BOUNDS, V_BOUNDS)[axis]
            at_bound = lo[axis] <= bounds[0] if side == 0 else hi[axis] >= bounds[1]
            if at_bound:
                continue  # the hard cap of the space (kappa <= 1e8): mass past it is not ours
            open_edges.append(value)
            if value > np.log(EDGE_TOLERANCE):
                span = hi[axis] - lo[axis]
                if side == 0:
                    lo[axis] = max(lo[axis] - 0.5 * span, bounds[0])
                else:
                    hi[axis] = min(hi[axis] + 0.5 * span, bounds[1])
                grew = True
        if not grew or widenings >= 12:
            break
        widenings += 1
    edge_density = float(np.exp(max(open_edges))) if open_edges else 0.0

    # refinement: the same box with nodes halfway between; compare every reported quantity
    change = rate_sd = prob = np.inf
    refinements = 0
    for step in range(MAX_REFINEMENTS):
        coarse = GridPosterior(u, v, ld, 0.0, edge_density, np.nan, widenings)
        fine_u, fine_v, fine_ld = evaluate(lo, hi, 2 * points - 1)
        fine = GridPosterior(fine_u, fine_v, fine_ld, 0.0, edge_density, np.nan, widenings)
        change, rate_sd, prob = refinement_changes(
            coarse, fine, successes, trials, full=step == MAX_REFINEMENTS - 1
        )
        u, v, ld, points = fine_u, fine_v, fine_ld, 2 * points - 1
        refinements += 1
        if change < REFINE_TOLERANCE and rate_sd < REFINE_RATE_SD and prob < REFINE_PROBABILITY:
            break
    hu = u[1] - u[0]
    hv = v[1] - v[0]
    top = ld.max()
    log_ml = float(top + np.log(np.exp(ld - top).sum() * hu * hv))
    log_ml += counts.log_choose_total + counts.log_constant
    return GridPosterior(u, v, ld, log_ml, edge_density, change, widenings,
                         rate_sd, prob, refinements)


def _probe_pairs(successes, trials, means: np.ndarray) -> np.ndarray:
    """Rows of the distinct pairs whose CDFs the refinement compares: all, or PROBE_PAIRS
    spread evenly over the order of posterior means and over the order of trials."""
    pairs, _ = distinct_pairs(successes, trials)
    if len(pairs) <= PROBE_PAIRS:
        return np.arange(len(pairs))
    half = PROBE_PAIRS // 2
    by_mean = np.argsort(means, kind="stable")
    by_trials = np.argsort(pairs[:, 1], kind="stable")
    picks = np.linspace(0, len(pairs) - 1, half).round().astype(int)
    return np.unique(np.concatenate([by_mean[picks], by_trials[picks]]))


def refinement_changes(coarse: GridPosterior, fine: GridPosterior, successes, trials, *,
                       full: bool = True):
    """How much the reported quantities move from ``coarse`` to ``fine`` (nodes halfway).

    Returns the largest change of a group's posterior mean (absolute); of a rate in posterior
    sds (group means and sds; each probed group's quantiles at PROBE_PROBABILITIES, as the
    CDF change there over density x sd; the population quantities); and of a probability
    (the probed CDFs, shrinkage). Unless ``full``, the costly probes are skipped (the
    probability is then inf) when the means or sds alone already ask for a finer grid.
    """
    mc = coarse.mixture(successes, trials, quantile_stride=None)
    mf = fine.mixture(successes, trials, quantile_stride=None)
    m_c, var_c = mc._pair_moments()
    m_f, var_f = mf._pair_moments()
    sd_f = np.sqrt(np.maximum(var_f, 1e-300))
    mean_change = float(np.max(np.abs(m_c - m_f)))
    rate = max(float(np.max(np.abs(m_c - m_f) / sd_f)),
               float(np.max(np.abs(np.sqrt(np.maximum(var_c, 0)) - sd_f) / sd_f)))
    if not full and (mean_change >= REFINE_TOLERANCE or rate >= REFINE_RATE_SD):
        return mean_change, rate, np.inf
    rows = _probe_pairs(successes, trials, m_f)
    pairs, _ = distinct_pairs(successes, trials)
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


def _weighted_quantiles(values: np.ndarray, weights: np.ndarray, probs) -> np.ndarray:
    order = np.argsort(values, kind="stable")
    v, w = values[order], weights[order]
    cdf = np.cumsum(w) - 0.5 * w  # each sub-node's mass centred on its value
    return np.interp(probs, cdf / w.sum(), v)


def population_summary(grid: GridPosterior, level: float = 0.95) -> dict[str, tuple]:
    """Mean, median, central interval and sd of mu, kappa, between-group sd and new_group_rate.

    By quadrature over the grid, not from draws. Means and sds are sums over the nodes (the
    trapezoid rule on a density that vanishes at the grid's edges). Quantiles are read on a
    finer grid (QUANTILE_NODES per axis), from a bicubic spline of the log density (mu and
    kappa from their marginals, the between-group sd from its values there); the new group's
    rate is the exact Beta mixture of a group with no trials.
    """
    from scipy.interpolate import RectBivariateSpline

    w = grid.weights
    probs = np.array([0.5, (1 - level) / 2, (1 + level) / 2])
    uu, vv = np.meshgrid(grid.u, grid.v, indexing="ij")
    mu, kappa = special.expit(uu), np.exp(vv)
    spread = mu * (1 - mu) / (kappa + 1)

    def moments(x):
        mean = float((w * x).sum())
        return mean, float(np.sqrt(max((w * x * x).sum() - mean**2, 0.0)))

    k = max(2, -(-QUANTILE_NODES // (len(grid.u) - 1)))
    fine_u = np.linspace(grid.u[0], grid.u[-1], (len(grid.u) - 1) * k + 1)
    fine_v = np.linspace(grid.v[0], grid.v[-1], (len(grid.v) - 1) * k + 1)
    rel = np.maximum(grid.log_density - grid.log_density.max(), -80.0)
    order = min(3, len(grid.u) - 1, len(grid.v) - 1)
    spline = RectBivariateSpline(grid.u, grid.v, rel, kx=order, ky=order)
    fine_w = np.exp(np.minimum(spline(fine_u, fine_v), 0.0))
    fine_w[:, [0, -1]] *= 0.5  # trapezoid weights: the edges are half cells
    fine_w[[0, -1], :] *= 0.5
    fine_w /= fine_w.sum()

    out: dict[str, tuple] = {}
    mean, sd = moments(mu)
    q = special.expit(_weighted_quantiles(fine_u, fine_w.sum(axis=1), probs))
    out["mu"] = (mean, *map(float, q), sd)
    mean, sd = moments(kappa)
    q = np.exp(_weighted_quantiles(fine_v, fine_w.sum(axis=0), probs))
    out["kappa"] = (mean, *map(float, q), sd)
    mean, sd = moments(np.sqrt(spread))
    fm = special.expit(fine_u)[:, None]
    fine_sd = np.sqrt(fm * (1 - fm) / (np.exp(fine_v)[None, :] + 1))
    q = _weighted_quantiles(fine_sd.ravel(), fine_w.ravel(), probs)
    out["between_group_sd"] = (mean, *map(float, q), sd)
    new = grid.mixture(np.zeros(1, dtype=np.int64), np.zeros(1, dtype=np.int64),
                       quantile_stride=None)
    mean, var = new.moments()
    out["theta_new"] = (float(mean[0]), *(float(new.ppf(q)[0]) for q in probs),
                        float(np.sqrt(var[0])))
    return out
