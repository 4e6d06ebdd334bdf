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
#: most (group, m) pairs of the every-m scan computed at once
SCAN_PAIRS = 200_000

if TYPE_CHECKING:
    from .draws import GroupDraws


def _smallest_true(pred, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per element, the smallest integer in [lo, hi] where the monotone ``pred`` holds (hi if none).

    ``pred(x)`` must be False then True along the integers; ``hi`` is treated as True.
    """
    lo = lo.copy()
    hi = hi.copy()
    while True:
        open_ = lo < hi
        if not open_.any():
            return lo
        mid = (lo + hi) // 2
        t = pred(mid)
        hi = np.where(open_ & t, mid, hi)
        lo = np.where(open_ & ~t, mid + 1, lo)


def _smallest_true_near(pred, guess: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """:func:`_smallest_true`, started from a guess: gallop from it to a bracket, then bisect.

    Exact whatever the guess (the bracket is checked by ``pred`` itself); a guess within a few
    integers of the answer takes a handful of ``pred`` calls instead of log2(hi - lo).
    """
    def holds(y):  # ``hi`` is treated as True (it may lie past the last valid count)
        return np.where(y >= hi, True, pred(np.minimum(y, hi - 1)))

    g = np.clip(guess, lo, hi)
    at = holds(g)
    low, high = lo.copy(), hi.copy()
    high = np.where(at, g, high)  # pred holds at g: the answer is at most g
    low = np.where(at, low, g + 1)  # it fails at g: the answer is above g
    step = np.ones_like(g)
    down, up = at & (g > lo), ~at & (g < hi)
    while down.any() or up.any():
        cand = np.where(down, np.maximum(g - step, lo), np.minimum(g + step, hi))
        t = holds(cand)
        # going down: a failure at cand closes the bracket (cand, high]
        low = np.where(down & ~t, cand + 1, low)
        high = np.where(down & t, cand, high)
        # going up: a success at cand closes the bracket [low, cand]
        high = np.where(up & t, cand, high)
        low = np.where(up & ~t, cand + 1, low)
        down = down & t & (cand > lo)
        up = up & ~t & (cand < hi)
        g = np.where(down | up, cand, g)
        step = step * 2
    return _smallest_true(pred, np.minimum(low, high), high)


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
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    m = np.broadcast_to(np.asarray(m, dtype=np.int64), a.shape).copy()
    low, high = bounds

    def cdf_at_target(y):  # P(theta <= target | y successes in m), decreasing in y
        return special.betainc(a + y, b + m - y, target)

    zero = np.zeros_like(m)
    top = m + 1
    # starting guesses from the normal approximation of the updated Beta (exactness comes
    # from the search, not from the guess)
    total = a + b + m
    spread = np.sqrt(target * (1 - target) / (total + 1))
    guess_high = np.floor((target + special.ndtri(high) * spread) * total - a).astype(np.int64)
    guess_low = np.floor((target - special.ndtri(1 - low) * spread) * total - a).astype(np.int64)
    # smallest y with P(above) > high  <=>  cdf < 1 - high
    y_high = _smallest_true_near(lambda y: cdf_at_target(y) < 1 - high, guess_high, zero, top)
    # smallest y with P(above) >= low  <=>  cdf <= 1 - low; y_low is the one before
    y_low = _smallest_true_near(lambda y: cdf_at_target(y) <= 1 - low, guess_low, zero,
                                top) - 1
    first = y_low + 1
    length = np.maximum(y_high - first, 0)
    unsettled = np.zeros(len(a))
    live = np.flatnonzero(length > 0)
    if live.size:
        longest = int(length[live].max())
        step = max(1, window_cells // max(longest, 1))
        for s in range(0, live.size, step):
            idx = live[s : s + step]
            unsettled[idx] = _window_mass(a[idx], b[idx], m[idx], first[idx], length[idx])
    return np.clip(1.0 - unsettled, 0.0, 1.0)


def _batches(items: np.ndarray, sizes: np.ndarray, most: int):
    """Consecutive runs of ``items`` whose ``sizes`` add up to at most ``most`` (at least one)."""
    start, total = 0, 0
    for i, size in enumerate(sizes):
        if i > start and total + size > most:
            yield items[start:i]
            start, total = i, 0
        total += int(size)
    if start < len(items):
        yield items[start:]


def _window_mass(a, b, m, first, length) -> np.ndarray:
    """Beta-binomial(m, a, b) mass of y = first .. first + length - 1, summed per row.

    The pmf at ``first`` comes from :func:`betabinom_logpmf`; the rest of the window by the
    ratio of neighbours, pmf(y + 1) / pmf(y) = (m - y)(a + y) / ((y + 1)(b + m - y - 1)),
    so each term costs one logarithm instead of five log-gamma functions.
    """
    span = int(length.max())
    m = m.astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        start = betabinom_logpmf(first.astype(float), m, a, b)
        y = first[:, None] + np.arange(span - 1)[None, :]
        step = np.log((m[:, None] - y) * (a[:, None] + y)) - np.log(
            (y + 1.0) * (b[:, None] + m[:, None] - y - 1.0))
    logpmf = np.empty((len(a), span))
    logpmf[:, 0] = start
    np.cumsum(step, axis=1, out=logpmf[:, 1:])
    logpmf[:, 1:] += start[:, None]
    j = np.arange(span)[None, :]
    logpmf = np.where(j < length[:, None], logpmf, -np.inf)
    return np.exp(logpmf).sum(axis=1)


def _first_crossing(a, b, todo, target, chance, max_trials, prob) -> np.ndarray:
    """A first m reaching the chance, by doubling from 1 to ``max_trials`` (-1: none).

    ``prob`` receives the last chance computed for groups that never reach it.
    """
    grid = [int(x) for x in 2 ** np.arange(0, int(np.log2(max_trials)) + 1)]
    if grid[-1] != max_trials:
        grid.append(int(max_trials))
    first_hit = np.full(len(a), -1, dtype=np.int64)
    active = todo
    for m in grid:
        if not active.size:
            break
        c = settle_chance(a[active], b[active], np.full(active.size, m), target)
        hit = c >= chance
        first_hit[active[hit]] = m
        prob[active[~hit]] = c[~hit]
        active = active[~hit]
    return first_hit


def _hold_from(a, b, found, first_hit, target, chance, max_trials, needed, prob) -> list[int]:
    """The smallest m from which the chance stays at or above ``chance`` through a horizon.

    The chance is computed at every m from 1 to the horizon (2 x the first hit + 20, widened
    until the chance at the horizon holds, capped by ``max_trials``); fills ``needed`` and
    ``prob`` in place and returns the groups still short at ``max_trials``.
    """
    horizon = np.minimum(int(max_trials), 2 * first_hit + 20)
    pending = found
    missing: list[int] = []
    while pending.size:
        widen = []
        for batch in _batches(pending, horizon[pending], SCAN_PAIRS):
            h = horizon[batch]
            rows = np.repeat(np.arange(batch.size), h)
            ms = np.arange(h.sum()) - np.repeat(np.cumsum(h) - h, h) + 1
            c = settle_chance(a[batch][rows], b[batch][rows], ms, target)
            ends = np.cumsum(h)
            for i, j in enumerate(batch):
                ci = c[ends[i] - h[i]: ends[i]]
                below = np.flatnonzero(ci < chance)
                if below.size and below[-1] == h[i] - 1:  # still short at the horizon
                    if h[i] >= max_trials:
                        missing.append(j)
                    else:
                        horizon[j] = min(int(max_trials), 2 * int(h[i]))
                        widen.append(j)
                    continue
                start = int(below[-1]) + 1 if below.size else 0
                needed[j] = start + 1
                prob[j] = float(ci[start])
        pending = np.asarray(widen, dtype=np.int64)
    return missing


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
    chance is then computed at *every* m from 1 to a horizon H (twice that first m plus 20,
    doubled while the chance at H still falls short, at most ``max_trials``), and the m
    reported is the smallest from which the chance stays at or above ``chance`` at every m
    through H. ``prob_settled`` is the chance at that m.
    """
    names = inp.names.astype(str)
    a, b = beta_from_moments(*inp.moments())
    p_above = inp.prob_above(target)
    low, high = SETTLE_BOUNDS
    settled = (p_above > high) | (p_above < low)
    g = len(names)
    needed = np.full(g, -1, dtype=np.int64)
    prob = np.full(g, np.nan)
    needed[settled] = 0
    prob[settled] = 1.0
    todo = np.flatnonzero(~settled)
    first_hit = _first_crossing(a, b, todo, target, chance, max_trials, prob)
    found = todo[first_hit[todo] > 0]
    missing = _hold_from(a, b, found, first_hit, target, chance, max_trials, needed, prob)
    found = np.setdiff1d(found, np.asarray(missing, dtype=np.int64))
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
        "settles_with_more_trials": int(found.size),
        "not_within_max_trials": int(g - settled.sum() - found.size),
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
