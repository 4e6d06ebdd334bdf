"""Figures at many groups: marks merged to the pixels look like every mark drawn.

The reference for every image check is matplotlib's own drawing of every mark (the merge
threshold raised past the table's size), rendered on the same Agg canvas at the report's
dpi. Data are invented counts (few distinct trial sizes, so many groups share a point, as
real counts do). Timings are printed by a benchmark, never asserted here.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from matplotlib.collections import LineCollection, PathCollection
from matplotlib.lines import Line2D
from PIL import Image

from workbench import figures
from workbench.figures import _merge
from workbench.figures._style import sort_rows
from workbench.figures.casemix import plot_oe_funnel
from workbench.report.images import FIGURE_DPI

#: groups drawn both ways in the image checks: above the threshold, small enough that
#: matplotlib draws every mark in a few seconds
MODERATE = 50_000


def invented_run(n: int, seed: int = 5) -> dict:
    """Tables shaped like a run folder's (columns the figures read), invented numbers."""
    rng = np.random.default_rng(seed)
    trials = np.round(np.exp(rng.uniform(0, np.log(3000), n))).astype(int)
    trials[:3] = 0
    rate = rng.beta(8, 30, n)
    successes = rng.binomial(trials, rate)
    with np.errstate(invalid="ignore", divide="ignore"):
        observed = np.where(trials > 0, successes / np.maximum(trials, 1), np.nan)
    pooled = 0.21
    mean = np.where(np.isnan(observed), pooled, pooled + (np.nan_to_num(observed) - pooled)
                    * trials / (trials + 40))
    half = 1.4 / np.sqrt(trials + 40)
    names = [f"unit-{i:06d}" for i in range(n)]
    estimates = pd.DataFrame({
        "group": names, "successes": successes, "trials": trials, "observed_rate": observed,
        "posterior_mean": mean, "lower": np.clip(mean - half, 0, 1),
        "upper": np.clip(mean + half, 0, 1),
    })
    population = pd.DataFrame({"quantity": ["population_mean"], "parameter": ["mu"],
                               "mean": [pooled], "lower": [0.2], "upper": [0.22]})
    position = np.empty(n)
    position[np.argsort(-mean, kind="stable")] = np.arange(1, n + 1)
    spread = np.maximum(1, n * half / 3)
    ranks = pd.DataFrame({
        "group": names, "rank_median": position,
        "rank_lower": np.clip(np.floor(position - spread), 1, n),
        "rank_upper": np.clip(np.ceil(position + spread), 1, n),
    })
    safe = np.maximum(trials, 1)
    sd = np.sqrt(pooled * (1 - pooled) / safe)
    limit = {f"{side}_{lvl}": np.clip(pooled + sign * z * sd, 0, 1)
             for lvl, z in (("95", 1.96), ("998", 3.09)) for side, sign in (("lower", -1),
                                                                           ("upper", 1))}
    outside = {f"outside_{lvl}": np.where(observed > limit[f"upper_{lvl}"], "high",
                                          np.where(observed < limit[f"lower_{lvl}"], "low", ""))
               for lvl in ("95", "998")}
    funnel = pd.DataFrame({"group": names, "successes": successes, "trials": trials,
                           "observed_rate": observed, "benchmark": pooled, **limit, **outside})
    grid = np.unique(np.geomspace(1, trials.max(), 80).round())
    gsd = np.sqrt(pooled * (1 - pooled) / grid)
    curve = pd.DataFrame({"trials": grid, "benchmark": pooled,
                          **{f"{side}_{lvl}": np.clip(pooled + sign * z * gsd, 0, 1)
                             for lvl, z in (("95", 1.96), ("998", 3.09))
                             for side, sign in (("lower", -1), ("upper", 1))}})
    expected = trials * pooled
    with np.errstate(invalid="ignore", divide="ignore"):
        oe = np.where(expected > 0, successes / np.maximum(expected, 1e-12), np.nan)
    oe_sd = np.sqrt((1 - pooled) / np.maximum(expected, 1e-12))
    adjusted = pd.DataFrame({
        "group": names, "expected": expected, "observed_expected": oe,
        **{f"oe_outside_{lvl}": np.where(oe > 1 + z * oe_sd, "high",
                                         np.where(oe < 1 - z * oe_sd, "low", ""))
           for lvl, z in (("95", 1.96), ("998", 3.09))},
    })
    egrid = np.geomspace(expected[expected > 0].min(), expected.max(), 80)
    esd = np.sqrt((1 - pooled) / egrid)
    oe_curve = pd.DataFrame({"expected": egrid,
                             **{f"{side}_{lvl}": 1 + sign * z * esd
                                for lvl, z in (("95", 1.96), ("998", 3.09))
                                for side, sign in (("lower", -1), ("upper", 1))}})
    return {"estimates": estimates, "population": population, "ranks": ranks,
            "funnel": funnel, "curve": curve, "adjusted": adjusted, "oe_curve": oe_curve}


