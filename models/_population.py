"""Population quantities of the exact beta-binomial engine, by quadrature on its rule.

The rule (``_grid._Rule``) is a trapezoid rule in (t, v): rows at equal steps of v = log kappa,
nodes at equal steps of t = (logit mu - c_k) / s_k in each row. A density sampled this finely
is reproduced by its sinc interpolant, whose integral up to a point is closed-form
(``scipy.special.sici``), so a probability P(q <= x) needs no point masses:

* mu: within each row, the sinc integral in t up to (logit x - c_k) / s_k;
* kappa: the rows' masses, the sinc integral in v up to log x;
* between-group sd, sqrt(mu (1 - mu) / (kappa + 1)): along each column t_i, the sinc integral
  in v from the v where the sd falls to x (c(v), s(v) by cubic splines through the rows);
* new-group rate: the Beta mixture of a group with no trials (``_mixture``).

Means are the rule's weighted sums. Quantiles are roots of these CDFs (``scipy.optimize``).
"""

from __future__ import annotations

import numpy as np
from scipy import interpolate, optimize, special

#: names as population() reports them
QUANTITIES = ("mu", "kappa", "between_group_sd", "theta_new")


def _sinc_below(x, nodes, h):
    """Integral up to x of the sinc interpolant's node weights: 1/2 + Si(pi (x - node) / h) / pi."""
    si, _ = special.sici(np.pi * (x - nodes) / h)
    return 0.5 + si / np.pi


def mu_cdf(rule, w, x: float) -> float:
    t0 = (special.logit(x) - rule.c) / rule.s
    return float((w * _sinc_below(t0[:, None], rule.t[None, :], rule.ht)).sum())


def log_kappa_cdf(rule, w, x: float) -> float:
    return float((w.sum(axis=1) * _sinc_below(x, rule.v, rule.hv)).sum())


def _sd_of(u, v):
    m = special.expit(u)
    return np.sqrt(m * (1 - m) / (np.exp(v) + 1))


def sd_profile(rule, splines):
    """log sd along every column t_i on a v-grid 16 times finer than the rows (cubic splines
    of the rows' c(v) and log s(v)), for ``sd_cdf``."""
    c_of, log_s_of = splines
    dense = np.linspace(rule.v[0] - 3 * rule.hv, rule.v[-1] + 3 * rule.hv, 16 * len(rule.v) + 96)
    u = c_of(dense)[:, None] + np.exp(log_s_of(dense))[:, None] * rule.t[None, :]
    return dense, np.log(_sd_of(u, dense[:, None]))


def sd_cdf(rule, w, x: float, profile) -> float:
    """P(between-group sd <= x): along each column, the sinc integral in v above the v where
    the sd falls to x (the sd falls as kappa grows; located on ``sd_profile``'s grid)."""
    dense, log_sd = profile
    above = (log_sd > np.log(x)).sum(axis=0)  # dense points before the crossing
    j = np.clip(above, 1, len(dense) - 1)
    cols = np.arange(log_sd.shape[1])
    y0, y1 = log_sd[j - 1, cols], log_sd[j, cols]
    frac = np.clip((y0 - np.log(x)) / np.where(y0 != y1, y0 - y1, 1.0), 0.0, 1.0)
    cut = dense[j - 1] + frac * (dense[j] - dense[j - 1])
    cut = np.where(above == 0, -np.inf, np.where(above == len(dense), np.inf, cut))
    share = 1.0 - _sinc_below(cut[None, :], rule.v[:, None], rule.hv)
    return float((w * share).sum())


def _quantile(cdf, q: float, lo: float, hi: float) -> float:
    f_lo, f_hi = cdf(lo) - q, cdf(hi) - q
    if f_lo >= 0:
        return lo
    if f_hi <= 0:
        return hi
    return float(optimize.brentq(lambda x: cdf(x) - q, lo, hi, xtol=1e-13, rtol=1e-12))


def summarise(rule, new_group, level: float, cap: float) -> dict[str, dict[str, float]]:
    """mean, median, lower, upper and sd of every population quantity, from the rule."""
    w = rule.weights()
    u, v = rule.u, np.broadcast_to(rule.v[:, None], rule.u.shape)
    lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
    out: dict[str, dict[str, float]] = {}

    def moments(values):
        mean = float((w * values).sum())
        return mean, float(np.sqrt(max((w * (values - mean) ** 2).sum(), 0.0)))

    mu = special.expit(u)
    mean, sd = moments(mu)
    u_lo, u_hi = float(u.min()) - 1, float(u.max()) + 1

    def mu_q(q):
        return float(special.expit(_quantile(
            lambda z: mu_cdf(rule, w, float(special.expit(z))), q, u_lo, u_hi)))

    out["mu"] = {"mean": mean, "sd": sd, **{k: mu_q(q) for k, q in _levels(lo_q, hi_q)}}
    mean, sd = moments(np.exp(v))
    v_lo, v_hi = rule.v[0] - 3 * rule.hv, rule.v[-1] + 3 * rule.hv
    kq = {k: float(np.exp(_quantile(lambda z: log_kappa_cdf(rule, w, z), q, v_lo, v_hi)))
          for k, q in _levels(lo_q, hi_q)}
    _, sd_log = moments(v)
    out["kappa"] = {"mean": mean, "sd": sd, "sd_log": sd_log, **kq}
    between = _sd_of(u, v)
    mean, sd = moments(between)
    profile = sd_profile(rule, (interpolate.CubicSpline(rule.v, rule.c),
                                interpolate.CubicSpline(rule.v, np.log(rule.s))))
    b_lo, b_hi = float(between.min()) * 0.5, min(float(between.max()) * 2, 0.5)
    out["between_group_sd"] = {
        "mean": mean, "sd": sd,
        **{k: _quantile(lambda z: sd_cdf(rule, w, z, profile), q, b_lo, b_hi)
           for k, q in _levels(lo_q, hi_q)},
    }
    m1, var = new_group._pair_moments()
    out["theta_new"] = {
        "mean": float(m1[0]), "sd": float(np.sqrt(max(var[0], 0.0))),
        **{k: float(new_group._pair_ppf(q)[0]) for k, q in _levels(lo_q, hi_q)},
    }
    out["kappa"]["cap_dependence"] = _cap_dependence(rule, w, cap)
    return out


def _levels(lo_q, hi_q):
    return (("median", 0.5), ("lower", lo_q), ("upper", hi_q))


def _cap_dependence(rule, w, cap: float) -> float:
    """How much kappa's mean would move (relative) were its cap ``cap`` ten times lower."""
    mass = w.sum(axis=1)
    kappa = np.exp(rule.v)
    full = (mass * kappa).sum()
    below = kappa <= cap / 10
    if below.all():
        return 0.0
    if not below.any() or mass[below].sum() <= 0:
        return 1.0
    lower = (mass[below] * kappa[below]).sum() / mass[below].sum()
    return float(abs(full - lower) / full)
