"""Every number the exact beta-binomial engine prints, against an independent dense quadrature.

The reference is written here, not taken from the engine: the hyper-posterior of
(u, v) = (logit mu, log kappa) under the README's priors (mu ~ Beta(1, 1), log kappa ~
Normal(log 20, 3), kappa <= 1e8), the likelihood as a product of Beta-binomial probabilities
(log C(n, y) + betaln(y + a, n - y + b) - betaln(a, b)), integrated by composite 8-point
Gauss-Legendre panels in (u, v) (numpy.polynomial.legendre.leggauss) over the region where the
log density is within 40 of its peak; in every v-row the u-panels are narrower than 1.5 times
the narrowest conditional Beta's width in u, so P(theta <= x | mu, kappa) is resolved even
where kappa is far above the trials. Group CDFs are then scipy.special.betainc mixtures on
these nodes; a population CDF integrates over the region below the value with the region's
edge as a panel edge. Quantiles are compared through the reference CDF: (F_ref(x) - q) over
the reference density, in posterior sd.

Tolerance (README, exact engine): probabilities within 1e-4 absolute; means, medians and
interval bounds within 1e-3 posterior sd (kappa's median and interval in sd of log kappa).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from workbench.models import BetaBinomial, GroupCounts

PROB_TOL = 1e-4
SD_TOL = 1e-3
CAP = np.log(1e8)
V_FLOOR = np.log(1e-6)
NODES, WEIGHTS = np.polynomial.legendre.leggauss(8)


def _panels(lo, hi, width):
    """Composite Gauss-Legendre nodes and weights on [lo, hi] with panels of at most width."""
    if hi <= lo:
        return np.zeros(0), np.zeros(0)
    k = max(1, int(np.ceil((hi - lo) / width)))
    edges = np.linspace(lo, hi, k + 1)
    half = np.diff(edges)[:, None] / 2
    mid = (edges[:-1] + edges[1:])[:, None] / 2
    return (mid + half * NODES).ravel(), (half * WEIGHTS).ravel()


class Reference:
    """Dense quadrature of the hierarchy's posterior for one table."""

    def __init__(self, y, n):
        pairs, counts = np.unique(np.stack([y, n], axis=1), axis=0, return_counts=True)
        self.py, self.pn, self.pc = pairs[:, 0] * 1.0, pairs[:, 1] * 1.0, counts
        self.log_choose = (special.gammaln(self.pn + 1) - special.gammaln(self.py + 1)
                           - special.gammaln(self.pn - self.py + 1))
        # scan for the region, then lay the v-nodes and, per v, the u-range and panels
        us, vs = np.linspace(-12, 12, 481), np.linspace(V_FLOOR, CAP, 241)
        scan = self.log_post(us[None, :], vs[:, None])
        self.top = scan.max()
        rows = np.flatnonzero((scan > self.top - 40).any(axis=1))
        v_lo, v_hi = vs[max(rows[0] - 1, 0)], vs[min(rows[-1] + 1, len(vs) - 1)]
        cols = np.flatnonzero((scan > self.top - 40).any(axis=0))
        self.u_lo, self.u_hi = us[max(cols[0] - 1, 0)], us[min(cols[-1] + 1, len(us) - 1)]
        self.v_lo, self.v_hi = v_lo, v_hi
        self._ranges: dict = {}
        self.v, self.wv = _panels(v_lo, v_hi, 0.25)
        self.nodes = self._group_nodes()

    def log_post(self, u, v):
        mu, kappa = special.expit(u), np.exp(v)
        a, b = mu * kappa, (1 - mu) * kappa
        shape = np.broadcast(a, b).shape
        a, b = np.broadcast_to(a, shape)[..., None], np.broadcast_to(b, shape)[..., None]
        ll = (self.log_choose + special.betaln(self.py + a, self.pn - self.py + b)
              - special.betaln(a, b)) @ self.pc
        log_prior_u = np.log(mu) + np.log1p(-mu)  # Beta(1, 1) on mu, in logit coordinates
        z = (v - np.log(20.0)) / 3.0
        return ll + log_prior_u - 0.5 * z**2

    def _row_range(self, v):
        if v in self._ranges:
            return self._ranges[v]
        u = np.linspace(self.u_lo, self.u_hi, 321)
        lp = self.log_post(u, v)
        keep = np.flatnonzero(lp > self.top - 40)
        found = None
        if len(keep):
            found = (u[max(keep[0] - 1, 0)], u[min(keep[-1] + 1, len(u) - 1)], u[np.argmax(lp)],
                     lp.max())
        self._ranges[v] = found
        return found

    def _group_nodes(self):
        us, vs, ws = [], [], []
        y = np.append(self.py, 0.0)
        n = np.append(self.pn, 0.0)
        for v, wv in zip(self.v, self.wv, strict=True):
            found = self._row_range(v)
            if found is None:
                continue
            lo, hi, peak, top = found
            m, k = special.expit(peak), np.exp(v)
            mean = (k * m + y) / (k + n)
            width = np.sqrt(mean * (1 - mean) / (k + n + 1)) * (k + n) / (k * m * (1 - m))
            panel = (hi - lo) / 16
            if top > self.top - 25:  # rows with any weight: resolve the narrowest Beta
                panel = min(panel, 1.5 * width.min())
            u, wu = _panels(lo, hi, panel)
            us.append(u)
            vs.append(np.full(len(u), v))
            ws.append(wu * wv)
        u, v, w = np.concatenate(us), np.concatenate(vs), np.concatenate(ws)
        lw = self.log_post(u, v) + np.log(w)
        w = np.exp(lw - lw.max())
        return u, v, w / w.sum()

    # -- group quantities --------------------------------------------------------------
    def _alpha_beta(self, y, n):
        u, v, _ = self.nodes
        mu, kappa = special.expit(u), np.exp(v)
        return mu * kappa + y, (1 - mu) * kappa + n - y

    def group_mean_sd(self, y, n):
        a, b = self._alpha_beta(y, n)
        w = self.nodes[2]
        m1 = (w * a / (a + b)).sum()
        m2 = (w * a * (a + 1) / ((a + b) * (a + b + 1))).sum()
        return m1, np.sqrt(m2 - m1**2)

    def group_cdf(self, y, n, x):
        a, b = self._alpha_beta(y, n)
        return float((self.nodes[2] * special.betainc(a, b, x)).sum())

    def group_pdf(self, y, n, x):
        a, b = self._alpha_beta(y, n)
        logpdf = special.xlogy(a - 1, x) + special.xlog1py(b - 1, -x) - special.betaln(a, b)
        return float((self.nodes[2] * np.exp(logpdf)).sum())

    def shrinkage(self, n):
        _, v, w = self.nodes
        return float((w * np.exp(v) / (np.exp(v) + n)).sum())

    # -- population quantities ---------------------------------------------------------
    def hyper_moments(self, f):
        u, v, w = self.nodes
        values = f(special.expit(u), np.exp(v))
        mean = (w * values).sum()
        return mean, np.sqrt((w * (values - mean) ** 2).sum())

    def _mass(self, limits_u, v_lo=None, v_hi=None):
        """Posterior mass of {v_lo <= v <= v_hi, limits_u(v)[0] <= u <= limits_u(v)[1]}."""
        v_lo = self.v_lo if v_lo is None else max(v_lo, self.v_lo)
        v_hi = self.v_hi if v_hi is None else min(v_hi, self.v_hi)
        vs, wv = _panels(v_lo, v_hi, 0.5)
        total = 0.0
        for v, weight in zip(vs, wv, strict=True):
            found = self._row_range(v)
            if found is None:
                continue
            lo, hi = limits_u(v, found[0], found[1])
            u, wu = _panels(lo, hi, (found[1] - found[0]) / 24)
            if len(u):
                total += weight * (wu * np.exp(self.log_post(u, v) - self.top)).sum()
        return total

    def _sd_mass_below(self, x):
        """P(sqrt(mu (1 - mu) / (kappa + 1)) <= x): outer integral over u, inner over v."""
        us, wu = _panels(self.u_lo, self.u_hi, (self.u_hi - self.u_lo) / 256)
        total = 0.0
        for u, weight in zip(us, wu, strict=True):
            m = special.expit(u)
            ratio = m * (1 - m) / x**2 - 1
            v_cut = np.log(ratio) if ratio > 0 else -np.inf
            v, wv = _panels(max(v_cut, self.v_lo), self.v_hi, 0.05)
            if len(v):
                total += weight * (wv * np.exp(self.log_post(u, v) - self.top)).sum()
        return total

    def population_cdfs(self):
        whole = self._mass(lambda v, lo, hi: (lo, hi))
        sd_whole = self._sd_mass_below(1.0)
        return {
            "mu": lambda x: self._mass(lambda v, lo, hi: (lo, min(hi, special.logit(x)))) / whole,
            "kappa": lambda x: self._mass(lambda v, lo, hi: (lo, hi), v_hi=np.log(x)) / whole,
            "between_group_sd": lambda x: self._sd_mass_below(x) / sd_whole,
            "theta_new": lambda x: self.group_cdf(0.0, 0.0, x),
        }


