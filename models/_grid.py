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

from ._mixture import BetaMixturePosteriors

#: Bounds of the transformed space: logit mu and log kappa (kappa capped at 1e8).
U_BOUNDS = (-30.0, 30.0)
V_BOUNDS = (np.log(1e-6), np.log(1e8))
EDGE_TOLERANCE = 1e-10  # largest density allowed on the grid's edge, relative to the mode
REFINE_TOLERANCE = 1e-6  # largest change of any posterior mean when the grid is refined


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

    def loglik(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Log marginal likelihood (without binomial coefficients) at points (u, v)."""
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
            total = special.gammaln(self.y_vals[:, None] + aa).T @ self.y_counts
            total += special.gammaln(self.f_vals[:, None] + bb).T @ self.f_counts
            total -= special.gammaln(self.n_vals[:, None] + kk).T @ self.n_counts
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
        return BetaMixturePosteriors(
            w[keep],
            mu[keep] * kappa[keep],
            (1 - mu[keep]) * kappa[keep],
            pairs[:, 0],
            pairs[:, 1],
            index.ravel(),
            quantile_source=coarse,
        )

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
        sd = np.sqrt(np.diag(cov))
        if not np.all(np.isfinite(sd)) or np.any(np.diag(cov) <= 0):
            raise np.linalg.LinAlgError
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

    # refinement: the same box with nodes halfway between, compare every posterior mean
    change = np.inf
    for _ in range(4):
        coarse = GridPosterior(u, v, ld, 0.0, edge_density, np.nan, widenings)
        fine_u, fine_v, fine_ld = evaluate(lo, hi, 2 * points - 1)
        fine = GridPosterior(fine_u, fine_v, fine_ld, 0.0, edge_density, np.nan, widenings)
        m_coarse = coarse.mixture(successes, trials)._pair_mean()
        m_fine = fine.mixture(successes, trials)._pair_mean()
        change = float(np.max(np.abs(m_coarse - m_fine)))
        u, v, ld, points = fine_u, fine_v, fine_ld, 2 * points - 1
        if change < REFINE_TOLERANCE:
            break
    hu = u[1] - u[0]
    hv = v[1] - v[0]
    top = ld.max()
    log_ml = float(top + np.log(np.exp(ld - top).sum() * hu * hv)) + counts.log_choose_total
    return GridPosterior(u, v, ld, log_ml, edge_density, change, widenings)
