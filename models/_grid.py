"""Exact engine for the beta-binomial hierarchy: quadrature over (logit mu, log kappa).

The rule: rows at equal steps of v = log kappa; in each row, nodes at equal steps of
t = (u - c(v)) / s(v), where u = logit mu and c(v), s(v) are the row's own mode and scale,
so every row is centred and scaled to its own density (no shear, no wasted nodes). Weights
are the trapezoid rule in (t, v), which for these smooth, fast-decaying densities converges
faster than any power of the step. Where a group's conditional Beta is narrower than the
row's step (kappa far above the trials: P(theta > x | mu, kappa) is nearly a step in mu), the
row is subdivided until the step is below the Beta's own width in u. The rule is checked
against the same rule shifted by half a step in both directions, on every reported
quantity, and halved until they agree (``REFINE_TOLERANCE``).

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

from . import _population
from ._mixture import BetaMixturePosteriors

#: Bounds of the transformed space: logit mu and log kappa (kappa capped at 1e8).
U_BOUNDS = (-30.0, 30.0)
V_BOUNDS = (np.log(1e-6), np.log(1e8))
EDGE_TOLERANCE = 1e-10  # largest density allowed on the grid's edge, relative to the mode
#: Largest change of any reported quantity between the rule and its half-step shift:
#: probabilities absolute, means and quantiles in posterior sd.
REFINE_TOLERANCE = 1e-4
CHECK_LEVELS = (0.025, 0.5, 0.975)  # group quantiles the refinement check compares
KEEP_MASS = 1 - 1e-9  # share of the weight kept in the group mixtures
ROW_MASS_FLOOR = 1e-9  # rows lighter than this are not subdivided for narrow Betas
MAX_SUBDIVIDE = 512


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


def _log_post(counts: _Counts, prior: HyperPrior, u, v) -> np.ndarray:
    u = np.asarray(u, dtype=float)
    out = counts.loglik(u, v) + _log_prior(u, v, prior)
    inside = (u >= U_BOUNDS[0]) & (u <= U_BOUNDS[1])
    return np.where(inside & np.isfinite(out), out, -np.inf)


def _row_modes(counts, prior, v, u0, s0) -> tuple[np.ndarray, np.ndarray]:
    """Each row's mode c(v) and scale s(v) in u: damped Newton with central differences."""
    v = np.asarray(v, dtype=float)
    u = np.broadcast_to(np.asarray(u0, dtype=float), v.shape).copy()
    s = np.broadcast_to(np.asarray(s0, dtype=float), v.shape).copy()
    for _ in range(60):
        h = 1e-2 * s
        f0, fp, fm = _log_post(counts, prior, np.stack([u, u + h, u - h]), np.stack([v] * 3))
        with np.errstate(invalid="ignore"):
            grad = (fp - fm) / (2 * h)
            curv = (fp - 2 * f0 + fm) / h**2
        concave = np.isfinite(curv) & (curv < 0)
        s = np.where(concave, 1 / np.sqrt(np.where(concave, -curv, 1.0)), s).clip(1e-6, 10.0)
        step = np.where(concave, -grad / np.where(concave, curv, -1.0), np.sign(grad) * s)
        step = np.nan_to_num(np.clip(step, -3 * s, 3 * s))
        u = np.clip(u + step, U_BOUNDS[0] + 1e-3, U_BOUNDS[1] - 1e-3)
        if np.all(np.abs(step) < 1e-5 * s):
            break
    return u, s


@dataclass
class _Rule:
    """Trapezoid rule in (t, v): rows v_k, nodes u_ki = c_k + s_k t_i, log density ld_ki."""

    v: np.ndarray
    c: np.ndarray
    s: np.ndarray
    t: np.ndarray
    ht: float
    hv: float
    ld: np.ndarray

    @property
    def u(self) -> np.ndarray:
        return self.c[:, None] + self.s[:, None] * self.t[None, :]

    def log_weights(self) -> np.ndarray:
        """Unnormalised log weight of every node: density x Jacobian s_k x cell."""
        return self.ld + np.log(self.s)[:, None] + np.log(self.ht * self.hv)

    def weights(self) -> np.ndarray:
        lw = self.log_weights()
        w = np.exp(lw - lw.max())
        return w / w.sum()

    def log_mass(self) -> float:
        lw = self.log_weights()
        top = lw.max()
        return float(top + np.log(np.exp(lw - top).sum()))


