"""Palette, layout and text helpers shared by every figure: no statistics here.

Figures are built on :class:`matplotlib.figure.Figure` directly, so they render on the Agg
canvas whatever the session's backend is, and no pyplot state is kept.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.collections import LineCollection, PathCollection
from matplotlib.figure import Figure
from matplotlib.transforms import Bbox, ScaledTranslation

from . import _merge

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

#: the word a title uses for a palette colour (tests hold titles to the colours drawn)
COLOUR_WORDS = {"harbour": "blue", "ochre": "orange", "mulberry": "red", "pewter": "grey",
                "mint": "pale green"}

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


def sort_rows(table: pd.DataFrame, keys: list[str], ascending: list[bool]) -> pd.DataFrame:
    """``table.sort_values(keys, ascending=ascending)``: the same rows in the same order. At
    many rows whose keys are numbers (none NaN or missing) or strings (none missing), sorted
    by pyarrow (stable; strings by code point, as Python compares them): several times
    faster on a million rows of string names."""
    columns = _arrow_keys(table, keys) if len(table) > _merge.MERGE_ABOVE else None
    if columns is None:
        return table.sort_values(keys, ascending=ascending)
    import pyarrow.compute as pc

    order = pc.sort_indices(columns, sort_keys=[
        (key, "ascending" if up else "descending") for key, up in zip(keys, ascending,
                                                                      strict=True)])
    return table.iloc[order.to_numpy()]


def _arrow_keys(table: pd.DataFrame, keys: list[str]):
    """The sort keys as a pyarrow table, or None where pandas must sort (see sort_rows)."""
    try:
        import pyarrow as pa
    except ImportError:
        return None
    columns = {}
    for key in keys:
        values = table[key]
        if values.isna().any():
            return None
        if pd.api.types.is_numeric_dtype(values):
            data = values.to_numpy()
            if data.dtype.kind == "f" and not np.isfinite(data).all():
                return None
            columns[key] = pa.array(data)
        elif pd.api.types.is_string_dtype(values):  # (an object column only if all str)
            columns[key] = pa.array(values, type=pa.large_string())
        else:
            return None
    return pa.table(columns)


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


def row_axes(ax: Axes | None, n: int, show: int, every: int):
    """The axes of a figure of ``n`` ordered rows, sized and styled, with the rows' places,
    the band (or None) and which rows get a label (see :func:`row_positions`)."""
    pos, band = row_positions(n, show, every=every)
    ax = _new_axes(ax, (7.2, _height(_shown_rows(n, show, band))))
    _apply_style(ax)
    return ax, pos, band, _labelled(n, band, show)


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


#: label offsets tried, in points from the edge of a point's marker, nearest first
_LABEL_GAPS = (3.0, 9.0, 17.0, 28.0, 42.0)
#: directions tried (dx, dy), right and left of the point first
_LABEL_DIRECTIONS = ((1, 0), (-1, 0), (1, -1), (1, 1), (-1, 1), (-1, -1), (0, -1), (0, 1))


def _renderer(fig: Figure):
    """The figure laid out as it will be drawn, and a renderer to measure text with."""
    fig.draw_without_rendering()
    return fig._get_renderer()


def _markers(ax: Axes) -> tuple[np.ndarray, np.ndarray]:
    """Display centres and radii (pixels) of every scatter marker on the axes."""
    centres, radii = [np.empty((0, 2))], [np.empty(0)]
    scale = ax.get_figure().dpi / 72.0
    for coll in ax.collections:
        if not isinstance(coll, PathCollection) or not len(coll.get_offsets()):
            continue
        offsets = np.asarray(coll.get_offsets(), dtype=float)
        sizes = np.broadcast_to(np.asarray(coll.get_sizes(), dtype=float), len(offsets))
        centres.append(ax.transData.transform(offsets))
        radii.append(np.sqrt(sizes) / 2 * scale)
    return np.concatenate(centres), np.concatenate(radii)


def _covers(box: Bbox, centres: np.ndarray, radii: np.ndarray) -> np.ndarray:
    """Which markers (discs) the box touches."""
    nearest_x = np.clip(centres[:, 0], box.x0, box.x1)
    nearest_y = np.clip(centres[:, 1], box.y0, box.y1)
    return np.hypot(centres[:, 0] - nearest_x, centres[:, 1] - nearest_y) < radii


def _spread_labels(
    ax: Axes,
    xs: Sequence[float],
    ys: Sequence[float],
    names: Sequence,
    *,
    flip: bool = True,
) -> None:
    """Name points where the names cover no marker, no other name, no legend or note and stay
    inside the axes: each name tries places around its point, nearest first (right, left,
    then the diagonals), and takes the first free one (else the one covering least), with a
    thin leader line when it sits away from its point. Call after the limits, the legend and
    the notes are set. ``flip`` is kept for callers; every side is tried."""
    if not len(xs):
        return
    fig = ax.get_figure()
    renderer = _renderer(fig)
    frame = ax.get_window_extent(renderer)
    scale = fig.dpi / 72.0
    centres, radii = _markers(ax)
    taken = [t.get_window_extent(renderer) for t in ax.texts if t.get_text()]
    legend = ax.get_legend()
    if legend is not None:
        taken.append(legend.get_window_extent(renderer))
    where = ax.transData.transform(np.column_stack([np.asarray(xs, float), np.asarray(ys, float)]))
    for i, (px, py) in enumerate(where):
        probe = ax.text(0, 0, text_label(names[i]), fontsize=7.5)
        width, height = (lambda b: (b.width, b.height))(probe.get_window_extent(renderer))
        probe.remove()
        own = np.hypot(centres[:, 0] - px, centres[:, 1] - py) < 0.5
        mine = float(radii[own].max()) if own.any() else 2.0
        best, fewest = None, None
        for gap in _LABEL_GAPS:
            for dx, dy in _LABEL_DIRECTIONS:
                reach = mine + gap * scale
                cx, cy = px + dx * reach, py + dy * reach
                x0 = cx if dx > 0 else cx - width if dx < 0 else cx - width / 2
                y0 = cy if dy > 0 else cy - height if dy < 0 else cy - height / 2
                box = Bbox.from_bounds(x0, y0, width, height)
                inside = frame.containsx(box.x0) and frame.containsx(box.x1) and \
                    frame.containsy(box.y0) and frame.containsy(box.y1)
                clash = int(_covers(box, centres, radii).sum()) + sum(
                    box.overlaps(t) for t in taken) + (0 if inside else 100)
                if fewest is None or clash < fewest:
                    best, fewest = (box, dx, dy, gap), clash
                if clash == 0:
                    break
            if fewest == 0:
                break
        box, dx, dy, gap = best
        taken.append(box)
        ha = "left" if dx > 0 else "right" if dx < 0 else "center"
        va = "bottom" if dy > 0 else "top" if dy < 0 else "center"
        anchor = ((box.x0 if dx > 0 else box.x1 if dx < 0 else (box.x0 + box.x1) / 2),
                  (box.y0 if dy > 0 else box.y1 if dy < 0 else (box.y0 + box.y1) / 2))
        arrow = {"arrowstyle": "-", "color": "#9aa6b0", "linewidth": 0.5}
        label = ax.annotate(
            text_label(names[i]),
            (xs[i], ys[i]),
            xytext=((anchor[0] - px) / scale, (anchor[1] - py) / scale),
            textcoords="offset points",
            fontsize=7.5,
            color=PALETTE["ink"],
            ha=ha,
            va=va,
            zorder=4,
            arrowprops=arrow if gap > _LABEL_GAPS[0] else None,
            # a pale backing so reference lines never run through a name
            bbox={"boxstyle": "square,pad=0.1", "fc": "white", "ec": "none", "alpha": 0.85},
        )
        label.set_in_layout(False)  # names never move the layout they were placed in


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


def _population_row(
    population: pd.DataFrame | None, quantity: str, *, parameter: str | None = None
) -> dict | None:
    """The population table's row of a quantity (by its ``parameter`` name where given)."""
    if population is None or "quantity" not in population.columns:
        return None
    rows = population[population["quantity"] == quantity]
    if parameter is not None and "parameter" in population.columns:
        by_name = population[population["parameter"] == parameter]
        rows = by_name if len(by_name) else rows
    if rows.empty:
        return None
    return rows.iloc[0].to_dict()


