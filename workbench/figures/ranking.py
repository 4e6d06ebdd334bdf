"""Rank intervals and the funnel plot, drawn from the ranking tables."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.lines import Line2D

from . import _merge
from ._merge import merge_marks
from ._style import (
    PALETTE,
    _apply_style,
    _band_note,
    _corner_note,
    _count,
    _draw_band,
    _legend_below,
    _line_width,
    _new_axes,
    _rate_axis,
    _require,
    _row_labels,
    _spread_labels,
    _title,
    row_axes,
    sort_rows,
)

# -- funnel -------------------------------------------------------------------------------------

_LIMITS = [(level, side) for level in ("95", "998") for side in ("lower", "upper")]


def plot_funnel(
    funnel: pd.DataFrame,
    curve: pd.DataFrame | None = None,
    *,
    ax: Axes | None = None,
    label: int = 4,
    benchmark_name: str = "benchmark",
) -> Axes:
    """Observed rate against trials, with the control limits around the benchmark.

    Parameters
    ----------
    funnel : DataFrame
        The funnel table: group, trials, observed_rate, benchmark, the limits ``lower_95``,
        ``upper_95``, ``lower_998``, ``upper_998`` (``limit_95_lower`` ... also read), and
        ``outside_95`` / ``outside_998`` ("high", "low" or blank; booleans also read).
    curve : DataFrame, optional
        The funnel curve table: trials and the four limits on a fine grid of trials, drawn as
        the funnel's edges; without it, the per-group limits are joined instead.
    ax : Axes, optional
    label : int, default=4
        Name at most this many groups outside the 99.8% limits, the most extreme first: by
        how far the observed rate lies from the benchmark, in units of the distance from the
        benchmark to the limit it crossed.
    benchmark_name : str, default="benchmark"
        What the benchmark is (for the legend), e.g. "target" or "pooled rate".
    """
    _require(funnel, ["group", "trials", "observed_rate", "benchmark"], "plot_funnel")
    limits = {key: _limit_column(funnel, *key) for key in _LIMITS}
    ax = _new_axes(ax, (7.2, 4.9))
    _apply_style(ax)
    table = funnel[(funnel["trials"] > 0) & funnel["observed_rate"].notna()]
    n = len(table)
    if curve is not None and len(curve):
        edge = curve[curve["trials"] > 0]
        limits = {key: _limit_column(curve, *key) for key in _LIMITS}
    else:
        edge = table.sort_values("trials")
    x = edge["trials"].to_numpy(dtype=float)
    lines = {key: edge[column].to_numpy(dtype=float) for key, column in limits.items()}
    _funnel_edges(ax, x, lines)
    benches = funnel["benchmark"].dropna()
    if len(benches):
        bench = float(benches.iloc[0])
        ax.axhline(
            bench,
            color=PALETTE["ink"],
            linewidth=1.2,
            zorder=1,
            label=f"{benchmark_name} {bench:.3g}",
        )
    out998 = _flag(table, "outside_998")
    flagged = _most_extreme(table[out998], limits_of=funnel, label=label)
    _funnel_points(ax, table, named=table.index.isin(flagged.index))
    ax.set_xscale("log")
    ax.set_xlabel("trials (log scale)")
    ax.set_ylabel("observed rate")
    if n:
        lo = min(float(table["observed_rate"].min()), float(np.nanmin(lines[("998", "lower")])))
        hi = max(float(table["observed_rate"].max()), float(np.nanmax(lines[("998", "upper")])))
        _rate_axis(ax, "y", lo, hi, 0.02)
        # fitted to the groups: from just below the smallest to just past the largest
        small, large = float(table["trials"].min()), float(table["trials"].max())
        ax.set_xlim(max(0.8, small * 0.8), large * 1.25)
    _title(ax, f"Funnel plot: observed rate by trials ({_count(n)} groups)")
    dropped = len(funnel) - n
    if dropped:
        _corner_note(ax, f"{_count(dropped)} group(s) with no trials not drawn", top=True)
    _spread_labels(
        ax,
        flagged["trials"].to_numpy(),
        flagged["observed_rate"].to_numpy(),
        flagged["group"].to_list(),
    )
    _legend_below(ax, ncols=3)
    return ax


def _most_extreme(outside: pd.DataFrame, *, limits_of: pd.DataFrame, label: int) -> pd.DataFrame:
    """The ``label`` groups furthest outside, as a multiple of their own limit's distance."""
    if outside.empty:
        return outside
    upper = outside[_limit_column(limits_of, "998", "upper")].to_numpy(dtype=float)
    lower = outside[_limit_column(limits_of, "998", "lower")].to_numpy(dtype=float)
    bench = outside["benchmark"].to_numpy(dtype=float)
    rate = outside["observed_rate"].to_numpy(dtype=float)
    reach = np.where(rate >= bench, upper - bench, bench - lower)
    with np.errstate(divide="ignore", invalid="ignore"):
        beyond = np.where(reach > 0, np.abs(rate - bench) / reach, np.inf)
    keep = slice(None)
    many = len(outside) > _merge.MERGE_ABOVE
    if many and 0 < label < len(outside) and not np.isnan(beyond).any():
        # only the rows that can be among the first ``label``: the same rows, same order
        keep = beyond >= np.partition(beyond, len(beyond) - label)[len(beyond) - label]
    order = outside[keep].assign(_beyond=beyond[keep]).sort_values(["_beyond", "group"],
                                                                   ascending=[False, True])
    return order.head(label).drop(columns="_beyond")


