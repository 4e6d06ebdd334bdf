"""Per-draw ranks of the groups, summarised without a draws x groups rank matrix.

In every posterior draw the groups are ranked by their rate; rank 1 is the best
(``better="higher"``: the highest rate; ``"lower"``: the lowest). A group's rank median and
central rank interval summarise its ranks over the draws. Quantiles are those of the draws'
empirical distribution (the smallest rank whose cumulative share reaches the probability),
read exactly from the ranks held at once where they fit a memory budget, else by refining
per-group histograms over a few passes.

Ties: where several groups share a rate in a draw (complete pooling: all of them, in every
draw), the tied block occupies positions lo..hi and each member gets the average rank
(lo + hi) / 2. ``prob_best_k`` gives each member the fraction of the block's positions that
are <= k (``prob_worst_k``: >= G - k + 1), so across groups P(in best k) sums to exactly k in
every draw. Pairwise, a tie counts one half for each side.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..models.exceptions import DataError
from ..options import BETTER, label
from .draws import CHUNK_CELLS, tied_runs
from .draws import chunks as _chunks

#: largest number of histogram cells held while refining rank quantiles
HISTOGRAM_CELLS = 16_000_000
#: most draws x groups ranks held at once (int32, 2 GB at most) to read quantiles in one pass:
#: half the memory of the largest theta a fit may hold (4 GB of float64), so every default fit
#: ranks in one pass (a million groups x 400 draws: 1.6 GB); larger posteriors, given as
#: arrays, refine histograms over several passes instead, each ranking every draw again
HELD_RANK_CELLS = 500_000_000


def _check_better(better: str) -> str:
    if better not in BETTER:
        raise ValueError(f"better={better!r} is not one of {BETTER}")
    return better


# -- ranks --------------------------------------------------------------------------------


def _block_positions(theta: np.ndarray, better: str) -> tuple[np.ndarray, np.ndarray]:
    """0-based first and last sorted position of each group's tied block, per draw.

    ``theta`` is (draws, groups); position 0 is the best.
    """
    key = -theta if better == "higher" else theta
    order = np.argsort(key, axis=1)  # any order within a tie: blocks are found below
    ordered = np.take_along_axis(key, order, axis=1)
    rows, g = ordered.shape
    if not (ordered[:, 1:] == ordered[:, :-1]).any():  # the usual case: no ties
        lo = np.empty((rows, g), dtype=np.int64)
        np.put_along_axis(lo, order, np.broadcast_to(np.arange(g, dtype=np.int64), (rows, g)),
                          axis=1)
        return lo, lo
    first, last = tied_runs(ordered)
    lo = np.empty((rows, g), dtype=np.int64)
    hi = np.empty((rows, g), dtype=np.int64)
    np.put_along_axis(lo, order, first, axis=1)
    np.put_along_axis(hi, order, last, axis=1)
    return lo, hi


def draw_ranks(theta: np.ndarray, better: str = "higher") -> np.ndarray:
    """Per-draw ranks (1 = best; a tied block shares its average rank), same shape as ``theta``.

    Dense: for small arrays and tests. :func:`rank_summary` never builds this matrix.
    """
    better = _check_better(better)
    theta = np.atleast_2d(np.asarray(theta, dtype=float))
    lo, hi = _block_positions(theta, better)
    return (lo + hi + 2) / 2.0


def _share_in_top(lo: np.ndarray, hi: np.ndarray, k: int, g: int):
    size = hi - lo + 1
    best = np.clip(k - lo, 0, size) / size
    worst = np.clip(hi + 1 - (g - k), 0, size) / size
    return best, worst


@dataclass
class RankSummary:
    """Per-group rank quantiles and top/bottom-k probabilities."""

    rank_median: np.ndarray
    rank_lower: np.ndarray
    rank_upper: np.ndarray
    prob_best_k: np.ndarray
    prob_worst_k: np.ndarray
    k: int
    passes: int
    seconds: float
    #: groups given a rank: those with trials (the others' entries are NaN, "no data")
    ranked: int = 0
    #: why nothing or not every group was ranked ("" when every group was)
    note: str = ""


def _target_counts(probs: np.ndarray, s: int) -> np.ndarray:
    # the inverted-CDF quantile at p is the smallest value whose count of draws <= it is
    # at least ceil(p * s)
    return np.maximum(1, np.ceil(np.round(probs * s, 9))).astype(np.int64)


class _BufferedCounts:
    """Counts of flat bin indices; one bincount per ``hold`` indices, not one per chunk."""

    def __init__(self, size: int, hold: int) -> None:
        self.counts = np.zeros(size, dtype=np.int64)
        self.hold = hold
        self.pending: list[np.ndarray] = []
        self.held = 0

    def add(self, flat: np.ndarray) -> None:
        self.pending.append(flat)
        self.held += flat.size
        if self.held >= self.hold:
            self._flush()

    def _flush(self) -> None:
        if self.pending:
            idx = np.concatenate(self.pending)
            self.counts += np.bincount(idx, minlength=self.counts.size)
            self.pending.clear()
            self.held = 0

    def total(self) -> np.ndarray:
        self._flush()
        return self.counts


def rank_summary(
    theta: np.ndarray,
    *,
    better: str = "higher",
    top: int = 5,
    level: float = 0.95,
    chunk_cells: int = CHUNK_CELLS,
    histogram_cells: int = HISTOGRAM_CELLS,
    held_cells: int = HELD_RANK_CELLS,
) -> RankSummary:
    """Rank median, central rank interval and P(in best / worst k) for every group.

    ``theta`` is (draws, groups). Quantiles are exact inverted-CDF quantiles of each group's
    per-draw (tie-averaged) ranks. Where draws x groups is at most ``held_cells`` the ranks
    are computed once and held (4 bytes each) and the quantiles read by partial sorts;
    otherwise they are found by refining per-group histograms of twice the rank: each pass
    ranks every draw again and splits every group's current bracket into at most
    ``histogram_cells / groups`` bins, so memory is bounded by ``histogram_cells`` and
    ``chunk_cells`` whatever the size of the posterior. Both give the same numbers. ``k`` is
    ``top`` capped at the number of groups.
    """
    started = time.perf_counter()
    better = _check_better(better)
    s, g = theta.shape
    k = min(int(top), g)
    probs = np.array([(1 - level) / 2, 0.5, (1 + level) / 2])
    need = _target_counts(probs, s)
    if s * g <= held_cells:
        twice, best_sum, worst_sum = _held_quantiles(theta, better, k, need, chunk_cells)
        done_passes = 1
    else:
        twice, best_sum, worst_sum, done_passes = _refined_quantiles(
            theta, better, k, need, chunk_cells, histogram_cells)
    return RankSummary(
        rank_median=twice[1] / 2.0,
        rank_lower=twice[0] / 2.0,
        rank_upper=twice[2] / 2.0,
        prob_best_k=best_sum / s,
        prob_worst_k=worst_sum / s,
        k=k,
        passes=done_passes,
        seconds=time.perf_counter() - started,
        ranked=g,
    )


def _held_quantiles(theta, better, k, need, chunk_cells):
    """Twice the rank at the three target counts, from every draw's ranks held at once."""
    s, g = theta.shape
    value = np.empty((s, g), dtype=np.int32)  # twice the rank minus 2: below 2 ** 31
    best_sum = np.zeros(g)
    worst_sum = np.zeros(g)
    for sl in _chunks(s, g, chunk_cells):
        lo, hi = _block_positions(theta[sl], better)
        b, w = _share_in_top(lo, hi, k, g)
        best_sum += b.sum(axis=0)
        worst_sum += w.sum(axis=0)
        value[sl] = lo + hi
        del lo, hi, b, w
    twice = np.empty((3, g), dtype=np.int64)
    kth = np.unique(need - 1)
    step = max(1, chunk_cells // s)
    for start in range(0, g, step):
        block = np.partition(value[:, start : start + step].T, kth, axis=1)
        twice[:, start : start + step] = block[:, need - 1].T
    return twice + 2, best_sum, worst_sum


def _refined_quantiles(theta, better, k, need, chunk_cells, histogram_cells):
    """Twice the rank at the three target counts, by refining per-group histograms."""
    s, g = theta.shape
    n_values = 2 * g - 1  # twice the rank, minus 2, lies in 0 .. 2g - 2
    max_bins = max(2, histogram_cells // g)
    passes = max(1, math.ceil(math.log(n_values) / math.log(max_bins))) if n_values > 1 else 1
    bins = max(2, math.ceil(n_values ** (1 / passes)))
    start = np.zeros((3, g), dtype=np.int64)
    below = np.zeros((3, g), dtype=np.int64)
    width = n_values
    best_sum = np.zeros(g)
    worst_sum = np.zeros(g)
    cols = np.arange(g, dtype=np.int64)
    done_passes = 0
    first = True
    while True:
        sub = max(1, math.ceil(width / bins))
        n_bins = math.ceil(width / sub)
        shared = first  # in the first pass all three brackets are the whole range
        counts = [_BufferedCounts(g * n_bins, 4 * chunk_cells) for _ in range(1 if shared else 3)]
        for sl in _chunks(s, g, chunk_cells):
            lo, hi = _block_positions(theta[sl], better)
            if first:
                b, w = _share_in_top(lo, hi, k, g)
                best_sum += b.sum(axis=0)
                worst_sum += w.sum(axis=0)
            value = lo + hi  # twice the rank minus 2
            del lo, hi
            for q, hist in enumerate(counts):
                offset = value - start[q][None, :]
                inside = (offset >= 0) & (offset < width)
                hist.add((cols[None, :] * n_bins + offset // sub)[inside])
        for q in range(3):
            c = counts[0 if shared else q].total().reshape(g, n_bins)
            cum = below[q][:, None] + np.cumsum(c, axis=1)
            hit = np.argmax(cum >= need[q], axis=1)
            below[q] = cum[cols, hit] - c[cols, hit]
            start[q] = start[q] + hit * sub
        done_passes += 1
        first = False
        width = sub
        if width == 1:
            break
    return start + 2, best_sum, worst_sum, done_passes


#: fewest groups with trials that make a ranking
MIN_RANKED = 2


def informative_rank_summary(
    theta: np.ndarray, trials: np.ndarray, *, better: str = "higher", top: int = 5,
    level: float = 0.95, **budgets,
) -> RankSummary:
    """:func:`rank_summary` over the groups with trials only; the others get NaN ("no data").

    A group with no trials has no data of its own: its draws are the population's, so a rank
    for it would describe the population, not the group. With fewer than
    :data:`MIN_RANKED` groups with trials nothing is ranked (every entry NaN) and ``note``
    says why.
    """
    trials = np.asarray(trials)
    keep = np.flatnonzero(trials > 0)
    g = theta.shape[1]
    empty = np.full(g, np.nan)
    if len(keep) < MIN_RANKED:
        return RankSummary(empty, empty.copy(), empty.copy(), empty.copy(), empty.copy(),
                           k=0, passes=0, seconds=0.0, ranked=0,
                           note=f"not ranked: {len(keep)} of {g} group(s) have trials;"
                           f" a ranking needs at least {MIN_RANKED}")
    part = theta if len(keep) == g else theta[:, keep]
    got = rank_summary(part, better=better, top=top, level=level, **budgets)
    got.ranked = len(keep)
    if len(keep) == g:
        return got
    for name in ("rank_median", "rank_lower", "rank_upper", "prob_best_k", "prob_worst_k"):
        full = empty.copy()
        full[keep] = getattr(got, name)
        setattr(got, name, full)
    got.note = (f"{g - len(keep)} group(s) with no trials not ranked (no data); ranks are among"
                f" the {len(keep)} groups with trials")
    return got


def ranks_table(names: np.ndarray, summary: RankSummary) -> pd.DataFrame:
    """ranks.csv: one row per group, best rank median first."""
    table = pd.DataFrame(
        {
            "group": np.asarray(names).astype(str),
            "rank_median": summary.rank_median,
            "rank_lower": summary.rank_lower,
            "rank_upper": summary.rank_upper,
            "prob_best_k": summary.prob_best_k,
            "prob_worst_k": summary.prob_worst_k,
        }
    )
    return table.sort_values(
        ["rank_median", "rank_lower", "rank_upper"], kind="stable", na_position="last"
    ).reset_index(drop=True)


def pairwise_table(
    theta: np.ndarray, names: np.ndarray, index: np.ndarray, better: str
) -> pd.DataFrame:
    """P(group A's rate is better than B's), every ordered pair of the chosen groups.

    A tie in a draw counts one half.
    """
    names = np.asarray(names).astype(str)
    picked = theta[:, index]
    rows = []
    for i, a in enumerate(index):
        for j, b in enumerate(index):
            if i == j:
                continue
            x, y = picked[:, i], picked[:, j]
            wins = (x > y) if better == "higher" else (x < y)
            p = wins.mean() + 0.5 * (x == y).mean()
            rows.append((names[a], names[b], float(p)))
    return pd.DataFrame(rows, columns=["group_a", "group_b", "prob_a_better"])


def pairwise_groups(
    names: np.ndarray, posterior_mean: np.ndarray, *, compare_groups, better: str, top: int,
    among: np.ndarray | None = None,
) -> tuple[np.ndarray, str]:
    """Indices of the groups to compare: the named ones, or the best ``top`` by mean (of the
    groups in the mask ``among``, where given: those with trials)."""
    names = np.asarray(names).astype(str)
    if compare_groups:
        where = {n: i for i, n in enumerate(names)}
        missing = [c for c in compare_groups if c not in where]
        if missing:
            known = ", ".join(repr(str(n)) for n in names[:5])
            raise DataError(
                f"{label('compare_groups')} group {missing[0]!r} is not in the run"
                + (f" (and {len(missing) - 1} more)" if len(missing) > 1 else "")
                + f"; its groups include {known}. Names are case-sensitive."
            )
        return np.array([where[c] for c in compare_groups]), "named"
    order = np.argsort(-posterior_mean if better == "higher" else posterior_mean, kind="stable")
    if among is not None:
        order = order[np.asarray(among)[order]]
    return order[: min(top, len(order))], f"best {top} by posterior mean"
