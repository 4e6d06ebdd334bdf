"""Plots: tables in, Axes or Figure out, on Agg, readable with 10 and with 5,000 groups."""

from __future__ import annotations

import io

import matplotlib
import numpy as np
import pandas as pd
import pytest
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from workbench import figures
from workbench.figures.ranking import _flag

matplotlib.use("Agg")

ODD_NAMES = ["<script>alert(1)</script>", "$x$ price", "a$b", 'O\'Brien & "Sons"', "\\frac"]


def invented_tables(n: int, seed: int = 11) -> dict:
    """Tables shaped like a run folder's files, with invented numbers (no model behind them)."""
    rng = np.random.default_rng(seed)
    trials = np.exp(rng.uniform(0, np.log(4000), n)).astype(int)
    trials[0] = 0
    rate = rng.beta(6, 24, n)
    successes = rng.binomial(trials, rate)
    with np.errstate(invalid="ignore", divide="ignore"):
        observed = np.where(trials > 0, successes / np.maximum(trials, 1), np.nan)
    mean = np.where(np.isnan(observed), 0.2, 0.2 + (observed - 0.2) * trials / (trials + 30))
    half = 1.5 / np.sqrt(trials + 30)
    names = [f"site-{i:05d}" for i in range(n)]
    names[: len(ODD_NAMES)] = ODD_NAMES[: min(n, len(ODD_NAMES))]
    estimates = pd.DataFrame(
        {
            "group": names,
            "successes": successes,
            "trials": trials,
            "observed_rate": observed,
            "posterior_mean": mean,
            "lower": np.clip(mean - half, 0, 1),
            "upper": np.clip(mean + half, 0, 1),
            "shrinkage": 30 / (trials + 30),
        }
    )
    population = pd.DataFrame(
        {
            "quantity": ["population_mean", "concentration", "between_group_sd"],
            "parameter": ["mu", "kappa", "between_group_sd"],
            "mean": [0.2, 30.0, 0.07],
            "median": [0.2, 29.0, 0.07],
            "lower": [0.18, 20.0, 0.05],
            "upper": [0.22, 45.0, 0.09],
        }
    )
    order = np.argsort(-mean)
    position = np.empty(n)
    position[order] = np.arange(1, n + 1)
    spread = np.maximum(1, n * half)
    ranks = pd.DataFrame(
        {
            "group": names,
            "rank_median": position,
            "rank_lower": np.clip(np.floor(position - spread), 1, n),
            "rank_upper": np.clip(np.ceil(position + spread), 1, n),
            "prob_best_k": np.linspace(1, 0, n)[position.astype(int) - 1],
            "prob_worst_k": np.linspace(0, 1, n)[position.astype(int) - 1],
        }
    )
    grid = np.unique(np.geomspace(1, max(trials.max(), 1), 60).round())
    curve = pd.DataFrame(
        {
            "trials": grid,
            "benchmark": 0.2,
            "lower_95": np.clip(0.2 - 2 * np.sqrt(0.16 / grid), 0, 1),
            "upper_95": np.clip(0.2 + 2 * np.sqrt(0.16 / grid), 0, 1),
            "lower_998": np.clip(0.2 - 3 * np.sqrt(0.16 / grid), 0, 1),
            "upper_998": np.clip(0.2 + 3 * np.sqrt(0.16 / grid), 0, 1),
        }
    )
    safe = np.maximum(trials, 1)
    lo95, hi95 = 0.2 - 2 * np.sqrt(0.16 / safe), 0.2 + 2 * np.sqrt(0.16 / safe)
    lo998, hi998 = 0.2 - 3 * np.sqrt(0.16 / safe), 0.2 + 3 * np.sqrt(0.16 / safe)
    side = lambda lo, hi: np.where(observed > hi, "high", np.where(observed < lo, "low", ""))  # noqa: E731
    funnel = pd.DataFrame(
        {
            "group": names,
            "successes": successes,
            "trials": trials,
            "observed_rate": observed,
            "benchmark": 0.2,
            "lower_95": lo95,
            "upper_95": hi95,
            "lower_998": lo998,
            "upper_998": hi998,
            "outside_95": side(lo95, hi95),
            "outside_998": side(lo998, hi998),
        }
    )
    stats = ["sd_rate", "max_rate", "zero_success_groups", "chi_square"]
    draws = np.arange(200)
    replicated = pd.concat(
        [
            pd.DataFrame(
                {
                    "statistic": s,
                    "draw": draws,
                    "observed": rng.normal(50, 5, 200) if s == "chi_square" else 3.0,
                    "replicated": rng.poisson(4, 200)
                    if s == "zero_success_groups"
                    else rng.normal(3, 1, 200),
                }
            )
            for s in stats
        ]
    )
    checks = [
        {"statistic": s, "observed": 3.0, "p_value": 0.4, "verdict": "consistent"} for s in stats
    ]
    chain, draw = np.divmod(np.arange(4 * 250), 250)
    population_draws = pd.DataFrame(
        {
            "chain": chain,
            "draw": draw,
            "mu": rng.normal(0.2, 0.01, 1000),
            "kappa": rng.lognormal(3.4, 0.2, 1000),
            "between_group_sd": rng.normal(0.07, 0.005, 1000),
            "diverging": False,
        }
    )
    return {
        "estimates": estimates,
        "population": population,
        "ranks": ranks,
        "funnel": funnel,
        "curve": curve,
        "replicated": replicated,
        "checks": checks,
        "population_draws": population_draws,
        "group_checks": pd.DataFrame({"loo_pit": rng.uniform(0, 1, n)}),
    }


