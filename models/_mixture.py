"""Closed-form group posteriors: independent Betas and mixtures of Betas over a grid."""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import special, stats

#: Most unique-pair x component cells for which mixture quantiles are solved exactly.
EXACT_QUANTILE_CELLS = 10_000_000
_CHUNK_CELLS = 4_000_000
#: Newton steps on the full grid from the quantile solved on the grid before its last
#: refinement. The start is within the refinement's change (under 0.01 sd by its test), so one
#: step leaves the error near that change squared: at most 2.2e-7 sd from the full grid's own
#: solution on 17 tables (one group to 200, 1e9 trials, all zeros); a second step cost about
#: an eighth of a 10,000-group fit.
POLISH_STEPS = 1


#: From here on (both Beta parameters at least this) the Beta CDF is taken from its Edgeworth
#: expansion (normal with a skewness term): its error is about 0.6 / min(alpha, beta), below
#: 1e-8 here (measured against scipy's betainc), where betainc slows twentyfold (1e15 trials).
EDGEWORTH_FROM = 1e8


def beta_cdf(alpha: np.ndarray, beta: np.ndarray, x: np.ndarray) -> np.ndarray:
    """The Beta(alpha, beta) CDF at x, elementwise (same shapes)."""
    big = np.minimum(alpha, beta) >= EDGEWORTH_FROM
    if not big.any():
        return special.betainc(alpha, beta, x)
    out = np.empty(alpha.shape)
    out[~big] = special.betainc(alpha[~big], beta[~big], x[~big])
    a, b, xb = alpha[big], beta[big], x[big]
    s = a + b
    mean = a / s
    sd = np.sqrt(a * b / (s * s * (s + 1)))
    skew = 2 * (b - a) * np.sqrt(s + 1) / ((s + 2) * np.sqrt(a * b))
    z = (xb - mean) / sd
    out[big] = np.clip(
        special.ndtr(z) - np.exp(-0.5 * z * z) / np.sqrt(2 * np.pi) * skew / 6 * (z * z - 1),
        0.0,
        1.0,
    )
    return out


#: Most steps (components x the longest walk of each distinct trials count) the CDF at one
#: rate takes by :func:`beta_mixture_cdf_walk`; beyond it, one betainc per pair and component.
WALK_STEPS = 4_000_000_000
#: Largest bound on the walk's absolute error that is accepted; past it, betainc per pair.
WALK_ERROR = 1e-9
_EPS = np.finfo(float).eps


def log_gamma_ratio(z: np.ndarray, a: np.ndarray) -> np.ndarray:
    """log Gamma(z + a) - log Gamma(z), without the cancellation of two large log-gammas.

    Below z = 1,000 the two gammaln values are small enough to subtract (absolute error
    under 1.3e-12). Above, Stirling's series for both, combined before rounding:
    (z - 1/2) log1p(a/z) + a log(z + a) - a plus the difference of the 1/(12 z) - ...
    corrections (series to z^-7; truncation error under 1e-24 there; the series is the
    standard asymptotic expansion of log Gamma, common practice).
    """
    z, a = np.broadcast_arrays(np.asarray(z, dtype=float), np.asarray(a, dtype=float))
    out = np.empty(z.shape)
    small = z < 1000.0
    out[small] = special.gammaln(z[small] + a[small]) - special.gammaln(z[small])
    zl, al = z[~small], a[~small]

    def corr(t):
        t2 = 1.0 / (t * t)
        return (1.0 / 12 - t2 * (1.0 / 360 - t2 * (1.0 / 1260 - t2 / 1680))) / t

    out[~small] = (
        (zl - 0.5) * np.log1p(al / zl) + al * np.log(zl + al) - al + corr(zl + al) - corr(zl)
    )
    return out


