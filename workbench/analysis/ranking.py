"""Ranks, target flags, pairwise comparisons, funnel data and trials still needed.

Everything here is computed from the posterior draws of the group rates (and, where the
engine is exact, from its closed forms), in chunks of draws so that memory stays bounded
whatever the number of groups.

Ranks
    In every posterior draw the groups are ranked by their rate; rank 1 is the best
    (``better="higher"``: the highest rate; ``"lower"``: the lowest). A group's rank median and
    central rank interval (at the run's ``level``) summarise its ranks over the draws.
    Quantiles are those of the draws' empirical distribution (the smallest rank whose
    cumulative share reaches the probability), computed exactly by refining per-group
    histograms over a few passes, never by holding a draws x groups rank matrix.

Ties
    Where several groups share a rate in a draw (complete pooling: all of them, in every
    draw), the tied block occupies positions lo..hi and each member gets the average rank
    (lo + hi) / 2. ``prob_best_k`` gives each member the fraction of the block's positions
    that are <= k (``prob_worst_k``: >= G - k + 1), so across groups P(in best k) sums to
    exactly k in every draw. Pairwise, a tie counts one half for each side.

Target flags
    With a target rate, ``prob_above_target`` is the posterior probability that a group's
    rate exceeds it (closed form where the engine is exact, as in the model's summary) and
    ``prob_below_target`` its complement. The flag "above target" goes to the largest set of
    groups, taken in order of decreasing probability, whose posterior expected share of false
    flags (the mean of 1 - P over the flagged) stays at or below ``fdr``; likewise "below
    target". Only groups with P > 1/2 are eligible, so no group is flagged both ways. This is
    the Bayesian false discovery rate rule (Newton et al. 2004; Mueller et al. 2004).

Caution
    Rank intervals overlap; a rank is no verdict on a group or on the people in it. Case mix
    and data quality are not modelled unless covariates are given; decisions defer to local
    governance and qualified review.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import special, stats

from ..models import DataError, ParameterError, closed_form

from ..io import atomic as _io

BETTER = ("higher", "lower")
DEFAULT_TOP = 5
DEFAULT_FDR = 0.10
DEFAULT_PAIRWISE = 10
DEFAULT_SETTLE_CHANCE = 0.80
DEFAULT_MAX_TRIALS = 100_000
#: a comparison with the target is "settled" when P(above target) leaves (0.05, 0.95)
SETTLE_BOUNDS = (0.05, 0.95)
#: funnel control limits: label -> mass inside the limits
FUNNEL_LEVELS = {"95": 0.95, "998": 0.998}
FUNNEL_CURVE_POINTS = 200
NEW_GROUP_LABEL = "(new group)"

#: draws x groups cells handled at once (each chunk holds a few arrays of this size)
CHUNK_CELLS = 2_000_000
#: groups x bins cells of the per-group rank histograms
HISTOGRAM_CELLS = 16_000_000

RANK_COLUMNS = ["rank_median", "rank_lower", "rank_upper"]
TARGET_COLUMNS = ["prob_above_target", "prob_below_target", "target_flag"]
ESTIMATE_COLUMNS = RANK_COLUMNS + TARGET_COLUMNS
RANKS_FILE = "ranks.csv"
TARGETS_FILE = "targets.json"
PAIRWISE_FILE = "pairwise.csv"
FUNNEL_FILE = "funnel.csv"
FUNNEL_CURVE_FILE = "funnel_curve.csv"
TRIALS_NEEDED_FILE = "trials_needed.csv"

CAUTION = (
    "Rank intervals overlap: neighbouring ranks are rarely distinguishable, and a rank is no"
    " verdict on a group or on the people in it. Case mix and data quality are not modelled"
    " unless covariates are given; decisions defer to local governance and qualified review."
)


# -- options -------------------------------------------------------------------------------


def _number(value, what: str, *, whole: bool = False) -> float | int:
    if isinstance(value, str):
        text = value.strip()
        try:
            value = int(text) if whole else float(text)
        except ValueError:
            kind = "a whole number" if whole else "a number"
            raise ParameterError(f"{what}={text!r} is not {kind}.") from None
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise ParameterError(f"{what}={value!r} is not a number.")
    if whole and float(value) != int(value):
        raise ParameterError(f"{what}={value!r} is not a whole number.")
    return int(value) if whole else float(value)


def check_whole(value, what: str, *, minimum: int = 1) -> int:
    """``value`` (a number or its text) as an int >= ``minimum``, else a ParameterError."""
    try:
        number = _number(value, what, whole=True)
    except ParameterError as exc:
        raise ParameterError(f"{str(exc)[:-1]}; give a whole number >= {minimum}.") from None
    if number < minimum:
        raise ParameterError(f"{what}={number} must be a whole number >= {minimum}.")
    return number


def check_fraction(value, what: str, example: str) -> float:
    """``value`` (a number or its text) strictly between 0 and 1, else a ParameterError."""
    number = _number(value, what)
    if not 0 < number < 1:
        raise ParameterError(f"{what}={number:g} must be strictly between 0 and 1; e.g. {example}.")
    return number


def check_better(value) -> str:
    text = str(value).strip().lower()
    if text not in BETTER:
        raise ParameterError(
            f"better={value!r} is not one of 'higher', 'lower'; say which direction of the rate"
            " is better."
        )
    return text


@dataclass(frozen=True)
class RankOptions:
    """Settings of the ranking tables, checked. See :func:`rank_options`."""

    top: int = DEFAULT_TOP
    better: str = "higher"
    fdr: float = DEFAULT_FDR
    level: float = 0.95
    target: float | None = None
    compare: tuple[str, ...] | None = None
    pairwise_top: int = DEFAULT_PAIRWISE
    settle_chance: float = DEFAULT_SETTLE_CHANCE
    max_trials: int = DEFAULT_MAX_TRIALS

    def as_dict(self) -> dict:
        return {
            "top": self.top,
            "better": self.better,
            "fdr": self.fdr,
            "level": self.level,
            "target": self.target,
            "compare": list(self.compare) if self.compare else None,
            "pairwise_top": self.pairwise_top,
            "settle_chance": self.settle_chance,
            "max_trials": self.max_trials,
        }


def rank_options(
    *,
    top=DEFAULT_TOP,
    better="higher",
    fdr=DEFAULT_FDR,
    level=0.95,
    target=None,
    compare=None,
    pairwise_top=DEFAULT_PAIRWISE,
    settle_chance=DEFAULT_SETTLE_CHANCE,
    max_trials=DEFAULT_MAX_TRIALS,
) -> RankOptions:
    """Check every ranking setting (numbers may be given as text) and return them.

    Raises
    ------
    ParameterError
        Naming the setting, the value seen and what is allowed.
    """
    if isinstance(compare, str):
        compare = [c for c in (s.strip() for s in compare.split(",")) if c]
    if compare is not None:
        compare = tuple(dict.fromkeys(str(c) for c in compare))
        if len(compare) < 2:
            raise ParameterError(
                f"compare={list(compare)!r} names fewer than two groups; give at least two,"
                " separated by commas (A,B,C)."
            )
    return RankOptions(
        top=check_whole(top, "top"),
        better=check_better(better),
        fdr=check_fraction(fdr, "fdr", "0.10"),
        level=check_fraction(level, "level", "0.95"),
        target=None if target is None else check_fraction(target, "target", "0.2"),
        compare=compare,
        pairwise_top=check_whole(pairwise_top, "pairwise_top", minimum=2),
        settle_chance=check_fraction(settle_chance, "settle_chance", "0.8"),
        max_trials=check_whole(max_trials, "max_trials"),
    )


# -- what the tables are computed from --------------------------------------------------------


@dataclass
class RankInput:
    """The posterior as the ranking tables need it; built from a Run or a RunFolder."""

    names: np.ndarray
    successes: np.ndarray
    trials: np.ndarray
    theta: np.ndarray  # (samples, groups), a view of the stored draws
    posterior_mean: np.ndarray
    closed: object | None  # closed-form posteriors (exact engine) or None
    known_prob_above: dict[float, np.ndarray] = field(default_factory=dict)

    @property
    def n_groups(self) -> int:
        return len(self.names)

    @property
    def n_draws(self) -> int:
        return self.theta.shape[0]

    def prob_above(self, value: float) -> np.ndarray:
        """P(theta_j > value): the model summary's value if known, else closed form, else draws."""
        if value in self.known_prob_above:
            return self.known_prob_above[value]
        if self.closed is not None:
            out = np.clip(self.closed.sf(value), 0.0, 1.0)
        else:
            out = _draw_share_above(self.theta, value)
        self.known_prob_above[value] = out
        return out

    def moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean and variance of each theta_j (exact where the engine is exact)."""
        if self.closed is not None:
            if hasattr(self.closed, "moments"):
                return self.closed.moments()
            a, b = self.closed.alpha, self.closed.beta
            s = a + b
            return a / s, a * b / (s * s * (s + 1))
        return _draw_moments(self.theta)


def _stacked(theta) -> np.ndarray:
    th = theta.transpose("chain", "draw", "group").values
    return th.reshape(-1, th.shape[-1])


def input_from_run(run) -> RankInput:
    """From a fitted :class:`workbench.api.Run` (its estimator keeps the closed forms)."""
    est = run.estimates
    known = {}
    target = run.settings.get("target")
    if target is not None and "prob_above_target" in est:
        known[float(target)] = est["prob_above_target"].to_numpy(dtype=float)
    return RankInput(
        names=est["group"].astype(str).to_numpy(),
        successes=est["successes"].to_numpy(),
        trials=est["trials"].to_numpy(),
        theta=_stacked(run.idata.posterior["theta"]),
        posterior_mean=est["posterior_mean"].to_numpy(dtype=float),
        closed=getattr(run.model, "exact_", None),
        known_prob_above=known,
    )


def input_from_folder(folder) -> RankInput:
    """From a :class:`workbench.api.RunFolder`; exact closed forms are rebuilt from the counts."""
    idata = folder.idata
    names = idata.posterior["group"].values.astype(str)
    est = folder.estimates.set_index(folder.estimates["group"].astype(str))
    known = {}
    target = folder.record.get("settings", {}).get("target")
    if target is not None and "prob_above_target" in est:
        known[float(target)] = est.loc[names, "prob_above_target"].to_numpy(dtype=float)
    return RankInput(
        names=names,
        successes=idata.observed_data["successes"].values,
        trials=idata.constant_data["trials"].values,
        theta=_stacked(idata.posterior["theta"]),
        posterior_mean=est.loc[names, "posterior_mean"].to_numpy(dtype=float),
        closed=closed_form(idata),
        known_prob_above=known,
    )


def _chunks(n_draws: int, n_groups: int, cells: int = CHUNK_CELLS):
    step = max(1, cells // max(n_groups, 1))
    for start in range(0, n_draws, step):
        yield slice(start, min(start + step, n_draws))


def _draw_share_above(theta: np.ndarray, value: float) -> np.ndarray:
    total = np.zeros(theta.shape[1])
    for sl in _chunks(*theta.shape):
        total += (theta[sl] > value).sum(axis=0)
    return total / theta.shape[0]


def _draw_moments(theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    s1 = np.zeros(theta.shape[1])
    s2 = np.zeros(theta.shape[1])
    shift = theta[0]  # shifted sums keep the variance accurate
    for sl in _chunks(*theta.shape):
        d = theta[sl] - shift
        s1 += d.sum(axis=0)
        s2 += (d * d).sum(axis=0)
    s = theta.shape[0]
    mean = s1 / s
    var = np.maximum(s2 / s - mean**2, 0.0) * s / max(s - 1, 1)
    return mean + shift, var


# -- ranks -----------------------------------------------------------------------------------


def _block_positions(theta: np.ndarray, better: str) -> tuple[np.ndarray, np.ndarray]:
    """0-based first and last sorted position of each group's tied block, per draw.

    ``theta`` is (draws, groups); position 0 is the best.
    """
    key = -theta if better == "higher" else theta
    order = np.argsort(key, axis=1)  # any order within a tie: blocks are found below
    ordered = np.take_along_axis(key, order, axis=1)
    rows, g = ordered.shape
    pos = np.broadcast_to(np.arange(g, dtype=np.int64), (rows, g))
    tied = ordered[:, 1:] == ordered[:, :-1]
    if not tied.any():  # the usual case: every block is one group
        lo = np.empty((rows, g), dtype=np.int64)
        np.put_along_axis(lo, order, pos, axis=1)
        return lo, lo
    starts = np.ones((rows, g), dtype=bool)
    starts[:, 1:] = ~tied
    ends = np.ones((rows, g), dtype=bool)
    ends[:, :-1] = ~tied
    first = np.maximum.accumulate(np.where(starts, pos, 0), axis=1)
    last = np.minimum.accumulate(np.where(ends, pos, g - 1)[:, ::-1], axis=1)[:, ::-1]
    lo = np.empty((rows, g), dtype=np.int64)
    hi = np.empty((rows, g), dtype=np.int64)
    np.put_along_axis(lo, order, first, axis=1)
    np.put_along_axis(hi, order, last, axis=1)
    return lo, hi


def draw_ranks(theta: np.ndarray, better: str = "higher") -> np.ndarray:
    """Per-draw ranks (1 = best; a tied block shares its average rank), same shape as ``theta``.

    Dense: for small arrays and tests. :func:`rank_summary` never builds this matrix.
    """
    better = check_better(better)
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
    top: int = DEFAULT_TOP,
    level: float = 0.95,
    chunk_cells: int = CHUNK_CELLS,
    histogram_cells: int = HISTOGRAM_CELLS,
) -> RankSummary:
    """Rank median, central rank interval and P(in best / worst k) for every group.

    ``theta`` is (draws, groups). Quantiles are exact inverted-CDF quantiles of each group's
    per-draw (tie-averaged) ranks, found by refining per-group histograms of twice the rank:
    each pass splits every group's current bracket into at most
    ``histogram_cells / groups`` bins, so memory is bounded by ``histogram_cells`` and
    ``chunk_cells`` whatever the size of the posterior. ``k`` is ``top`` capped at the number
    of groups.
    """
    started = time.perf_counter()
    better = check_better(better)
    s, g = theta.shape
    k = min(int(top), g)
    probs = np.array([(1 - level) / 2, 0.5, (1 + level) / 2])
    need = _target_counts(probs, s)
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
    twice = start + 2
    return RankSummary(
        rank_median=twice[1] / 2.0,
        rank_lower=twice[0] / 2.0,
        rank_upper=twice[2] / 2.0,
        prob_best_k=best_sum / s,
        prob_worst_k=worst_sum / s,
        k=k,
        passes=done_passes,
        seconds=time.perf_counter() - started,
    )


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
        ["rank_median", "rank_lower", "rank_upper"], kind="stable"
    ).reset_index(drop=True)


# -- target flags ------------------------------------------------------------------------------


def fdr_flags(prob: np.ndarray, level: float) -> tuple[np.ndarray, float]:
    """Flag the largest set, by decreasing ``prob``, whose mean of (1 - prob) is <= ``level``.

    Only entries with prob > 1/2 are eligible. Returns the mask and the expected share of
    false flags among the flagged (0 when nothing is flagged).
    """
    prob = np.asarray(prob, dtype=float)
    order = np.argsort(-prob, kind="stable")
    ordered = prob[order]
    eligible = ordered > 0.5
    miss = np.cumsum(1.0 - ordered) / np.arange(1, len(prob) + 1)
    # miss is non-decreasing along the order, so the admissible prefix is contiguous
    ok = eligible & (miss <= level + 1e-12)
    m = int(np.argmin(ok)) if not ok.all() else len(ok)
    mask = np.zeros(len(prob), dtype=bool)
    mask[order[:m]] = True
    return mask, float(miss[m - 1]) if m else 0.0


def target_tables(
    names: np.ndarray, prob_above: np.ndarray, target: float, fdr: float
) -> tuple[pd.DataFrame, dict]:
    """Per-group target columns and the targets.json document."""
    prob_above = np.clip(np.asarray(prob_above, dtype=float), 0.0, 1.0)
    prob_below = 1.0 - prob_above
    above, share_above = fdr_flags(prob_above, fdr)
    below, share_below = fdr_flags(prob_below, fdr)
    flag = np.where(above, "above target", np.where(below, "below target", ""))
    table = pd.DataFrame(
        {
            "group": np.asarray(names).astype(str),
            "prob_above_target": prob_above,
            "prob_below_target": prob_below,
            "target_flag": flag,
        }
    )

    def side(mask, share):
        n = int(mask.sum())
        return {
            "flagged": n,
            "expected_false_share": share,
            "expected_false_flags": share * n,
        }

    doc = {
        "target": target,
        "fdr_level": fdr,
        "groups": int(len(names)),
        "above": side(above, share_above),
        "below": side(below, share_below),
        "rule": (
            "flag the largest set of groups, in order of decreasing posterior probability of"
            " being above (below) the target, whose posterior expected share of false flags,"
            " the mean of 1 - P over the flagged, is at most fdr_level; only groups with"
            " P > 0.5 are eligible (Bayesian false discovery rate)."
        ),
        "caution": CAUTION,
    }
    return table, doc


# -- pairwise ---------------------------------------------------------------------------------


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
    names: np.ndarray, posterior_mean: np.ndarray, opts: RankOptions
) -> tuple[np.ndarray, str]:
    """Indices of the groups to compare: the named ones, or the best ``pairwise_top`` by mean."""
    names = np.asarray(names).astype(str)
    if opts.compare:
        where = {n: i for i, n in enumerate(names)}
        missing = [c for c in opts.compare if c not in where]
        if missing:
            known = ", ".join(repr(str(n)) for n in names[:5])
            raise DataError(
                f"compare: group {missing[0]!r} is not in the run"
                + (f" (and {len(missing) - 1} more)" if len(missing) > 1 else "")
                + f"; its groups include {known}. Names are case-sensitive."
            )
        return np.array([where[c] for c in opts.compare]), "named"
    order = np.argsort(
        -posterior_mean if opts.better == "higher" else posterior_mean, kind="stable"
    )
    return order[
        : min(opts.pairwise_top, len(names))
    ], f"best {opts.pairwise_top} by posterior mean"


# -- funnel ----------------------------------------------------------------------------------


def control_limits(trials: np.ndarray, benchmark: float) -> dict[str, np.ndarray]:
    """Exact binomial control limits as rates: ppf(alpha/2) / n and ppf(1 - alpha/2) / n."""
    n = np.asarray(trials, dtype=float)
    out = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        for label, mass in FUNNEL_LEVELS.items():
            alpha = 1 - mass
            lo = stats.binom.ppf(alpha / 2, n, benchmark) / n
            hi = stats.binom.ppf(1 - alpha / 2, n, benchmark) / n
            out[f"lower_{label}"] = np.where(n > 0, lo, np.nan)
            out[f"upper_{label}"] = np.where(n > 0, hi, np.nan)
    return out


def funnel_tables(inp: RankInput, benchmark: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """funnel.csv (one row per group) and funnel_curve.csv (limits on a log grid of trials)."""
    n = inp.trials
    with np.errstate(divide="ignore", invalid="ignore"):
        observed = np.where(n > 0, inp.successes / np.maximum(n, 1), np.nan)
    limits = control_limits(n, benchmark)
    table = pd.DataFrame(
        {
            "group": inp.names.astype(str),
            "successes": inp.successes,
            "trials": n,
            "observed_rate": observed,
            "benchmark": benchmark,
            **limits,
        }
    )
    for label in FUNNEL_LEVELS:
        lo, hi = limits[f"lower_{label}"], limits[f"upper_{label}"]
        side = np.where(observed > hi, "high", np.where(observed < lo, "low", ""))
        table[f"outside_{label}"] = np.where(n > 0, side, "")
    table["posterior_mean"] = inp.posterior_mean
    table["prob_above_benchmark"] = inp.prob_above(benchmark)
    top = int(max(n.max(initial=0), 1))
    grid = np.unique(np.round(np.geomspace(1, top, FUNNEL_CURVE_POINTS)).astype(np.int64))
    curve = pd.DataFrame(
        {"trials": grid, "benchmark": benchmark, **control_limits(grid, benchmark)}
    )
    return table, curve


# -- trials still needed ------------------------------------------------------------------------


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
    # smallest y with P(above) > high  <=>  cdf < 1 - high
    y_high = _smallest_true(lambda y: cdf_at_target(y) < 1 - high, zero, top)
    # smallest y with P(above) >= low  <=>  cdf <= 1 - low; y_low is the one before
    y_low = _smallest_true(lambda y: cdf_at_target(y) <= 1 - low, zero, top) - 1
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


def _window_mass(a, b, m, first, length) -> np.ndarray:
    """Beta-binomial(m, a, b) mass of y = first .. first + length - 1, summed per row."""
    span = int(length.max())
    j = np.arange(span)[None, :]
    y = first[:, None] + j
    mm = m[:, None].astype(float)
    aa, bb = a[:, None], b[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        logpmf = (
            special.gammaln(mm + 1)
            - special.gammaln(y + 1)
            - special.gammaln(mm - y + 1)
            + special.betaln(y + aa, mm - y + bb)
            - special.betaln(aa, bb)
        )
    logpmf = np.where(j < length[:, None], logpmf, -np.inf)
    return np.exp(logpmf).sum(axis=1)


def trials_needed_table(
    inp: RankInput,
    target: float,
    *,
    chance: float = DEFAULT_SETTLE_CHANCE,
    max_trials: int = DEFAULT_MAX_TRIALS,
) -> tuple[pd.DataFrame, dict]:
    """How many more trials make it likely (``chance``) that a group's comparison is settled.

    Preposterior analysis: each group's posterior is moment-matched to a Beta (exact for the
    conjugate models; for the hierarchy this holds the population fixed while the group
    learns), future successes are Beta-binomial, and :func:`settle_chance` gives the exact
    probability that P(theta > target) ends outside (0.05, 0.95). The search doubles m from 1
    to ``max_trials``, then bisects between the last miss and the first hit. The chance rises
    with m apart from small saw-teeth caused by whole-number counts, so the answer is the
    first m on the search path that reaches ``chance``.
    """
    names = inp.names.astype(str)
    mean, var = inp.moments()
    mean = np.clip(mean, 1e-300, 1 - 1e-16)
    var = np.maximum(var, 1e-300)
    common = np.maximum(mean * (1 - mean) / var - 1, 1e-8)
    a, b = mean * common, (1 - mean) * common
    p_above = inp.prob_above(target)
    low, high = SETTLE_BOUNDS
    settled = (p_above > high) | (p_above < low)
    g = len(names)
    needed = np.full(g, -1, dtype=np.int64)
    prob = np.full(g, np.nan)
    needed[settled] = 0
    prob[settled] = 1.0
    todo = np.flatnonzero(~settled)
    last_miss = np.zeros(g, dtype=np.int64)
    grid = [int(x) for x in 2 ** np.arange(0, int(np.log2(max_trials)) + 1)]
    if grid[-1] != max_trials:
        grid.append(int(max_trials))
    first_hit = np.full(g, -1, dtype=np.int64)
    hit_prob = np.full(g, np.nan)
    active = todo
    for m in grid:
        if not active.size:
            break
        c = settle_chance(a[active], b[active], np.full(active.size, m), target)
        hit = c >= chance
        first_hit[active[hit]] = m
        hit_prob[active[hit]] = c[hit]
        last_miss[active[~hit]] = m
        prob[active[~hit]] = c[~hit]
        active = active[~hit]
    found = todo[first_hit[todo] > 0]
    lo = last_miss[found].copy()  # chance < target level here (0: not yet settled)
    hi = first_hit[found].copy()
    best = hit_prob[found].copy()
    while found.size:
        open_ = hi - lo > 1
        if not open_.any():
            break
        idx = np.flatnonzero(open_)
        mid = (lo[idx] + hi[idx]) // 2
        c = settle_chance(a[found[idx]], b[found[idx]], mid, target)
        ok = c >= chance
        hi[idx[ok]] = mid[ok]
        best[idx[ok]] = c[ok]
        lo[idx[~ok]] = mid[~ok]
    needed[found] = hi
    prob[found] = best
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
            " Beta-binomial; settled outcomes found by bisection; m searched by doubling, then"
            " bisection"
        ),
    }
    return table, doc


# -- the whole ranking step ---------------------------------------------------------------------


@dataclass
class Ranking:
    """Every table and document of the ranking step, ready to write."""

    options: RankOptions
    tables: dict[str, pd.DataFrame]
    estimate_columns: pd.DataFrame
    record: dict  # goes into run.json as "ranking"
    targets: dict | None = None
    final: bool = True


def compute(inp: RankInput, opts: RankOptions) -> Ranking:
    """Ranks, target flags, pairwise, funnel and (with a target) trials still needed."""
    started = time.perf_counter()
    summary = rank_summary(inp.theta, better=opts.better, top=opts.top, level=opts.level)
    ranks = ranks_table(inp.names, summary)
    columns = pd.DataFrame(
        {
            "group": inp.names.astype(str),
            "rank_median": summary.rank_median,
            "rank_lower": summary.rank_lower,
            "rank_upper": summary.rank_upper,
        }
    )
    tables: dict[str, pd.DataFrame] = {"ranks": ranks}
    targets = None
    needed_doc: dict | str = "not computed: no target was given (--target)"
    if opts.target is not None:
        target_cols, targets = target_tables(
            inp.names, inp.prob_above(opts.target), opts.target, opts.fdr
        )
        columns = columns.merge(target_cols, on="group", how="left")
        needed, needed_doc = trials_needed_table(
            inp, opts.target, chance=opts.settle_chance, max_trials=opts.max_trials
        )
        tables["trials_needed"] = needed
    if inp.n_groups >= 2:
        index, chosen = pairwise_groups(inp.names, inp.posterior_mean, opts)
        tables["pairwise"] = pairwise_table(inp.theta, inp.names, index, opts.better)
    else:
        chosen = "none: fewer than two groups"
        tables["pairwise"] = pd.DataFrame(columns=["group_a", "group_b", "prob_a_better"])
    total = float(inp.trials.sum())
    if opts.target is not None:
        benchmark, source = opts.target, "target"
    elif total > 0:
        benchmark, source = float(inp.successes.sum()) / total, "pooled rate"
    else:
        benchmark, source = None, "none: no trials"
    if benchmark is not None:
        tables["funnel"], tables["funnel_curve"] = funnel_tables(inp, benchmark)
    record = {
        **opts.as_dict(),
        "top_k": summary.k,
        "groups": int(inp.n_groups),
        "draws": int(inp.n_draws),
        "rank_passes": summary.passes,
        "ties": "a tied block at positions lo..hi shares the average rank; P(best k) gives each"
        " member the block's share of positions <= k",
        "pairwise_groups": chosen,
        "funnel_benchmark": benchmark,
        "funnel_benchmark_source": source,
        "trials_needed": needed_doc,
        "caution": CAUTION,
    }
    record["seconds"] = round(time.perf_counter() - started, 3)
    return Ranking(opts, tables, columns, record, targets)


def add_to_run(run, *, top=DEFAULT_TOP, better="higher", fdr=DEFAULT_FDR) -> Ranking:
    """Compute the ranking step for a fitted :class:`workbench.api.Run` and store it in the run.

    Fills ``run.tables`` (ranks, pairwise, funnel, funnel_curve, trials_needed),
    ``run.tables["estimate_columns"]`` (rank and target columns of estimates.csv) and
    ``run.documents`` (``targets``; ``ranking``, kept in run.json).
    """
    opts = rank_options(
        top=top,
        better=better,
        fdr=fdr,
        level=run.settings["level"],
        target=run.settings.get("target"),
    )
    result = compute(input_from_run(run), opts)
    run.tables.update(result.tables)
    extra = result.estimate_columns.drop(columns=["prob_above_target"], errors="ignore")
    if "prob_above_target" not in run.estimates and "prob_above_target" in result.estimate_columns:
        extra = result.estimate_columns
    run.tables.setdefault("estimate_columns", []).append(extra)
    run.documents["ranking"] = result.record
    if result.targets is not None:
        run.documents["targets"] = result.targets
    return result


# -- run folders ---------------------------------------------------------------------------------

#: tables of the ranking step and their files
FILES = {
    "ranks": RANKS_FILE,
    "pairwise": PAIRWISE_FILE,
    "funnel": FUNNEL_FILE,
    "funnel_curve": FUNNEL_CURVE_FILE,
    "trials_needed": TRIALS_NEEDED_FILE,
}


def _merged_estimates(estimates: pd.DataFrame, columns: pd.DataFrame) -> pd.DataFrame:
    """estimates.csv with the ranking columns replaced; prob_above_target keeps its place."""
    keep_place = "prob_above_target" in estimates and "prob_above_target" in columns
    drop = [
        c
        for c in ESTIMATE_COLUMNS
        if c in estimates and not (keep_place and c == "prob_above_target")
    ]
    base = estimates.drop(columns=drop)
    base = base.assign(group=base["group"].astype(str))
    if keep_place:
        values = columns.set_index("group")["prob_above_target"]
        base["prob_above_target"] = base["group"].map(values).to_numpy()
        columns = columns.drop(columns=["prob_above_target"])
    return base.merge(columns, on="group", how="left")


def update_record(folder_path: Path, record: dict, changes: dict) -> dict:
    """run.json with ``changes`` applied and its file list refreshed, written atomically."""
    new = {**record, **changes}
    new["files"] = sorted(p.name for p in folder_path.iterdir() if not p.name.startswith("."))
    if "run.json" not in new["files"]:
        new["files"] = sorted([*new["files"], "run.json"])
    _io.write_json(folder_path / "run.json", new)
    return new


def rank_folder(
    path,
    *,
    top=None,
    better=None,
    fdr=None,
    level=None,
    target=None,
    compare=None,
    settle_chance=None,
    max_trials=None,
) -> Ranking:
    """Recompute the ranking step of a run folder and write it back, file by file atomically.

    Options left as ``None`` keep the run's recorded setting (else the default). Writes
    ranks.csv, pairwise.csv, funnel.csv, funnel_curve.csv, and with a target targets.json
    and trials_needed.csv; replaces the rank and target columns of estimates.csv; records the
    settings in run.json under "ranking".
    """
    from ..api import open_run

    folder = open_run(path)
    settings = folder.record.get("settings", {})
    previous = folder.record.get("ranking", {})

    def pick(given, key, default):
        if given is not None:
            return given
        for source in (previous, settings):
            if source.get(key) is not None:
                return source[key]
        return default

    opts = rank_options(
        top=pick(top, "top", DEFAULT_TOP),
        better=pick(better, "better", "higher"),
        fdr=pick(fdr, "fdr", DEFAULT_FDR),
        level=pick(level, "level", 0.95),
        target=pick(target, "target", None),
        compare=compare,
        settle_chance=pick(settle_chance, "settle_chance", DEFAULT_SETTLE_CHANCE),
        max_trials=pick(max_trials, "max_trials", DEFAULT_MAX_TRIALS),
    )
    result = compute(input_from_folder(folder), opts)
    result.final = folder.final
    out = folder.path
    for name, filename in FILES.items():
        if name in result.tables:
            _io.write_csv(out / filename, result.tables[name])
    if result.targets is not None:
        _io.write_json(out / TARGETS_FILE, result.targets)
    _io.write_csv(
        out / "estimates.csv", _merged_estimates(folder.estimates, result.estimate_columns)
    )
    new_settings = {
        **settings,
        "top": opts.top,
        "better": opts.better,
        "fdr": opts.fdr,
        "target": opts.target,
    }
    update_record(out, folder.record, {"settings": new_settings, "ranking": result.record})
    return result


# -- terminal summary ------------------------------------------------------------------------------


def format_ranking(
    tables: dict, record: dict, targets: dict | None = None, *, rows: int = 3
) -> str:
    """A summary of the ranking step readable in ten seconds."""
    ranks = tables.get("ranks")
    if ranks is None or record is None:
        return ""
    k = record["top_k"]
    level = record["level"]
    lines = [
        f"ranks: {record['groups']} groups, {record['better']} rate is better, rank 1 = best,"
        f" {record['draws']} draws; median {level:.0%} rank interval spans"
        f" {float((ranks['rank_upper'] - ranks['rank_lower']).median()):.0f} places"
    ]
    for r in ranks.head(rows).itertuples():
        lines.append(
            f"  {str(r.group)[:28]:<28} rank {r.rank_median:g} [{r.rank_lower:g}, {r.rank_upper:g}]"
            f"  P(best {k}) {r.prob_best_k:.2f}"
        )
    sure = int((ranks["prob_best_k"] >= 0.9).sum())
    lines.append(f"  {sure} group(s) with P(in best {k}) >= 0.9")
    if targets is not None:
        ab, be = targets["above"], targets["below"]
        lines.append(
            f"target {targets['target']:g}: {ab['flagged']} flagged above (expected false share"
            f" {ab['expected_false_share']:.3f}), {be['flagged']} below"
            f" ({be['expected_false_share']:.3f}); level {targets['fdr_level']:g}"
        )
    funnel = tables.get("funnel")
    if funnel is not None:
        o998 = funnel["outside_998"]
        o95 = funnel["outside_95"]
        lines.append(
            f"funnel vs {record['funnel_benchmark_source']} {record['funnel_benchmark']:.4g}:"
            f" {int((o998 != '').sum())} outside 99.8% limits ({int((o998 == 'high').sum())} high,"
            f" {int((o998 == 'low').sum())} low), {int((o95 != '').sum())} outside 95%"
        )
    needed = record.get("trials_needed")
    if isinstance(needed, dict):
        more = tables["trials_needed"]
        more = more[more["status"] == "settles with more trials"]["trials_needed"]
        median = f", median {int(more.median())} more" if len(more) else ""
        lines.append(
            f"trials needed ({needed['settle_chance']:.0%} chance to settle vs target):"
            f" {needed['already_settled']} already settled,"
            f" {needed['settles_with_more_trials']} need more{median},"
            f" {needed['not_within_max_trials']} not within {needed['max_trials']}"
        )
    else:
        lines.append("trials needed: give --target to compute")
    lines.append(
        "caution: rank intervals overlap; a rank is no verdict on a group or the people in it."
    )
    return "\n".join(lines)


def format_run(run) -> str:
    """The ranking summary of a fitted Run ("" if it has none)."""
    return format_ranking(run.tables, run.documents.get("ranking"), run.documents.get("targets"))


def format_result(result: Ranking) -> str:
    """The ranking summary of :func:`rank_folder`'s result."""
    return format_ranking(result.tables, result.record, result.targets)


__all__ = [
    "CAUTION",
    "RankInput",
    "RankOptions",
    "RankSummary",
    "Ranking",
    "add_to_run",
    "check_better",
    "check_fraction",
    "check_whole",
    "compute",
    "control_limits",
    "draw_ranks",
    "fdr_flags",
    "format_ranking",
    "format_result",
    "format_run",
    "funnel_tables",
    "input_from_folder",
    "input_from_run",
    "pairwise_table",
    "rank_folder",
    "rank_options",
    "rank_summary",
    "settle_chance",
    "target_tables",
    "trials_needed_table",
]
