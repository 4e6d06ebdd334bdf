"""Shrinkage and interval figures of the estimates table: they draw, they compute nothing."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.transforms import ScaledTranslation

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
    _population_row,
    _rate_axis,
    _require,
    _row_labels,
    _spread_labels,
    _title,
    row_axes,
    sort_rows,
)

# -- shrinkage ----------------------------------------------------------------------------------


def plot_shrinkage(
    estimates: pd.DataFrame,
    population: pd.DataFrame | None = None,
    *,
    ax: Axes | None = None,
    label: int = 4,
) -> Axes:
    """Observed rate against the estimate, one marker per group, area by trials.

    Markers on the diagonal were not pulled at all; partial pooling moves small groups
    towards the population mean (the horizontal line, from the population table). Groups
    with no trials have no observed rate and are counted in a note instead of drawn.

    Parameters
    ----------
    estimates : DataFrame
        The estimates table: group, trials, observed_rate, posterior_mean.
    population : DataFrame, optional
        The population table; its ``population_mean`` row is drawn with its interval.
    ax : Axes, optional
    label : int, default=4
        With more than 12 groups, the groups with the highest and the lowest estimates
        that many each are named; with 12 or fewer, all are.
    """
    _require(estimates, ["group", "trials", "observed_rate", "posterior_mean"], "plot_shrinkage")
    ax = _new_axes(ax, (6.4, 5.4))
    _apply_style(ax)
    drawn = estimates[estimates["observed_rate"].notna()]
    n = len(drawn)
    ax.plot(
        [0, 1],
        [0, 1],
        color=PALETTE["pewter"],
        linestyle=(0, (4, 3)),
        linewidth=1.0,
        label="no pooling (estimate = observed)",
        zorder=1,
    )
    _population_line(ax, population)
    named = _named(drawn, label) if n else None  # drawn one by one however many groups
    _size_scatter(ax, drawn, None if named is None else drawn.index.isin(named.index))
    _square_limits(ax, drawn)
    ax.set_xlabel("observed rate (successes / trials)")
    ax.set_ylabel("estimate (posterior mean)")
    _title(ax, f"Shrinkage: observed rate \u2192 estimate ({_count(n)} groups)")
    missing = len(estimates) - n
    if missing:
        _corner_note(ax, f"{_count(missing)} group(s) with no trials not drawn", top=False)
    ax.legend(loc="upper left", fontsize=7.5, scatterpoints=1, labelspacing=0.9, borderaxespad=0.6)
    if named is not None:  # named last: clear of the markers, the legend and the note
        _spread_labels(
            ax,
            named["observed_rate"].to_numpy(),
            named["posterior_mean"].to_numpy(),
            named["group"].to_list(),
        )
    return ax


def _named(drawn: pd.DataFrame, label: int) -> pd.DataFrame:
    """The groups named on the shrinkage figure: all (12 or fewer), else the ``label``
    highest and lowest estimates, ties by name. At many groups only the rows that can be
    among them (estimate at or past the ``label``-th from either end) are sorted: the same
    rows in the same order as sorting every group."""
    keys, ascending = ["posterior_mean", "group"], [False, True]
    n = len(drawn)
    if n <= 12:
        return drawn.sort_values(keys, ascending=ascending)
    mean = drawn["posterior_mean"].to_numpy(dtype=float)
    if n > _merge.MERGE_ABOVE and 0 < label < n // 2 and np.isfinite(mean).all():
        high = np.partition(mean, n - label)[n - label]
        low = np.partition(mean, label - 1)[label - 1]
        drawn = drawn[(mean >= high) | (mean <= low)]
    order = drawn.sort_values(keys, ascending=ascending)
    return pd.concat([order.head(label), order.tail(label)])


def _population_line(ax: Axes, population: pd.DataFrame | None) -> None:
    pop = _population_row(population, "population_mean")
    if pop is None:
        return
    ax.axhspan(pop["lower"], pop["upper"], color=PALETTE["mint"], alpha=0.35, linewidth=0, zorder=0)
    ax.axhline(
        pop["mean"],
        color=PALETTE["ochre"],
        linewidth=1.6,
        zorder=2,
        label=f"population mean {pop['mean']:.3f} (band: its interval)",
    )


def _size_scatter(ax: Axes, drawn: pd.DataFrame, named: np.ndarray | None = None) -> None:
    """The groups as markers whose area grows with trials, and a legend of round sizes; at
    many groups merged to the pixels, the ``named`` ones always drawn one by one."""
    n = len(drawn)
    trials = drawn["trials"].to_numpy(dtype=float)
    biggest = float(trials.max()) if n else 1.0
    scale = 160.0 if n <= 100 else 60.0 if n <= 1000 else 18.0
    marks = ax.scatter(
        drawn["observed_rate"],
        drawn["posterior_mean"],
        s=6.0 + scale * np.sqrt(trials / max(biggest, 1.0)),
        color=PALETTE["harbour"],
        alpha=0.85 if n <= 200 else 0.45 if n <= 2000 else 0.25,
        edgecolors="white" if n <= 2000 else "none",
        linewidths=0.6,
        zorder=3,
        rasterized=n > 2000,
        clip_on=False,  # a rate of 0 or 1 sits on the frame: drawn whole, never half-cut
    )
    merge_marks(marks, keep=named)
    for ref in _size_steps(biggest):
        ax.scatter(
            [],
            [],
            s=6.0 + scale * math.sqrt(ref / max(biggest, 1.0)),
            color=PALETTE["harbour"],
            alpha=0.6,
            label=f"{_count(int(ref))} trials",
        )


def _square_limits(ax: Axes, drawn: pd.DataFrame) -> None:
    """The same range on both axes, around every drawn value, within [0, 1]."""
    if len(drawn):
        lo = float(np.nanmin([drawn["observed_rate"].min(), drawn["posterior_mean"].min()]))
        hi = float(np.nanmax([drawn["observed_rate"].max(), drawn["posterior_mean"].max()]))
    else:
        lo, hi = 0.0, 1.0
    pad = 0.04 * max(hi - lo, 0.05)
    _rate_axis(ax, "x", lo, hi, pad)
    _rate_axis(ax, "y", lo, hi, pad)


def _size_steps(biggest: float) -> list[float]:
    """Round trial counts (1, 10, 100, ...) for the size legend, largest three below the top."""
    if biggest < 1:
        return []
    top = 10 ** math.floor(math.log10(biggest))
    return [s for s in (top / 100, top / 10, top) if s >= 1]


# -- intervals ----------------------------------------------------------------------------------


def plot_intervals(
    estimates: pd.DataFrame,
    *,
    target: float | None = None,
    level: float | None = None,
    ax: Axes | None = None,
    show: int = 15,
    every: int = 70,
) -> Axes:
    """Every group's estimate and interval, ordered from the highest estimate down.

    Parameters
    ----------
    estimates : DataFrame
        The estimates table: group, posterior_mean, lower, upper (observed_rate if present).
    target : float, optional
        A target rate, drawn as a vertical line.
    level : float, optional
        The interval mass, for the axis label.
    ax : Axes, optional
    show : int, default=15
        With more than ``every`` groups, the highest and the lowest ``show`` are labelled and
        the rest squeezed in order into a band between them.
    every : int, default=70
        Up to this many groups, every one gets a labelled row.
    """
    _require(estimates, ["group", "posterior_mean", "lower", "upper"], "plot_intervals")
    table = sort_rows(estimates, ["posterior_mean", "group"], [False, True])
    n = len(table)
    ax, pos, band, idx = row_axes(ax, n, show, every)
    lower = table["lower"].to_numpy(dtype=float)
    upper = table["upper"].to_numpy(dtype=float)
    mean = table["posterior_mean"].to_numpy(dtype=float)
    if band is not None:
        mid = np.arange(show, n - show)
        _draw_band(
            ax,
            lower,
            upper,
            mean,
            pos,
            mid,
            colour=PALETTE["harbour"],
            alpha=min(0.5, 30 / len(mid)),
        )
    span = [float(np.nanmin(lower)), float(np.nanmax(upper))] if n else [0.0, 1.0]
    if target is not None:
        span = [min(span[0], target), max(span[1], target)]
    limits = (max(0.0, span[0] - 0.02), min(1.0, span[1] + 0.02))
    ax.set_xlim(*limits)
    _labelled_intervals(ax, table, pos, idx, level=level, limits=limits)
    if target is not None:
        ax.axvline(
            target,
            color=PALETTE["ochre"],
            linestyle=(0, (5, 2)),
            linewidth=1.6,
            label=f"target {target:g}",
            zorder=2,
        )
    _row_labels(ax, pos, table["group"].astype(str).to_list(), idx)
    _band_note(ax, band, n - 2 * show)
    ax.set_ylim(pos[-1] + 0.8 if n else 1, -0.8)
    ax.set_xlabel(f"rate: estimate and {level:.0%} interval" if level else "rate")
    shown = "all" if band is None else f"highest and lowest {show} of"
    _title(ax, f"Estimates, ordered ({shown} {_count(n)} groups)")
    _legend_below(ax)
    return ax


def _labelled_intervals(
    ax: Axes, table: pd.DataFrame, pos: np.ndarray, idx: np.ndarray, *, level: float | None,
    limits: tuple[float, float],
) -> None:
    """Interval bars, estimate dots and observed-rate ticks of the labelled rows; an observed
    rate beyond the axis is drawn on its edge as an arrowhead pointing out, with its value."""
    ax.hlines(
        pos[idx],
        table["lower"].to_numpy(dtype=float)[idx],
        table["upper"].to_numpy(dtype=float)[idx],
        color=PALETTE["harbour"],
        linewidth=_line_width(len(idx)),
        label=f"{level:.0%} interval" if level else "interval",
    )
    ax.plot(
        table["posterior_mean"].to_numpy(dtype=float)[idx],
        pos[idx],
        "o",
        color=PALETTE["ink"],
        markersize=4 if len(table) <= 200 else 3,
        label="estimate (posterior mean)",
        zorder=3,
    )
    if "observed_rate" not in table.columns:
        return
    observed = table["observed_rate"].to_numpy(dtype=float)[idx]
    rows = pos[idx]
    low, high = limits
    inside = (observed >= low) & (observed <= high)
    ax.plot(
        observed[inside],
        rows[inside],
        "|",
        color=PALETTE["mulberry"],
        markersize=7,
        markeredgewidth=1.4,
        label="observed rate",
        zorder=3,
        clip_on=False,
    )
    named = False
    for beyond, edge, marker, ha, sign in ((observed < low, low, "<", "left", 1),
                                           (observed > high, high, ">", "right", -1)):
        if not beyond.any():
            continue
        # the arrowhead's tip on the frame, the arrowhead and the value inside it
        inward = ax.transData + ScaledTranslation(sign * 3.5 / 72, 0,
                                                  ax.get_figure().dpi_scale_trans)
        ax.plot(np.full(beyond.sum(), edge), rows[beyond], marker, color=PALETTE["mulberry"],
                markersize=5, zorder=4, clip_on=False, transform=inward,
                label=None if named else "observed rate off the axis (value beside)")
        named = True
        for value, row in zip(observed[beyond], rows[beyond], strict=True):
            ax.annotate(f"{value:.2g}", (edge, row), xytext=(sign * 8, 0),
                        textcoords="offset points", ha=ha, va="center", fontsize=6.5,
                        color=PALETTE["mulberry"], zorder=4)


# -- parents (nested model) ---------------------------------------------------------------------


def plot_parents(parents: pd.DataFrame, *, level: float | None = None, ax: Axes | None = None,
                 show: int = 15, every: int = 70) -> Axes:
    """Each parent's effect on the log-odds with its interval, largest first (nested model).

    0 is the population; a parent right of it lifts its groups' rates. The rate of the
    parent's typical group is printed beside each row.

    Parameters
    ----------
    parents : DataFrame
        The parents table: parent, groups, effect_mean, effect_lower, effect_upper and
        typical_rate_median if present.
    level : float, optional
        The interval mass, for the axis label.
    ax : Axes, optional
    show, every : int
        As for :func:`plot_intervals`.
    """
    _require(parents, ["parent", "effect_mean", "effect_lower", "effect_upper"], "plot_parents")
    table = sort_rows(parents, ["effect_mean", "parent"], [False, True])
    n = len(table)
    ax, pos, band, idx = row_axes(ax, n, show, every)
    lower = table["effect_lower"].to_numpy(dtype=float)
    upper = table["effect_upper"].to_numpy(dtype=float)
    mean = table["effect_mean"].to_numpy(dtype=float)
    if band is not None:
        _draw_band(ax, lower, upper, mean, pos, np.arange(show, n - show),
                   colour=PALETTE["harbour"], alpha=min(0.5, 30 / max(n - 2 * show, 1)))
    ax.axvline(0.0, color=PALETTE["pewter"], linestyle=(0, (4, 3)), linewidth=1.0,
               label="0: the population", zorder=1)
    ax.hlines(pos[idx], lower[idx], upper[idx], color=PALETTE["harbour"],
              linewidth=_line_width(len(idx)), label=f"{level:.0%} interval" if level else
              "interval")
    ax.plot(mean[idx], pos[idx], "o", color=PALETTE["ink"], markersize=4,
            label="effect (posterior mean)", zorder=3)
    if "typical_rate_median" in table.columns:
        rate = table["typical_rate_median"].to_numpy(dtype=float)
        for i in idx:
            ax.text(1.01, pos[i], f"{rate[i]:.3f}", transform=ax.get_yaxis_transform(),
                    va="center", ha="left", fontsize=7.5, color=PALETTE["ink"])
        ax.text(1.01, -1.2, "typical\nrate", transform=ax.get_yaxis_transform(),
                va="bottom", ha="left", fontsize=7, color="#4a5762")
    _row_labels(ax, pos, table["parent"].astype(str).to_list(), idx)
    _band_note(ax, band, n - 2 * show, "parents")
    ax.set_ylim(pos[-1] + 0.8 if n else 1, -0.8)
    if n:
        reach = max(abs(float(np.nanmin(lower))), abs(float(np.nanmax(upper))), 0.05) * 1.08
        ax.set_xlim(-reach, reach)
    ax.set_xlabel("parent effect on the log-odds" + (f": mean and {level:.0%} interval"
                                                    if level else ""))
    shown = "all" if band is None else f"highest and lowest {show} of"
    _title(ax, f"Parents, ordered by effect ({shown} {_count(n)} parents)")
    _legend_below(ax, ncols=3)
    return ax


__all__ = ["plot_intervals", "plot_parents", "plot_shrinkage"]