@pytest.fixture(scope="module", params=[10, 5000], ids=["10-groups", "5000-groups"])
def tables(request):
    return request.param, invented_tables(request.param)


def _renders(artist) -> bytes:
    buf = io.BytesIO()
    figures.figure_of(artist).savefig(buf, format="png", dpi=40)
    return buf.getvalue()


@pytest.mark.slow
def test_every_plot_returns_axes_or_figure_and_renders(tables):
    n, t = tables
    made = {
        "shrinkage": figures.plot_shrinkage(t["estimates"], t["population"]),
        "intervals": figures.plot_intervals(t["estimates"], target=0.25, level=0.95),
        "funnel": figures.plot_funnel(t["funnel"], t["curve"]),
        "ranks": figures.plot_ranks(t["ranks"], k=3),
        "loo_pit": figures.plot_loo_pit(t["group_checks"]),
    }
    for name, ax in made.items():
        assert isinstance(ax, Axes), name
        assert _renders(ax)[:8] == b"\x89PNG\r\n\x1a\n", name
    made_figures = {
        "predictive": figures.plot_predictive(t["checks"], t["replicated"]),
        "population": figures.plot_population(t["population_draws"], t["population"]),
        "mixing": figures.plot_mixing(t["population_draws"]),
    }
    for name, fig in made_figures.items():
        assert isinstance(fig, Figure), name
        assert _renders(fig)[:4] == b"\x89PNG", name


def test_row_plots_label_every_group_or_only_the_extremes(tables):
    n, t = tables
    ax = figures.plot_intervals(t["estimates"], show=12)
    labels = [lab.get_text() for lab in ax.get_yticklabels()]
    if n == 10:
        assert len(labels) == 10
    else:
        assert len(labels) == 24  # 12 highest + 12 lowest
        notes = [x.get_text() for x in ax.texts]
        assert any(f"{n - 24:,} groups between" in note for note in notes)
    highest = t["estimates"].sort_values("posterior_mean", ascending=False)["group"].iloc[0]
    assert labels[0] == figures.text_label(highest)


