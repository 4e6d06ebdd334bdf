"""Trials still needed: how many more trials make a group's comparison with a target settled."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import special

from ..models._stats import beta_from_moments, betabinom_logpmf

#: P(above target) outside these bounds reads "settled"
SETTLE_BOUNDS = (0.05, 0.95)
CHUNK_CELLS = 2_000_000

if TYPE_CHECKING:
    from .draws import GroupDraws


def _smallest_true(pred, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per element, the smallest integer in [lo, hi] where the monotone ``pred`` holds (hi if none).

    ``pred(x, idx)`` (x at the elements ``idx``) must be False then True along the integers;
    ``hi`` is treated as True. Only elements still open are evaluated.
    """
    lo = lo.copy()
    hi = hi.copy()
    while True:
        idx = np.flatnonzero(lo < hi)
        if not idx.size:
            return lo
        mid = (lo[idx] + hi[idx]) // 2
        t = pred(mid, idx)
        hi[idx] = np.where(t, mid, hi[idx])
        lo[idx] = np.where(t, lo[idx], mid + 1)


def settle_chance(
    a: np.ndarray,
    b: np.ndarray,
    m: np.ndarray,
    target: float,
    bounds: tuple[float, float] = SETTLE_BOUNDS,
    window_cells: int = CHUNK_CELLS,
) -> np.ndarray:
    """P(after m more trials, P(theta > target | data) falls outside ``bounds``).

    The group's current posterior is Beta(a, b); the m future successes are then
    Beta-binomial(m, a, b), and the updated P(theta > target) rises with their count, so the
    settled outcomes are y <= y_low and y >= y_high, found by bisection on y with the
    regularised incomplete beta function. The chance is one minus the Beta-binomial mass of
    the unsettled window between, summed exactly from the probability mass function.
    """
    return _settle(a, b, m, target, bounds=bounds, window_cells=window_cells)[0]