def _tables():
    rng = np.random.default_rng(20)
    n30 = rng.choice(np.arange(50, 201, 5), size=30)
    homogeneous = GroupCounts([f"h{i:02d}" for i in range(30)], n30 // 5, n30)  # all at 20%
    tiny = GroupCounts(["a", "b", "c", "d", "e"], [0, 9, 3, 14, 6], [9, 9, 20, 14, 25])
    n200 = np.exp(rng.uniform(np.log(3), np.log(400), 200)).astype(int)
    theta = rng.beta(0.3 * 12, 0.7 * 12, 200)
    many = GroupCounts([f"m{i:03d}" for i in range(200)], rng.binomial(n200, theta), n200)
    return {"homogeneous": (homogeneous, 0.2), "tiny": (tiny, 0.5), "heterogeneous": (many, 0.3)}


TABLES = _tables()


def _quantile_error(cdf, pdf, x, q, sd):
    return abs(cdf(x) - q) / (pdf(x) * sd)


@pytest.mark.slow
@pytest.mark.reference
@pytest.mark.parametrize("name", list(TABLES))
def test_every_printed_number_within_the_stated_tolerance(name):
    counts, target = TABLES[name]
    fit = BetaBinomial(draws=250, chains=2, random_seed=3).fit(counts)
    est = fit.summary(0.95, target=target)
    pop = fit.population(0.95).set_index("parameter")
    ref = Reference(counts.successes, counts.trials)
    worst = {"prob": 0.0, "sd": 0.0}

    def record(kind, value, what):
        worst[kind] = max(worst[kind], value)
        limit = PROB_TOL if kind == "prob" else SD_TOL
        assert value <= limit, f"{name}: {what} off by {value:.2e} (tolerance {limit:g})"

    seen = set()
    for row in est.itertuples():
        key = (row.successes, row.trials)
        if key in seen:
            continue
        seen.add(key)
        y, n = float(row.successes), float(row.trials)
        mean, sd = ref.group_mean_sd(y, n)
        record("sd", abs(row.posterior_mean - mean) / sd, f"mean of {row.group}")
        for col, q in (("posterior_median", 0.5), ("lower", 0.025), ("upper", 0.975)):
            x = getattr(row, col)
            if 1e-300 < x < 1 - 1e-15:
                err = _quantile_error(lambda z: ref.group_cdf(y, n, z),
                                      lambda z: ref.group_pdf(y, n, z), x, q, sd)
                record("sd", err, f"{col} of {row.group}")
        above = 1 - ref.group_cdf(y, n, target)
        record("prob", abs(row.prob_above_target - above), f"P(above) of {row.group}")
        record("prob", abs(row.shrinkage - ref.shrinkage(n)), f"shrinkage of {row.group}")
    cdfs = ref.population_cdfs()
    funcs = {
        "mu": lambda m, k: m,
        "kappa": lambda m, k: k,
        "between_group_sd": lambda m, k: np.sqrt(m * (1 - m) / (k + 1)),
    }
    for param, cdf in cdfs.items():
        got = pop.loc[param]
        if param == "theta_new":
            mean, sd = ref.group_mean_sd(0.0, 0.0)
        else:
            mean, sd = ref.hyper_moments(funcs[param])
        record("sd", abs(got["mean"] - mean) / sd, f"{param} mean")
        scale = sd
        if param == "kappa":  # its quantiles on the log scale
            _, scale = ref.hyper_moments(lambda m, k: np.log(k))
        for col, q in (("median", 0.5), ("lower", 0.025), ("upper", 0.975)):
            x = float(got[col])
            if param == "theta_new" and not (1e-300 < x < 1 - 1e-15):
                continue
            if param == "kappa":
                h = 1e-3 * scale
                dens = (cdf(x * np.exp(h)) - cdf(x * np.exp(-h))) / (2 * h)
            else:  # a central difference that stays inside (0, x]
                h = min(1e-3 * sd, 0.5 * x)
                dens = (cdf(x + h) - cdf(x - h)) / (2 * h)
            record("sd", abs(cdf(x) - q) / (dens * scale), f"{param} {col}")
    print(f"{name}: worst probability error {worst['prob']:.2e},"
          f" worst mean/quantile error {worst['sd']:.2e} sd")