def _lay(counts, prior, box, ht, hv, offset, guide) -> _Rule:
    """Rows and nodes of the rule over ``box`` = ((v_lo, v_hi), (t_lo, t_hi))."""
    (v_lo, v_hi), (t_lo, t_hi) = box
    v = v_lo + hv * (np.arange(int(np.floor((v_hi - v_lo) / hv - offset)) + 1) + offset)
    t = t_lo + ht * (np.arange(int(np.floor((t_hi - t_lo) / ht - offset)) + 1) + offset)
    gv, gc, gs = guide
    c, s = _row_modes(counts, prior, v, np.interp(v, gv, gc), np.interp(v, gv, gs))
    rule = _Rule(v, c, s, t, ht, hv, np.empty((len(v), len(t))))
    rule.ld = _log_post(counts, prior, rule.u, v[:, None])
    return rule


def _profile(counts, prior, v, u0, s0):
    """Rows' modes and scales and the Laplace log mass of each row (for sizing only)."""
    c, s = _row_modes(counts, prior, v, u0, s0)
    return c, s, _log_post(counts, prior, c, v) + np.log(s)


def _v_range(counts, prior, mode, sd, width):
    """Rows' span: widened until the row mass at an open end is below EDGE_TOLERANCE."""
    lo = max(mode[1] - width * sd[1], V_BOUNDS[0])
    hi = min(mode[1] + width * sd[1], V_BOUNDS[1])
    widenings = 0
    for _ in range(3):  # widen, then trim to the mass and look again at that resolution
        while True:
            v = np.linspace(lo, hi, 61)
            c, s, lg = _profile(counts, prior, v, mode[0], sd[0])
            rel = lg - lg.max()
            grew = False
            if rel[0] > np.log(EDGE_TOLERANCE) and lo > V_BOUNDS[0]:
                lo, grew = max(lo - 0.5 * (hi - lo), V_BOUNDS[0]), True
            if rel[-1] > np.log(EDGE_TOLERANCE) and hi < V_BOUNDS[1]:
                hi, grew = min(hi + 0.5 * (hi - lo), V_BOUNDS[1]), True
            if not grew or widenings >= 12:
                break
            widenings += 1
        seen = np.flatnonzero(rel > np.log(EDGE_TOLERANCE) - 5)
        step = v[1] - v[0]
        new_lo = v[max(seen[0] - 1, 0)] if v[seen[0]] > V_BOUNDS[0] else lo
        new_hi = v[min(seen[-1] + 1, len(v) - 1)] if v[seen[-1]] < V_BOUNDS[1] else hi
        if new_hi - new_lo > 0.5 * (hi - lo):
            break
        lo, hi = max(new_lo - step, V_BOUNDS[0]), min(new_hi + step, V_BOUNDS[1])
    w = np.exp(rel)
    mean = (w * v).sum() / w.sum()
    sd_v = np.sqrt((w * (v - mean) ** 2).sum() / w.sum())
    curv = -np.diff(lg, 2) / (v[1] - v[0]) ** 2
    heavy = (rel[1:-1] > np.log(1e-6)) & (curv > 0)
    scale = min(sd_v, float(np.min(1 / np.sqrt(curv[heavy])))) if heavy.any() else sd_v
    return (lo, hi), max(scale, 1e-4), (v, c, s), widenings


def _widen_rows(counts, prior, rule, box, guide):
    """Extend the rows' t span (all rows alike) until no row's end carries density."""
    (v_lo, v_hi), (t_lo, t_hi) = box
    for _ in range(8):
        top = rule.ld.max()
        low = rule.ld[:, 0].max() - top > np.log(EDGE_TOLERANCE)
        high = rule.ld[:, -1].max() - top > np.log(EDGE_TOLERANCE)
        if not (low or high):
            break
        span = t_hi - t_lo
        t_lo, t_hi = t_lo - 0.5 * span * low, t_hi + 0.5 * span * high
        box = ((v_lo, v_hi), (t_lo, t_hi))
        rule = _lay(counts, prior, box, rule.ht, rule.hv, 0.0, guide)
    return rule, box


