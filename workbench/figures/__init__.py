"""Tables -> matplotlib figures. Figures draw; they never compute a statistic.

Every function takes tables already computed (a run folder's tables and documents read back
as DataFrames and dicts, among them the population draws table for the histogram and mixing
views) and returns a matplotlib ``Axes`` or ``Figure``. Options after the tables are
keyword-only; ``ax=None`` makes a new figure. Nothing here calls ``show()``.

Sorting rows, placing labels, binning draws for a histogram and ranking draws for a rank plot
are drawing; means, quantiles and intervals come from the tables.

Readable at any size: with more groups than fit as labelled rows, the first and last rows are
drawn and labelled and the rows between them are squeezed, in order, into an unlabelled band.
Above 20,000 marks in one artist, marks that land on the same pixels are merged when drawn
(:mod:`workbench.figures._merge`): the picture is the same, the cost bounded by the pixels.

>>> import pandas as pd
>>> from workbench import figures
>>> table = pd.DataFrame({"group": ["a", "b"], "successes": [3, 9], "trials": [10, 20],
...                       "observed_rate": [0.3, 0.45], "posterior_mean": [0.33, 0.43],
...                       "lower": [0.12, 0.25], "upper": [0.58, 0.62]})
>>> ax = figures.plot_intervals(table)
"""

from __future__ import annotations

from ._style import (
    CHAIN_COLOURS,
    NOT_COMPUTED,
    PALETTE,
    figure_of,
    not_computed,
    row_positions,
    text_label,
)
from .checks import plot_loo_pit, plot_predictive
from .estimates import plot_intervals, plot_parents, plot_shrinkage
from .population import parameter_names, plot_mixing, plot_population
from .ranking import plot_funnel, plot_ranks

__all__ = [
    "CHAIN_COLOURS",
    "NOT_COMPUTED",
    "PALETTE",
    "figure_of",
    "not_computed",
    "parameter_names",
    "plot_funnel",
    "plot_intervals",
    "plot_loo_pit",
    "plot_mixing",
    "plot_parents",
    "plot_population",
    "plot_predictive",
    "plot_ranks",
    "plot_shrinkage",
    "row_positions",
    "text_label",
]