def beta_mixture_cdf_walk(y, n, weights, a, b, x: float) -> np.ndarray | None:
    """sum_k w_k I_x(a_k + y_i, b_k + n_i - y_i) for every pair (y_i, n_i), at one ``x``.

    For fixed x, n and component, the Beta CDFs of consecutive successes differ by one
    term: I_x(p, q) - I_x(p + 1, q - 1) = Gamma(p + q) / (Gamma(p + 1) Gamma(q)) x^p
    (1 - x)^(q - 1) (the regularised incomplete Beta's recurrence), and consecutive terms by
    the ratio x (q - 1) / ((1 - x)(p + 1)). So one betainc per component and distinct n
    starts a walk up the successes that every pair with that n shares, in place of one
    betainc per pair and component.

    Its error is absolute: the first term's logarithm is a sum of large numbers, each
    rounded (relative error eps), and that error scales every term subtracted; each step
    adds a few eps more. When the bound on both exceeds ``WALK_ERROR`` (huge trials or
    components), or the walk would take more than ``WALK_STEPS`` steps, this returns None
    and the caller evaluates betainc per pair.
    """
    y = np.asarray(y, dtype=np.int64)
    n = np.asarray(n, dtype=np.int64)
    a = np.ascontiguousarray(a, dtype=float)
    b = np.ascontiguousarray(b, dtype=float)
    if not len(y):
        return np.zeros(0)
    order = np.lexsort((y, n))
    ys, ns = y[order], n[order]
    starts = np.flatnonzero(np.r_[True, ns[1:] != ns[:-1]])
    longest = np.maximum.reduceat(ys, starts).astype(float)
    if (longest + 1).sum() * len(a) > WALK_STEPS:
        return None
    distinct = ns[starts].astype(float)
    bn = b[None, :] + distinct[:, None]
    power_a, power_b = a * np.log(x), (bn - 1) * np.log1p(-x)
    log_a1 = special.gammaln(a + 1)
    log_term = log_gamma_ratio(bn, a[None, :]) - log_a1 + power_a + power_b
    # rounding of each part of the first term's logarithm (it scales all terms), and a
    # few roundings per step of the walk
    bound = 2 * _EPS * (np.abs(power_a) + np.abs(log_a1) + np.abs(power_b) + longest[:, None] + 10)
    if not np.all(np.isfinite(log_term)) or bound.max(initial=0.0) > WALK_ERROR:
        return None
    start_cdf = special.betainc(a[None, :], bn, x)
    out = np.zeros(len(y))
    _cdf_walk_kernel()(
        ys,
        ns,
        order,
        starts,
        np.ascontiguousarray(weights, dtype=float),
        a,
        b,
        x,
        start_cdf,
        log_term,
        out,
    )
    return np.clip(out, 0.0, 1.0)


def _cdf_walk(ys, ns, rows, starts, w, a, b, x, start_cdf, log_term, out):  # pragma: no cover
    pairs = ys.shape[0]
    odds = x / (1.0 - x)
    for j in range(starts.shape[0]):
        first = starts[j]
        last = starts[j + 1] if j + 1 < starts.shape[0] else pairs
        ni = ns[first]
        for k in range(a.shape[0]):
            cdf = start_cdf[j, k]
            off = log_term[j, k]
            scale = math.exp(off)
            term = 1.0  # the step from successes s to s + 1 is term * scale
            s = 0
            for i in range(first, last):
                while s < ys[i]:
                    cdf -= term * scale
                    term *= odds * (b[k] + ni - s - 1.0) / (a[k] + s + 1.0)
                    s += 1
                    if term > 1e200 or (0.0 < term < 1e-200):
                        off += math.log(term)
                        scale = math.exp(off)
                        term = 1.0
                out[rows[i]] += w[k] * cdf


@functools.cache
def _cdf_walk_kernel():
    """The compiled walk (numba, on first use; cached on disk)."""
    import numba

    return numba.njit(cache=True)(_cdf_walk)