def _edge_density(rule: _Rule) -> float:
    rel = rule.ld - rule.ld.max()
    edges = [rel[:, 0].max(), rel[:, -1].max()]
    if rule.v[0] - rule.hv > V_BOUNDS[0]:
        edges.append(rel[0].max())
    if rule.v[-1] + rule.hv < V_BOUNDS[1]:
        edges.append(rel[-1].max())
    return float(np.exp(max(edges)))


def _kernel_width(rule: _Rule, y: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Per row, the narrowest conditional Beta's sd over its mean's rate of change, in t."""
    m = special.expit(rule.c)[:, None]
    k = np.exp(rule.v)[:, None]
    mean = (k * m + y[None, :]) / (k + n[None, :])
    sd = np.sqrt(mean * (1 - mean) / (k + n[None, :] + 1))
    slope = k * m * (1 - m) / (k + n[None, :])
    with np.errstate(divide="ignore", invalid="ignore"):
        width = np.where(slope > 0, sd / slope, np.inf)
    return width.min(axis=1) / rule.s


def _group_nodes(counts, prior, rule: _Rule, y, n):
    """mu, kappa and weight of the group rule: the rule's rows, subdivided where a Beta is
    narrower than the row's step (rows lighter than ROW_MASS_FLOOR are left whole)."""
    lw = rule.log_weights()
    row_mass = np.exp(special.logsumexp(lw, axis=1) - special.logsumexp(lw))
    width = _kernel_width(rule, y, n)
    split = np.where(row_mass >= ROW_MASS_FLOOR, np.ceil(rule.ht / width), 1.0)
    split = np.nan_to_num(split, nan=1.0, posinf=MAX_SUBDIVIDE).clip(1, MAX_SUBDIVIDE).astype(int)
    whole = split == 1
    us, vs = [rule.u[whole].ravel()], [np.repeat(rule.v[whole], len(rule.t))]
    lws = [lw[whole].ravel()]
    for k in np.flatnonzero(~whole):
        r = split[k]
        t = rule.t[0] + (rule.ht / r) * np.arange((len(rule.t) - 1) * r + 1)
        u = rule.c[k] + rule.s[k] * t
        ld = _log_post(counts, prior, u, np.full_like(u, rule.v[k]))
        us.append(u)
        vs.append(np.full_like(u, rule.v[k]))
        lws.append(ld + np.log(rule.s[k] * rule.ht / r * rule.hv))
    u, v, lw = np.concatenate(us), np.concatenate(vs), np.concatenate(lws)
    w = np.exp(lw - lw.max())
    w /= w.sum()
    order = np.argsort(w)[::-1]
    keep = order[: int(np.searchsorted(np.cumsum(w[order]), KEEP_MASS)) + 1]
    return special.expit(u[keep]), np.exp(v[keep]), w[keep], int(split.max())


def distinct_pairs(successes, trials) -> tuple[np.ndarray, np.ndarray]:
    """The distinct (successes, trials) pairs, sorted, and each group's row among them.

    One int64 key per pair and a 1-D unique (about 40 times faster than ``axis=0`` at a
    million groups); the 2-D unique where the key would overflow (trials near 1e15).
    """
    y = np.asarray(successes, dtype=np.int64).ravel()
    n = np.asarray(trials, dtype=np.int64).ravel()
    base = int(y.max(initial=0)) + 1
    if n.size and float(n.max()) * base + base < 2.0**62:
        keys, index = np.unique(n * base + y, return_inverse=True)
        return np.stack([keys % base, keys // base], axis=1), index.ravel()
    pairs, index = np.unique(np.stack([y, n], axis=1), axis=0, return_inverse=True)
    return pairs, index.ravel()


def _mixture(mu, kappa, w, successes, trials) -> BetaMixturePosteriors:
    pairs, index = distinct_pairs(successes, trials)
    return BetaMixturePosteriors(
        w, mu * kappa, (1 - mu) * kappa, pairs[:, 0], pairs[:, 1], index.ravel()
    )


@dataclass
class _Fit:
    """One rule and what is computed on it: group mixture, new-group mixture, population."""

    rule: _Rule
    mixture: BetaMixturePosteriors | None
    new_group: BetaMixturePosteriors
    population: dict
    subdivision: int


def _evaluate(counts, prior, rule, successes, trials, level=0.95) -> _Fit:
    pairs, _ = distinct_pairs(successes, trials)
    y = np.append(pairs[:, 0], 0).astype(float)
    n = np.append(pairs[:, 1], 0).astype(float)
    mu, kappa, w, split = _group_nodes(counts, prior, rule, y, n)
    new_group = _mixture(mu, kappa, w, np.zeros(1), np.zeros(1))
    mix = _mixture(mu, kappa, w, successes, trials) if len(successes) else None
    population = _population.summarise(rule, new_group, level, cap=float(np.exp(V_BOUNDS[1])))
    return _Fit(rule, mix, new_group, population, split)


def _compare(a: _Fit, b: _Fit, trials) -> float:
    """Largest change of a reported quantity from ``a`` to ``b``: probabilities absolute,
    means and quantiles in posterior sd (kappa's quantiles on the log scale)."""
    change = 0.0
    for name, pa in a.population.items():
        pb = b.population[name]
        for key in ("mean", "median", "lower", "upper"):
            if name == "kappa" and key != "mean":
                diff = abs(np.log(pa[key]) - np.log(pb[key])) / max(pa["sd_log"], 1e-12)
            else:
                diff = abs(pa[key] - pb[key]) / max(pa["sd"], 1e-12)
            change = max(change, diff)
    n = np.unique(trials).astype(float)[:, None]
    shrink = [(np.exp(f.rule.v) / (np.exp(f.rule.v) + n)) @ f.rule.weights().sum(axis=1)
              for f in (a, b)]
    change = max(change, float(np.max(np.abs(shrink[0] - shrink[1]), initial=0.0)))
    if a.mixture is not None:
        change = max(change, _compare_groups(a.mixture, b.mixture))
    return change


def _compare_groups(ma: BetaMixturePosteriors, mb: BetaMixturePosteriors) -> float:
    m_a, var = ma._pair_moments()
    m_b, _ = mb._pair_moments()
    sd = np.sqrt(np.maximum(var, 1e-300))
    change = float(np.max(np.abs(m_a - m_b) / sd))
    if not ma.exact_quantiles:
        return change
    for q in CHECK_LEVELS:
        x = ma._quantiles.get(q)
        if x is None:
            x = ma._quantiles[q] = ma._pair_ppf(q)
        # a quantile at the ends of the doubles (mass within 1e-16 of 0 or 1) is that end
        inside = (x > 1e-300) & (x < 1 - 2e-16)
        gap = np.where(inside, np.abs(mb._pair_cdf(x) - q), 0.0)
        shift = gap / np.maximum(ma._pair_pdf(x) * sd, 1e-300)
        change = max(change, float(np.max(gap)), float(np.max(np.minimum(shift, 1e6))))
    return change


@dataclass
class GridPosterior:
    """The hyper-posterior on the checked rule, and what was checked about it."""

    rule: _Rule
    log_marginal_likelihood: float
    edge_density: float  # largest density on the rule's open edges, relative to the mode
    refinement_change: float  # largest change of a reported quantity under the half-step shift
    widenings: int
    refinements: int
    subdivision: int  # largest subdivision of a row for narrow Betas
    counts: _Counts
    prior: HyperPrior
    fitted: _Fit | None = None
    fitted_data: tuple | None = None

    @property
    def v(self) -> np.ndarray:
        return self.rule.v

    @property
    def log_density(self) -> np.ndarray:
        return self.rule.ld

    @property
    def weights(self) -> np.ndarray:
        return self.rule.weights()

    def points(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """mu, kappa and weight of every node of the rule carrying mass (flattened)."""
        w = self.rule.weights().ravel()
        keep = w > 1e-16
        mu = special.expit(self.rule.u).ravel()[keep]
        kappa = np.exp(np.broadcast_to(self.rule.v[:, None], self.rule.u.shape)).ravel()[keep]
        return mu, kappa, w[keep] / w[keep].sum()

    def mixture(self, successes: np.ndarray, trials: np.ndarray) -> BetaMixturePosteriors:
        """theta_j's exact posterior: a Beta mixture over the (subdivided) rule."""
        key = (np.asarray(successes).tobytes(), np.asarray(trials).tobytes())
        if self.fitted is not None and self.fitted_data == key:
            return self.fitted.mixture
        fit = _evaluate(self.counts, self.prior, self.rule, np.asarray(successes),
                        np.asarray(trials))
        return fit.mixture

    def population(self, level: float) -> dict[str, dict[str, float]]:
        """Population quantities by quadrature (``_population.summarise``)."""
        new_group = self.fitted.new_group if self.fitted is not None else _evaluate(
            self.counts, self.prior, self.rule, np.zeros(0, int), np.zeros(0, int)).new_group
        return _population.summarise(self.rule, new_group, level, cap=float(np.exp(V_BOUNDS[1])))

    def draw(self, size: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Independent draws of (mu, kappa): a node of the rule at half its steps,
        by weight, then uniform within its cell in (t, v)."""
        r = self.rule
        box = ((r.v[0], r.v[-1] + 1e-12), (r.t[0], r.t[-1] + 1e-12))
        fine = _lay(self.counts, self.prior, box, r.ht / 2, r.hv / 2, 0.0, (r.v, r.c, r.s))
        w = fine.weights().ravel()
        cell = rng.choice(w.size, size=size, p=w)
        k, i = np.unravel_index(cell, fine.ld.shape)
        t = fine.t[i] + rng.uniform(-0.5, 0.5, size) * fine.ht
        v = fine.v[k] + rng.uniform(-0.5, 0.5, size) * fine.hv
        return special.expit(fine.c[k] + fine.s[k] * t), np.exp(np.minimum(v, V_BOUNDS[1]))


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
    """Lay, check and refine the rule; return the hyper-posterior on it.

    The first step is ``2 width / (points - 1)`` of each direction's posterior sd (the rows'
    own scale in t; the smaller of the v-marginal's sd and its narrowest local scale in v);
    the rule and its half-step shift are compared on every reported quantity (group means,
    quantiles at ``CHECK_LEVELS``, P(theta <= x) there and at mean +- sd, shrinkage and the
    population's means, medians and interval bounds), and both steps are halved until the
    largest change is below ``REFINE_TOLERANCE`` (at most four times).
    """
    successes = np.asarray(successes)
    trials = np.asarray(trials)
    counts = _Counts(successes, trials)
    pooled = (successes.sum() + 0.5) / (trials.sum() + 1.0)
    mode, sd = _find_mode(counts, prior, float(special.logit(pooled)))
    step = 2 * width / (points - 1)
    (v_lo, v_hi), v_scale, guide, widenings = _v_range(counts, prior, mode, sd, width)
    box = ((v_lo, v_hi), (-width, width))
    ht, hv = step, step * v_scale
    for refinements in range(5):
        rule = _lay(counts, prior, box, ht, hv, 0.0, guide)
        rule, box = _widen_rows(counts, prior, rule, box, guide)
        shifted = _lay(counts, prior, box, ht, hv, 0.5, guide)
        fit = _evaluate(counts, prior, rule, successes, trials)
        change = _compare(fit, _evaluate(counts, prior, shifted, successes, trials), trials)
        if change < REFINE_TOLERANCE or refinements == 4:
            break
        ht, hv = ht / 2, hv / 2
    log_ml = rule.log_mass() + counts.log_choose_total
    key = (successes.tobytes(), trials.tobytes())
    return GridPosterior(rule, log_ml, _edge_density(rule), change, widenings, refinements,
                         fit.subdivision, counts, prior, fit, key)
