"""Tables -> matplotlib figures. Plots draw; they never compute a statistic.

Every function takes tables already computed (the run folder's CSV and JSON files read back
as DataFrames and dicts, or posterior draws for the histogram and mixing views) and returns a
matplotlib ``Axes`` or ``Figure``. Options after the tables are keyword-only; ``ax=None``
makes a new figure. Nothing here calls ``show()``: figures are built on
:class:`matplotlib.figure.Figure` directly, so they render on the Agg canvas whatever the
session's backend is, and no pyplot state is kept.

Sorting rows, placing labels, binning draws for a histogram and ranking draws for a rank plot
are drawing; means, quantiles and intervals come from the tables.

Readable at any size: with more groups than fit as labelled rows, the first and last rows are
drawn and labelled and the rows between them are squeezed, in order, into an unlabelled band.

>>> import pandas as pd
>>> from workbench import plots
>>> table = pd.DataFrame({"group": ["a", "b"], "successes": [3, 9], "trials": [10, 20],
...                       "observed_rate": [0.3, 0.45], "posterior_mean": [0.33, 0.43],
...                       "lower": [0.12, 0.25], "upper": [0.58, 0.62]})
>>> ax = plots.plot_intervals(table)
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter
from matplotlib.transforms import ScaledTranslation

#: The workbench palette: chosen so every pair stays apart (CIELAB distance >= 18) under
#: simulated protan, deutan and tritan colour vision; meaning is also carried by marker
#: shape and line style, never by colour alone.
PALETTE = {
    "ink": "#1d2833",  # text, estimates, the benchmark
    "harbour": "#1f6aa5",  # main series; the best-placed groups
    "ochre": "#e39b2d",  # target; the worst-placed groups; outside the 95% limits
    "mulberry": "#a8325e",  # outside the 99.8% limits; the observed value of a check
    "pewter": "#7c8893",  # context: observed rates, the squeezed band, limits
    "mint": "#9fd6c6",  # light fill
    "mist": "#e6ebef",  # lightest fill
}

#: chain colours for the mixing views
CHAIN_COLOURS = ("#1f6aa5", "#e39b2d", "#a8325e", "#5a9e8f", "#7c8893", "#1d2833")

_STYLE = {
    "axes.titlesize": 10.5,
    "axes.labelsize": 9.0,
    "axes.edgecolor": "#9aa6b0",
    "xtick.color": "#4a5762",
    "xtick.labelsize": 8.0,
    "grid.color": "#dfe5ea",
    "grid.linewidth": 0.6,
}

#: longest group label drawn on a figure (the tables keep the full name)
LABEL_CHARS = 26

NOT_COMPUTED = "not computed for this run"


# ---------------------------------------------------------------------------------------------
# helpers: layout and text, no statistics


def _new_axes(ax: Axes | None, size: tuple[float, float]) -> Axes:
    if ax is not None:
        return ax
    fig = Figure(figsize=size, layout="constrained", dpi=110)
    return fig.add_subplot()


def _apply_style(ax: Axes) -> None:
    ax.set_facecolor("white")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(_STYLE["axes.edgecolor"])
    ax.tick_params(colors=_STYLE["xtick.color"], labelsize=_STYLE["xtick.labelsize"])
    for label in (ax.xaxis.label, ax.yaxis.label):
        label.set_color(PALETTE["ink"])
        label.set_size(_STYLE["axes.labelsize"])
    ax.grid(True, axis="both", color=_STYLE["grid.color"], linewidth=_STYLE["grid.linewidth"])
    ax.set_axisbelow(True)


def _title(ax: Axes, text: str) -> None:
    ax.set_title(
        text, loc="left", fontsize=_STYLE["axes.titlesize"], fontweight="bold", color=PALETTE["ink"]
    )


def text_label(name: object, limit: int = LABEL_CHARS) -> str:
    """A user-supplied name made safe to draw: shortened, and ``$`` never starts mathtext."""
    s = str(name).replace("\n", " ")
    if len(s) > limit:
        s = s[: limit - 1] + "\u2026"
    return s.replace("$", r"\$")


def _count(n: int) -> str:
    return f"{n:,}"


def _require(table: pd.DataFrame, columns: Sequence[str], what: str) -> None:
    missing = [c for c in columns if c not in table.columns]
    if missing:
        raise ValueError(f"{what} needs columns {missing}; found {list(table.columns)}.")


def row_positions(
    n: int, show: int, *, every: int = 70, band: float = 8.0
) -> tuple[np.ndarray, tuple | None]:
    """Vertical places for ``n`` ordered rows.

    Up to ``every`` rows (or ``2 * show + 12``, if more): one row each. Beyond that: the first
    and the last ``show`` rows one row each, the rows between them spread in order over a band
    ``band`` rows high. Returns the positions and the band's (top, bottom) or None.
    """
    if n <= max(every, 2 * show + 12):
        return np.arange(n, dtype=float), None
    pos = np.empty(n)
    pos[:show] = np.arange(show)
    top = show + 0.6
    pos[show : n - show] = np.linspace(top, top + band, n - 2 * show)
    pos[n - show :] = top + band + 1.0 + np.arange(show)
    return pos, (top - 0.4, top + band + 0.4)


def _labelled(n: int, band: tuple | None, show: int) -> np.ndarray:
    idx = np.arange(n)
    if band is None:
        return idx
    return np.concatenate([idx[:show], idx[n - show :]])


def _band_note(ax: Axes, band: tuple | None, hidden: int, what: str = "groups") -> None:
    if band is None:
        return
    ax.axhspan(band[0], band[1], color=PALETTE["mist"], zorder=0, linewidth=0)
    note = f"{_count(hidden)} {what} between,\nin order, unlabelled"
    ax.text(
        0.995,
        (band[0] + band[1]) / 2,
        note,
        transform=ax.get_yaxis_transform(),
        ha="right",
        va="center",
        fontsize=7.5,
        color="#4a5762",
        style="italic",
    )


def _row_labels(ax: Axes, pos: np.ndarray, names: Sequence, idx: np.ndarray) -> None:
    ax.set_yticks(pos[idx], labels=[text_label(names[i]) for i in idx])
    ax.tick_params(axis="y", length=0, labelsize=7.5 if len(idx) > 30 else 8.0)
    ax.grid(False, axis="y")


def _legend_below(ax: Axes, handles: list | None = None, *, ncols: int = 4) -> None:
    """The legend under the x-axis label, where it can hide no data."""
    below = ax.transAxes + ScaledTranslation(0, -34 / 72, ax.get_figure().dpi_scale_trans)
    ax.legend(
        handles=handles,
        loc="upper center",
        bbox_to_anchor=(0.5, 0.0),
        bbox_transform=below,
        ncols=ncols,
        fontsize=7.5,
        frameon=False,
        handlelength=1.8,
        columnspacing=1.4,
    )


def _spread_labels(
    ax: Axes,
    xs: Sequence[float],
    ys: Sequence[float],
    names: Sequence,
    *,
    gap: float = 9.5,
    flip: bool = True,
) -> None:
    """Name points; labels that would collide are spread apart vertically around their
    points (``gap`` points apart) with a thin leader line. With ``flip``, points in the right
    quarter of the axes are named on their left; the others always on their right."""
    if not len(xs):
        return
    fig = ax.get_figure()
    height_pt = ax.get_position().height * fig.get_figheight() * 72
    to_axes = ax.transScale + ax.transLimits  # data -> axes fraction, before layout
    where = to_axes.transform(np.column_stack([np.asarray(xs, float), np.asarray(ys, float)]))
    at = where[:, 1] * height_pt
    left = (where[:, 0] > 0.75) & flip
    for side in (False, True):
        chosen = np.flatnonzero(left == side)
        if not chosen.size:
            continue
        chosen = chosen[np.argsort(at[chosen], kind="stable")]
        placed = _stack(at[chosen], gap)
        for i, y in zip(chosen, placed, strict=True):
            shift = y - at[i]
            arrow = {"arrowstyle": "-", "color": "#9aa6b0", "linewidth": 0.5}
            ax.annotate(
                text_label(names[i]),
                (xs[i], ys[i]),
                xytext=(-7 if side else 7, shift),
                textcoords="offset points",
                fontsize=7.5,
                color=PALETTE["ink"],
                ha="right" if side else "left",
                va="center",
                zorder=4,
                arrowprops=arrow if abs(shift) > 5 else None,
                # a pale backing so reference lines never run through a name
                bbox={"boxstyle": "square,pad=0.1", "fc": "white", "ec": "none", "alpha": 0.85},
            )


def _stack(wanted: np.ndarray, gap: float) -> np.ndarray:
    """Positions at least ``gap`` apart, each run of crowded labels centred on its points."""
    clusters: list[list[float]] = []  # each: the wanted positions of its members, in order
    for y in wanted:
        clusters.append([float(y)])
        while len(clusters) > 1:
            low, high = clusters[-2], clusters[-1]
            low_top = np.mean(low) + (len(low) - 1) * gap / 2
            high_bottom = np.mean(high) - (len(high) - 1) * gap / 2
            if high_bottom - low_top >= gap:
                break
            clusters[-2:] = [low + high]
    out = []
    for members in clusters:
        centre = np.mean(members)
        out += [centre + (k - (len(members) - 1) / 2) * gap for k in range(len(members))]
    return np.asarray(out)


def _line_width(n: int) -> float:
    return 2.2 if n <= 40 else 1.6 if n <= 200 else 0.6


def _shown_rows(n: int, show: int, band: tuple | None) -> float:
    return n if band is None else 2 * show + 10


def _height(rows: float) -> float:
    return float(min(max(2.8, 0.17 * rows + 1.6), 13.5))


def not_computed(what: str, *, ax: Axes | None = None, why: str = NOT_COMPUTED) -> Axes:
    """An empty panel that says ``what`` is not in this run."""
    ax = _new_axes(ax, (5.0, 1.6))
    ax.set_axis_off()
    ax.text(
        0.5,
        0.5,
        f"{what}: {why}",
        ha="center",
        va="center",
        color="#4a5762",
        transform=ax.transAxes,
        style="italic",
    )
    return ax


# ---------------------------------------------------------------------------------------------
# shrinkage


def plot_shrinkage(
    estimates: pd.DataFrame,
    population: pd.DataFrame | None = None,
    *,
    ax: Axes | None = None,
    label: int = 4,
) -> Axes:
    """Observed rate against the estimate, one marker per group, area by trials.

    Markers on the diagonal were not pulled at all; partial pooling moves small groups
    towards the population mean (the horizontal line, from ``population.csv``). Groups with
    no trials have no observed rate and are counted in a note instead of drawn.

    Parameters
    ----------
    estimates : DataFrame
        ``estimates.csv``: group, trials, observed_rate, posterior_mean.
    population : DataFrame, optional
        ``population.csv``; its ``population_mean`` row is drawn with its interval.
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
    trials = drawn["trials"].to_numpy(dtype=float)
    biggest = float(trials.max()) if n else 1.0
    scale = 160.0 if n <= 100 else 60.0 if n <= 1000 else 18.0
    sizes = 6.0 + scale * np.sqrt(trials / max(biggest, 1.0))
    alpha = 0.85 if n <= 200 else 0.45 if n <= 2000 else 0.25
    ax.plot(
        [0, 1],
        [0, 1],
        color=PALETTE["pewter"],
        linestyle=(0, (4, 3)),
        linewidth=1.0,
        label="no pooling (estimate = observed)",
        zorder=1,
    )
    pop = _population_row(population, "population_mean")
    if pop is not None:
        ax.axhspan(
            pop["lower"], pop["upper"], color=PALETTE["mint"], alpha=0.35, linewidth=0, zorder=0
        )
        ax.axhline(
            pop["mean"],
            color=PALETTE["ochre"],
            linewidth=1.6,
            zorder=2,
            label=f"population mean {pop['mean']:.3f} (band: its interval)",
        )
    ax.scatter(
        drawn["observed_rate"],
        drawn["posterior_mean"],
        s=sizes,
        color=PALETTE["harbour"],
        alpha=alpha,
        edgecolors="white" if n <= 2000 else "none",
        linewidths=0.6,
        zorder=3,
        rasterized=n > 2000,
    )
    for ref in _size_steps(biggest):
        ax.scatter(
            [],
            [],
            s=6.0 + scale * math.sqrt(ref / max(biggest, 1.0)),
            color=PALETTE["harbour"],
            alpha=0.6,
            label=f"{_count(int(ref))} trials",
        )
    lo = float(np.nanmin([drawn["observed_rate"].min(), drawn["posterior_mean"].min()])) if n else 0
    hi = float(np.nanmax([drawn["observed_rate"].max(), drawn["posterior_mean"].max()])) if n else 1
    pad = 0.04 * max(hi - lo, 0.05)
    ax.set_xlim(max(0.0, lo - pad), min(1.0, hi + pad))
    ax.set_ylim(max(0.0, lo - pad), min(1.0, hi + pad))
    if n:
        order = drawn.sort_values(["posterior_mean", "group"], ascending=[False, True])
        named = order if n <= 12 else pd.concat([order.head(label), order.tail(label)])
        _spread_labels(
            ax,
            named["observed_rate"].to_numpy(),
            named["posterior_mean"].to_numpy(),
            named["group"].to_list(),
        )
    ax.set_xlabel("observed rate (successes / trials)")
    ax.set_ylabel("estimate (posterior mean)")
    _title(ax, f"Shrinkage: observed rate \u2192 estimate ({_count(n)} groups)")
    missing = len(estimates) - n
    if missing:
        ax.text(
            0.99,
            0.01,
            f"{_count(missing)} group(s) with no trials not drawn",
            transform=ax.transAxes,
            ha="right",
            va="bottom",
            fontsize=7.5,
            color="#4a5762",
        )
    ax.legend(loc="upper left", fontsize=7.5, scatterpoints=1, labelspacing=0.9, borderaxespad=0.6)
    return ax


