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
from scipy import optimize, special

from ._gridposterior import (  # noqa: F401  (re-exported: the engine's names in one place)
    EDGE_TOLERANCE,
    EXACT_TOLERANCE,
    MAX_REFINEMENTS,
    REFINE_PROBABILITY,
    REFINE_RATE_SD,
    REFINE_TOLERANCE,
    U_BOUNDS,
    V_BOUNDS,
    Z_BOUNDS,
    GridPosterior,
    distinct_pairs,
)
from ._quadrature import population_summary, refinement_changes  # noqa: F401


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


def lgamma_shift(x: np.ndarray, a: np.ndarray, base: np.ndarray | None = None) -> np.ndarray:
    """lgamma(x + a) - lgamma(x) (lgamma(a) at x = 0), stable for x up to 1e15 and beyond.

    Broadcasts ``x`` (counts, >= 0) against ``a`` (> 0). For x >= STIRLING_FROM the
    difference of Stirling's series: (x - 1/2) log1p(a/x) + a log(x + a) - a
    + 1/(12 (x + a)) - 1/(12 x), every term small or exact, so no cancellation.
    """
    x = np.asarray(x, dtype=float)
    base = _lgamma_base(x) if base is None else base  # ``base``: lgamma_base(x), precomputed
    if x.max(initial=0.0) < STIRLING_FROM:
        return special.gammaln(x + a) - base
    x, a = np.broadcast_arrays(x, np.asarray(a, dtype=float))
    big = x >= STIRLING_FROM
    out = special.gammaln(x + a) - base
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
        self._bases = [_lgamma_base(x) for x in (self.y_vals, self.f_vals, self.n_vals)]
        self.log_constant = float(self._bases[0] @ self.y_counts + self._bases[1] @ self.f_counts
                                  - self._bases[2] @ self.n_counts)

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
            by, bf, bn = self._bases
            total = lgamma_shift(self.y_vals[:, None], aa, by[:, None]).T @ self.y_counts
            total += lgamma_shift(self.f_vals[:, None], bb, bf[:, None]).T @ self.f_counts
            total -= lgamma_shift(self.n_vals[:, None], kk, bn[:, None]).T @ self.n_counts
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


def _conditional_ridge(counts: _Counts, prior: HyperPrior, v: np.ndarray,
                       start) -> tuple[np.ndarray, np.ndarray]:
    """For each log kappa in ``v``: the most probable logit mu and its conditional sd.

    Newton on the exact slope and curvature in u (digamma and trigamma sums over the
    distinct counts) from ``start`` (one value or one per v), safeguarded by halving any step
    that lowers the log density; each v stops when its Newton decrement is below 1e-10, its
    step below 1e-12, or it rests on the bound of logit mu. The sd is the Laplace one,
    1 / sqrt(-d2/du2).
    """
    v = np.asarray(v, dtype=float)
    u = np.clip(np.broadcast_to(np.asarray(start, dtype=float), v.shape), *U_BOUNDS).copy()
    active = np.ones(v.shape, dtype=bool)

    def value(u, v):
        return counts.loglik(u, v) + _log_prior(u, v, prior)

    f = value(u, v)
    for _ in range(100):
        idx = np.flatnonzero(active)
        ua, va = u[idx], v[idx]
        slope, curve = _slope_curvature(counts, prior, ua, va)
        concave = curve < 0
        newton = np.where(concave, -slope / np.where(concave, curve, -1.0), np.sign(slope))
        at_bound = ((ua <= U_BOUNDS[0]) & (slope <= 0)) | ((ua >= U_BOUNDS[1]) & (slope >= 0))
        done = (concave & (slope * newton < 1e-10)) | at_bound
        go = np.flatnonzero(~done)
        if len(go):
            base, vg, fg = ua[go], va[go], f[idx[go]]
            step = np.clip(newton[go], -2.0, 2.0)
            for _ in range(40):
                trial = np.clip(base + step, *U_BOUNDS)
                f_trial = value(trial, vg)
                worse = ~(f_trial >= fg - 1e-12)
                if not worse.any():
                    break
                step = np.where(worse, 0.5 * step, step)
            ok = f_trial >= fg - 1e-12
            u[idx[go[ok]]] = trial[ok]
            f[idx[go[ok]]] = f_trial[ok]
            done[go] |= ~ok | (np.abs(trial - base) < 1e-12)
        active[idx[done]] = False
        if not active.any():
            break
    _, curve = _slope_curvature(counts, prior, u, v)
    scale = np.where(curve < 0, 1.0 / np.sqrt(np.where(curve < 0, -curve, 1.0)), 1.0)
    return u, np.clip(scale, 1e-12, 10.0)


def _slope_curvature(counts: _Counts, prior: HyperPrior, u: np.ndarray, v: np.ndarray):
    """d/du and d2/du2 of the log posterior at fixed v (a = mu kappa, b = (1 - mu) kappa)."""
    mu = special.expit(u)
    kappa = np.exp(v)
    a, b = mu * kappa, (1 - mu) * kappa
    g = kappa * mu * (1 - mu)  # da/du = -db/du

    def sums(vals, weights, x):
        d1 = (special.digamma(vals[:, None] + x) - special.digamma(x)).T @ weights
        d2 = (special.polygamma(1, vals[:, None] + x) - special.polygamma(1, x)).T @ weights
        return d1, d2

    a1, a2 = sums(counts.y_vals.astype(float), counts.y_counts, a)
    b1, b2 = sums(counts.f_vals.astype(float), counts.f_counts, b)
    slope = g * (a1 - b1) + prior.mu_a * (1 - mu) - prior.mu_b * mu
    curve = g**2 * (a2 + b2) + g * (1 - 2 * mu) * (a1 - b1) - (prior.mu_a + prior.mu_b) * g / kappa
    return slope, curve


