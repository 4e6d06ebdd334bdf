"""Posterior predictive checks and LOO-PIT, drawn from the checks tables."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from ._style import (
    COLOUR_WORDS,
    PALETTE,
    _apply_style,
    _count,
    _new_axes,
    _require,
    _suptitle,
    _title,
    not_computed,
    text_label,
)


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
        One per statistic (the checks document's "statistics"): ``statistic``, ``observed``,
        ``p_value`` and ``verdict`` if present.
    replicated : DataFrame
        The replicated-statistics table: statistic, draw, observed, replicated (a ``value``
        column is read as the replicated value).
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
        _statistic_panel(ax, part, value, check.get("observed"))
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
    _suptitle(
        fig,
        f"Posterior predictive checks: replicated data ({COLOUR_WORDS['harbour']}) against the"
        f" observed data ({COLOUR_WORDS['mulberry']} line)",
    )
    return fig


def _statistic_panel(ax: Axes, part: pd.DataFrame, value: str, observed) -> None:
    """One statistic: replicated against observed per draw, or a histogram and a line."""
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
        return
    bins = _bins(rep)
    ax.hist(rep, bins=bins, color=PALETTE["harbour"], alpha=0.55, edgecolor=PALETTE["harbour"],
            linewidth=0.4)
    if observed is not None:
        ax.axvline(float(observed), color=PALETTE["mulberry"], linewidth=2.0)
    if not isinstance(bins, int):  # a count: whole-number ticks, none below the smallest
        _count_axis(ax, rep, observed)
    ax.set_yticks([])
    ax.grid(False, axis="y")


def _count_axis(ax: Axes, values: np.ndarray, observed) -> None:
    """A count statistic's axis: every bar whole, ticks on whole numbers, never below 0."""
    finite = values[np.isfinite(values)]
    low = float(finite.min())
    high = float(finite.max())
    if observed is not None and np.isfinite(float(observed)):
        low, high = min(low, float(observed)), max(high, float(observed))
    ax.set_xlim(low - 0.6, high + 0.6)
    ticks = MaxNLocator(integer=True, min_n_ticks=1).tick_values(low, high)
    ax.set_xticks([t for t in ticks if low <= t <= high and (t >= 0 or low < 0)])


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
        The group checks table, with a ``loo_pit`` column.
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


__all__ = ["plot_loo_pit", "plot_predictive"]