def _makers(t: dict) -> dict:
    return {
        "intervals": lambda: figures.plot_intervals(t["estimates"], target=0.25, level=0.95),
        "ranks": lambda: figures.plot_ranks(t["ranks"], k=10),
        "shrinkage": lambda: figures.plot_shrinkage(t["estimates"], t["population"]),
        "funnel": lambda: figures.plot_funnel(t["funnel"], t["curve"]),
        "oe_funnel": lambda: plot_oe_funnel(t["adjusted"], t["oe_curve"]),
    }


def _pixels(artist) -> np.ndarray:
    buf = io.BytesIO()
    figures.figure_of(artist).savefig(buf, format="png", dpi=FIGURE_DPI, facecolor="white")
    buf.seek(0)
    return np.asarray(Image.open(buf).convert("RGB"), dtype=int)


@pytest.fixture(scope="module")
def moderate():
    return invented_run(MODERATE)


@pytest.mark.slow  # draws 50,000 marks one by one (the reference): several seconds a figure
@pytest.mark.parametrize("name", ["intervals", "ranks", "shrinkage", "funnel", "oe_funnel"])
def test_merged_drawing_covers_the_same_pixels_as_every_mark_drawn(moderate, name, monkeypatch):
    make = _makers(moderate)[name]
    monkeypatch.setattr(_merge, "MERGE_ABOVE", 10**12)  # the reference: matplotlib, every mark
    full = _pixels(make())
    monkeypatch.setattr(_merge, "MERGE_ABOVE", 20_000)
    artist = make()
    assert any(isinstance(a, (_merge._MergedMarks, _merge._RowEnvelopes))
               for a in figures.figure_of(artist).axes[0].get_children())
    merged = _pixels(artist)
    assert merged.shape == full.shape
    off = np.abs(full - merged).max(axis=2)
    # Tolerance: antialiased fringes of many exactly stacked markers darken a little further
    # in the full drawing than in the merged layers (at most 3 layers per pixel cell), and a
    # merged marker sits on its cell's top point; measured at 50,000 groups: at most 0.6% of
    # pixels differ by more than 32 of 255 in a channel (funnel; the row figures under
    # 0.01%), mean difference under 0.5 levels. Held to 0.75% of pixels and 0.75 levels.
    assert np.mean(off > 32) < 0.0075, f"{np.mean(off > 32):.4%} of pixels differ by > 32"
    assert off.mean() < 0.75