def test_ranks_highlight_best_and_worst_k(tables):
    n, t = tables
    ax = figures.plot_ranks(t["ranks"], k=3)
    colours = [tuple(np.round(c, 3)) for c in ax.collections[-2].get_colors()]
    blue = tuple(np.round(matplotlib.colors.to_rgba(figures.PALETTE["harbour"]), 3))
    ochre = tuple(np.round(matplotlib.colors.to_rgba(figures.PALETTE["ochre"]), 3))
    assert colours[:3] == [blue] * 3
    assert colours[-3:] == [ochre] * 3
    assert blue not in colours[3:-3] and ochre not in colours[3:-3]


def test_given_axes_is_drawn_on_and_returned():
    t = invented_tables(10)
    fig = Figure()
    ax = fig.add_subplot()
    assert figures.plot_shrinkage(t["estimates"], t["population"], ax=ax) is ax
    assert figures.plot_funnel(t["funnel"], ax=fig.add_subplot(2, 1, 2)) is not ax


def test_plots_leave_pyplot_alone():
    import matplotlib.pyplot as plt

    before = plt.get_fignums()
    t = invented_tables(10)
    figures.plot_intervals(t["estimates"])
    figures.plot_population(t["population_draws"], t["population"])
    assert plt.get_fignums() == before


def test_text_label_keeps_names_literal():
    assert figures.text_label("$x$ price") == r"\$x\$ price"
    assert figures.text_label("x" * 40, 10) == "x" * 9 + "\u2026"
    assert figures.text_label("<script>alert(1)</script>", 60) == "<script>alert(1)</script>"


def test_row_positions_squeeze_the_middle_in_order():
    pos, band = figures.row_positions(5000, 10)
    assert band is not None
    assert np.all(np.diff(pos) > 0)
    assert band[0] < pos[10] and pos[-11] < band[1]
    assert pos[-1] - pos[0] < 40  # drawn height stays small whatever the count
    pos, band = figures.row_positions(50, 10)
    assert band is None and list(pos) == list(range(50))


def test_funnel_reads_both_limit_namings_and_word_flags():
    t = invented_tables(10)
    renamed = t["funnel"].rename(
        columns={
            "lower_95": "limit_95_lower",
            "upper_95": "limit_95_upper",
            "lower_998": "limit_998_lower",
            "upper_998": "limit_998_upper",
        }
    )
    renamed["outside_95"] = renamed["outside_95"] != ""
    ax = figures.plot_funnel(renamed)
    legend = [x.get_text() for x in ax.get_legend().get_texts()]
    flags = t["funnel"][["outside_95", "outside_998"]] != ""
    outside = int(flags["outside_95"].sum() - flags["outside_998"].sum())
    assert any(text.startswith("outside 95%") and f"({outside})" in text for text in legend)
    with pytest.raises(ValueError, match="lower_95"):
        figures.plot_funnel(t["funnel"].drop(columns=["lower_95"]))


def test_flag_reads_words_booleans_and_blanks():
    table = pd.DataFrame({"w": ["high", "", None, "low"], "b": [True, False, False, True]})
    assert _flag(table, "w").tolist() == [True, False, False, True]
    assert _flag(table, "b").tolist() == [True, False, False, True]
    assert _flag(table, "missing").tolist() == [False] * 4


def test_predictive_draws_realised_discrepancy_as_scatter():
    t = invented_tables(10)
    fig = figures.plot_predictive(t["checks"], t["replicated"])
    axes = [a for a in fig.axes if a.get_visible() and a.axison]
    chi = next(a for a in axes if a.get_title(loc="left").startswith("chi_square"))
    assert len(chi.collections) == 1 and chi.get_xlabel() == "observed (per draw)"
    zeros = next(a for a in axes if a.get_title(loc="left").startswith("zero_success_groups"))
    assert len(zeros.patches) > 0 and not zeros.collections


