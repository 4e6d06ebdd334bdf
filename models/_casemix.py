"""Trial-level covariates on the collapsed engine: each group's likelihood over its cells.

With covariates that vary within a group (age band, severity, channel), a group's data are
cells c = (group, covariate pattern) with counts (y_c, n_c) and covariates x_c, and

    logit p_c = alpha + x_c . beta + u_g,   u_g = (parent effect) + sigma z_g,

so the group's likelihood, its effect integrated out, is

    L_g = integral of prod_c Binomial(y_c | n_c, expit(m_c + sigma z)) Normal(z | 0, 1) dz,

m_c = alpha + x_c . beta (+ the parent's effect). The integrand's log, g(z), is a sum of
concave terms minus z^2 / 2, so everything in :mod:`models._collapsed` carries over: the
bracketed Newton search for the mode (g'(z) = sigma sum_c (y_c - n_c p_c) - z is strictly
decreasing, its root between 0 and g'(0)), adaptive Gauss-Hermite with 16 nodes for the
value and its gradient (d log L / d m_c = E[y_c - n_c p_c | data],
d log L / d sigma = E[sum_c (y_c - n_c p_c) z | data]), and exact draws of z_g from its
conditional by rejection under the tangent envelope. Rows are aggregated by (group,
pattern) before any of this runs, so the cost follows the number of cells, not of trials.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ._collapsed import _LOG_W, _T, _TANGENTS, GH_NODES
from ._envelope import envelope_kernels
from ._mcmc import SamplerSettings, run_nuts

#: Most (draw x cell) values handled at once when summarising rates per draw.
_CHUNK_CELLS = 4_000_000

#: Gauss-Hermite nodes for the population-average group (probabilists', normalised weights).
_AVG_T, _AVG_W = np.polynomial.hermite_e.hermegauss(32)
_AVG_W = _AVG_W / _AVG_W.sum()


def _compile():
    import numba

    njit = numba.njit(cache=True)
    g_and_slope, mode = _core(njit)
    return _loglik_kernel(njit, g_and_slope, mode), _draw_kernel(njit, g_and_slope, mode)


def _core(njit):
    """The integrand's log, slope and curvature over a group's cells, and its mode."""

    @njit
    def g_and_slope(z, y, n, m, a, b, s):  # pragma: no cover - compiled
        value = -0.5 * z * z
        resid = 0.0
        curv = 0.0
        for c in range(a, b):
            eta = m[c] + s * z
            if eta > 0:
                log_p = -np.log1p(np.exp(-eta))
                log_q = -eta + log_p
            else:
                log_q = -np.log1p(np.exp(eta))
                log_p = eta + log_q
            p = np.exp(log_p)
            value += y[c] * log_p + (n[c] - y[c]) * log_q
            resid += y[c] - n[c] * p
            curv += n[c] * p * (1.0 - p)
        return value, s * resid - z, s * s * curv + 1.0

    @njit
    def mode(y, n, m, a, b, s):  # pragma: no cover - compiled
        d0 = g_and_slope(0.0, y, n, m, a, b, s)[1]
        lo = min(0.0, d0)
        hi = max(0.0, d0)
        z = 0.0
        for _ in range(200):
            _, grad, curv = g_and_slope(z, y, n, m, a, b, s)
            if grad == 0.0:
                break
            if grad > 0.0:
                lo = z
            else:
                hi = z
            step = grad / curv
            if abs(step) <= 1e-10 * (1.0 + abs(z)):
                z += step
                break
            z += step
            if z <= lo or z >= hi:
                z = 0.5 * (lo + hi)
        return z, 1.0 / np.sqrt(g_and_slope(z, y, n, m, a, b, s)[2])

    return g_and_slope, mode


def _loglik_kernel(njit, g_and_slope, mode):
    """log L_g by adaptive Gauss-Hermite, with its gradient per cell and in sigma."""
    t, log_w = _T, _LOG_W

    @njit
    def loglik(y, n, m, starts, s):  # pragma: no cover - compiled
        groups = starts.size - 1
        k = t.size
        value = np.empty(groups)
        d_m = np.zeros(m.size)
        d_s = np.empty(groups)
        terms = np.empty(k)
        nodes = np.empty(k)
        for g in range(groups):
            a, b = starts[g], starts[g + 1]
            zhat, scale = mode(y, n, m, a, b, s[g])
            top = -np.inf
            for j in range(k):
                nodes[j] = zhat + scale * t[j]
                terms[j] = g_and_slope(nodes[j], y, n, m, a, b, s[g])[0] + log_w[j]
                top = max(top, terms[j])
            total = 0.0
            for j in range(k):
                terms[j] = np.exp(terms[j] - top)
                total += terms[j]
            ds = 0.0
            for j in range(k):
                w = terms[j] / total
                part = 0.0
                for c in range(a, b):
                    r = y[c] - n[c] / (1.0 + np.exp(-(m[c] + s[g] * nodes[j])))
                    d_m[c] += w * r
                    part += r
                ds += w * part * nodes[j]
            value[g] = np.log(scale) + top + np.log(total) - 0.5 * np.log(2.0 * np.pi)
            d_s[g] = ds
        return value, d_m, d_s

    return loglik


def _draw_kernel(njit, g_and_slope, mode):
    """Exact draws of each group's z by rejection under a tangent envelope."""
    build, propose, height = envelope_kernels(njit)

    @njit
    def draws(y, n, m2, starts, s2, tangents, seed):  # pragma: no cover - compiled
        # m2 (draws, cells), s2 (draws, groups): one exact z per draw and group
        np.random.seed(seed)  # noqa: NPY002 - numba's compiled generator has only this API
        rows, groups = s2.shape
        k = tangents.size
        out = np.empty((rows, groups))
        proposals = 0
        tp = np.empty(k)
        gv = np.empty(k)
        gs = np.empty(k)
        lo = np.empty(k)
        hi = np.empty(k)
        anchor = np.empty(k)
        log_mass = np.empty(k)
        cum = np.empty(k)
        for r in range(rows):
            m = m2[r]
            for g in range(groups):
                a, b, s = starts[g], starts[g + 1], s2[r, g]
                zhat, sd = mode(y, n, m, a, b, s)
                reach = sd + abs(g_and_slope(zhat, y, n, m, a, b, s)[1])
                for j in range(k):
                    tp[j] = zhat + reach * tangents[j]
                    v3 = g_and_slope(tp[j], y, n, m, a, b, s)
                    gv[j] = v3[0]
                    gs[j] = v3[1]
                total = build(tp, gv, gs, lo, hi, anchor, log_mass, cum)
                while True:
                    proposals += 1
                    z = propose(gs, lo, hi, anchor, cum, total)
                    env = height(z, tp, gv, gs)
                    if np.log(np.random.random()) < g_and_slope(z, y, n, m, a, b, s)[0] - env:  # noqa: NPY002
                        out[r, g] = z
                        break
        return out, proposals

    return draws