def _rate_axis(ax: Axes, which: str, low: float, high: float, pad: float) -> None:
    """A rate axis from ``low - pad`` to ``high + pad``, reaching past 0 and 1 by at most the
    pad so markers on 0 or 1 lie inside the frame, with ticks only inside [0, 1]."""
    low, high = max(-pad, low - pad), min(1.0 + pad, high + pad)
    axis, setter = (ax.xaxis, ax.set_xlim) if which == "x" else (ax.yaxis, ax.set_ylim)
    setter(low, high)
    axis.set_ticks([t for t in axis.get_major_locator().tick_values(low, high) if 0 <= t <= 1])


def figure_of(artist: Axes | Figure) -> Figure:
    """The Figure an Axes belongs to (or the Figure itself)."""
    return artist if isinstance(artist, Figure) else artist.get_figure()


def _draw_band(
    ax: Axes,
    lower: np.ndarray,
    upper: np.ndarray,
    centre: np.ndarray,
    pos: np.ndarray,
    mid: np.ndarray,
    *,
    colour: str,
    alpha: float,
) -> None:
    """The squeezed rows between the labelled ones: thin interval lines and their centres.

    Above :data:`MERGE_ABOVE` rows, merged to the pixel rows they land on, when one interval
    line's opacity is below the canvas's 8-bit step (the full drawing then shows none of
    them, however many overlap: only the centre line is seen, and merged it covers the same
    pixels). A visible opacity keeps the full drawing: stacked lines darken where they
    overlap, which one envelope per pixel row would not show."""
    if len(mid) > _merge.MERGE_ABOVE and alpha * 255 < 0.5:
        _merge.merged_band(ax, lower[mid], upper[mid], centre[mid], pos[mid], colour=colour,
                           alpha=alpha, centre_colour=PALETTE["ink"])
        return
    segments = np.stack([np.c_[lower[mid], pos[mid]], np.c_[upper[mid], pos[mid]]], axis=1)
    ax.add_collection(
        LineCollection(segments, colors=colour, linewidths=0.3, alpha=alpha, rasterized=True)
    )
    ax.plot(centre[mid], pos[mid], color=PALETTE["ink"], linewidth=0.8, rasterized=True)


def _corner_note(ax: Axes, text: str, *, top: bool) -> None:
    """A small note in the lower (or upper) right corner of the axes."""
    ax.text(
        0.99,
        0.99 if top else 0.01,
        text,
        transform=ax.transAxes,
        ha="right",
        va="top" if top else "bottom",
        fontsize=7.5,
        color="#4a5762",
    )


def _suptitle(fig: Figure, text: str) -> None:
    fig.suptitle(text, x=0.01, ha="left", fontsize=10, fontweight="bold", color=PALETTE["ink"])