def _funnel_edges(ax: Axes, x: np.ndarray, lines: dict) -> None:
    """The 95% limits as a shaded band with grey edges, the 99.8% limits dashed."""
    ax.fill_between(
        x,
        lines[("95", "lower")],
        lines[("95", "upper")],
        color=PALETTE["mist"],
        linewidth=0,
        zorder=0,
        label="95% limits (shaded)",
    )
    for side in ("lower", "upper"):
        ax.plot(x, lines[("95", side)], color=PALETTE["pewter"], linewidth=0.9, zorder=1)
        ax.plot(
            x,
            lines[("998", side)],
            color=PALETTE["ink"],
            linestyle=(0, (4, 2)),
            linewidth=1.0,
            zorder=1,
            label="99.8% limits" if side == "lower" else None,
        )


def _funnel_points(ax: Axes, table: pd.DataFrame, named: np.ndarray | None = None) -> None:
    """The groups, by colour and shape inside / outside each pair of limits; at many groups
    merged to the pixels within each kind, the ``named`` ones always drawn one by one."""
    n = len(table)
    out95 = _flag(table, "outside_95")
    out998 = _flag(table, "outside_998")
    small = 16 if n <= 500 else 5
    kinds = [
        (~out95 & ~out998, "o", PALETTE["harbour"], small, "inside the 95% limits"),
        (out95 & ~out998, "D", PALETTE["ochre"], small + 4, "outside 95%"),
        (out998, "^", PALETTE["mulberry"], small + 14, "outside 99.8%"),
    ]
    for mask, marker, colour, size, text in kinds:
        part = table.loc[mask, ["trials", "observed_rate"]]
        marks = ax.scatter(
            part["trials"],
            part["observed_rate"],
            s=size,
            marker=marker,
            color=colour,
            alpha=0.9 if n <= 2000 else 0.5,
            edgecolors="white" if n <= 2000 else "none",
            linewidths=0.5,
            zorder=3,
            label=f"{text} ({_count(len(part))})",
            rasterized=n > 2000,
            clip_on=False,  # a rate of 0 or 1 on the frame is drawn whole
        )
        merge_marks(marks, keep=None if named is None else named[mask])


def _limit_column(table: pd.DataFrame, level: str, side: str) -> str:
    for name in (f"{side}_{level}", f"limit_{level}_{side}"):
        if name in table.columns:
            return name
    raise ValueError(f"plot_funnel needs a column {side}_{level}; found {list(table.columns)}.")


def _flag(table: pd.DataFrame, column: str) -> np.ndarray:
    """A yes/no column read leniently: booleans, 0/1, or words ("high", "low"; blank = no)."""
    if column not in table.columns:
        return np.zeros(len(table), dtype=bool)
    values = table[column]
    if pd.api.types.is_bool_dtype(values) or pd.api.types.is_numeric_dtype(values):
        return values.fillna(0).to_numpy(dtype=float) != 0
    words = values.fillna("").astype(str).str.strip().str.lower()
    return (~words.isin(["", "false", "0", "no", "nan", "none"])).to_numpy()


# -- ranks --------------------------------------------------------------------------------------