@pytest.mark.slow  # draws 50,000 groups merged: about a second a figure
def test_named_and_flagged_points_are_all_drawn(moderate):
    t = moderate
    table = t["funnel"][(t["funnel"]["trials"] > 0)]
    ax = figures.plot_funnel(t["funnel"], t["curve"])
    ax.get_figure().draw_without_rendering()  # merged on the grid transData now maps to
    names = {a.get_text() for a in ax.texts}
    named = table[table["group"].isin(names)]
    assert len(named), "the funnel names its most extreme groups"
    drawn = [c for c in ax.collections if isinstance(c, PathCollection)]
    merged = [c for c in drawn if isinstance(c, _merge._MergedMarks)]
    assert merged, "50,000 groups are drawn merged"
    every = np.concatenate([np.asarray(c.get_offsets(), float) for c in drawn])
    for point in named[["trials", "observed_rate"]].to_numpy(dtype=float):
        # a named group's own marker, at its own place (not a neighbour standing in for it)
        assert np.any(np.all(every == point, axis=1)), point
    # every group, flagged or not, lies on a pixel cell where its own kind has a marker
    for coll, kind in zip(drawn[:3], ("", "95", "998"), strict=True):
        out95 = table["outside_95"].ne("").to_numpy()
        out998 = table["outside_998"].ne("").to_numpy()
        mask = {"": ~out95 & ~out998, "95": out95 & ~out998, "998": out998}[kind]
        points = table.loc[mask, ["trials", "observed_rate"]].to_numpy(dtype=float)
        cells = np.floor(ax.transData.transform(points)).astype(int)
        marks = np.floor(ax.transData.transform(np.asarray(coll.get_offsets(), float)))
        have = {tuple(c) for c in marks.astype(int)}
        assert all(tuple(c) in have for c in cells), kind


@pytest.mark.slow  # draws 50,000 groups merged: about a second
def test_shrinkage_draws_its_named_groups_as_themselves(moderate):
    t = moderate
    ax = figures.plot_shrinkage(t["estimates"], t["population"])
    _pixels(ax)
    (marks,) = [c for c in ax.collections if isinstance(c, _merge._MergedMarks)]
    offsets = np.asarray(marks.get_offsets(), float)
    est = t["estimates"].set_index("group")
    labelled = [a.get_text() for a in ax.texts if a.get_text() in est.index]
    assert len(labelled) == 8  # 4 highest and 4 lowest estimates
    for name in labelled:
        point = est.loc[name, ["observed_rate", "posterior_mean"]].to_numpy(dtype=float)
        assert np.any(np.all(offsets == point, axis=1)), name
    assert len(offsets) < len(est) / 2  # bounded by the pixels, not one per group


def test_a_band_of_visible_interval_lines_is_drawn_whole(monkeypatch):
    """A band whose lines the canvas shows (opacity 30 / 2,970, above 1/510) keeps every
    line, whatever the threshold: stacked lines darken where they overlap."""
    monkeypatch.setattr(_merge, "MERGE_ABOVE", 500)
    t = invented_run(3_000)
    ax = figures.plot_intervals(t["estimates"], level=0.95)
    assert sorted(len(c.get_segments()) for c in ax.collections
                  if type(c) is LineCollection) == [30, 2_970]


def test_below_the_threshold_every_mark_is_drawn_as_before():
    t = invented_run(3_000)
    drawn = t["estimates"]["observed_rate"].notna().sum()
    ax = figures.plot_shrinkage(t["estimates"], t["population"])
    sizes = [len(c.get_offsets()) for c in ax.collections]
    assert all(type(c) is PathCollection for c in ax.collections)
    assert drawn in sizes
    ax = figures.plot_intervals(t["estimates"], level=0.95)
    bands = [c for c in ax.collections if type(c) is LineCollection]
    # the band's one segment per squeezed row (beside the 30 labelled rows' bars)
    assert sorted(len(c.get_segments()) for c in bands) == [30, len(t["estimates"]) - 30]
    lines = [ln for ln in ax.lines if len(ln.get_xdata()) == len(t["estimates"]) - 30]
    assert len(lines) == 1 and type(lines[0]) is Line2D
    assert not any(isinstance(a, (_merge._MergedMarks, _merge._RowEnvelopes, _merge._RowCentres))
                   for a in ax.get_children())


