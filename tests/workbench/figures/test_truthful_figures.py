"""Figures that show every group and every parameter (issue 10, item 6).

Each test reads the matplotlib objects (limits, artists, colours, text boxes measured by the
renderer), not pixels. Data are invented.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_rgb
from matplotlib.lines import Line2D
from matplotlib.text import Annotation, Text
from scipy import stats
from workbench.models import BetaBinomial, GroupCounts

from workbench import figures
from workbench.analysis import draws, funnel
from workbench.cli import text
from workbench.figures import PALETTE


def _renderer(fig):
    fig.draw_without_rendering()
    return fig._get_renderer()


def _same_colour(a, b) -> bool:
    return np.allclose(to_rgb(a), to_rgb(b), atol=1 / 255)


# -- intervals: observed rates outside the axis ----------------------------------------------


def test_intervals_draw_every_observed_rate_even_beyond_the_axis():
    # a 3/3 and two 0/2 groups: their observed rates lie far outside every interval and used
    # to vanish off the axis
    est = pd.DataFrame({
        "group": ["full", "none-a", "none-b", "mid"],
        "observed_rate": [1.0, 0.0, 0.0, 0.21],
        "posterior_mean": [0.30, 0.16, 0.16, 0.21],
        "lower": [0.20, 0.08, 0.08, 0.17],
        "upper": [0.42, 0.27, 0.27, 0.25],
    })
    ax = figures.plot_intervals(est, level=0.95)
    low, high = ax.get_xlim()
    red = [ln for ln in ax.get_lines() if _same_colour(ln.get_color(), PALETTE["mulberry"])]
    drawn = {}
    for line in red:
        for x, y in zip(line.get_xdata(), line.get_ydata(), strict=True):
            assert low - 1e-9 <= x <= high + 1e-9  # every red mark lies on the axis
            drawn[float(y)] = float(x)
    ticks = dict(zip(ax.get_yticks(), [t.get_text() for t in ax.get_yticklabels()],
                     strict=True))
    rows = {ticks[y]: x for y, x in drawn.items()}
    assert set(rows) == set(est["group"])  # every group's observed rate is marked
    assert rows["full"] == pytest.approx(high) and rows["none-a"] == pytest.approx(low)
    values = {a.get_text() for a in ax.texts if isinstance(a, Annotation)}
    assert {"1", "0"} <= values  # the value beside each edge mark


# -- shrinkage: markers whole, names apart ---------------------------------------------------


@pytest.fixture(scope="module")
def demo_estimates():
    data = pd.read_csv(__import__("workbench").api.demo_data_path())
    counts = GroupCounts(data["branch"].to_numpy(), data["signups"].to_numpy(),
                         data["visitors"].to_numpy())
    model = BetaBinomial(draws=200, chains=2, random_seed=1).fit(counts)
    return model.summary(), model.population()


def _shrinkage(demo_estimates):
    est, pop = demo_estimates
    est = pd.concat([est, pd.DataFrame({
        "group": ["all of them"], "successes": [3], "trials": [3], "observed_rate": [1.0],
        "posterior_mean": [0.31], "lower": [0.1], "upper": [0.6]})], ignore_index=True)
    ax = figures.plot_shrinkage(est, pop)
    fig = ax.get_figure()
    r = _renderer(fig)
    frame = ax.get_window_extent(r)
    scale = fig.dpi / 72
    marks = [c for c in ax.collections if len(c.get_offsets())]
    centres = np.concatenate([ax.transData.transform(c.get_offsets()) for c in marks])
    radii = np.concatenate([np.sqrt(np.broadcast_to(c.get_sizes(), len(c.get_offsets())))
                            / 2 * scale for c in marks])
    return ax, r, frame, centres, radii


def test_shrinkage_markers_on_0_and_1_are_drawn_whole(demo_estimates):
    # the demo's 0/2 groups sat half-cut on the frame at 0, as would a 3/3 group at 1
    ax, r, frame, centres, radii = _shrinkage(demo_estimates)
    inside = ((centres[:, 0] - radii >= frame.x0 - 0.5) & (centres[:, 0] + radii <= frame.x1 + 0.5)
              & (centres[:, 1] - radii >= frame.y0 - 0.5)
              & (centres[:, 1] + radii <= frame.y1 + 0.5))
    assert inside.all()
    assert all(0 <= t <= 1 for t in ax.get_xticks()) and all(0 <= t <= 1 for t in ax.get_yticks())


def test_shrinkage_names_cover_no_marker_name_or_legend(demo_estimates):
    # the names at the bottom left lay over the crowd of small groups
    ax, r, frame, centres, radii = _shrinkage(demo_estimates)
    names = [a for a in ax.texts if isinstance(a, Annotation)]
    assert len(names) == 8
    boxes = [Text.get_window_extent(a, r) for a in names]
    legend = ax.get_legend().get_window_extent(r)
    for i, box in enumerate(boxes):
        assert frame.contains(box.x0, box.y0) and frame.contains(box.x1, box.y1)
        assert not box.overlaps(legend)
        assert not any(box.overlaps(other) for other in boxes[i + 1:]), names[i].get_text()
        nx = np.clip(centres[:, 0], box.x0, box.x1)
        ny = np.clip(centres[:, 1], box.y0, box.y1)
        covered = np.hypot(centres[:, 0] - nx, centres[:, 1] - ny) < radii
        assert not covered.any(), f"{names[i].get_text()} covers a marker"


# -- predictive checks: a count's axis and the title's colours -------------------------------


def _replicates(values, statistic="zero_success_groups", observed=0.0):
    return pd.DataFrame({"statistic": statistic, "draw": np.arange(len(values)),
                         "observed": observed, "replicated": np.asarray(values, float)})


def test_count_statistic_axis_shows_no_negative_or_fractional_values():
    # all replicates 0 or 1 groups with no successes: the old panel drew a block from -0.5 to
    # 0.5 and an axis reading -0.4, -0.2, ...
    rep = _replicates(np.random.default_rng(1).binomial(1, 0.2, 400))
    fig = figures.plot_predictive([{"statistic": "zero_success_groups", "observed": 0.0,
                                    "p_value": 0.6}], rep)
    ax = fig.axes[0]
    low, high = ax.get_xlim()
    shown = [t for t in ax.get_xticks() if low <= t <= high]
    assert shown and all(t >= 0 and float(t).is_integer() for t in shown)
    bars = [p for p in ax.patches]
    assert all(low <= p.get_x() and p.get_x() + p.get_width() <= high for p in bars)


def test_predictive_title_names_the_colours_it_draws():
    # the title said "replicated data (blue)" over pale green bars
    rep = pd.concat([_replicates(np.random.default_rng(2).normal(1, 0.2, 300), "dispersion",
                                 1.0)])
    fig = figures.plot_predictive([{"statistic": "dispersion", "observed": 1.0}], rep)
    title = fig._suptitle.get_text()
    assert "replicated data (blue)" in title and "(red line)" in title
    ax = fig.axes[0]
    assert ax.patches and all(_same_colour(p.get_facecolor(), PALETTE["harbour"])
                              for p in ax.patches)
    observed = [ln for ln in ax.get_lines() if len(ln.get_xdata())]
    assert observed and all(_same_colour(ln.get_color(), PALETTE["mulberry"]) for ln in observed)
    assert figures._style.COLOUR_WORDS["harbour"] == "blue"
    assert figures._style.COLOUR_WORDS["mulberry"] == "red"


# -- funnel: smooth limits, a fitted axis, the most extreme named ----------------------------


def _funnel_draws(counts: GroupCounts) -> draws.GroupDraws:
    model = BetaBinomial(draws=200, chains=2, random_seed=4).fit(counts)
    th = model.idata_.posterior["theta"].values
    return draws.GroupDraws(np.asarray(counts.names).astype(str), counts.successes,
                            counts.trials, th.reshape(-1, th.shape[-1]), model.exact_.mean(),
                            model.exact_)


@pytest.fixture(scope="module")
def funnel_case():
    # invented: small groups from 1 trial up, one large group at 2,000; one small group far
    # out and one large group just outside the 99.8% limits
    rng = np.random.default_rng(7)
    n = np.unique(np.round(np.geomspace(1, 1500, 40)).astype(int))
    y = rng.binomial(n, 0.2)
    n = np.append(n, [40, 2000])
    y = np.append(y, [30, 470])  # 30/40 is far out; 470/2000 (0.235) just outside 99.8%
    counts = GroupCounts([f"g{i:02d}" for i in range(len(n) - 2)] + ["small far", "big near"],
                         y, n)
    return funnel.funnel_tables(_funnel_draws(counts), 0.2)


def test_funnel_limits_are_smooth_and_agree_with_the_exact_flags(funnel_case):
    table, curve = funnel_case
    assert np.all(np.diff(curve["trials"]) > 0)
    for level in ("95", "998"):
        # smooth: the upper limit never rises and the lower never falls as trials grow (the
        # integer quantile's limits saw-tooth both ways at small trials)
        assert np.all(np.diff(curve[f"upper_{level}"]) <= 1e-12)
        assert np.all(np.diff(curve[f"lower_{level}"]) >= -1e-12)
    # the smooth band at each group's trials classifies it as the exact flags do
    # (reference: scipy.stats.binom.ppf, the flags' own definition)
    smooth = funnel.smooth_limits(table["trials"].to_numpy(), 0.2)
    rate = table["observed_rate"].to_numpy()
    n = table["trials"].to_numpy()
    for level, mass in funnel.FUNNEL_LEVELS.items():
        a = 1 - mass
        high = rate > stats.binom.ppf(1 - a / 2, n, 0.2) / n
        low = rate < stats.binom.ppf(a / 2, n, 0.2) / n
        np.testing.assert_array_equal(rate >= smooth[f"upper_{level}"] - 1e-12, high)
        np.testing.assert_array_equal(rate < smooth[f"lower_{level}"] - 1e-12, low)
        np.testing.assert_array_equal(table[f"outside_{level}"] == "high", high)


def test_funnel_axis_fits_the_data(funnel_case):
    table, curve = funnel_case
    ax = figures.plot_funnel(table, curve)
    low, high = ax.get_xlim()
    assert high <= 1.3 * table["trials"].max()  # not out to 10^4 for a largest group of 2,000
    assert low >= 0.5 * table["trials"].min()
    assert float(curve["trials"].max()) >= high  # the band reaches the axis' end


def test_funnel_names_the_most_extreme_groups(funnel_case):
    table, curve = funnel_case
    assert set(table.loc[table["outside_998"] != "", "group"]) >= {"small far", "big near"}
    ax = figures.plot_funnel(table, curve, label=1)
    named = [a.get_text() for a in ax.texts if isinstance(a, Annotation)]
    assert named == ["small far"]  # the most extreme, not the largest


# -- nested model: the parents in the terminal and as a figure -------------------------------


PARENTS = pd.DataFrame({
    "parent": ["North", "Coast", "Valley"], "groups": [5, 4, 6],
    "effect_mean": [-0.62, -0.07, 0.64], "effect_lower": [-1.76, -1.15, -0.50],
    "effect_upper": [0.44, 0.97, 1.74], "typical_rate_median": [0.149, 0.235, 0.381],
    "typical_rate_lower": [0.114, 0.188, 0.322], "typical_rate_upper": [0.184, 0.282, 0.450],
})


def test_parents_get_a_terminal_table():
    lines = text.format_parents(PARENTS, 0.95)
    assert lines[0].startswith("parents (3)")
    assert [ln.split()[0] for ln in lines[1:]] == ["Valley", "Coast", "North"]
    assert "+0.640 [-0.500, +1.740]" in lines[1] and "rate 0.381 [0.322, 0.450]" in lines[1]


def test_parents_get_a_figure_with_every_interval():
    ax = figures.plot_parents(PARENTS, level=0.95)
    labels = [t.get_text() for t in ax.get_yticklabels()]
    assert labels == ["Valley", "Coast", "North"]
    segments = ax.collections[0].get_segments()
    ends = sorted((round(s[0][0], 2), round(s[1][0], 2)) for s in segments)
    assert ends == sorted(zip(PARENTS["effect_lower"], PARENTS["effect_upper"], strict=True))
    low, high = ax.get_xlim()
    assert low <= PARENTS["effect_lower"].min() and high >= PARENTS["effect_upper"].max()
    assert any(isinstance(ln, Line2D) and list(ln.get_xdata()) == [0, 0] for ln in ax.lines)
