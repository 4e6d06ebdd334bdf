"""Population parameters: histograms of their draws and chain-mixing views.

Both read the population draws table: columns ``chain`` and ``draw``, one column per
population parameter (every scalar the model samples, whatever its name), and a boolean
``diverging`` column. Reshaping it into one (chain, draw) array per parameter, binning draws
for a histogram and ranking them for a rank plot are drawing; means and intervals come from
the population table.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from ._style import (
    CHAIN_COLOURS,
    COLOUR_WORDS,
    PALETTE,
    _apply_style,
    _population_row,
    _require,
    _suptitle,
    not_computed,
    text_label,
)

#: columns of the population draws table that are not parameters
INDEX_COLUMNS = ("chain", "draw")
DIVERGING = "diverging"

_HYPER_NAMES = {
    "mu": "population mean (mu)",
    "kappa": "concentration (kappa)",
    "between_group_sd": "between-group sd",
    "alpha": "intercept (alpha)",
    "sigma": "between-group sd, logit (sigma)",
    "tau": "between-parent sd, logit (tau)",
}

_HYPER_QUANTITY = {
    "mu": "population_mean",
    "kappa": "concentration",
    "between_group_sd": "between_group_sd",
}


def parameter_names(draws: pd.DataFrame) -> list[str]:
    """The parameters of a population draws table, in its column order."""
    return [c for c in draws.columns if c not in (*INDEX_COLUMNS, DIVERGING)]


def _by_chain(draws: pd.DataFrame, column: str) -> np.ndarray:
    """One column as a (chain, draw) array, chains and draws in order."""
    wide = draws.pivot(index="chain", columns="draw", values=column).sort_index()
    return wide.sort_index(axis=1).to_numpy()


def _display_name(name: str) -> str:
    if name in _HYPER_NAMES:
        return _HYPER_NAMES[name]
    if name.startswith("beta_"):
        return f"coefficient of {text_label(name[5:])}"
    return text_label(name)


def plot_population(
    draws: pd.DataFrame,
    population: pd.DataFrame | None = None,
    *,
    fig: Figure | None = None,
    columns: int = 4,
) -> Figure:
    """Posterior of each population parameter: histogram of its draws, interval from the table.

    Parameters
    ----------
    draws : DataFrame
        The population draws table: chain, draw, one column per parameter (chains are
        pooled for the histogram).
    population : DataFrame, optional
        The population table: its mean and interval are marked on the matching panel.
    fig : Figure, optional
    columns : int, default=4
        Panels per row.
    """
    _require(draws, list(INDEX_COLUMNS), "plot_population")
    names = parameter_names(draws)
    count = max(len(names), 1)
    cols = min(columns, count)
    rows = math.ceil(count / cols)
    fig = fig or Figure(figsize=(3.2 * cols, 2.7 * rows), layout="constrained", dpi=110)
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax, name in zip(axes, names, strict=False):
        _apply_style(ax)
        values = draws[name].to_numpy(dtype=float)
        _histogram(ax, values[np.isfinite(values)], log=name == "kappa")
        row = _population_row(population, _HYPER_QUANTITY.get(name, name), parameter=name)
        if row is not None:
            _mark_interval(ax, row)
        ax.set_title(_display_name(name), loc="left", fontsize=9, color=PALETTE["ink"])
        ax.set_yticks([])
        ax.grid(False, axis="y")
    for ax in axes[len(names) :]:
        ax.set_axis_off()
    if not names:
        not_computed("population parameters", ax=axes[0])
    _suptitle(fig, "Population parameters: posterior draws (bars), mean and interval"
                   f" ({COLOUR_WORDS['ochre']})")
    return fig


def _histogram(ax: Axes, values: np.ndarray, *, log: bool) -> None:
    """Bars of the draws; on a log axis for a positive scale parameter."""
    log = bool(log and values.size and values.min() > 0)
    count = int(min(40, max(8, values.size // 25)))
    bins = np.geomspace(values.min(), values.max(), count + 1) if log else count
    ax.hist(values, bins=bins, color=PALETTE["mint"], edgecolor=PALETTE["harbour"], linewidth=0.4)
    if log:
        ax.set_xscale("log")
        ax.xaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.xaxis.set_minor_formatter(NullFormatter())


def _mark_interval(ax: Axes, row: dict) -> None:
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


def plot_mixing(draws: pd.DataFrame, *, fig: Figure | None = None, bins: int = 20) -> Figure:
    """Chain-mixing views for MCMC runs: a trace and a rank histogram per parameter.

    Every parameter column of the table gets its row. Well-mixed chains overlap in the trace
    and have flat, similar rank histograms; divergent transitions (the ``diverging``
    column) are marked under each trace.

    Parameters
    ----------
    draws : DataFrame
        The population draws table: chain, draw, one column per parameter, diverging.
    fig : Figure, optional
    bins : int, default=20
        Bars of the rank histograms.
    """
    _require(draws, list(INDEX_COLUMNS), "plot_mixing")
    names = parameter_names(draws)
    count = max(len(names), 1)
    fig = fig or Figure(figsize=(9.0, 2.0 * count + 0.4), layout="constrained", dpi=110)
    axes = fig.subplots(count, 2, squeeze=False, width_ratios=[2.2, 1.0])
    divergent = _by_chain(draws, DIVERGING).astype(bool) if DIVERGING in draws else None
    chains = 0
    for (trace_ax, rank_ax), name in zip(axes, names, strict=False):
        values = _by_chain(draws, name).astype(float)
        chains = values.shape[0]
        _trace(trace_ax, values, divergent, _display_name(name))
        _rank_histograms(rank_ax, values, bins)
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
    _suptitle(
        fig,
        "Chain mixing: traces should overlap, rank histograms should be flat (dashed line: flat)",
    )
    return fig


def _trace(ax: Axes, values: np.ndarray, divergent: np.ndarray | None, title: str) -> None:
    _apply_style(ax)
    steps = np.arange(values.shape[1])
    for c in range(values.shape[0]):
        ax.plot(
            steps,
            values[c],
            color=CHAIN_COLOURS[c % len(CHAIN_COLOURS)],
            linewidth=0.5,
            alpha=0.75,
            label=f"chain {c}",
        )
    if divergent is not None and divergent.any():
        where = np.nonzero(divergent.any(axis=0))[0]
        ax.plot(
            where,
            np.full(where.shape, np.nanmin(values)),
            "|",
            color=PALETTE["mulberry"],
            markersize=8,
            label="divergent",
        )
    ax.set_title(f"{title}: trace", loc="left", fontsize=9, color=PALETTE["ink"])
    ax.set_xlabel("draw")


def _rank_histograms(ax: Axes, values: np.ndarray, bins: int) -> None:
    """Each chain's histogram of its draws' ranks among all chains, and the flat line."""
    _apply_style(ax)
    chains, n_draws = values.shape
    ranks = _draw_ranks(values)
    bars = int(min(bins, max(4, chains * n_draws // 50)))
    edges = np.linspace(0, chains * n_draws, bars + 1)
    for c in range(chains):
        counts, _ = np.histogram(ranks[c], bins=edges)
        ax.stairs(
            counts, edges, color=CHAIN_COLOURS[c % len(CHAIN_COLOURS)], linewidth=1.2, baseline=None
        )
    ax.axhline(n_draws / bars, color=PALETTE["pewter"], linestyle=(0, (3, 2)), linewidth=0.9)
    ax.set_ylim(0, None)
    ax.set_title("rank histogram per chain", loc="left", fontsize=9, color=PALETTE["ink"])
    ax.set_xlabel("rank of draw among all chains")
    ax.set_yticks([])


def _draw_ranks(values: np.ndarray) -> np.ndarray:
    """Rank of each draw among all chains' draws (0-based), in the array's shape."""
    flat = values.ravel()
    order = np.argsort(flat, kind="stable")
    ranks = np.empty(flat.size)
    ranks[order] = np.arange(flat.size)
    return ranks.reshape(values.shape)


__all__ = ["parameter_names", "plot_mixing", "plot_population"]
