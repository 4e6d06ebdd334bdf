"""Pareto-smoothed importance sampling for many groups at once.

The same numbers as ArviZ's ``psislw`` / ``loo(pointwise=True)`` / ``loo_pit`` (ArviZ 0.23),
computed for a whole block of groups with array operations instead of one Python call per
group. Per group (one row of log-ratios over the posterior draws):

1. centre on the row's largest value;
2. the tail is the draws above the value ranked ``M + 1`` from the top, where
   ``M = ceil(min(S / 5, 3 sqrt(S / reff)))`` (and above log of the smallest positive
   double), so ties at the cut leave the tail shorter;
3. a tail of 4 draws or fewer gets k = inf and no smoothing; otherwise the generalized Pareto
   distribution is fitted to the tail's exceedances by the empirical-Bayes method of Zhang &
   Stephens (2009), with the weakly informative prior on k (10 pseudo-observations at 0.5)
   ArviZ adds, and the tail is replaced by the fitted distribution's quantiles at
   (i - 0.5) / n, truncated at the row's largest raw ratio;
4. the row is normalised so its weights sum to one.

Rows holding NaN after centring (a +inf ratio, i.e. a -inf log-likelihood, or a NaN) come out
as ArviZ gives them: k = inf and every weight NaN.

Work is done by blocks of rows, so memory stays bounded whatever the number of groups.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

#: Cells (rows x draws) handled at once: 2 MB of doubles. Blocks this small keep every
#: temporary in cache and reuse freed memory; 32 MB blocks ran about 1.5x slower here, most
#: of it in fresh pages for each temporary.
BLOCK_CELLS = 262_144

#: Cells of the Pareto fit's (rows x grid x tail) array at once: small enough to stay in cache.
FIT_CELLS = 250_000

_CUTOFF_MIN = float(np.log(np.finfo(float).tiny))
_EPS = np.finfo(float).eps
_PRIOR_BS = 3
_PRIOR_K = 10


def _quiet(func):
    """Run ``func`` without numpy's floating-point warnings: NaN, inf and 0 results are part
    of ArviZ's answers here (a -inf log-likelihood, a failed fit) and reach the caller as
    values (k = inf, NaN weights), which is how the callers report them."""

    @functools.wraps(func)
    def run(*args, **kwargs):
        with np.errstate(all="ignore"):
            return func(*args, **kwargs)

    return run


def tail_cut(samples: int, reff: float) -> int:
    """The tail size ``M`` (before ties at the cut): ArviZ's expression, kept verbatim so
    odd ``reff`` values (NaN, inf) give its answer too."""
    return int(np.ceil(min(samples / 5.0, 3 * (samples / reff) ** 0.5)))


def _row_blocks(rows: int, width: int, cells: int):
    step = max(1, cells // max(width, 1))
    for s in range(0, rows, step):
        yield slice(s, min(rows, s + step))


def _logsumexp_rows(x: np.ndarray) -> np.ndarray:
    """Row-wise log-sum-exp in ArviZ's order of operations (max, shift, exp, sum, log, add)."""
    m = x.max(axis=1, keepdims=True)
    s = np.exp(x - m).sum(axis=1)
    return np.log(s) + m[:, 0]


