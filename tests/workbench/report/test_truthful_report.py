"""The report and the terminal say what the numbers mean (issue 10, items 5 and 6).

Data are invented.
"""

from __future__ import annotations

import re
import warnings
from pathlib import Path

import pandas as pd
import pytest
from helpers import recorded_exit_code

from workbench import api, cli, figures
from workbench.io.runfolder import path_of

#: invented complication counts: lower is better; one clinic has no operations yet
ROWS = [
    ("Harbour", 2, 90), ("Mill", 3, 85), ("North", 21, 80), ("Quarry", 24, 75),
    ("Elm", 9, 70), ("West", 10, 80), ("Gate", 8, 60), ("Pier", 11, 90), ("New", 0, 0),
]


def _fit(tmp: Path, rows, **options) -> Path:
    data = tmp / "clinics.csv"
    pd.DataFrame(rows, columns=["clinic", "bad", "ops"]).to_csv(data, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = api.fit(data, group="clinic", successes="bad", trials="ops", seed=2,
                      checks=False, **options)
    return api.write_run(run, tmp / "run", report=True)


@pytest.fixture(scope="module")
def lower_is_better(tmp_path_factory) -> tuple[Path, str]:
    out = _fit(tmp_path_factory.mktemp("lower"), ROWS, better="lower", target=0.12)
    return out, path_of(out, "report").read_text(encoding="utf-8")


def _rows(html: str) -> list[tuple[str, str]]:
    """(row class, row text) of every table row of the page."""
    return [(cls, re.sub(r"<[^>]+>", " ", body))
            for cls, body in re.findall(r'<tr(?: class="([^"]*)")?>(.*?)</tr>', html, flags=re.S)]


@pytest.mark.slow
def test_flag_colour_follows_better_and_worse_not_the_side(lower_is_better):
    # with --better lower the high-complication clinics are above the target and worse: their
    # flag reads so and takes the "worse" colour; the old page coloured "above" blue always
    out, html = lower_is_better
    est = pd.read_csv(path_of(out, "estimates"))
    flags = est.set_index("group")["target_flag"].fillna("")
    assert flags["North"] == flags["Quarry"] == "above target (worse)"
    assert flags["Harbour"] == flags["Mill"] == "below target (better)"
    rows = re.findall(r'<tr(?: class="([^"]*)")?>(.*?)</tr>', html, flags=re.S)
    flagged = [(cls, body) for cls, body in rows if '<td class="t flag">' in body]
    for cls, body in flagged:
        if '<td class="t flag">above target (worse)</td>' in body:
            assert cls == "flag-worse"
        elif '<td class="t flag">below target (better)</td>' in body:
            assert cls == "flag-better"
        else:
            assert cls == ""
    assert {cls for cls, _ in flagged} == {"flag-worse", "flag-better", ""}
    css = html  # the page's style is inline
    blue, ochre = "var(--blue)", "var(--ochre)"
    assert re.search(r"tr\.flag-better td\.flag \{ color: " + re.escape(blue), css)
    assert re.search(r"tr\.flag-worse td\.flag \{ color: " + re.escape(ochre), css)
    assert "flagged above target (worse)" in html


@pytest.mark.slow  # fits and renders a whole report with its figures (about 3 s)
def test_a_group_with_no_trials_reads_no_data_not_a_rank(lower_is_better):
    out, html = lower_is_better
    ranks = pd.read_csv(path_of(out, "ranks"))
    assert ranks.set_index("group").loc["New"].isna().all()
    rows = re.findall(r'<tr(?: class="[^"]*")?>(<td class="t">New</td><td>0</td><td>0</td>.*?)'
                      r'</tr>', html, flags=re.S)
    assert len(rows) == 1 and rows[0].count("<td>no data</td>") == 3  # rank, low, high
    assert "1 group(s) with no trials have no rank (no data)" in html
    best_worst = html[html.index("<h3>Best placed</h3>"):html.index("<h3>Target</h3>")]
    assert not re.search(r"\bNew\b", best_worst)  # not among the worst placed either


@pytest.mark.slow
def test_one_group_with_trials_makes_no_ranking(tmp_path, capsys):
    out = _fit(tmp_path, [("Only", 4, 30), ("Later", 0, 0)])
    html = path_of(out, "report").read_text(encoding="utf-8")
    assert "<strong>No ranking:</strong> not ranked: 1 of 2 group(s) have trials" in html
    assert not (out / "figures" / "ranks.png").exists()
    assert pd.read_csv(path_of(out, "ranks"))["rank_median"].isna().all()
    assert cli.main(["rank", str(out)]) == recorded_exit_code(out)
    assert "ranks: none: not ranked: 1 of 2 group(s) have trials" in capsys.readouterr().out


@pytest.mark.slow
def test_nested_parents_and_every_population_parameter_are_shown(tmp_path):
    # the nested model's parent effects appeared nowhere, and the mixing figure must have a
    # row for every sampled population parameter, tau and the parent effects included
    rows = []
    for parent, base in (("North", 0.10), ("Coast", 0.18), ("Valley", 0.30)):
        rows += [(f"{parent}-{j}", parent, round(base * n), n) for j, n in
                 enumerate((40, 60, 80, 120))]
    data = tmp_path / "nested.csv"
    pd.DataFrame(rows, columns=["site", "region", "done", "tries"]).to_csv(data, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = api.fit(data, group="site", successes="done", trials="tries", model="nested",
                      parent="region", draws=300, tune=300, chains=2, seed=3, checks=False)
    from workbench.cli import text

    summary = text.format_fit(run)
    assert "parents (3)" in summary and all(p in summary for p in ("North", "Coast", "Valley"))
    out = api.write_run(run, tmp_path / "run", report=True)
    html = path_of(out, "report").read_text(encoding="utf-8")
    assert "<h3>Parents</h3>" in html and 'id="figure-parents"' in html
    draws = pd.read_csv(path_of(out, "population_draws"))
    names = figures.parameter_names(draws)
    assert "tau" in names and sum(n.startswith("parent_effect[") for n in names) == 3
    fig = figures.plot_mixing(draws)
    titles = [ax.get_title(loc="left") for ax in fig.axes[::2]]
    assert len(titles) == len(names)
    assert any("tau" in t for t in titles)


@pytest.mark.slow
def test_demo_gives_the_same_numbers_twice(tmp_path, capsys):
    # the demo is reproducible by default: a fixed seed (1), recorded in run.json
    import json

    for name in ("a", "b"):
        assert cli.main(["demo", "--out", str(tmp_path / name), "--quiet"]) == 0
    capsys.readouterr()
    for table in ("estimates", "ranks", "predictions", "population"):
        a = path_of(tmp_path / "a", table).read_bytes()
        assert a == path_of(tmp_path / "b", table).read_bytes(), table
    record = json.loads(path_of(tmp_path / "a", "record").read_text())
    assert record["settings"]["seed"] == 1
