"""Trials still needed: how many more trials make a group's comparison with a target settled."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import special

from ..models._stats import beta_from_moments, betabinom_logpmf
from . import _walk

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
    lie in [start, start + span]; by default [0, m + 1].
    """
    unsettled, first, y_high = _settle_parts(a, b, m, target, start=start, span=span,
                                             bounds=bounds, window_cells=window_cells)
    return np.clip(1.0 - unsettled, 0.0, 1.0), first, y_high


def _settle_parts(a, b, m, target, *, start=None, span=None, bounds=SETTLE_BOUNDS,
                  window_cells=CHUNK_CELLS):
    """:func:`_settle` before its last step: the unsettled window's mass (not one minus it)."""
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
    return unsettled, first, y_high


#: a walked value this close to a cut-off is recomputed directly before it decides anything
#: (walked window masses were within 3e-11 of scipy's after 2,000 steps; the direct sums
#: they start from carry ~1e-11 themselves: test_trials_needed_walk.py)
WALK_GUARD = 1e-9
#: steps between direct recomputations of every walking group's state
WALK_RESYNC = 1024
#: walked probabilities below this are recomputed directly (no walk through underflow)
WALK_TINY = 1e-280


def _walk_state(a, b, m, first, high, target):
    """A walking group's state at m, computed directly from its two thresholds.

    Row 0 follows ``first``, row 1 ``high``; for each, y is the threshold minus one and
    q = P(Y_m = y) (Beta-binomial(m, a, b)); J = I_target(a + y, b + m - 1 - y), the test of
    whether the threshold moves down at m - 1, and g = target^(a+y) (1 - target)^(b+m-1-y)
    / B(a + y, b + m - 1 - y), the term of J's recurrences. Rows that need no test are
    "dead" (their q, J and g are 0): first at 0 stays there, high at its ceiling m + 1 falls
    with m. ``bad`` marks groups that cannot be walked from here.
    Returns (y, q, J, g) as one (4, 2, groups) float array, and ``bad``.
    """
    m = np.asarray(m, dtype=np.int64)
    y = np.stack([first - 1, high - 1])
    dead = np.stack([first == 0, high == m + 1])
    al = a + y
    be = b + (m - 1) - y
    bad = (~dead & ~((be > 0) & (al > 0))) | (y < -1) | (y > m)
    live = ~dead & ~bad
    s = np.zeros((4,) + y.shape)
    s[0] = y
    mm = np.broadcast_to(m, y.shape)
    aa, bb = np.broadcast_to(a, y.shape), np.broadcast_to(b, y.shape)
    s[1][live] = np.exp(betabinom_logpmf(y[live], mm[live], aa[live], bb[live]))
    s[2][live] = special.betainc(al[live], be[live], target)
    s[3][live] = np.exp(al[live] * np.log(target) + be[live] * np.log1p(-target)
                        - special.betaln(al[live], be[live]))
    return s, bad.any(axis=0)


def _walk_direct(a, b, m, first, high, target):
    """The step to m taken directly, from the thresholds at m + 1 (each the same or one
    less at m): (chance, window mass, state, bad) as :func:`settle_chance` computes them."""
    first, high = first.astype(np.int64), high.astype(np.int64)
    un, f, h = _settle_parts(a, b, m, target, start=(np.maximum(first - 1, 0),
                                                     np.maximum(high - 1, 0)), span=1)
    return np.clip(1.0 - un, 0.0, 1.0), un, *_walk_state(a, b, m, f, h, target)


def _last_short(a, b, horizon, target, chance) -> np.ndarray:
    """Per group, the largest m in 1..horizon with settle_chance < ``chance`` (0 if none).

    Walks down from each group's horizon one m at a time and stops at the first short m, so
    every m above the answer is evaluated. The chance at the horizon is computed as
    :func:`settle_chance` does; each step down then costs a few arithmetic operations
    (:func:`._walk.walk_down`, compiled). With n = a + b + m - 1 and m' = m - 1:
    P(Y_m' = y) = P(Y_m = y) (m - y) n / (m (b + m' - y)); one trial fewer adds
    P(Y_m' = y) (a + y) / n to P(Y <= y) (the Polya urn: the m-th trial a success), so the
    unsettled window [first, high) gains it at high - 1 and loses it at first - 1. Each
    threshold stays or moves down by one (one trial fewer only raises P(above) for the same
    successes, one success fewer only lowers it); it moves when J passes its cut, taking
    P(Y_m' = y) into the window (first) or out of it (high), q stepping to y - 1 by the ratio
    of neighbouring terms; J follows I(a, b - 1) = I(a, b) - g / ((1 - t)(a + b - 1)) (stays)
    or I(a - 1, b) = I(a, b) + g / (t (a + b - 1)) (moves), g with it. A step whose decision
    falls within WALK_GUARD of a cut-off, or whose values leave the recurrences' safe range,
    is taken directly as :func:`settle_chance` computes (bisection on y, summed mass), and
    so is every WALK_RESYNC-th step of a group.
    """
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    horizon = np.asarray(horizon, dtype=np.int64)
    last = np.zeros(len(a), dtype=np.int64)
    un, f, h = _settle_parts(a, b, horizon, target)
    c = np.clip(1.0 - un, 0.0, 1.0)
    last[c < chance] = horizon[c < chance]
    act = np.flatnonzero((c >= chance) & (horizon > 1))
    m, W, aa, bb = horizon[act].astype(float), un[act], a[act], b[act]
    s, bad = _walk_state(aa, bb, horizon[act], f[act], h[act], target)
    cuts = (1 - SETTLE_BOUNDS[0], 1 - SETTLE_BOUNDS[1])
    while act.size:
        event = np.full(act.size, _walk.DIRECT)
        go = np.flatnonzero(~bad)
        if go.size:  # the compiled walk works on contiguous copies
            sub = (m[go], np.ascontiguousarray(s[:, :, go]), W[go])
            event[go] = _walk.walk_down(aa[go], bb[go], *sub, target, chance, cuts,
                                        WALK_GUARD, WALK_TINY, WALK_RESYNC)
            m[go], s[:, :, go], W[go] = sub
        redo = np.flatnonzero(event == _walk.DIRECT)
        if redo.size:
            m[redo] -= 1
            c, W[redo], s[:, :, redo], bad[redo] = _walk_direct(
                aa[redo], bb[redo], m[redo].astype(np.int64), s[0, 0, redo] + 1,
                s[0, 1, redo] + 1, target)
            event[redo[c < chance]] = _walk.SHORT
            event[redo[(c >= chance) & (m[redo] <= 1)]] = _walk.BOTTOM
        short = event == _walk.SHORT
        last[act[short]] = m[short]
        keep = event == _walk.DIRECT
        act, aa, bb, m, W, bad = act[keep], aa[keep], bb[keep], m[keep], W[keep], bad[keep]
        s = s[:, :, keep]
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
    #    past the last m in 1..H short of it (every m above it evaluated, see _last_short)
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
    through H. ``prob_settled`` is the chance at that m. The m from H down to the answer are
    each evaluated by exact recurrences, a few operations a step (:func:`_last_short`), and
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