def test_palette_pairs_stay_apart_under_simulated_colour_blindness():
    """CIELAB distance between every pair of palette colours, after Machado-style simulation."""
    sims = {
        "protan": [[0.152, 1.053, -0.205], [0.115, 0.786, 0.099], [-0.004, -0.048, 1.052]],
        "deutan": [[0.367, 0.861, -0.228], [0.280, 0.673, 0.047], [-0.012, 0.043, 0.969]],
        "tritan": [[1.256, -0.077, -0.179], [-0.078, 0.931, 0.148], [0.005, 0.691, 0.304]],
    }

    def linear(c):
        c = np.asarray(c)
        return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)

    def lab(rgb_linear):
        xyz = np.array(
            [[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]]
        ) @ np.clip(rgb_linear, 0, 1)
        f = np.cbrt(np.maximum(xyz / np.array([0.9505, 1.0, 1.089]), 0.008856))
        return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])

    names = ["ink", "harbour", "ochre", "mulberry", "pewter"]
    for matrix in sims.values():
        seen = {
            k: lab(np.array(matrix) @ linear(matplotlib.colors.to_rgb(figures.PALETTE[k])))
            for k in names
        }
        gaps = [
            np.linalg.norm(seen[a] - seen[b]) for i, a in enumerate(names) for b in names[i + 1 :]
        ]
        assert min(gaps) > 15


def _draws_table(names, chains=3, draws=120, seed=4, diverging=()):
    """A population draws table with invented values: chain, draw, one column per name."""
    rng = np.random.default_rng(seed)
    chain, draw = np.divmod(np.arange(chains * draws), draws)
    table = pd.DataFrame({"chain": chain, "draw": draw})
    for name in names:
        table[name] = rng.normal(0, 1, chains * draws)
    table["diverging"] = np.isin(np.arange(chains * draws), diverging)
    return table


def test_mixing_draws_every_parameter_column_not_only_four():
    names = ["alpha", "sigma", "tau", "beta_case_mix", "beta_size", "beta_$weird$"]
    table = _draws_table(names)
    fig = figures.plot_mixing(table)
    titles = [a.get_title(loc="left") for a in fig.axes]
    traces = [x for x in titles if x.endswith("trace")]
    assert len(traces) == len(names) == len(figures.parameter_names(table))
    assert traces[2].startswith("between-parent sd") and "case_mix" in traces[3]
    assert r"\$weird\$" in traces[5]  # a name stays literal, never mathtext
    # each trace holds one line per chain, in the table's chain order
    first = next(a for a in fig.axes if a.get_title(loc="left") == traces[0])
    lines = [ln for ln in first.get_lines() if ln.get_label().startswith("chain")]
    assert len(lines) == 3
    by_chain = table.sort_values(["chain", "draw"])
    assert np.allclose(lines[1].get_ydata(), by_chain[by_chain["chain"] == 1]["alpha"])


def test_mixing_marks_the_divergent_draws_of_the_table():
    table = _draws_table(["mu", "kappa"], diverging=(5, 130))  # chain 0 draw 5, chain 1 draw 10
    fig = figures.plot_mixing(table)
    marks = [ln for ln in fig.axes[0].get_lines() if ln.get_label() == "divergent"]
    assert len(marks) == 1 and sorted(marks[0].get_xdata()) == [5, 10]
    quiet = figures.plot_mixing(_draws_table(["mu"]))
    assert not [ln for ln in quiet.axes[0].get_lines() if ln.get_label() == "divergent"]


def test_population_has_one_panel_per_parameter_with_the_tables_interval():
    t = invented_tables(10)
    table = _draws_table(["mu", "kappa", "between_group_sd", "beta_x", "extra"])
    fig = figures.plot_population(table, t["population"])
    titled = [a for a in fig.axes if a.get_title(loc="left")]
    assert len(titled) == 5
    mu = titled[0]
    # the orange line is the population table's mean, not a mean of the draws
    lines = [ln.get_xdata()[0] for ln in mu.get_lines()]
    assert 0.2 in lines and not np.isclose(table["mu"].mean(), 0.2)
