"""The one home of small statistical formulas used across the package.

- :func:`betabinom_logpmf` is written out rather than calling ``scipy.stats.betabinom``:
  on a 1,000 x 2,000 array it measured 5.8 times faster (0.08 s against 0.46 s, scipy's time
  going to argument checks) and agrees with scipy to 4e-12; tests hold it to scipy.
- :func:`betabinom_cdf` sums the shorter tail of that mass function in bounded chunks
  (scipy's generic ``cdf`` sums the whole lower tail in one array).
- :func:`beta_from_moments` is the moment-matched Beta.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import special


def log_choose(n, y):
    """log C(n, y), elementwise."""
    return special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)


def betabinom_logpmf(y, n, a, b):
    """log P(Y = y) for Y ~ Beta-binomial(n, a, b), broadcasting (scipy's parametrisation)."""
    return log_choose(n, y) + special.betaln(y + a, n - y + b) - special.betaln(a, b)


#: Longest tail :func:`betabinom_cdf` sums term by term; beyond it (trials up to 1e15) the
#: CDF comes from the Beta identity below, in constant time.
MAX_TAIL_TERMS = 1_000_000
#: Gauss-Hermite nodes for that identity (the integrand is smooth on the scale of the nodes)
_HERMITE = np.polynomial.hermite.hermgauss(64)


def betabinom_cdf(y: float, n: float, a, b, w=None, *, cells: int = 2_000_000,
                  max_terms: int = MAX_TAIL_TERMS) -> float:
    """P(Y <= y): one Beta-binomial(n, a, b), or the mixture sum_p w_p Beta-binomial(n, a_p, b_p).

    Sums the shorter tail in chunks of at most ``cells`` terms while it has at most
    ``max_terms`` terms; a longer tail (only with both y and n - y above ``max_terms``) uses
    :func:`_betabinom_cdf_long`.
    """
    if y < 0:
        return 0.0
    if y >= n:
        return 1.0
    a = np.atleast_1d(np.asarray(a, dtype=float))
    b = np.atleast_1d(np.asarray(b, dtype=float))
    w = np.ones(1) if w is None else np.asarray(w, dtype=float)
    if min(y + 1, n - y) > max_terms:
        return _betabinom_cdf_long(float(y), float(n), a, b, w)
    lower_tail = y + 1 <= n - y
    first, last = (0, y) if lower_tail else (y + 1, n)
    step = max(1, cells // len(a))
    mass = 0.0
    for start in np.arange(first, last + 1, step):
        k = np.arange(start, min(start + step, last + 1), dtype=float)[:, None]
        mass += float(np.exp(betabinom_logpmf(k, n, a[None, :], b[None, :])).sum(axis=0) @ w)
    return min(1.0, mass) if lower_tail else max(0.0, 1.0 - mass)


def _betabinom_cdf_long(y: float, n: float, a, b, w) -> float:
    """P(Y <= y) when both tails are long: an identity, then Gauss-Hermite quadrature.

    For Y ~ Binomial(n, p), P(Y <= y) = P(Q > p) with Q ~ Beta(y + 1, n - y) (the
    binomial-Beta relation of the regularised incomplete Beta function). Averaging over
    p ~ Beta(a, b) gives P(Y <= y) = E_Q[F(Q)], F the Beta(a, b) CDF (or the mixture's).
    The expectation is taken with 64 Gauss-Hermite nodes in Q's normal scores (Q's exact
    quantiles at the nodes), where F(Q) is smooth whatever the sizes (checked against
    scipy.stats.betabinom in tests/models/test_stats_long_tails.py).
    """
    x, h = _HERMITE
    z = np.sqrt(2.0) * x
    # Q's own quantiles at the normal nodes (exact Beta, no skewness error); where the
    # inverse cannot be formed the normal form is used
    with np.errstate(all="ignore"):
        q = special.betaincinv(y + 1, n - y, special.ndtr(z))
    mean = (y + 1) / (n + 1)
    normal = mean + z * np.sqrt(mean * (1 - mean) / (n + 2))
    q = np.clip(np.where(np.isfinite(q), q, normal), 0.0, 1.0)
    f = special.betainc(a[None, :], b[None, :], q[:, None]) @ w
    return float(np.clip((h / np.sqrt(np.pi)) @ f, 0.0, 1.0))


def beta_from_moments(mean, var, *, floor: float = 1e-8):
    """The Beta(a, b) with the given mean and variance (its common size floored at ``floor``)."""
    mean = np.clip(np.asarray(mean, dtype=float), 1e-300, 1 - 1e-16)
    var = np.maximum(np.asarray(var, dtype=float), 1e-300)
    size = np.maximum(mean * (1 - mean) / var - 1, floor)
    return mean * size, (1 - mean) * size


#: Most mass-function steps (draws x the longest walk of each distinct trials count)
#: :func:`betabinom_cdf_pairs` takes; beyond it callers fall back to replicates.
PAIR_CDF_STEPS = 1_000_000_000


def betabinom_cdf_steps(successes, trials, draws: int) -> int:
    """The steps :func:`betabinom_cdf_pairs` would take: per draw, the largest successes of
    each distinct trials count (the walk up the mass function stops there)."""
    n = np.asarray(trials, dtype=np.int64)
    y = np.asarray(successes, dtype=np.int64)
    if not n.size:
        return 0
    order = np.lexsort((y, n))
    last = np.r_[n[order][1:] != n[order][:-1], True]
    return int((y[order][last] + 1).sum()) * int(draws)


def betabinom_cdf_pairs(successes, trials, a, b) -> tuple[np.ndarray, np.ndarray]:
    """P(Y < y_i) and P(Y <= y_i) for Y ~ Beta-binomial(n_i, a_s, b_s): two (pairs, draws)
    arrays, for every pair (y_i, n_i) and every (a_s, b_s).

    Exact sums of the mass function, walked upward by its ratio
    P(k + 1) / P(k) = (n - k)(k + a) / ((k + 1)(n - k - 1 + b)) from
    P(0) = B(a, n + b) / B(a, b), once per draw and distinct n (pairs sorted by (n, y) share
    the walk); the running term is rescaled so it neither overflows nor underflows. The cost
    is :func:`betabinom_cdf_steps`; tests hold it to ``scipy.stats.betabinom.cdf``.
    """
    y = np.asarray(successes, dtype=np.int64).ravel()
    n = np.asarray(trials, dtype=np.int64).ravel()
    a = np.ascontiguousarray(np.atleast_1d(a), dtype=float).ravel()
    b = np.ascontiguousarray(np.atleast_1d(b), dtype=float).ravel()
    if np.any((y < 0) | (y > n)):
        raise ValueError("betabinom_cdf_pairs needs 0 <= successes <= trials.")
    order = np.lexsort((y, n))
    below = np.empty((len(y), len(a)))
    at = np.empty((len(y), len(a)))
    _walk_kernel()(y[order], n[order], order, a, b, below, at)
    return below, at


def _walk(y, n, rows, a, b, below, at):  # pragma: no cover - compiled by numba
    pairs = y.shape[0]
    draws = a.shape[0]
    off = np.empty(draws)  # log of the scale
    scale = np.empty(draws)
    term = np.empty(draws)  # P(k) = term * scale
    cdf = np.empty(draws)  # P(Y < k)
    i = 0
    while i < pairs:
        ni = n[i]
        for s in range(draws):
            off[s] = (math.lgamma(ni + b[s]) + math.lgamma(a[s] + b[s]) - math.lgamma(b[s])
                      - math.lgamma(ni + a[s] + b[s]))  # log P(0)
            scale[s] = math.exp(off[s])
            term[s] = 1.0
            cdf[s] = 0.0
        k = 0
        while i < pairs and n[i] == ni:
            while k < y[i]:
                common = (ni - k) / (k + 1.0)
                for s in range(draws):
                    cdf[s] += term[s] * scale[s]
                    term[s] *= common * (k + a[s]) / (ni - k - 1.0 + b[s])
                    if term[s] > 1e200 or (0.0 < term[s] < 1e-200):
                        off[s] += math.log(term[s])
                        scale[s] = math.exp(off[s])
                        term[s] = 1.0
                k += 1
            row = rows[i]
            for s in range(draws):
                below[row, s] = min(cdf[s], 1.0)
                at[row, s] = min(cdf[s] + term[s] * scale[s], 1.0)
            i += 1


@functools.cache
def _walk_kernel():
    """The compiled walk (numba, on first use; cached on disk)."""
    import numba

    return numba.njit(cache=True)(_walk)
