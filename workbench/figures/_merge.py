"""Marks bounded by pixels: at many groups, marks that land on the same pixels are merged.

Drawing only, no statistics. Above :data:`MERGE_ABOVE` marks in one artist, the artist is
given the full data but, each time it is drawn, draws only what the canvas can show at the
pixel grid it is drawn on (the layout and the dpi are final only then):

- a scatter (:func:`merge_marks`): one marker per occupied one-pixel cell and marker
  diameter (to half a pixel), at the last-drawn point of that cell (the one on top), as
  large as the largest there, its opacity that of the cell's markers stacked
  (``1 - (1 - alpha) ** count``, the rasteriser's own compositing of one colour); points
  passed as ``keep`` (named, highlighted) are always drawn as themselves;
- the squeezed band of a row figure (:func:`merged_band`): per pixel row, one interval line
  from the least lower end to the greatest upper end of the rows on it (same colour, width
  and opacity), and the line through the centres reduced to the first, last, leftmost and
  rightmost centre of each pixel row, in order (the pixels a polyline covers in a pixel row
  are those of these four vertices and their joins). Used only where one interval line is
  fainter than the canvas's 8-bit opacity step (see ``_style._draw_band``): matplotlib's
  Agg canvas draws such lines not at all, stacked or not.

At or below the threshold nothing here is used: the figures draw exactly as before.
"""

from __future__ import annotations

import numpy as np
from matplotlib.artist import allow_rasterization
from matplotlib.collections import LineCollection, PathCollection
from matplotlib.lines import Line2D

#: artists of more marks than this are drawn merged to the pixels (20,000 rows or points)
MERGE_ABOVE = 20_000

#: merged markers' diameters are kept to this many pixels
_DIAMETER_STEP = 0.5

#: a cell of many marks is drawn as at most this many layers (see ``_MergedMarks.draw``)
_LAYERS = 3


def merge_marks(coll: PathCollection, keep: np.ndarray | None = None) -> PathCollection:
    """Draw the scatter ``coll`` merged to the pixels when it holds more than
    :data:`MERGE_ABOVE` points; points where ``keep`` is true are drawn one by one."""
    offsets = np.ma.filled(np.ma.asarray(coll.get_offsets(), dtype=float), np.nan)
    if len(offsets) <= MERGE_ABOVE:
        return coll
    sizes = np.broadcast_to(np.asarray(coll.get_sizes(), dtype=float), len(offsets)).copy()
    face = coll.get_facecolor()
    edge = coll.get_edgecolor()
    if len(face) > 1 or len(edge) > 1:  # one colour per collection is all the figures use
        return coll
    coll.__class__ = _MergedMarks
    coll._full = (offsets, sizes, np.zeros(len(offsets), bool) if keep is None
                  else np.asarray(keep, dtype=bool).copy())
    coll._base = (face.copy(), edge.copy(), coll.get_alpha())
    return coll


