"""Audit figures: simulation-based calibration, drawn from the calibration tables.

The rank histogram bins ranks already computed (the calibration table: replicate, quantity, rank,
draws); the coverage panel shows the realised shares per replicate already computed
(the calibration replicates table: coverage_0.5, coverage_0.8, coverage_0.95). Nothing is estimated.
"""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from ._style import PALETTE, _apply_style, _require, text_label


def plot_calibration(ranks: pd.DataFrame, replicates: pd.DataFrame, *, bins: int = 10,
                     columns: int = 4) -> Figure:
    """Rank histograms per quantity (flat under a calibrated engine) and interval coverage."""
    _require(ranks, ["quantity", "rank", "draws"], "calibration table")
    quantities = list(dict.fromkeys(ranks["quantity"].astype(str)))
    panels = len(quantities) + 1
    rows = int(np.ceil(panels / columns))
    fig, axes = plt.subplots(rows, columns, figsize=(3.0 * columns, 2.3 * rows), squeeze=False)
    draws = int(ranks["draws"].iloc[0])
    edges = np.linspace(0, draws + 1, bins + 1)
    colour = list(PALETTE.values())[0] if isinstance(PALETTE, dict) else PALETTE[0]
    for ax, q in zip(axes.flat, quantities, strict=False):
        r = ranks.loc[ranks["quantity"].astype(str) == q, "rank"].to_numpy()
        ax.hist(r, bins=edges, color=colour, edgecolor="white")
        expected = len(r) / bins
        ax.axhline(expected, color="black", lw=1, ls="--")
        ax.set_title(text_label(q), fontsize=9)
        ax.set_xlim(0, draws + 1)
        _apply_style(ax)
    ax = axes.flat[len(quantities)]
    levels = [c for c in replicates.columns if c.startswith("coverage_")]
    nominal = [float(c.split("_", 1)[1]) for c in levels]
    ax.boxplot([replicates[c].to_numpy() for c in levels], positions=range(len(levels)),
               widths=0.5)
    ax.scatter(range(len(levels)), [replicates[c].mean() for c in levels], color=colour,
               zorder=3, label="realised (mean)")
    ax.scatter(range(len(levels)), nominal, marker="_", s=400, color="black", zorder=4,
               label="nominal")
    ax.set_xticks(range(len(levels)), [f"{v:.0%}" for v in nominal])
    ax.set_ylim(0, 1.02)
    ax.set_title("interval coverage per data set", fontsize=9)
    ax.legend(fontsize=7, loc="lower right")
    _apply_style(ax)
    for extra in list(axes.flat)[panels:]:
        extra.set_visible(False)
    fig.suptitle("Simulation-based calibration: ranks of the truths (dashed: uniform)",
                 fontsize=10)
    fig.tight_layout()
    return fig


__all__ = ["plot_calibration"]