@_quiet
def gpd_fit(tails: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Generalized Pareto (k, sigma) per row of ``tails`` (rows sorted ascending, positive):
    Zhang & Stephens (2009) with ArviZ's prior on k. All rows share one tail length."""
    rows, n = tails.shape
    m_est = 30 + int(n**0.5)
    base = 1 - np.sqrt(m_est / (np.arange(1, m_est + 1, dtype=float) - 0.5))
    k_out = np.empty(rows)
    s_out = np.empty(rows)
    for blk in _row_blocks(rows, m_est * n, FIT_CELLS):
        ary = tails[blk]
        b = base[None, :] / (_PRIOR_BS * ary[:, int(n / 4 + 0.5) - 1])[:, None]
        b += (1 / ary[:, -1])[:, None]
        grid = -b[:, :, None] * ary[:, None, :]
        k_ary = np.log1p(grid, out=grid).mean(axis=2)
        len_scale = n * (np.log(-(b / k_ary)) - k_ary - 1)
        # ArviZ forms 1 / sum_j exp(L_j - L_i) (m x m per row); exp(L_i - logsumexp(L))
        # is the same weight (to rounding) from m exponentials, and gives 0 or NaN where
        # that does, so the same grid points are dropped below
        weights = np.exp(len_scale - _logsumexp_rows(len_scale)[:, None])
        real = weights >= 10 * _EPS  # negligible (or NaN) weights are dropped
        total = np.where(real, weights, 0.0).sum(axis=1)
        b_post = np.where(real, b * (weights / total[:, None]), 0.0).sum(axis=1)
        k_post = np.log1p(-b_post[:, None] * ary).mean(axis=1)
        s_out[blk] = -k_post / b_post
        k_out[blk] = (n * k_post + _PRIOR_K * 0.5) / (n + _PRIOR_K)
    return k_out, s_out


def _gpd_quantiles(n: int, k: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Quantiles at (i - 0.5) / n of each row's fitted GPD: (rows, n); NaN where sigma <= 0."""
    probs = np.arange(0.5, n) / n
    lp = np.log1p(-probs)[None, :]
    small = np.abs(k) < _EPS
    kk = np.where(small, 1.0, k)[:, None]
    q = np.where(small[:, None], -lp, np.expm1(-kk * lp) / kk)
    q *= sigma[:, None]
    q[sigma <= 0] = np.nan  # ArviZ: sigma <= 0 gives no quantiles (NaN sigma gives NaN anyway)
    return q


def _smooth_block(x: np.ndarray, reff: float, normalize: bool) -> tuple[np.ndarray, np.ndarray]:
    """PSIS of every row of ``x`` (a C-contiguous block of rows, smoothed in place and
    returned) and the rows' k."""
    rows, samples = x.shape
    big = tail_cut(samples, reff)
    cut = samples - big - 1  # ArviZ's index -big - 1 into the ascending order
    if cut < 0:
        raise ValueError(f"PSIS needs at least 2 draws per row; got {samples}.")
    k = np.full(rows, np.inf)
    max_x = x.max(axis=1, keepdims=True)
    x -= max_x
    ok = np.isfinite(max_x[:, 0])  # else the centred row holds NaN (np.max passes NaN on)
    if ok.any():
        xo = x if ok.all() else x[ok]  # in place when every row is usable
        part = np.argpartition(xo, cut, axis=1)
        cut_val = np.take_along_axis(xo, part[:, cut : cut + 1], axis=1)[:, 0]
        top_idx = part[:, cut + 1 :]
        top_val = np.take_along_axis(xo, top_idx, axis=1)
        order = np.argsort(top_val, axis=1)
        top_idx = np.take_along_axis(top_idx, order, axis=1)
        top_val = np.take_along_axis(top_val, order, axis=1)
        x_cut = np.where(_CUTOFF_MIN > cut_val, _CUTOFF_MIN, cut_val)  # Python max(v, min)
        tail_len = (top_val > x_cut[:, None]).sum(axis=1)
        k_ok = np.full(len(xo), np.inf)
        for n in np.unique(tail_len[tail_len > 4]):
            sel = np.flatnonzero(tail_len == n)
            exp_cut = np.exp(x_cut[sel])
            vals = top_val[sel, big - n :]
            pos = top_idx[sel, big - n :].copy()
            # tied tail values: ArviZ places the smoothed values in the order its argsort of
            # the tail (in draw order) gives; take that same order for those rows
            for i in np.flatnonzero((np.diff(vals, axis=1) == 0).any(axis=1)):
                row = xo[sel[i]]
                inds = np.flatnonzero(row > x_cut[sel[i]])
                pos[i] = inds[np.argsort(row[inds])]
            kn, sigma = gpd_fit(np.exp(vals) - exp_cut[:, None])
            k_ok[sel] = kn
            fin = np.isfinite(kn)
            if fin.any():
                sf = sel[fin]
                smoothed = _gpd_quantiles(int(n), kn[fin], sigma[fin])
                smoothed = np.log(smoothed + exp_cut[fin, None])
                block = xo[sf]
                np.put_along_axis(block, pos[fin], smoothed, axis=1)
                block[block > 0] = 0  # truncate at the largest raw ratio
                xo[sf] = block
        if xo is not x:
            x[ok] = xo
        k[ok] = k_ok
    if normalize:
        x -= _logsumexp_rows(x)[:, None]
    else:
        x += max_x
    return x, k


@_quiet
def psis_log_weights(
    log_ratios, reff: float = 1.0, normalize: bool = True, cells: int = BLOCK_CELLS
) -> tuple[np.ndarray, np.ndarray]:
    """Smoothed log weights (groups, samples) and Pareto k (groups,) of (groups, samples)
    log importance ratios; ArviZ's ``psislw(log_ratios, reff)`` on a 2-D array."""
    lr = np.asarray(log_ratios, dtype=float)
    if lr.ndim != 2:
        raise ValueError(f"log_ratios must be (groups, samples); got shape {lr.shape}.")
    out = lr.copy()
    k = np.empty(lr.shape[0])
    for blk in _row_blocks(lr.shape[0], lr.shape[1], cells):
        k[blk] = _smooth_block(out[blk], reff, normalize)[1]  # rows smoothed in place
    return out, k


@dataclass
class PointwiseLoo:
    """Per-group PSIS-LOO, as ``az.loo(pointwise=True)`` reports it."""

    elpd_i: np.ndarray  # loo_i
    pareto_k: np.ndarray
    good_k: float  # min(1 - 1 / log10(S), 0.7)


def good_k_of(samples: int) -> float:
    """ArviZ's Pareto-k threshold for ``samples`` draws."""
    return min(1 - 1 / np.log10(samples), 0.7)


@_quiet
def psis_loo(log_lik, reff: float = 1.0, cells: int = BLOCK_CELLS) -> PointwiseLoo:
    """Pointwise PSIS-LOO of (groups, samples) log-likelihoods: elpd_i, Pareto k, good_k."""
    ll = np.asarray(log_lik, dtype=float)
    if ll.ndim != 2:
        raise ValueError(f"log_lik must be (groups, samples); got shape {ll.shape}.")
    elpd = np.empty(ll.shape[0])
    k = np.empty(ll.shape[0])
    for blk in _row_blocks(ll.shape[0], ll.shape[1], cells):
        lw, k[blk] = _smooth_block(-ll[blk], reff, True)
        lw += ll[blk]
        elpd[blk] = _logsumexp_rows(lw)
    return PointwiseLoo(elpd, k, good_k_of(ll.shape[1]))


@_quiet
def loo_pit(y, y_hat, log_weights, cells: int = BLOCK_CELLS) -> np.ndarray:
    """LOO-PIT per group: the weighted share of ``y_hat`` (groups, samples) at or below ``y``
    (groups,), capped at 1; ``az.loo_pit(y=y, y_hat=y_hat, log_weights=log_weights)`` for
    float inputs (ArviZ spline-smooths integer ones, which this does not do)."""
    y = np.asarray(y)
    y_hat = np.asarray(y_hat)
    lw = np.asarray(log_weights, dtype=float)
    if y.dtype.kind in "iu" or y_hat.dtype.kind in "iu":
        raise TypeError("loo_pit takes float y and y_hat (integers would be smoothed by ArviZ).")
    if y_hat.shape != lw.shape or y_hat.shape[:-1] != y.shape or y_hat.ndim != 2:
        raise ValueError(f"shapes do not match: y {y.shape}, y_hat {y_hat.shape},"
                         f" log_weights {lw.shape}.")
    out = np.empty(len(y))
    for blk in _row_blocks(len(y), lw.shape[1], cells):
        sel = y_hat[blk] <= y[blk, None]
        value = np.exp(_logsumexp_rows(np.where(sel, lw[blk], -np.inf)))
        # ArviZ: min(1, value), which gives 1 for NaN; 0 where no replicate is at or below y
        out[blk] = np.where(sel.any(axis=1), np.where(value < 1, value, 1.0), 0.0)
    return out