class _Kernels:
    compiled = None

    @classmethod
    def get(cls):
        if cls.compiled is None:
            cls.compiled = _compile()
        return cls.compiled


def _flat(a):
    return np.ascontiguousarray(a, dtype=float)


def integrated_loglik(y, n, m, starts, s):
    """log L_g (without binomial coefficients) per group, d/dm per cell, d/dsigma per group.

    ``y``, ``n``, ``m`` per cell (cells sorted by group), ``starts`` the group offsets,
    ``s`` sigma per group (or one number). For tests, checks and the sampler's Op.
    """
    starts = np.ascontiguousarray(starts, dtype=np.int64)
    s = np.broadcast_to(np.asarray(s, dtype=float), (starts.size - 1,))
    return _Kernels.get()[0](_flat(y), _flat(n), _flat(m), starts, _flat(s))


def _loglik_op():
    import pytensor.tensor as pt
    from pytensor.gradient import DisconnectedType
    from pytensor.graph.basic import Apply
    from pytensor.graph.op import Op

    class CellIntegratedLoglik(Op):
        __props__ = ()

        def make_node(self, y, n, starts, cell_group, m, s):
            ins = [pt.as_tensor_variable(v) for v in (y, n, starts, cell_group, m, s)]
            return Apply(self, ins, [ins[5].type(), ins[4].type(), ins[5].type()])

        def perform(self, node, inputs, outputs):
            y, n, starts, _, m, s = inputs
            for out, value in zip(outputs, integrated_loglik(y, n, m, starts, s), strict=True):
                out[0] = value

        def connection_pattern(self, node):
            return [[False] * 3] * 4 + [[True] * 3, [True] * 3]

        def grad(self, inputs, output_grads):
            _, d_m, d_s = self(*inputs)
            g = output_grads[0]
            cell_group = inputs[3]
            return [DisconnectedType()() for _ in range(4)] + [g[cell_group] * d_m, g * d_s]

    return CellIntegratedLoglik()