def _size_steps(biggest: float) -> list[float]:
    """Round trial counts (1, 10, 100, ...) for the size legend, largest three below the top."""
    if biggest < 1:
        return []
    top = 10 ** math.floor(math.log10(biggest))
    return [s for s in (top / 100, top / 10, top) if s >= 1]


def _population_row(
    population: pd.DataFrame | None, quantity: str, *, parameter: str | None = None
) -> dict | None:
    """The population.csv row of a quantity (by its ``parameter`` name where given)."""
    if population is None or "quantity" not in population.columns:
        return None
    rows = population[population["quantity"] == quantity]
    if parameter is not None and "parameter" in population.columns:
        by_name = population[population["parameter"] == parameter]
        rows = by_name if len(by_name) else rows
    if rows.empty:
        return None
    return rows.iloc[0].to_dict()


# ---------------------------------------------------------------------------------------------
# intervals


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
        ``estimates.csv``: group, posterior_mean, lower, upper (observed_rate if present).
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
    table = estimates.sort_values(["posterior_mean", "group"], ascending=[False, True])
    n = len(table)
    pos, band = row_positions(n, show, every=every)
    ax = _new_axes(ax, (7.2, _height(_shown_rows(n, show, band))))
    _apply_style(ax)
    lower = table["lower"].to_numpy(dtype=float)
    upper = table["upper"].to_numpy(dtype=float)
    mean = table["posterior_mean"].to_numpy(dtype=float)
    names = table["group"].astype(str).to_list()
    idx = _labelled(n, band, show)
    lw = _line_width(len(idx))
    if band is not None:
        mid = np.arange(show, n - show)
        segments = np.stack([np.c_[lower[mid], pos[mid]], np.c_[upper[mid], pos[mid]]], axis=1)
        ax.add_collection(
            LineCollection(
                segments,
                colors=PALETTE["harbour"],
                linewidths=0.3,
                alpha=min(0.5, 30 / len(mid)),
                rasterized=True,
            )
        )
        ax.plot(mean[mid], pos[mid], color=PALETTE["ink"], linewidth=0.8, rasterized=True)
    ax.hlines(
        pos[idx],
        lower[idx],
        upper[idx],
        color=PALETTE["harbour"],
        linewidth=lw,
        label=f"{level:.0%} interval" if level else "interval",
    )
    ax.plot(
        mean[idx],
        pos[idx],
        "o",
        color=PALETTE["ink"],
        markersize=4 if n <= 200 else 3,
        label="estimate (posterior mean)",
        zorder=3,
    )
    if "observed_rate" in table.columns:
        obs = table["observed_rate"].to_numpy(dtype=float)
        ax.plot(
            obs[idx],
            pos[idx],
            "|",
            color=PALETTE["mulberry"],
            markersize=7,
            markeredgewidth=1.4,
            label="observed rate",
            zorder=3,
        )
    if target is not None:
        ax.axvline(
            target,
            color=PALETTE["ochre"],
            linestyle=(0, (5, 2)),
            linewidth=1.6,
            label=f"target {target:g}",
            zorder=2,
        )
    _row_labels(ax, pos, names, idx)
    _band_note(ax, band, n - 2 * show)
    ax.set_ylim(pos[-1] + 0.8 if n else 1, -0.8)
    ax.set_xlim(
        max(0.0, float(np.nanmin(lower)) - 0.02) if n else 0,
        min(1.0, float(np.nanmax(upper)) + 0.02) if n else 1,
    )
    ax.set_xlabel(f"rate: estimate and {level:.0%} interval" if level else "rate")
    shown = "all" if band is None else f"highest and lowest {show} of"
    _title(ax, f"Estimates, ordered ({shown} {_count(n)} groups)")
    _legend_below(ax)
    return ax