def _v_box(profile, prior: HyperPrior, width: float) -> tuple[float, float]:
    """The first range of log kappa: the profile's mode (a scan of V_BOUNDS, then a bounded
    1-D search) plus and minus ``width`` of its curvature's sd."""
    scan = np.linspace(*V_BOUNDS, 129)
    top = int(np.argmax(profile(scan)))
    near = scan[max(top - 1, 0)], scan[min(top + 1, len(scan) - 1)]
    best = optimize.minimize_scalar(lambda x: -profile(np.array([x]))[0], bounds=near,
                                    method="bounded", options={"xatol": 1e-6})
    v_mode = float(best.x)
    h = 1e-3
    curve = (profile(np.array([v_mode - h, v_mode, v_mode + h])) @ [1.0, -2.0, 1.0]) / h**2
    v_sd = 1.0 / np.sqrt(-curve) if curve < 0 else prior.kappa_log_sd
    v_sd = float(np.clip(v_sd, 1e-4, 2 * prior.kappa_log_sd))
    return max(v_mode - width * v_sd, V_BOUNDS[0]), min(v_mode + width * v_sd, V_BOUNDS[1])


def _widen(evaluate, lo: np.ndarray, hi: np.ndarray, points: int):
    """Widen the box until the density on every open edge is below EDGE_TOLERANCE.

    Returns the nodes, the box, the largest density on an open edge and the widenings.
    """
    widenings = 0
    while True:
        nodes = evaluate(lo, hi, points)
        rel = nodes[-1] - nodes[-1].max()
        edges = {(0, 0): rel[0, :].max(), (0, 1): rel[-1, :].max(),
                 (1, 0): rel[:, 0].max(), (1, 1): rel[:, -1].max()}
        grew = False
        open_edges = []
        for (axis, side), value in edges.items():
            bounds = (Z_BOUNDS, V_BOUNDS)[axis]
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
    return nodes, lo, hi, edge_density, widenings


def fit_grid(
    successes: np.ndarray,
    trials: np.ndarray,
    prior: HyperPrior,
    *,
    points: int = 25,
    width: float = 7.0,
    means_only: bool = False,
) -> GridPosterior:
    """Lay the grid along the ridge, check and refine it; return the hyper-posterior on it.

    ``means_only`` refines until the group means settle and checks nothing else: for
    internal refits that use only sums over the grid (leaving one group out), never for
    numbers that are printed.
    """
    counts = _Counts(successes, trials)
    pooled = (successes.sum() + 0.5) / (trials.sum() + 1.0)
    start = float(special.logit(pooled))

    def ridge(v):
        """(centre, scale) at log kappa ``v``."""
        return _conditional_ridge(counts, prior, v, start)

    def profile(v):  # log density of v alone, by Laplace across the ridge
        centre, scale = ridge(v)
        return counts.loglik(centre, v) + _log_prior(centre, v, prior) + np.log(scale)

    def evaluate(lo, hi, m):
        z = np.linspace(lo[0], hi[0], m)
        v = np.linspace(lo[1], hi[1], m)
        centre, scale = ridge(v)
        u = centre[None, :] + scale[None, :] * z[:, None]
        inside = (u >= U_BOUNDS[0]) & (u <= U_BOUNDS[1])
        uu = np.clip(u, *U_BOUNDS)
        vv = np.broadcast_to(v[None, :], u.shape)
        ld = counts.loglik(uu, vv) + _log_prior(uu, vv, prior) + np.log(scale)[None, :]
        return z, v, centre, scale, np.where(inside, ld, -np.inf)

    v_lo, v_hi = _v_box(profile, prior, width)
    nodes, lo, hi, edge_density, widenings = _widen(
        evaluate, np.array([-width, v_lo]), np.array([width, v_hi]), points
    )

    def posterior(z, v, centre, scale, ld):
        return GridPosterior(z, v, centre, scale, ld, 0.0, edge_density, np.nan, widenings)

    # refinement: the same box with nodes halfway between; compare every reported quantity.
    # Each finer grid is the next step's coarser one, and its memo (what was computed from
    # its nodes) goes with it, and to the posterior returned.
    change = rate_sd = prob = np.inf
    refinements = 0
    current = posterior(*nodes)
    for step in range(MAX_REFINEMENTS):
        fine_nodes = evaluate(lo, hi, 2 * points - 1)
        fine = posterior(*fine_nodes)
        change, rate_sd, prob = refinement_changes(
            current, fine, successes, trials,
            full=step == MAX_REFINEMENTS - 1, means_only=means_only,
        )
        nodes, points, current = fine_nodes, 2 * points - 1, fine
        refinements += 1
        if change < REFINE_TOLERANCE and (
            means_only or (rate_sd < REFINE_RATE_SD and prob < REFINE_PROBABILITY)
        ):
            break
    z, v, centre, scale, ld = nodes
    top = ld.max()
    log_ml = float(top + np.log(np.exp(ld - top).sum() * (z[1] - z[0]) * (v[1] - v[0])))
    log_ml += counts.log_choose_total + counts.log_constant
    return GridPosterior(z, v, centre, scale, ld, log_ml, edge_density, change, widenings,
                         rate_sd, prob, refinements, memo=current.memo)