class _MergedMarks(PathCollection):
    """A scatter that draws one marker per occupied pixel cell (see the module notes)."""

    _full: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
    _base: tuple[np.ndarray, np.ndarray, float | None]

    def _merged(self):
        """Indices of the marks to draw (in drawing order), their sizes and stack counts, for
        the pixel grid the collection is drawn on now (kept while that grid stays)."""
        offsets, sizes, keep = self._full
        fig = self.get_figure(root=True)
        axes = self.axes
        grid = (fig.dpi, tuple(fig.bbox.bounds), None if axes is None else
                (tuple(axes.bbox.bounds), tuple(axes.viewLim.bounds), axes.get_xscale(),
                 axes.get_yscale()))
        cached = getattr(self, "_drawn", None)
        if cached is not None and cached[0] == grid:
            return cached[1]
        disp = self.get_offset_transform().transform(offsets)
        ok = np.isfinite(disp).all(axis=1)
        pool = np.flatnonzero(ok & ~keep)
        cells = np.floor(disp[pool]).astype(np.int64)
        width = np.floor(np.sqrt(sizes[pool]) * fig.dpi / 72.0 / _DIAMETER_STEP).astype(np.int64)
        if len(pool):
            cells -= cells.min(axis=0)
            width -= width.min()
            span = cells.max(axis=0) + 1
            key = (cells[:, 0] * span[1] + cells[:, 1]) * (width.max() + 1) + width
        else:
            key = np.empty(0, np.int64)
        order = np.argsort(key)
        ranked = key[order]
        starts = np.flatnonzero(np.r_[True, ranked[1:] != ranked[:-1]]) if len(ranked) else \
            np.empty(0, np.int64)
        ends = np.r_[starts[1:], len(ranked)].astype(np.int64)[: len(starts)]
        if len(starts):  # each cell at its last-drawn point (the one on top), its largest size
            top = np.maximum.reduceat(pool[order], starts)
            biggest = np.maximum.reduceat(sizes[pool][order], starts)
        else:
            top, biggest = np.empty(0, np.int64), np.empty(0)
        alone = np.flatnonzero(ok & keep)
        index = np.r_[top, alone]
        size = np.r_[biggest, sizes[alone]]
        count = np.r_[ends - starts, np.ones(len(alone), np.int64)]
        by_order = np.argsort(index, kind="stable")
        merged = index[by_order], size[by_order], count[by_order]
        self._drawn = (grid, merged)
        return merged

    @allow_rasterization
    def draw(self, renderer):
        if not self.get_visible():
            return
        if getattr(self, "_full", None) is None:  # a legend's copy of the marker: as given
            super().draw(renderer)
            return
        offsets, _, _ = self._full
        face, edge, alpha = self._base
        index, size, count = self._merged()
        # A cell's marks are drawn as layers of the collection's own colour, one pass per
        # layer: up to _LAYERS - 1 plain layers, then one carrying the rest of the stack
        # (``1 - (1 - alpha) ** rest``, up to where the stack is opaque to 8 bits); each pass
        # one colour and, where the scatter has one size, one size, so matplotlib blits the
        # markers onto whole pixels as in the full drawing. One colour over itself stacks the
        # same in any order; opaque marks are one pass, in the order given.
        count = np.minimum(count, _opaque_after(face, edge))
        plain = min(_LAYERS - 1, int(count.max(initial=0)))
        passes = [(count >= j, 1) for j in range(1, plain + 1)]
        rest = count - (_LAYERS - 1)
        passes += [(rest == r, r) for r in np.unique(rest[rest > 0])]
        self._alpha = None  # the stacked opacities are per pass
        try:
            for part, layers in passes:
                if not part.any():
                    continue
                self.set_offsets(offsets[index[part]])
                sizes = size[part]
                self.set_sizes(sizes[:1] if (sizes == sizes[0]).all() else sizes)
                self.set_facecolor(_stacked(face, layers))
                self.set_edgecolor(_stacked(edge, layers))
                super().draw(renderer)
        finally:
            # left as drawn (what label placement reads), in the collection's own colours
            self.set_offsets(offsets[index])
            self.set_sizes(size)
            self.set_facecolor(face)
            self.set_edgecolor(edge)
            self._alpha = alpha


def _opaque_after(*colours: np.ndarray) -> int:
    """How many layers of these colours stack to full opacity at 8 bits (at least 1)."""
    alpha = max((float(c[0, 3]) for c in colours if len(c)), default=1.0)
    if alpha >= 1.0:
        return 1
    if alpha <= 0.0:
        return 1
    return max(1, int(np.ceil(np.log(0.5 / 255) / np.log(1.0 - alpha))))


def _stacked(colour: np.ndarray, layers: int) -> np.ndarray:
    """One RGBA colour ``layers`` times over itself: the opacity of that many layers."""
    out = np.array(colour[:1], dtype=float)
    if len(out):
        out[0, 3] = 1.0 - (1.0 - out[0, 3]) ** int(layers)
    return out