# ---------------------------------------------------------------------------------------------
# funnel


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
        ``funnel.csv``: group, trials, observed_rate, benchmark, the limits ``lower_95``,
        ``upper_95``, ``lower_998``, ``upper_998`` (``limit_95_lower`` ... also read), and
        ``outside_95`` / ``outside_998`` ("high", "low" or blank; booleans also read).
    curve : DataFrame, optional
        ``funnel_curve.csv``: trials and the four limits on a fine grid of trials, drawn as
        the funnel's edges; without it, the per-group limits are joined instead.
    ax : Axes, optional
    label : int, default=4
        Name at most this many groups outside the 99.8% limits (the largest ones first).
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
        edge_limits = {key: _limit_column(curve, *key) for key in _LIMITS}
    else:
        edge, edge_limits = table.sort_values("trials"), limits
    x = edge["trials"].to_numpy(dtype=float)

    def line(level, side):
        return edge[edge_limits[(level, side)]].to_numpy(dtype=float)

    ax.fill_between(
        x,
        line("95", "lower"),
        line("95", "upper"),
        color=PALETTE["mist"],
        linewidth=0,
        zorder=0,
        label="95% limits (shaded)",
    )
    for side in ("lower", "upper"):
        ax.plot(x, line("95", side), color=PALETTE["pewter"], linewidth=0.9, zorder=1)
        ax.plot(
            x,
            line("998", side),
            color=PALETTE["ink"],
            linestyle=(0, (4, 2)),
            linewidth=1.0,
            zorder=1,
            label="99.8% limits" if side == "lower" else None,
        )
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
    out95 = _flag(table, "outside_95")
    out998 = _flag(table, "outside_998")
    small = 16 if n <= 500 else 5
    kinds = [
        (~out95 & ~out998, "o", PALETTE["harbour"], small, "inside the 95% limits"),
        (out95 & ~out998, "D", PALETTE["ochre"], small + 4, "outside 95%"),
        (out998, "^", PALETTE["mulberry"], small + 14, "outside 99.8%"),
    ]
    for mask, marker, colour, size, text in kinds:
        part = table[mask]
        ax.scatter(
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
        )
    ax.set_xscale("log")
    ax.set_xlabel("trials (log scale)")
    ax.set_ylabel("observed rate")
    if n:
        lo = min(float(table["observed_rate"].min()), float(np.nanmin(line("998", "lower"))))
        hi = max(float(table["observed_rate"].max()), float(np.nanmax(line("998", "upper"))))
        ax.set_ylim(max(0.0, lo - 0.02), min(1.0, hi + 0.02))
    flagged = table[out998].sort_values(["trials", "group"], ascending=[False, True]).head(label)
    if n:
        room = 4.0 if len(flagged) else 1.3  # empty space on the right for the names
        ax.set_xlim(
            max(0.8, float(x.min()) * 0.9 if len(x) else 0.8), float(table["trials"].max()) * room
        )
    _spread_labels(
        ax,
        flagged["trials"].to_numpy(),
        flagged["observed_rate"].to_numpy(),
        flagged["group"].to_list(),
        flip=False,
    )
    _title(ax, f"Funnel plot: observed rate by trials ({_count(n)} groups)")
    dropped = len(funnel) - n
    if dropped:
        ax.text(
            0.99,
            0.99,
            f"{_count(dropped)} group(s) with no trials not drawn",
            transform=ax.transAxes,
            ha="right",
            va="top",
            fontsize=7.5,
            color="#4a5762",
        )
    _legend_below(ax, ncols=3)
    return ax