def _settle(a, b, m, target, *, start=None, span=None, bounds=SETTLE_BOUNDS,
            window_cells=CHUNK_CELLS):
    """settle_chance with its two thresholds (first unsettled y, first settled-high y).

    ``start`` (two arrays) and ``span`` narrow the bisection: both thresholds are known to
    lie in [start, start + span] (see :func:`_last_short`); by default [0, m + 1].
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    m = np.broadcast_to(np.asarray(m, dtype=np.int64), a.shape).copy()
    low, high = bounds

    def cdf_at_target(y, i):  # P(theta <= target | y successes in m), decreasing in y
        return special.betainc(a[i] + y, b[i] + m[i] - y, target)

    top = m + 1
    lo_first, lo_high = (np.zeros_like(m), np.zeros_like(m)) if start is None else start
    top_first = top if span is None else np.minimum(lo_first + span, top)
    top_high = top if span is None else np.minimum(lo_high + span, top)
    # smallest y with P(above) > high  <=>  cdf < 1 - high
    y_high = _smallest_true(lambda y, i: cdf_at_target(y, i) < 1 - high, lo_high, top_high)
    # smallest y with P(above) >= low  <=>  cdf <= 1 - low (y_low is the one before)
    first = _smallest_true(lambda y, i: cdf_at_target(y, i) <= 1 - low, lo_first, top_first)
    length = np.maximum(y_high - first, 0)
    unsettled = np.zeros(len(a))
    live = np.flatnonzero(length > 0)
    if live.size:
        longest = int(length[live].max())
        step = max(1, window_cells // max(longest, 1))
        for s in range(0, live.size, step):
            idx = live[s : s + step]
            unsettled[idx] = _window_mass(a[idx], b[idx], m[idx], first[idx], length[idx])
    return np.clip(1.0 - unsettled, 0.0, 1.0), first, y_high


def pmf_ceiling(a, b, m) -> np.ndarray:
    """The largest Beta-binomial(m, a, b) probability, slightly rounded up.

    p(y + 1) >= p(y) exactly when m (a - 1) - (b - 1) >= y (a + b - 2) (the ratio of
    neighbouring terms, multiplied out), so the mass function rises to one mode and falls
    (a + b > 2), or is largest at an end (a + b <= 2): the mode's two neighbours of
    (m (a - 1) - (b - 1)) / (a + b - 2) and both ends cover every case.
    """
    m = np.asarray(m, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        y = (m * (a - 1.0) - (b - 1.0)) / (a + b - 2.0)
    y = np.where(np.isfinite(y), y, 0.0)
    out = np.zeros_like(m)
    for c in (np.zeros_like(m), m, np.clip(np.floor(y), 0, m), np.clip(np.ceil(y), 0, m)):
        out = np.maximum(out, np.exp(betabinom_logpmf(c, m, a, b)))
    return out * (1 + 1e-9) + 1e-15


def _last_short(a, b, horizon, target, chance) -> np.ndarray:
    """Per group, the largest m in 1..horizon with settle_chance < ``chance`` (0 if none).

    The same answer as evaluating every m, with fewer evaluations. From m to m + 1 each
    threshold of :func:`settle_chance` stays or moves up by one (one more trial can only
    lower P(above) for the same successes, and one more success only raises it), and the
    settled mass on each side changes by at most one probability of Beta-binomial(m, a, b):
    so |chance(m + j) - chance(m)| <= 2 j p_max(m), p_max (:func:`pmf_ceiling`) falling
    with m (each term of m + 1 averages two of m). A chance short of ``chance`` by d thus
    stays short for the next ceil(d / (2 p_max)) - 1 trials, and one above it by d stays
    above for floor(d / (2 p_max)): those m are known without evaluating them, and the
    thresholds' bisection is narrowed to the skipped span.
    """
    g = len(a)
    m = np.ones(g, dtype=np.int64)
    last = np.zeros(g, dtype=np.int64)
    first = np.zeros(g, dtype=np.int64)
    high = np.zeros(g, dtype=np.int64)
    span = np.full(g, -1, dtype=np.int64)  # -1: no state yet, bisect the whole range
    act = np.arange(g)
    while act.size:
        mm = m[act]
        known = span[act] >= 0
        c, f, h = _settle(a[act], b[act], mm, target, start=(first[act], high[act]),
                          span=np.where(known, span[act], mm + 1))
        first[act], high[act] = f, h
        p2 = 2.0 * pmf_ceiling(a[act], b[act], mm)
        short = c < chance
        room = horizon[act] - mm + 1
        with np.errstate(over="ignore", invalid="ignore"):
            j_short = np.clip(np.ceil((chance - c) / p2 - 1e-12), 1, room)
            j_ok = np.clip(np.floor((c - chance) / p2) + 1, 1, room)
        step = np.where(short, j_short, j_ok).astype(np.int64)
        last[act[short]] = (mm + step - 1)[short]
        m[act] = mm + step
        span[act] = step
        act = act[m[act] <= horizon[act]]
    return last


def _window_mass(a, b, m, first, length) -> np.ndarray:
    """Beta-binomial(m, a, b) mass of y = first .. first + length - 1, summed per row.

    One log mass at ``first``, then the ratio of neighbouring terms,
    p(y + 1) / p(y) = (m - y)(a + y) / ((y + 1)(b + m - y - 1)), summed in logs: two
    logarithms a term instead of six log-gamma functions. Rows are laid end to end (no
    padding to the longest).
    """
    length = np.asarray(length, dtype=np.int64)
    out = np.zeros(len(first))
    rows = np.flatnonzero(length > 0)
    if not rows.size:
        return out
    size = length[rows]
    ends = np.cumsum(size)
    row = np.repeat(np.arange(rows.size), size)
    j = np.arange(ends[-1]) - np.repeat(ends - size, size)  # position within the row
    aa, bb, mm = a[rows], b[rows], m[rows].astype(float)
    y0 = first[rows].astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        start = betabinom_logpmf(y0, mm, aa, bb)
        y = (y0[row] + j)[:-1]
        ar, br, mr = aa[row][:-1], bb[row][:-1], mm[row][:-1]
        steps = np.log((mr - y) * (ar + y) / ((y + 1) * (br + mr - y - 1)))
    steps = np.concatenate([[0.0], steps])
    steps[ends[:-1]] = 0.0  # each row starts afresh
    total = np.cumsum(steps)
    logpmf = start[row] + total - np.repeat(total[ends - size], size)
    out[rows] = np.add.reduceat(np.exp(logpmf), ends - size)
    return out


def _needed(a, b, p_above, target, chance, max_trials):
    """trials_needed_table's search for distinct posteriors: (m, chance then, found)."""
    low, high = SETTLE_BOUNDS
    settled = (p_above > high) | (p_above < low)
    g = len(a)
    needed = np.full(g, -1, dtype=np.int64)
    prob = np.full(g, np.nan)
    needed[settled] = 0
    prob[settled] = 1.0
    todo = np.flatnonzero(~settled)
    # 1. a first m that reaches the chance: doubling from 1 to max_trials
    grid = [int(x) for x in 2 ** np.arange(0, int(np.log2(max_trials)) + 1)]
    if grid[-1] != max_trials:
        grid.append(int(max_trials))
    first_hit = np.full(g, -1, dtype=np.int64)
    active = todo
    for m in grid:
        if not active.size:
            break
        c = settle_chance(a[active], b[active], np.full(active.size, m), target)
        hit = c >= chance
        first_hit[active[hit]] = m
        prob[active[~hit]] = c[~hit]
        active = active[~hit]
    # 2. the horizon H: 2 x the first hit + 20, doubled while the chance at H falls short
    #    (capped by max_trials; short there: not found)
    horizon = np.minimum(int(max_trials), 2 * first_hit + 20)
    pending = todo[first_hit[todo] > 0]
    found = np.zeros(g, dtype=bool)
    while pending.size:
        short = settle_chance(a[pending], b[pending], horizon[pending], target) < chance
        found[pending[~short]] = True
        pending = pending[short & (horizon[pending] < max_trials)]
        horizon[pending] = np.minimum(int(max_trials), 2 * horizon[pending])
    # 3. the smallest m from which the chance stays at or above ``chance`` through H: one
    #    past the last m in 1..H short of it (every m accounted for, see _last_short)
    idx = np.flatnonzero(found)
    if idx.size:
        needed[idx] = _last_short(a[idx], b[idx], horizon[idx], target, chance) + 1
        prob[idx] = settle_chance(a[idx], b[idx], needed[idx], target)
    return needed, prob, found