def plot_ranks(
    ranks: pd.DataFrame,
    *,
    k: int | None = None,
    ax: Axes | None = None,
    show: int = 15,
    every: int = 70,
) -> Axes:
    """Rank intervals, best-placed first, the best and worst ``k`` positions highlighted.

    Parameters
    ----------
    ranks : DataFrame
        The ranks table: group, rank_median, rank_lower, rank_upper (rank 1 = best), and
        prob_best_k / prob_worst_k if present (printed beside the highlighted rows).
    k : int, optional
        How many at each end to highlight (the k of prob_best_k; the report passes the run's
        ``top_k``); default: the table's ``k`` column if it has one, else 5. At most half the
        groups.
    ax : Axes, optional
    show : int, default=15
        With more than ``every`` groups, the first and last ``show`` rows are labelled and the
        rest squeezed in order into a band.
    every : int, default=70
        Up to this many groups, every one gets a labelled row.
    """
    _require(ranks, ["group", "rank_median", "rank_lower", "rank_upper"], "plot_ranks")
    sort_cols, ascending = ["rank_median", "group"], [True, True]
    if "prob_best_k" in ranks.columns:
        sort_cols.insert(1, "prob_best_k")
        ascending.insert(1, False)
    unranked = int(ranks["rank_median"].isna().sum())  # groups with no trials: no data
    table = sort_rows(ranks.dropna(subset=["rank_median"]), sort_cols, ascending)
    n = len(table)
    if k is None:
        k = int(ranks["k"].iloc[0]) if "k" in ranks.columns and n else 5
    k = max(0, min(int(k), n // 2))
    show = max(show, k)
    ax, pos, band, idx = row_axes(ax, n, show, every)
    lo = table["rank_lower"].to_numpy(dtype=float)
    hi = table["rank_upper"].to_numpy(dtype=float)
    med = table["rank_median"].to_numpy(dtype=float)
    colours = np.array([PALETTE["pewter"]] * n, dtype=object)
    colours[:k] = PALETTE["harbour"]
    if k:
        colours[n - k :] = PALETTE["ochre"]
    if band is not None:
        mid = np.arange(show, n - show)
        _draw_band(
            ax, lo, hi, med, pos, mid, colour=PALETTE["pewter"], alpha=min(0.6, 40 / len(mid))
        )
    ax.hlines(
        pos[idx], lo[idx], hi[idx], colors=list(colours[idx]), linewidth=_line_width(len(idx))
    )
    dots = np.where(colours[idx] == PALETTE["pewter"], PALETTE["ink"], colours[idx])
    ax.scatter(
        med[idx], pos[idx], s=18, c=list(dots), zorder=3, edgecolors=PALETTE["ink"], linewidths=0.5
    )
    _row_labels(ax, pos, table["group"].astype(str).to_list(), idx)
    _band_note(ax, band, n - 2 * show)
    _end_probabilities(ax, table, pos, k)
    ax.set_ylim(pos[-1] + 0.8 if n else 1, -0.8)
    ax.set_xlim(0.5, max(n, 1) + 0.5)
    ax.set_xlabel("rank (1 = best placed): median and interval")
    handles = [
        Line2D([], [], color=PALETTE["harbour"], linewidth=2.2, label=f"best {k} positions"),
        Line2D([], [], color=PALETTE["ochre"], linewidth=2.2, label=f"worst {k} positions"),
        Line2D([], [], color=PALETTE["pewter"], linewidth=2.2, label="others"),
    ]
    _legend_below(ax, handles if k else handles[2:], ncols=3)
    shown = "all" if band is None else f"first and last {show} of"
    _title(ax, f"Ranks with their intervals ({shown} {_count(n)} groups)")
    if unranked:
        _corner_note(ax, f"{_count(unranked)} group(s) with no trials: no data, not ranked",
                     top=True)
    return ax


def _end_probabilities(ax: Axes, table: pd.DataFrame, pos: np.ndarray, k: int) -> None:
    """P(in best k) beside the best k rows and P(in worst k) beside the worst, from the table."""
    n = len(table)
    for col, rows, colour in (
        ("prob_best_k", range(k), PALETTE["harbour"]),
        ("prob_worst_k", range(n - k, n), PALETTE["ochre"]),
    ):
        if col not in table.columns:
            continue
        values = table[col].to_numpy(dtype=float)
        for i in rows:
            ax.text(
                1.01,
                pos[i],
                f"{values[i]:.0%}",
                transform=ax.get_yaxis_transform(),
                va="center",
                ha="left",
                fontsize=7.5,
                color=colour,
            )
    if k and ("prob_best_k" in table.columns or "prob_worst_k" in table.columns):
        ax.text(
            1.01,
            -1.2,
            f"P(in best /\nworst {k})",
            transform=ax.get_yaxis_transform(),
            va="bottom",
            ha="left",
            fontsize=7,
            color="#4a5762",
        )


__all__ = ["plot_funnel", "plot_ranks"]