def draw_z(y, n, means, starts, sigma, rng) -> tuple[np.ndarray, float]:
    """Exact z (chain, draw, group) given cell means (chain, draw, cell) and sigma (chain, draw)."""
    chains, draws_, cells = means.shape
    groups = starts.size - 1
    z = np.empty((chains, draws_, groups))
    per = max(1, _CHUNK_CELLS // max(cells + groups, 1))
    done = proposals = 0
    for c in range(chains):
        for start in range(0, draws_, per):
            sl = slice(start, min(draws_, start + per))
            s2 = np.broadcast_to(sigma[c, sl, None], (sl.stop - start, groups))
            s2 = np.ascontiguousarray(s2)
            seed = int(rng.integers(2**31 - 1))
            z[c, sl], got = _Kernels.get()[1](
                _flat(y), _flat(n), _flat(means[c, sl]), starts, s2, _TANGENTS, seed)
            done += s2.size
            proposals += got
    return z, done / max(proposals, 1)


def sample(cells, groups: int, x: np.ndarray, *, alpha_prior, sigma_prior, beta_prior,
           draws, tune, chains, target_accept, seed, progress, parent_index=None,
           tau_prior=1.0):
    """Population draws by NUTS on the collapsed cell likelihood, then exact group effects.

    ``x`` (cells, k) standardised. Returns hyper (``alpha``, ``sigma``, ``beta``, and for the
    nested model ``tau``, ``parent_effect``), the group log-odds shift u (chain, draw, group)
    with the cell log-odds ``alpha + x_c . beta + u_g``, the sampler's statistics and facts.
    """
    import pymc as pm
    import pytensor.tensor as pt

    k = x.shape[1]
    starts = cells.starts(groups)
    y, n = cells.successes.astype(float), cells.trials.astype(float)
    with pm.Model():
        alpha = pm.Normal("alpha", alpha_prior[0], alpha_prior[1])
        sigma = pm.HalfNormal("sigma", sigma_prior)
        m = alpha + pt.zeros(cells.n_cells)
        if k:
            beta = pm.Normal("beta", 0.0, beta_prior, shape=k)
            m = m + pt.dot(x, beta)
        if parent_index is not None:
            tau = pm.HalfNormal("tau", tau_prior)
            z_parent = pm.Normal("z_parent", 0.0, 1.0, shape=int(parent_index.max()) + 1)
            effect = pm.Deterministic("parent_effect", tau * z_parent)
            m = m + effect[parent_index[cells.group]]
        if cells.n_cells:
            value = _loglik_op()(y, n, starts.astype(float), cells.group, m,
                                 sigma * pt.ones(groups))[0]
            pm.Potential("likelihood", value.sum())
        post, stats = run_nuts(SamplerSettings(draws, tune, chains, target_accept, progress), seed)
    hyper = {"alpha": post["alpha"].values, "sigma": post["sigma"].values}
    shift = np.zeros(hyper["alpha"].shape + (groups,))
    fixed = hyper["alpha"][..., None] * np.ones(cells.n_cells)
    if k:
        hyper["beta"] = post["beta"].values
        fixed = fixed + hyper["beta"] @ x.T
    if parent_index is not None:
        hyper["tau"] = post["tau"].values
        hyper["parent_effect"] = post["parent_effect"].values
        shift = hyper["parent_effect"][..., parent_index]
        fixed = fixed + shift[..., cells.group]
    rng = np.random.default_rng([seed, 7])
    z, accept = draw_z(y, n, fixed, starts, hyper["sigma"], rng)
    shift = shift + hyper["sigma"][..., None] * z
    facts = {
        "likelihood_terms": int(cells.n_cells),
        "gauss_hermite_nodes": GH_NODES,
        "group_draw_acceptance": float(accept),
    }
    return hyper, shift, stats, facts


def patterns(x: np.ndarray, trials: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct covariate patterns, each cell's pattern and the population's trial shares."""
    uniq, index = np.unique(x, axis=0, return_inverse=True)
    index = index.ravel()
    share = np.bincount(index, trials.astype(float), minlength=len(uniq))
    return uniq, index, share / max(share.sum(), 1.0)


def rates(cells, groups: int, x: np.ndarray, alpha, beta, shift, spread):
    """Per draw: own-mix rate, adjusted rate, expected count and cell log-odds shift.

    ``alpha`` (S,), ``beta`` (S, k), ``shift`` (S, groups): the group's u_g (parent effect
    included), ``spread`` (S,): the sd of u over the population (sigma, or
    sqrt(sigma^2 + tau^2) for a new group in a new parent).

    - own-mix rate: sum_c n_c expit(alpha + x_c . beta + u_g) / n_g, the rate the model
      gives the group on its own cases (its adjusted rate where it has no trials);
    - adjusted rate: sum_k w_k expit(alpha + x_k . beta + u_g), k over the covariate patterns
      and w_k the population's share of trials in pattern k: the group's rate for the
      population's case mix (direct standardisation through the model);
    - expected: sum_c n_c E_v[expit(alpha + x_c . beta + v)], v ~ Normal(0, spread): the
      successes the population-average group would have on this group's cases (indirect
      standardisation; the sum of the predicted probabilities).
    """
    uniq, index, share = patterns(x, cells.trials)
    n_g = np.bincount(cells.group, cells.trials.astype(float), minlength=groups)
    S = len(alpha)
    own = np.empty((S, groups))
    adjusted = np.empty((S, groups))
    expected = np.empty((S, groups))
    lin = alpha[:, None] + (beta @ uniq.T if beta.size else 0.0)  # (S, K)
    per = max(1, _CHUNK_CELLS // max(len(uniq) * groups + cells.n_cells, 1))
    for a in range(0, S, per):
        sl = slice(a, min(S, a + per))
        eta = lin[sl, None, :] + shift[sl, :, None]  # (s, groups, K)
        p = special.expit(eta)
        adjusted[sl] = p @ share
        pc = p[:, cells.group, index]  # (s, cells)
        num = np.stack([np.bincount(cells.group, cells.trials * row, minlength=groups)
                        for row in pc])
        avg = special.expit(lin[sl, :, None] + spread[sl, None, None] * _AVG_T) @ _AVG_W
        ec = cells.trials * avg[:, index]
        expected[sl] = np.stack([np.bincount(cells.group, row, minlength=groups) for row in ec])
        with np.errstate(invalid="ignore", divide="ignore"):
            own[sl] = np.where(n_g > 0, num / np.maximum(n_g, 1.0), adjusted[sl])
    return own, adjusted, expected


def standardise(cells, columns) -> tuple[np.ndarray, dict]:
    """(cells, k) covariates centred and scaled by their trial-weighted mean and sd.

    Weighted by trials, so x = 0 is the population's average case and beta is per sd of the
    covariate over the population's trials.
    """
    from .exceptions import ParameterError

    x = cells.x.to_numpy(dtype=float)
    w = cells.trials.astype(float)
    w = w / w.sum() if w.sum() > 0 else np.full(len(w), 1.0 / max(len(w), 1))
    center = w @ x
    scale = np.sqrt(w @ (x - center) ** 2)
    flat = [str(c) for c, s in zip(columns, scale, strict=True) if not s > 0]
    if flat:
        raise ParameterError(
            f"covariate(s) {flat} take one value across all trials; drop them or give a column"
            " that varies.")
    return (x - center) / scale, {"columns": [str(c) for c in columns],
                                  "center": center.tolist(), "scale": scale.tolist(),
                                  "weighted_by": "trials", "level": "trial"}


def fit_cells(est, data, engine: str, seed: int):
    """The logit-normal / nested fit on cells: the tuple an estimator's ``_fit`` returns.

    theta is each group's own-mix rate; the posterior also holds ``adjusted_rate``,
    ``expected`` and ``group_shift`` (u_g) per group (see :func:`rates`).
    """
    from ._logit import covariate_names, population_rates
    from .exceptions import ParameterError

    if engine != "mcmc":
        raise ParameterError(
            "trial-level covariates (values that differ within a group) are fitted by the"
            " collapsed engine only; use engine='mcmc' (the default).")
    cells = data.cells
    x, info = standardise(cells, cells.x.columns)
    parent_index = est._parent_index(data)
    hyper, shift, stats_, facts = sample(
        cells, data.n_groups, x, alpha_prior=tuple(map(float, est.alpha_prior)),
        sigma_prior=float(est.sigma_prior), beta_prior=float(est.effect_prior),
        draws=est.draws, tune=est.tune, chains=est.chains,
        target_accept=float(est.target_accept), seed=seed, progress=est.progress,
        parent_index=parent_index, tau_prior=float(getattr(est, "tau_prior", 1.0)))
    alpha, sigma, tau = hyper["alpha"], hyper["sigma"], hyper.get("tau")
    spread = sigma if tau is None else np.sqrt(sigma**2 + tau**2)
    shape = alpha.shape
    beta = hyper.get("beta", np.zeros(shape + (0,)))
    own, adjusted, expected = rates(
        cells, data.n_groups, x, alpha.ravel(), beta.reshape(-1, x.shape[1]),
        shift.reshape(-1, data.n_groups), spread.ravel())
    rng = np.random.default_rng(seed + 1)
    theta_new = special.expit(alpha + spread * rng.standard_normal(shape))
    mean, sd = population_rates(alpha, sigma, tau)
    out = {"alpha": alpha, "sigma": sigma, "mu": mean, "between_group_sd": sd}
    if tau is not None:
        out["tau"] = tau
        est._parent_effects = hyper["parent_effect"]
    names = covariate_names(info["columns"])
    for k, name in enumerate(names):
        out[name] = beta[..., k]
    est._covariates = (None, ())
    full = shape + (data.n_groups,)
    est._group_vars = {"adjusted_rate": adjusted.reshape(full), "expected": expected.reshape(full),
                       "group_shift": shift}
    est._cell_data = (cells, x, tuple(info["columns"]))
    extra = {
        "tune": est.tune, "target_accept": float(est.target_accept),
        "sampler": ("pymc-nuts on the population parameters, each group's effect integrated"
                    " out over its covariate patterns (adaptive Gauss-Hermite) and drawn"
                    " exactly given each draw"),
        **facts, "covariates": info, "covariate_effects": names, "case_mix": "trial-level",
        "cells": int(cells.n_cells),
    }
    return own.reshape(full), theta_new, out, extra, stats_


def cell_log_likelihood(idata) -> tuple[np.ndarray, np.ndarray]:
    """Per group (chain, draw, group): log p(y_g | u_g, ...) and with u_g integrated out.

    Both are sums over the group's cells, binomial coefficients included.
    """
    import json

    from ._stats import log_choose

    post, const = idata.posterior, idata.constant_data
    group = const["cell_group"].values.astype(np.int64)
    y = const["cell_successes"].values.astype(float)
    n = const["cell_trials"].values.astype(float)
    x = const["cell_covariates"].values
    groups = post.sizes["group"]
    starts = np.searchsorted(group, np.arange(groups + 1)).astype(np.int64)
    lc = np.bincount(group, log_choose(n, y), minlength=groups)
    alpha = post["alpha"].values.reshape(-1)
    fixed = alpha[:, None] * np.ones(len(group))
    for k, name in enumerate(json.loads(post.attrs.get("covariate_effects") or "[]")):
        fixed = fixed + post[name].values.reshape(-1)[:, None] * x[:, k]
    shift = post["group_shift"].transpose("chain", "draw", "group").values.reshape(len(alpha), -1)
    parent_part = np.zeros_like(shift)
    if "parent_effect" in post:
        labels = post["parent"].values.astype(str)
        index = np.searchsorted(labels, const["parent"].values.astype(str))
        parent_part = post["parent_effect"].transpose("chain", "draw", "parent").values.reshape(
            len(alpha), -1)[:, index]
    sigma = post["sigma"].values.reshape(-1)
    cond = np.empty_like(shift)
    integ = np.empty_like(shift)
    for i in range(len(alpha)):
        eta = fixed[i] + shift[i, group]
        cell = y * -np.logaddexp(0.0, -eta) + (n - y) * -np.logaddexp(0.0, eta)
        cond[i] = lc + np.bincount(group, cell, minlength=groups)
        integ[i] = lc + integrated_loglik(y, n, fixed[i] + parent_part[i, group], starts,
                                          sigma[i])[0]
    shape = post["alpha"].shape + (groups,)
    return cond.reshape(shape), integ.reshape(shape)