def trials_needed_table(
    inp: GroupDraws,
    target: float,
    *,
    chance: float = 0.80,
    max_trials: int = 100_000,
) -> tuple[pd.DataFrame, dict]:
    """How many more trials make it likely (``chance``) that a group's comparison is settled.

    Preposterior analysis: each group's posterior is moment-matched to a Beta (exact for the
    conjugate models; for the hierarchy this holds the population fixed while the group
    learns), future successes are Beta-binomial, and :func:`settle_chance` gives the exact
    probability that P(theta > target) ends outside (0.05, 0.95). The search doubles m from 1
    to ``max_trials`` until the chance is first met. Whole-number counts make the chance
    zig-zag with m (by a few hundredths), so a first crossing is not yet a promise; the
    chance is then accounted for at *every* m from 1 to a horizon H (twice that first m plus
    20, doubled while the chance at H still falls short, at most ``max_trials``), and the m
    reported is the smallest from which the chance stays at or above ``chance`` at every m
    through H. ``prob_settled`` is the chance at that m. Every m is accounted for without
    computing each (:func:`_last_short` bounds how far the chance can move per trial), and
    groups sharing one posterior are searched once.
    """
    names = inp.names.astype(str)
    a, b = beta_from_moments(*inp.moments())
    p_above = inp.prob_above(target)
    low, high = SETTLE_BOUNDS
    # groups with one posterior (same counts under an exact engine) share one answer
    codes = pd.DataFrame({"a": a, "b": b, "p": p_above}).groupby(
        ["a", "b", "p"], sort=False, dropna=False).ngroup().to_numpy()
    one = np.unique(codes, return_index=True)[1]
    needed, prob, found = _needed(a[one], b[one], p_above[one], target, chance, max_trials)
    needed, prob, found = needed[codes], prob[codes], found[codes]
    settled = (p_above > high) | (p_above < low)
    g = len(names)
    status = np.where(
        settled,
        "already settled",
        np.where(needed > 0, "settles with more trials", f"not within {max_trials} trials"),
    )
    table = pd.DataFrame(
        {
            "group": names,
            "trials_needed": pd.array(np.where(needed >= 0, needed, 0), dtype="Int64"),
            "status": status,
            "prob_settled": prob,
        }
    )
    table.loc[needed < 0, "trials_needed"] = pd.NA
    doc = {
        "target": target,
        "settle_chance": chance,
        "max_trials": int(max_trials),
        "settled_when": f"P(above target) > {high} or < {low}",
        "already_settled": int(settled.sum()),
        "settles_with_more_trials": int(found.sum()),
        "not_within_max_trials": int(g - settled.sum() - found.sum()),
        "method": (
            "preposterior: each group's posterior moment-matched to a Beta; future successes"
            " Beta-binomial; settled outcomes found by bisection; m searched by doubling to a"
            " first m reaching the chance, then the chance at every m up to a horizon"
        ),
        "definition": (
            f"trials_needed is the smallest m from which the chance of settling stays at or"
            f" above {chance:g} for every m up to a horizon of twice the first m reaching it"
            f" plus 20 (widened while the chance there falls short, at most {int(max_trials)})"
        ),
    }
    return table, doc