# -- the squeezed band ------------------------------------------------------------------------


def merged_band(ax, lower, upper, centre, rows, *, colour, alpha, centre_colour) -> None:
    """The squeezed band's interval lines and centre line, merged per pixel row."""
    envelopes = _RowEnvelopes([], colors=colour, linewidths=0.3, alpha=alpha, rasterized=True)
    envelopes._full = (np.asarray(lower, float), np.asarray(upper, float),
                       np.asarray(rows, float))
    ax.add_collection(envelopes, autolim=False)
    ends = np.r_[lower, upper]
    if np.isfinite(ends).any():
        ax.update_datalim([(np.nanmin(ends), np.min(rows)), (np.nanmax(ends), np.max(rows))])
    (line,) = ax.plot(centre, rows, color=centre_colour, linewidth=0.8, rasterized=True)
    line.__class__ = _RowCentres
    line._full = (np.asarray(centre, float), np.asarray(rows, float))


def _pixel_rows(ax, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The order that puts rows of the same pixel row together, where each pixel row's run
    starts in that order, and each pixel row's number."""
    pixel = np.floor(ax.get_yaxis_transform().transform(
        np.column_stack([np.zeros_like(y), y]))[:, 1])
    step = np.diff(pixel)
    if (step <= 0).all() or (step >= 0).all():  # in order (the band's rows always are)
        order = np.arange(len(y))
    else:
        order = np.argsort(pixel, kind="stable")
    ranked = pixel[order]
    starts = np.flatnonzero(np.r_[True, ranked[1:] != ranked[:-1]]) if len(y) else \
        np.empty(0, np.int64)
    return order, starts, ranked[starts]


class _RowEnvelopes(LineCollection):
    """One interval line per pixel row, from its least lower to its greatest upper end."""

    _full: tuple[np.ndarray, np.ndarray, np.ndarray]

    @allow_rasterization
    def draw(self, renderer):
        if not self.get_visible():
            return
        lower, upper, y = self._full
        order, starts, pixel = _pixel_rows(self.axes, y)
        if len(starts):
            low = np.fmin.reduceat(lower[order], starts)
            high = np.fmax.reduceat(upper[order], starts)
            # each line on its pixel row's centre, where the rasteriser snaps a row's line
            at = self.axes.get_yaxis_transform().inverted().transform(
                np.column_stack([np.zeros_like(pixel), pixel + 0.5]))[:, 1]
            drawn = np.isfinite(low) & np.isfinite(high)
            segments = np.stack([np.c_[low, at], np.c_[high, at]], axis=1)[drawn]
        else:
            segments = np.empty((0, 2, 2))
        self.set_segments(segments)
        super().draw(renderer)


class _RowCentres(Line2D):
    """The line through the centres, drawn through the first, last, leftmost and rightmost
    centre of each pixel row, in order."""

    _full: tuple[np.ndarray, np.ndarray]

    @allow_rasterization
    def draw(self, renderer):
        x, y = self._full
        finite = np.flatnonzero(np.isfinite(x) & np.isfinite(y))
        fx, fy = x[finite], y[finite]
        order, starts, _ = _pixel_rows(self.axes, fy)
        ends = np.r_[starts[1:], len(order)].astype(np.int64)[: len(starts)]
        if len(starts):
            row = np.repeat(np.arange(len(starts)), ends - starts)
            by_x = order[np.lexsort((fx[order], row))]
            picks = np.unique(np.r_[order[starts], order[ends - 1], by_x[starts],
                                    by_x[ends - 1]])
        else:
            picks = np.empty(0, np.int64)
        self.set_data(fx[picks], fy[picks])
        super().draw(renderer)


__all__ = ["MERGE_ABOVE", "merge_marks", "merged_band"]