_LIMITS = [(level, side) for level in ("95", "998") for side in ("lower", "upper")]


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


# ---------------------------------------------------------------------------------------------
# ranks


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
        ``ranks.csv``: group, rank_median, rank_lower, rank_upper (rank 1 = best), and
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
    sort_cols = ["rank_median", "group"]
    ascending = [True, True]
    if "prob_best_k" in ranks.columns:
        sort_cols.insert(1, "prob_best_k")
        ascending.insert(1, False)
    table = ranks.sort_values(sort_cols, ascending=ascending)
    n = len(table)
    if k is None:
        k = int(ranks["k"].iloc[0]) if "k" in ranks.columns and n else 5
    k = max(0, min(int(k), n // 2))
    show = max(show, k)
    pos, band = row_positions(n, show, every=every)
    ax = _new_axes(ax, (7.2, _height(_shown_rows(n, show, band))))
    _apply_style(ax)
    lo = table["rank_lower"].to_numpy(dtype=float)
    hi = table["rank_upper"].to_numpy(dtype=float)
    med = table["rank_median"].to_numpy(dtype=float)
    names = table["group"].astype(str).to_list()
    idx = _labelled(n, band, show)
    colours = np.array([PALETTE["pewter"]] * n, dtype=object)
    colours[:k] = PALETTE["harbour"]
    if k:
        colours[n - k :] = PALETTE["ochre"]
    if band is not None:
        mid = np.arange(show, n - show)
        segments = np.stack([np.c_[lo[mid], pos[mid]], np.c_[hi[mid], pos[mid]]], axis=1)
        ax.add_collection(
            LineCollection(
                segments,
                colors=PALETTE["pewter"],
                linewidths=0.3,
                alpha=min(0.6, 40 / len(mid)),
                rasterized=True,
            )
        )
        ax.plot(med[mid], pos[mid], color=PALETTE["ink"], linewidth=0.8, rasterized=True)
    lw = _line_width(len(idx))
    ax.hlines(pos[idx], lo[idx], hi[idx], colors=list(colours[idx]), linewidth=lw)
    dots = np.where(colours[idx] == PALETTE["pewter"], PALETTE["ink"], colours[idx])
    ax.scatter(
        med[idx], pos[idx], s=18, c=list(dots), zorder=3, edgecolors=PALETTE["ink"], linewidths=0.5
    )
    _row_labels(ax, pos, names, idx)
    _band_note(ax, band, n - 2 * show)
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
    return ax


# ---------------------------------------------------------------------------------------------
# posterior predictive checks


def plot_predictive(
    checks: Sequence[Mapping],
    replicated: pd.DataFrame,
    *,
    fig: Figure | None = None,
    columns: int = 3,
    names: Mapping[str, str] | None = None,
) -> Figure:
    """Each test statistic's replicated values against the observed one.

    A statistic with one observed value is drawn as a histogram of its replicates with the
    observed value as a line; one whose observed value changes with the draw (a realised
    discrepancy such as chi-square) as replicated against observed per draw, with the line
    of equality.

    Parameters
    ----------
    checks : sequence of dicts
        One per statistic (``checks.json`` "statistics"): ``statistic``, ``observed``,
        ``p_value`` and ``verdict`` if present.
    replicated : DataFrame
        ``ppc_statistics.csv``: statistic, draw, observed, replicated (a ``value`` column is
        read as the replicated value).
    fig : Figure, optional
    columns : int, default=3
    names : mapping, optional
        Display names of the statistics.
    """
    value = "replicated" if "replicated" in replicated.columns else "value"
    _require(replicated, ["statistic", value], "plot_predictive")
    names = dict(names or {})
    count = max(len(checks), 1)
    cols = min(columns, count)
    rows = math.ceil(count / cols)
    fig = fig or Figure(figsize=(3.2 * cols, 2.55 * rows + 0.35), layout="constrained", dpi=110)
    axes = fig.subplots(rows, cols, squeeze=False)
    groups = dict(tuple(replicated.groupby("statistic", sort=False)))
    for ax, check in zip(axes.ravel(), checks, strict=False):
        _apply_style(ax)
        key = str(check.get("statistic", check.get("name", "?")))
        title = text_label(names.get(key, key), 34)
        part = groups.get(key)
        if part is None or not len(part):
            not_computed(title, ax=ax, why="no replicates stored")
            continue
        rep = part[value].to_numpy(dtype=float)
        per_draw = part["observed"].to_numpy(dtype=float) if "observed" in part else None
        if per_draw is not None and np.ptp(per_draw) > 0:
            ax.scatter(
                per_draw,
                rep,
                s=5,
                color=PALETTE["harbour"],
                alpha=0.35,
                edgecolors="none",
                rasterized=True,
            )
            both = np.concatenate([per_draw, rep])
            ends = [float(both.min()), float(both.max())]
            ax.plot(ends, ends, color=PALETTE["mulberry"], linewidth=1.6)
            ax.set_xlabel("observed (per draw)", fontsize=7.5)
            ax.set_ylabel("replicated", fontsize=7.5)
        else:
            ax.hist(
                rep,
                bins=_bins(rep),
                color=PALETTE["mint"],
                edgecolor=PALETTE["harbour"],
                linewidth=0.4,
            )
            observed = check.get("observed")
            if observed is not None:
                ax.axvline(float(observed), color=PALETTE["mulberry"], linewidth=2.0)
            ax.set_yticks([])
            ax.grid(False, axis="y")
        p = check.get("p_value")
        verdict = check.get("verdict")
        sub = f"p = {float(p):.2f}" if p is not None else ""
        if verdict:
            sub += f"  ({verdict})"
        ax.set_title(f"{title}\n{sub}", loc="left", fontsize=8.5, color=PALETTE["ink"])
        ax.tick_params(labelsize=7)
    for ax in axes.ravel()[len(checks) :]:
        ax.set_axis_off()
    if not checks:
        not_computed("posterior predictive checks", ax=axes.ravel()[0])
    fig.suptitle(
        "Posterior predictive checks: replicated data (blue) against the observed data (red line)",
        x=0.01,
        ha="left",
        fontsize=10,
        fontweight="bold",
        color=PALETTE["ink"],
    )
    return fig


def _bins(values: np.ndarray) -> int | np.ndarray:
    """Histogram bins: one per whole number for small counts, else 30."""
    finite = values[np.isfinite(values)]
    if finite.size and np.all(finite == np.round(finite)) and np.ptp(finite) <= 40:
        return np.arange(finite.min() - 0.5, finite.max() + 1.5)
    return 30


def plot_loo_pit(groups: pd.DataFrame, *, ax: Axes | None = None, bins: int = 10) -> Axes:
    """Histogram of the leave-one-group-out PIT values; calibrated predictions are flat.

    Parameters
    ----------
    groups : DataFrame
        ``group_checks.csv`` with a ``loo_pit`` column.
    ax : Axes, optional
    bins : int, default=10
    """
    _require(groups, ["loo_pit"], "plot_loo_pit")
    ax = _new_axes(ax, (4.6, 3.0))
    _apply_style(ax)
    values = groups["loo_pit"].to_numpy(dtype=float)
    values = values[np.isfinite(values)]
    ax.hist(
        values,
        bins=np.linspace(0, 1, bins + 1),
        color=PALETTE["mint"],
        edgecolor=PALETTE["harbour"],
        linewidth=0.6,
    )
    ax.axhline(
        values.size / bins,
        color=PALETTE["mulberry"],
        linestyle=(0, (4, 2)),
        linewidth=1.3,
        label="flat: calibrated",
    )
    ax.set_xlim(0, 1)
    ax.set_xlabel("LOO-PIT value")
    ax.set_ylabel("groups")
    _title(ax, f"LOO-PIT ({_count(values.size)} groups)")
    ax.legend(loc="upper right", fontsize=7.5)
    return ax


# ---------------------------------------------------------------------------------------------
# population parameters and mixing

_HYPER_NAMES = {
    "mu": "population mean (mu)",
    "kappa": "concentration (kappa)",
    "between_group_sd": "between-group sd",
    "theta_new": "rate of a new group",
    "alpha": "intercept (alpha)",
    "sigma": "between-group sd, logit (sigma)",
}

_HYPER_QUANTITY = {
    "mu": "population_mean",
    "kappa": "concentration",
    "between_group_sd": "between_group_sd",
    "theta_new": "new_group_rate",
}


def plot_population(
    draws: Mapping[str, np.ndarray],
    population: pd.DataFrame | None = None,
    *,
    fig: Figure | None = None,
) -> Figure:
    """Posterior of each population parameter: histogram of its draws, interval from the table.

    Parameters
    ----------
    draws : mapping of name -> array
        Draws of each parameter (any shape; chains are pooled for the histogram).
    population : DataFrame, optional
        ``population.csv``: its mean and interval are marked on the matching panel.
    fig : Figure, optional
    """
    names = list(draws)
    count = max(len(names), 1)
    fig = fig or Figure(figsize=(3.2 * count, 2.7), layout="constrained", dpi=110)
    axes = fig.subplots(1, count, squeeze=False).ravel()
    for ax, name in zip(axes, names, strict=False):
        _apply_style(ax)
        values = np.asarray(draws[name], dtype=float).ravel()
        values = values[np.isfinite(values)]
        log = name == "kappa" and values.size and values.min() > 0
        count = int(min(40, max(8, values.size // 25)))
        bins = np.geomspace(values.min(), values.max(), count + 1) if log else count
        ax.hist(
            values, bins=bins, color=PALETTE["mint"], edgecolor=PALETTE["harbour"], linewidth=0.4
        )
        if log:
            ax.set_xscale("log")
            ax.xaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
            ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
            ax.xaxis.set_minor_formatter(NullFormatter())
        row = _population_row(population, _HYPER_QUANTITY.get(name, name), parameter=name)
        if row is not None:
            ax.axvspan(row["lower"], row["upper"], color=PALETTE["ochre"], alpha=0.15, linewidth=0)
            ax.axvline(row["mean"], color=PALETTE["ochre"], linewidth=1.8)
            ax.text(
                0.98,
                0.95,
                f"mean {row['mean']:.4g}\n[{row['lower']:.4g}, {row['upper']:.4g}]",
                transform=ax.transAxes,
                ha="right",
                va="top",
                fontsize=7.5,
                color=PALETTE["ink"],
                bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1.5},
            )
        ax.set_title(
            _HYPER_NAMES.get(name, text_label(name)), loc="left", fontsize=9, color=PALETTE["ink"]
        )
        ax.set_yticks([])
        ax.grid(False, axis="y")
    if not names:
        not_computed("population parameters", ax=axes[0])
    fig.suptitle(
        "Population parameters: posterior draws (bars), mean and interval (orange)",
        x=0.01,
        ha="left",
        fontsize=10,
        fontweight="bold",
        color=PALETTE["ink"],
    )
    return fig


def plot_mixing(
    draws: Mapping[str, np.ndarray],
    *,
    divergent: np.ndarray | None = None,
    fig: Figure | None = None,
    bins: int = 20,
) -> Figure:
    """Chain-mixing views for MCMC runs: a trace and a rank histogram per parameter.

    Well-mixed chains overlap in the trace and have flat, similar rank histograms.

    Parameters
    ----------
    draws : mapping of name -> array of shape (chain, draw)
    divergent : array of shape (chain, draw), optional
        Divergent transitions, marked under each trace.
    fig : Figure, optional
    bins : int, default=20
        Bars of the rank histograms.
    """
    names = list(draws)
    count = max(len(names), 1)
    fig = fig or Figure(figsize=(9.0, 2.0 * count + 0.4), layout="constrained", dpi=110)
    axes = fig.subplots(count, 2, squeeze=False, width_ratios=[2.2, 1.0])
    for (trace_ax, rank_ax), name in zip(axes, names, strict=False):
        values = np.asarray(draws[name], dtype=float)
        if values.ndim == 1:
            values = values[None, :]
        chains, n_draws = values.shape
        _apply_style(trace_ax)
        _apply_style(rank_ax)
        steps = np.arange(n_draws)
        for c in range(chains):
            trace_ax.plot(
                steps,
                values[c],
                color=CHAIN_COLOURS[c % len(CHAIN_COLOURS)],
                linewidth=0.5,
                alpha=0.75,
                label=f"chain {c}",
            )
        if divergent is not None and np.asarray(divergent).any():
            div = np.asarray(divergent, dtype=bool)
            where = np.nonzero(div.any(axis=0))[0]
            trace_ax.plot(
                where,
                np.full(where.shape, np.nanmin(values)),
                "|",
                color=PALETTE["mulberry"],
                markersize=8,
                label="divergent",
            )
        trace_ax.set_title(
            f"{_HYPER_NAMES.get(name, text_label(name))}: trace",
            loc="left",
            fontsize=9,
            color=PALETTE["ink"],
        )
        trace_ax.set_xlabel("draw")
        ranks = _draw_ranks(values)
        bars = int(min(bins, max(4, chains * n_draws // 50)))
        edges = np.linspace(0, chains * n_draws, bars + 1)
        for c in range(chains):
            counts, _ = np.histogram(ranks[c], bins=edges)
            rank_ax.stairs(
                counts,
                edges,
                color=CHAIN_COLOURS[c % len(CHAIN_COLOURS)],
                linewidth=1.2,
                baseline=None,
            )
        rank_ax.axhline(
            n_draws / bars, color=PALETTE["pewter"], linestyle=(0, (3, 2)), linewidth=0.9
        )
        rank_ax.set_ylim(0, None)
        rank_ax.set_title("rank histogram per chain", loc="left", fontsize=9, color=PALETTE["ink"])
        rank_ax.set_xlabel("rank of draw among all chains")
        rank_ax.set_yticks([])
    if names:
        axes[0][0].legend(
            loc="upper right",
            fontsize=7,
            ncols=min(6, chains + 1),
            framealpha=0.85,
            frameon=True,
            edgecolor="none",
        )
    else:
        not_computed("chain-mixing views", ax=axes[0][0])
        axes[0][1].set_axis_off()
    fig.suptitle(
        "Chain mixing: traces should overlap, rank histograms should be flat (dashed line: flat)",
        x=0.01,
        ha="left",
        fontsize=10,
        fontweight="bold",
        color=PALETTE["ink"],
    )
    return fig


def _draw_ranks(values: np.ndarray) -> np.ndarray:
    """Rank of each draw among all chains' draws (0-based), in the array's shape."""
    flat = values.ravel()
    order = np.argsort(flat, kind="stable")
    ranks = np.empty(flat.size)
    ranks[order] = np.arange(flat.size)
    return ranks.reshape(values.shape)


def figure_of(artist: Axes | Figure) -> Figure:
    """The Figure an Axes belongs to (or the Figure itself)."""
    return artist if isinstance(artist, Figure) else artist.get_figure()


__all__ = [
    "CHAIN_COLOURS",
    "NOT_COMPUTED",
    "PALETTE",
    "figure_of",
    "not_computed",
    "plot_funnel",
    "plot_intervals",
    "plot_loo_pit",
    "plot_mixing",
    "plot_population",
    "plot_predictive",
    "plot_ranks",
    "plot_shrinkage",
    "row_positions",
    "text_label",
]