class BetaPosteriors:
    """Independent Beta(alpha_j, beta_j) posteriors, one per group."""

    exact_quantiles = True

    def __init__(self, alpha: np.ndarray, beta: np.ndarray) -> None:
        self.alpha = np.asarray(alpha, dtype=float)
        self.beta = np.asarray(beta, dtype=float)

    def mean(self) -> np.ndarray:
        return self.alpha / (self.alpha + self.beta)

    def ppf(self, q: float) -> np.ndarray:
        return stats.beta.ppf(q, self.alpha, self.beta)

    def sf(self, x: float) -> np.ndarray:
        return stats.beta.sf(x, self.alpha, self.beta)

    def cdf(self, x: float) -> np.ndarray:
        return stats.beta.cdf(x, self.alpha, self.beta)


class BetaMixturePosteriors:
    """theta_j | data = sum_p w_p Beta(a_p + y_j, b_p + n_j - y_j): the exact hierarchy's answer.

    Groups sharing (successes, trials) share a posterior, so everything is computed once per
    unique pair and mapped back with ``index``.
    """

    def __init__(
        self,
        weights: np.ndarray,
        a: np.ndarray,
        b: np.ndarray,
        pair_successes: np.ndarray,
        pair_trials: np.ndarray,
        index: np.ndarray,
        quantile_source: BetaMixturePosteriors | None = None,
        cdf_components=None,
    ) -> None:
        self.weights = weights / weights.sum()
        self.quantile_source = quantile_source
        self.a = a
        self.b = b
        # the CDF and density may use a finer mixture of the same posterior (sub-nodes where
        # theta given (mu, kappa) is much narrower than a grid cell; given as a function, so
        # it is built only when a CDF is asked for); means use the nodes
        self._cdf_source = cdf_components
        self._cdf_cache = None
        self._log_beta = None
        self.y = pair_successes.astype(float)
        self.n = pair_trials.astype(float)
        self.index = index
        cells = len(self.y) * len((quantile_source or self).weights)
        self.exact_quantiles = cells <= EXACT_QUANTILE_CELLS

    @property
    def _cdf(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        if self._cdf_cache is None:
            source = self._cdf_source
            if source is None:
                self._cdf_cache = (self.weights, self.a, self.b)
            else:
                cw, ca, cb = source() if callable(source) else source
                self._cdf_cache = (cw / cw.sum(), ca, cb)
        return self._cdf_cache

    def _chunks(self, a=None, b=None, rows=None):
        """(slice of the output, alpha, beta) by chunks of pairs: all of them, or ``rows``."""
        a = self.a if a is None else a
        b = self.b if b is None else b
        y = self.y if rows is None else self.y[rows]
        n = self.n if rows is None else self.n[rows]
        step = max(1, _CHUNK_CELLS // max(len(a), 1))
        for start in range(0, len(y), step):
            sl = slice(start, start + step)
            alpha = a[None, :] + y[sl, None]
            beta = b[None, :] + (n[sl] - y[sl])[:, None]
            yield sl, alpha, beta

    def _pair_mean(self) -> np.ndarray:
        out = np.empty(len(self.y))
        for sl, alpha, beta in self._chunks():
            out[sl] = (alpha / (alpha + beta)) @ self.weights
        return out

    def mean(self) -> np.ndarray:
        return self._pair_mean()[self.index]

    def _pair_moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Mean and variance per pair; the variance as the mean of the components' variances
        plus their spread around the mean (E[theta^2] - mean^2 would cancel to noise where
        the sd is 1e-8 of the mean: a group with 1e15 trials)."""
        m1 = np.empty(len(self.y))
        var = np.empty(len(self.y))
        for sl, alpha, beta in self._chunks():
            s = alpha + beta
            m = alpha / s
            m1[sl] = m @ self.weights
            inner = m * (beta / s) / (s + 1)
            var[sl] = (inner + (m - m1[sl, None]) ** 2) @ self.weights
        return m1, var

    def moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Exact posterior mean and variance per group."""
        m1, var = self._pair_moments()
        return m1[self.index], var[self.index]

    def _pair_cdf(self, x: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """The CDF at ``x`` of every pair, or of the pairs ``rows`` (``x`` then theirs)."""
        out = np.empty(len(x))
        weights, a, b = self._cdf
        for sl, alpha, beta in self._chunks(a, b, rows):
            out[sl] = beta_cdf(alpha, beta, np.broadcast_to(x[sl, None], alpha.shape)) @ weights
        return out

    def _pair_pdf(self, x: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """The density at ``x`` of every pair, or of the pairs ``rows``."""
        out = np.empty(len(x))
        weights, a, b = self._cdf
        # log B(alpha, beta) does not depend on x: kept between calls (Newton steps) while
        # it is small (then it is one chunk)
        if self._log_beta is None and len(self.y) * len(a) <= _CHUNK_CELLS:
            self._log_beta = special.betaln(*next(self._chunks(a, b))[1:])
        for sl, alpha, beta in self._chunks(a, b, rows):
            xs = x[sl, None]
            if self._log_beta is None:
                log_beta = special.betaln(alpha, beta)
            else:
                log_beta = self._log_beta if rows is None else self._log_beta[rows]
            with np.errstate(divide="ignore", invalid="ignore"):
                logpdf = special.xlogy(alpha - 1, xs) + special.xlog1py(beta - 1, -xs) - log_beta
            out[sl] = np.exp(logpdf) @ weights
        return out

    def cdf(self, x: float) -> np.ndarray:
        x = float(x)
        weights, a, b = self._cdf
        if 0.0 < x < 1.0:
            walked = beta_mixture_cdf_walk(self.y, self.n, weights, a, b, x)
            if walked is not None:
                return walked[self.index]
        return self._pair_cdf(np.full(len(self.y), x))[self.index]

    def sf(self, x: float) -> np.ndarray:
        return 1.0 - self.cdf(x)

    def ppf(self, q: float, *, tol: float = 1e-10, max_iter: int = 60) -> np.ndarray:
        """Exact quantiles: safeguarded Newton from the moment-matched Beta's quantile.

        With a ``quantile_source`` (the same posterior on the grid before its last
        refinement: a quarter of the points), the quantiles are solved there and then polished
        by POLISH_STEPS Newton steps on this, the full, grid, so what is returned is the full
        grid's quantile (its CDF equals ``q`` to the refinement's own error squared).
        """
        if self.quantile_source is not None:
            start = self.quantile_source._pair_ppf(q, tol=tol, max_iter=max_iter)
            return self._polish(start, q)[self.index]
        return self._pair_ppf(q, tol=tol, max_iter=max_iter)[self.index]

    def _polish(self, x: np.ndarray, q: float, steps: int = POLISH_STEPS) -> np.ndarray:
        for _ in range(steps):
            f = self._pair_cdf(x) - q
            new = x - f / np.maximum(self._pair_pdf(x), 1e-300)
            ok = np.isfinite(new) & (new > 0.0) & (new < 1.0)
            x = np.where(ok, new, x)
        return x

    def _pair_ppf(self, q: float, *, tol: float, max_iter: int) -> np.ndarray:
        m1, var = self._pair_moments()
        var = np.maximum(var, 1e-300)
        common = np.maximum(m1 * (1 - m1) / var - 1, 1e-8)
        x = np.clip(stats.beta.ppf(q, m1 * common, (1 - m1) * common), 1e-300, 1 - 1e-16)
        lo = np.zeros_like(x)
        hi = np.ones_like(x)
        rows = np.arange(len(x))  # the pairs still moving: only they are evaluated
        for _ in range(max_iter):
            xr, lo_r, hi_r = x[rows], lo[rows], hi[rows]
            f = self._pair_cdf(xr, rows) - q
            lo_r = np.where(f < 0, xr, lo_r)
            hi_r = np.where(f >= 0, xr, hi_r)
            new = xr - f / np.maximum(self._pair_pdf(xr, rows), 1e-300)
            outside = (new < lo_r) | (new > hi_r) | ~np.isfinite(new)
            new = np.where(outside, 0.5 * (lo_r + hi_r), new)
            x[rows], lo[rows], hi[rows] = new, lo_r, hi_r
            moving = (np.abs(new - xr) >= tol) & (hi_r - lo_r >= tol) & (np.abs(f) > 1e-14)
            rows = rows[moving]
            if not len(rows):
                break
        return x
