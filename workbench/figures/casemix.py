"""The observed/expected funnel of a risk-adjusted fit, drawn from the adjusted-rates table."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.axes import Axes

from ._merge import merge_marks
from ._style import PALETTE, _apply_style, _legend_below, _new_axes, _require, text_label


def plot_oe_funnel(table: pd.DataFrame, curve: pd.DataFrame | None = None, *,
                   ax: Axes | None = None, label: int = 4) -> Axes:
    """O/E against the expected count, with 95% and 99.8% control limits around 1.

    ``table`` is the adjusted-rates table (group, expected, observed_expected, oe_outside_95,
    oe_outside_998); ``curve`` the O/E funnel curve table (expected and the four limits).
    """
    _require(table, ["group", "expected", "observed_expected"], "plot_oe_funnel")
    ax = _new_axes(ax, (7.2, 4.9))
    _apply_style(ax)
    shown = table[(table["expected"] > 0) & table["observed_expected"].notna()]
    if curve is not None and len(curve):
        x = curve["expected"].to_numpy(dtype=float)
        ax.fill_between(x, curve["lower_95"], curve["upper_95"], color=PALETTE["mist"],
                        linewidth=0, zorder=0, label="95% limits (shaded)")
        for side in ("lower", "upper"):
            ax.plot(x, curve[f"{side}_95"], color=PALETTE["pewter"], linewidth=0.9, zorder=1)
            ax.plot(x, curve[f"{side}_998"], color=PALETTE["ink"], linestyle=(0, (4, 2)),
                    linewidth=1.0, zorder=1, label="99.8% limits" if side == "lower" else None)
    ax.axhline(1.0, color=PALETTE["ink"], linewidth=1.2, zorder=1, label="O/E = 1")

    def flag(column):
        if column not in shown:
            return np.zeros(len(shown), dtype=bool)
        return shown[column].fillna("").astype(str).isin(["high", "low"]).to_numpy()

    out95, out998 = flag("oe_outside_95"), flag("oe_outside_998")
    kinds = [(~out95 & ~out998, "o", PALETTE["harbour"], 18, "inside the 95% limits"),
             (out95 & ~out998, "D", PALETTE["ochre"], 22, "outside 95%"),
             (out998, "^", PALETTE["mulberry"], 32, "outside 99.8%")]
    named = shown[out998].sort_values("expected", ascending=False).head(label)
    is_named = shown.index.isin(named.index)
    for mask, marker, colour, size, text in kinds:
        part = shown[mask]
        marks = ax.scatter(part["expected"], part["observed_expected"], s=size, marker=marker,
                           color=colour, edgecolors="white", linewidths=0.5, zorder=3,
                           label=f"{text} ({len(part)})")
        # at many groups merged to the pixels within each kind; the named drawn one by one
        merge_marks(marks, keep=is_named[mask])
    for _, row in named.iterrows():
        ax.annotate(text_label(row["group"]), (row["expected"], row["observed_expected"]),
                    xytext=(4, 2), textcoords="offset points", fontsize=7.5,
                    color=PALETTE["ink"])
    ax.set_xscale("log")
    ax.set_xlabel("expected successes for the population-average group (log scale)")
    ax.set_ylabel("observed / expected")
    ax.set_title("Observed/expected after adjusting for case mix", loc="left")
    _legend_below(ax)
    return ax
