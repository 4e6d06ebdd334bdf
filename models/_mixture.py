"""Closed-form group posteriors: independent Betas and mixtures of Betas over a grid."""

from __future__ import annotations

import numpy as np
from scipy import special, stats

#: Most unique-pair x component cells for which mixture quantiles are solved exactly.
EXACT_QUANTILE_CELLS = 10_000_000
_CHUNK_CELLS = 4_000_000


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
    ) -> None:
        self.weights = weights / weights.sum()
        self.a = a
        self.b = b
        self.y = pair_successes.astype(float)
        self.n = pair_trials.astype(float)
        self.index = index
        self._quantiles: dict[float, np.ndarray] = {}  # level -> per-pair quantile
        cells = len(self.y) * len(self.weights)
        self.exact_quantiles = cells <= EXACT_QUANTILE_CELLS

    def _chunks(self):
        step = max(1, _CHUNK_CELLS // max(len(self.weights), 1))
        for start in range(0, len(self.y), step):
            sl = slice(start, start + step)
            alpha = self.a[None, :] + self.y[sl, None]
            beta = self.b[None, :] + (self.n[sl] - self.y[sl])[:, None]
            yield sl, alpha, beta

    def _pair_mean(self) -> np.ndarray:
        out = np.empty(len(self.y))
        for sl, alpha, beta in self._chunks():
            out[sl] = (alpha / (alpha + beta)) @ self.weights
        return out

    def mean(self) -> np.ndarray:
        return self._pair_mean()[self.index]

    def _pair_moments(self) -> tuple[np.ndarray, np.ndarray]:
        m1 = np.empty(len(self.y))
        m2 = np.empty(len(self.y))
        for sl, alpha, beta in self._chunks():
            s = alpha + beta
            m1[sl] = (alpha / s) @ self.weights
            m2[sl] = (alpha * (alpha + 1) / (s * (s + 1))) @ self.weights
        return m1, m2 - m1**2

    def moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Exact posterior mean and variance per group."""
        m1, var = self._pair_moments()
        return m1[self.index], var[self.index]

    def _pair_cdf(self, x: np.ndarray) -> np.ndarray:
        out = np.empty(len(self.y))
        for sl, alpha, beta in self._chunks():
            out[sl] = special.betainc(alpha, beta, x[sl, None]) @ self.weights
        return out

    def _pair_pdf(self, x: np.ndarray) -> np.ndarray:
        out = np.empty(len(self.y))
        for sl, alpha, beta in self._chunks():
            xs = x[sl, None]
            with np.errstate(divide="ignore", invalid="ignore"):
                logpdf = (
                    special.xlogy(alpha - 1, xs)
                    + special.xlog1py(beta - 1, -xs)
                    - special.betaln(alpha, beta)
                )
            out[sl] = np.exp(logpdf) @ self.weights
        return out

    def cdf(self, x: float) -> np.ndarray:
        return self._pair_cdf(np.full(len(self.y), float(x)))[self.index]

    def sf(self, x: float) -> np.ndarray:
        return 1.0 - self.cdf(x)

    def ppf(self, q: float, *, tol: float = 1e-7, max_iter: int = 200) -> np.ndarray:
        """Exact quantiles of every group's mixture (solved once per level, then kept)."""
        q = float(q)
        if q not in self._quantiles:
            self._quantiles[q] = self._pair_ppf(q, tol=tol, max_iter=max_iter)
        return self._quantiles[q][self.index]

    def _pair_ppf(
        self, q: float, *, start: np.ndarray | None = None, tol: float = 1e-7, max_iter: int = 200
    ) -> np.ndarray:
        """Safeguarded Newton on the full mixture CDF (scipy.special.betainc), per unique pair.

        Starts from ``start`` or the moment-matched Beta's quantile; each chunk of pairs keeps
        its log Beta functions, so a Newton step costs one betainc per pair-component.
        """
        if start is None:
            m1, var = self._pair_moments()
            var = np.maximum(var, 1e-300)
            common = np.maximum(m1 * (1 - m1) / var - 1, 1e-8)
            start = stats.beta.ppf(q, m1 * common, (1 - m1) * common)
        x_all = np.clip(np.asarray(start, dtype=float), 1e-300, 1 - 1e-16)
        out = np.empty(len(self.y))
        for sl, alpha, beta in self._chunks():
            out[sl] = _newton(alpha, beta, self.weights, x_all[sl], q, tol, max_iter)
        return out


def _newton(alpha, beta, w, x, q, tol, max_iter):
    """Quantile q of sum_p w_p Beta(alpha_ip, beta_ip) for every row i (bracketed Newton).

    A row is done when its Newton step is below ``tol`` times its distance to the nearer end
    of (0, 1) and 1e-7 of its bracket's start; the step is taken (the error after it is of
    the order of the step squared).
    """
    log_beta = special.betaln(alpha, beta)
    x = x.copy()
    lo = np.full_like(x, 1e-300)
    hi = np.full_like(x, 1 - 1e-16)
    act = np.arange(len(x))
    for _ in range(max_iter):
        if not len(act):
            break
        a, b, xa = alpha[act], beta[act], x[act]
        f = special.betainc(a, b, xa[:, None]) @ w - q
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            logpdf = (a - 1) * np.log(xa)[:, None] + (b - 1) * np.log1p(-xa)[:, None]
            pdf = np.exp(logpdf - log_beta[act]) @ w
        lo[act] = np.where(f < 0, xa, lo[act])
        hi[act] = np.where(f >= 0, xa, hi[act])
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            new = xa - f / np.maximum(pdf, 1e-300)
        outside = (new < lo[act]) | (new > hi[act]) | ~np.isfinite(new)
        hit = np.abs(f) < 1e-15  # solved: keep x (a bisection from here would undo it)
        newton = ~outside & ~hit
        new = np.where(outside, _middle(lo[act], hi[act]), new)
        new = np.where(hit, xa, new)
        scale = np.minimum(xa, 1 - xa)
        done = hit | (newton & (np.abs(new - xa) < tol * scale)) | (hi[act] - lo[act] < 1e-3 * tol * scale)
        x[act] = new
        act = act[~done]
    return x


def _middle(lo, hi):
    """Bisection point: geometric toward 0 or 1 when the bracket spans decades there."""
    geo_low = np.sqrt(lo * hi)
    geo_high = 1 - np.sqrt((1 - lo) * (1 - hi))
    mid = 0.5 * (lo + hi)
    mid = np.where((hi <= 0.5) & (hi > 4 * lo), geo_low, mid)
    return np.where((lo >= 0.5) & (1 - lo > 4 * (1 - hi)), geo_high, mid)