def test_merged_band_keeps_each_pixel_rows_extremes(monkeypatch):
    """The centre line drawn merged passes through every pixel row's leftmost and rightmost
    centre (the pixels the full polyline covers there), and the envelope spans every row's
    intervals: checked against the table with numpy, row by row."""
    monkeypatch.setattr(_merge, "MERGE_ABOVE", 500)
    t = invented_run(16_000, seed=9)  # one interval line's opacity 30 / 15,970: below 1/510
    ax = figures.plot_intervals(t["estimates"], level=0.95)
    ax.get_figure().draw_without_rendering()
    (centres,) = [ln for ln in ax.lines if isinstance(ln, _merge._RowCentres)]
    (envelopes,) = [c for c in ax.collections if isinstance(c, _merge._RowEnvelopes)]
    x, y = centres._full
    lower, upper, _ = envelopes._full
    rows = np.floor(ax.get_yaxis_transform().transform(np.c_[np.zeros_like(y), y])[:, 1])
    kept = set(zip(centres.get_xdata(), centres.get_ydata(), strict=True))
    segs = envelopes.get_segments()
    seg_rows = np.floor(ax.get_yaxis_transform().transform(
        np.c_[np.zeros(len(segs)), [s[0, 1] for s in segs]])[:, 1])
    assert len(kept) < len(x) and len(segs) < len(x)
    for row in np.unique(rows):
        on = rows == row
        low = x[on].min()
        assert any((low, at) in kept for at in y[on][x[on] == low])
        high = x[on].max()
        assert any((high, at) in kept for at in y[on][x[on] == high])
        (seg,) = [s for s, r in zip(segs, seg_rows, strict=True) if r == row]
        assert seg[0, 0] == lower[on].min() and seg[1, 0] == upper[on].max()


def test_rows_sorted_at_scale_in_pandas_own_order():
    """The row figures' order at many rows is pandas' sort_values order (the reference),
    ties broken by name, with NaN keys left to pandas."""
    rng = np.random.default_rng(2)
    n = 25_000
    table = pd.DataFrame({"posterior_mean": rng.integers(0, 50, n) / 50,  # many ties
                          "group": [f"g{v}" for v in rng.permutation(n)],
                          "prob": rng.integers(0, 3, n) / 2})
    for keys, up in ((["posterior_mean", "group"], [False, True]),
                     (["posterior_mean", "prob", "group"], [True, False, True])):
        got = sort_rows(table, keys, up)
        assert got.index.equals(table.sort_values(keys, ascending=up).index)
    table.loc[7, "posterior_mean"] = np.nan
    got = sort_rows(table, ["posterior_mean", "group"], [False, True])
    assert got.index.equals(table.sort_values(["posterior_mean", "group"],
                                              ascending=[False, True]).index)


def test_named_groups_at_scale_are_those_of_sorting_every_group(monkeypatch):
    """Shrinkage's named groups and the funnel's most extreme ones, picked at many groups
    from the rows that can be among them, are those of pandas sorting every row (the
    reference: the threshold raised so every row is sorted), ties included."""
    from workbench.figures import estimates, ranking

    t = invented_run(60_000, seed=4)
    drawn = t["estimates"][t["estimates"]["observed_rate"].notna()]
    drawn = drawn.assign(posterior_mean=drawn["posterior_mean"].round(3))  # many ties
    table = t["funnel"][t["funnel"]["trials"] > 0]
    outside = table[table["outside_998"] != ""]
    outside = outside.assign(observed_rate=outside["observed_rate"].round(2))
    assert len(outside) > 5_000  # above the threshold set next: the shortcut is taken
    monkeypatch.setattr(_merge, "MERGE_ABOVE", 5_000)
    fast = [estimates._named(drawn, k).index for k in (1, 4, 9)]
    extreme = [ranking._most_extreme(outside, limits_of=table, label=k).index for k in (1, 4)]
    monkeypatch.setattr(_merge, "MERGE_ABOVE", 10**12)
    assert all(f.equals(estimates._named(drawn, k).index)
               for f, k in zip(fast, (1, 4, 9), strict=True))
    assert all(f.equals(ranking._most_extreme(outside, limits_of=table, label=k).index)
               for f, k in zip(extreme, (1, 4), strict=True))
