"""The report: one self-contained HTML file that shows names as text and runs no injected code."""

from __future__ import annotations

import ast
import base64
import hashlib
import json
import re
import shlex
import shutil
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from workbench import DataError, api
from workbench.io import runfolder
from workbench.io.runfolder import FILES, path_of
from workbench.options import FIT_OPTIONS
from workbench.report import render as report
from workbench.report import reproduce

XSS = "<script>alert(1)</script>"
IMG = "<img src=x onerror=alert(2)>"

#: invented counts; the names try to break out of HTML, attributes, mathtext and CSV
ROWS = [
    (XSS, 7, 40),
    ('O\'Brien & "Sons"', 12, 30),
    ("$x$ price", 3, 25),
    ("Straße Nord", 20, 60),
    ("NA", 5, 18),
    (IMG, 9, 33),
    ("Harbour Gate", 14, 52),
    ("Mill Lane", 2, 11),
    ("North Pier", 30, 75),
    ("Quarry End", 6, 44),
    ("Elm Court", 11, 29),
    ("West Yard", 0, 5),
]

SECTION_IDS = [
    "verdict",
    "data",
    "model",
    "verdict-detail",
    "checks",
    "estimates",
    "ranks",
    "predictions",
    "cautions",
    "reproduce",
]


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory) -> Path:
    base = tmp_path_factory.mktemp("report")
    data = base / "odd names.csv"
    pd.DataFrame(ROWS, columns=["site", "passed", "attempts"]).to_csv(data, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = api.fit(
            data, group="site", successes="passed", trials="attempts", seed=5, target=0.25
        )
    out = api.write_run(run, base / "run")
    assert path_of(out, "population_draws").exists()
    result = report.render_into(out)
    assert result.final  # the run is ready
    return out


@pytest.fixture(scope="module")
def html(run_folder) -> str:
    return path_of(run_folder, "report").read_text(encoding="utf-8")


@pytest.mark.slow
def test_report_has_every_section_and_the_verdict(html):
    for anchor in SECTION_IDS:
        assert f'id="{anchor}"' in html, anchor
    assert "READY: the convergence and model checks passed" in html
    assert 'id="estimates-table"' in html
    for caution in report.CAUTIONS:
        assert caution.replace("'", "&#39;") in html


@pytest.mark.slow  # fits and renders a whole report with its figures (about 4 s)
def test_user_strings_are_text_never_markup(html):
    assert XSS not in html and IMG not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;img src=x onerror=alert(2)&gt;" in html
    assert "O&#39;Brien &amp; &#34;Sons&#34;" in html
    assert html.count("<script") == 1  # the page's own
    assert "onerror=" not in html.replace("onerror=alert(2)&gt;", "")


@pytest.mark.slow  # fits and renders a whole report with its figures (about 4 s)
def test_page_is_self_contained_and_only_its_own_script_may_run(html):
    assert not re.search(r"""(?:src|href)\s*=\s*["']?(?:https?:)?//""", html)
    assert "@import" not in html and "url(" not in html
    script = re.search(r"<script>(.*?)</script>", html, re.S).group(1)
    digest = base64.b64encode(hashlib.sha256(script.encode()).digest()).decode()
    csp = re.search(r'http-equiv="Content-Security-Policy" content="([^"]+)"', html).group(1)
    csp = csp.replace("&#39;", "'")
    assert f"script-src 'sha256-{digest}'" in csp and "default-src 'none'" in csp
    images = re.findall(r'<img src="([^"]+)"', html)
    assert images and all(src.startswith("data:image/png;base64,") for src in images)


@pytest.mark.slow  # fits and renders a whole report with its figures (about 4 s)
def test_figures_are_png_files_written_whole(run_folder):
    figures = sorted(p.name for p in path_of(run_folder, "figures").iterdir())
    assert {"intervals.png", "shrinkage.png", "ranks.png", "funnel.png", "population.png"} <= set(
        figures
    )
    assert all(not name.startswith(".") for name in figures)  # no temporary left behind
    for name in figures:
        assert (path_of(run_folder, "figures") / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not [p for p in run_folder.iterdir() if p.name.endswith(".part")]


def test_figure_files_keep_the_palette_colours(run_folder):
    from PIL import Image

    from workbench.figures import PALETTE

    with Image.open(path_of(run_folder, "figures") / "ranks.png") as im:
        pixels = np.asarray(im.convert("RGB")).reshape(-1, 3).astype(int)
    for name in ("harbour", "ochre", "ink"):  # best k, worst k, medians
        want = np.array([int(PALETTE[name][i : i + 2], 16) for i in (1, 3, 5)])
        assert np.abs(pixels - want).max(axis=1).min() <= 2, name


def test_values_on_the_page_are_the_files_values(run_folder, html):
    est = runfolder.read_table(path_of(run_folder, "estimates"))
    row = est[est["group"] == "North Pier"].iloc[0]
    cells = re.search(r"<tr[^>]*><td class=\"t\">North Pier</td>(.*?)</tr>", html).group(1)
    shown = re.findall(r"<td[^>]*>([^<]*)</td>", cells)
    assert f"{row['posterior_mean']:.3f}" in shown and f"{row['upper']:.3f}" in shown
    assert '<td class="t">NA</td>' in html  # a group called NA stays a name


@pytest.mark.slow
def test_absent_tables_say_not_computed(run_folder, tmp_path):
    bare = tmp_path / "bare"
    shutil.copytree(run_folder, bare)
    for name in (
        "ranks",
        "funnel",
        "funnel_curve",
        "pairwise",
        "checks",
        "ppc_statistics",
        "group_checks",
        "targets",
        "trials_needed",
    ):
        path_of(bare, name).unlink(missing_ok=True)
    runfolder.refresh_record(bare)  # a folder written without these steps
    record = json.loads(path_of(bare, "record").read_text())
    record.pop("ranking", None)
    path_of(bare, "record").write_text(json.dumps(record))
    result = report.render_into(bare)
    page = result.path.read_text(encoding="utf-8")
    for what in (
        "Ranks",
        "Funnel plot",
        "Posterior predictive checks and leave-one-group-out",
        "Comparison",
        "Predictions of future trials",
    ):
        assert f"{what}: not computed for this run" in page, what
    # the figure of a removed table goes from the figures folder; the others are rewritten
    assert not (path_of(bare, "figures") / "ranks.png").exists()
    assert (path_of(bare, "figures") / "intervals.png").exists()


@pytest.mark.slow
def test_not_ready_run_says_so_in_red_words(run_folder, tmp_path):
    failed = tmp_path / "failed"
    shutil.copytree(run_folder, failed)
    diag = json.loads(path_of(failed, "diagnostics").read_text())
    diag.update(
        verdict="not-ready",
        final=False,
        remedies=["run longer (--draws 2000)"],
        reasons=[{"text": "theta[Mill Lane]: R-hat = 1.08 is above the limit 1.01"}],
    )
    path_of(failed, "diagnostics").write_text(json.dumps(diag))
    record = json.loads(path_of(failed, "record").read_text())
    record.update(final=False, verdict="not-ready")
    path_of(failed, "record").write_text(json.dumps(record))
    runfolder.refresh_record(failed)  # as if the run had been written that way
    assert report.render_into(failed).final is False  # written, but not final
    page = path_of(failed, "report").read_text(encoding="utf-8")
    banner = re.search(
        r'<div id="verdict" class="verdict ([^"]+)"[^>]*>\s*<p class="word">([^<]+)', page
    )
    assert banner.group(1) == "not-ready"
    assert banner.group(2) == "NOT READY: nothing in this report is final"
    assert '<li class="red">theta[Mill Lane]: R-hat = 1.08 is above the limit 1.01</li>' in page
    assert "run longer (--draws 2000)" in page
    assert "these numbers are provisional" in page


def _parse_fit_command(line: str) -> tuple[str, dict]:
    """A ``workbench fit`` line read back through the option declarations alone (how many
    words each flag takes, and its check): the data file and the options given."""
    words = shlex.split(line)
    assert words[:2] == ["workbench", "fit"]
    by_flag = {o.flag: o for o in FIT_OPTIONS.values()}
    negated = {"--no-" + o.flag[2:]: o for o in FIT_OPTIONS.values() if o.takes == "switch"}
    given, i = {}, 3
    while i < len(words):
        flag = words[i]
        if flag in negated:
            given[negated[flag].name], i = False, i + 1
            continue
        option = by_flag[flag]  # an unknown flag fails here
        if option.takes == "switch":
            given[option.name], i = True, i + 1
        elif option.takes == "pair":
            given[option.name], i = option.validate(words[i + 1 : i + 3]), i + 3
        elif option.takes == "list":
            j = i + 1
            while j < len(words) and not words[j].startswith("--"):
                j += 1
            given[option.name], i = option.validate(words[i + 1 : j]), j
        else:
            given[option.name], i = option.validate(words[i + 1]), i + 2
    return words[2], given


def test_reproduce_command_parses_back_to_the_recorded_settings(run_folder):
    record = json.loads(path_of(run_folder, "record").read_text())
    source, given = _parse_fit_command(reproduce.command_line(record))
    assert source == record["input"]["source"]
    assert (given["group"], given["successes"], given["trials"]) == ("site", "passed", "attempts")
    assert given["seed"] == record["random_seed"] == 5
    assert given["target"] == 0.25
    # every other option is left out because it has its declared default
    for name, option in FIT_OPTIONS.items():
        want = option.validate(record["settings"][name] if name != "seed" else 5)
        assert given.get(name, option.validate(option.default)) == want, name
    assert "--level" not in reproduce.command_line(record)


def test_reproduce_command_spells_every_kind_of_option():
    settings = {name: o.default for name, o in FIT_OPTIONS.items()}
    settings.update(
        model="nested",
        covariates=["case mix", "size"],
        parent="region",
        kappa_prior=[5.0, 1.5],
        compare_groups=["A", "D"],
        checks=False,
        verify=True,
        level=0.9,
        draws=500,
    )
    record = {"settings": settings, "input": {"source": "my data.csv"}, "random_seed": 7}
    line = reproduce.command_line(record)
    source, given = _parse_fit_command(line)
    assert source == "my data.csv"
    assert given == {
        "model": "nested",
        "covariates": ("case mix", "size"),
        "parent": "region",
        "kappa_prior": (5.0, 1.5),
        "compare_groups": ("A", "D"),
        "checks": False,
        "verify": True,
        "level": 0.9,
        "draws": 500,
        "seed": 7,
    }
    assert "--no-checks" in line and "'case mix'" in line


@pytest.mark.slow
def test_reproduce_section_lists_the_fit_and_every_later_step_in_order(run_folder, tmp_path):
    stepped = tmp_path / "stepped"
    shutil.copytree(run_folder, stepped)
    record = json.loads(path_of(stepped, "record").read_text())
    record["command"] = "workbench fit 'odd names.csv' --group site --seed 5"
    record["steps"] = [
        runfolder.step_entry("workbench rank stepped --top 3", "ranked"),
        runfolder.step_entry(None, "predicted"),
        runfolder.step_entry("workbench report stepped", "wrote the report"),
    ]
    path_of(stepped, "record").write_text(json.dumps(record))
    page = report.render_into(stepped).path.read_text(encoding="utf-8")
    listed = page.split('<ol id="commands">', 1)[1].split("</ol>", 1)[0]
    shown = re.findall(r'<pre class="cmd">([^<]*)</pre>|<p class="absent">([^<]*)</p>', listed)
    assert [a or b for a, b in shown] == [
        "workbench fit &#39;odd names.csv&#39; --group site --seed 5",
        "workbench rank stepped --top 3",
        "run from Python: no command line recorded.",
        "workbench report stepped",
    ]
    assert "predicted" in listed


def test_report_refuses_a_folder_that_is_no_run(tmp_path):
    with pytest.raises(DataError, match="not a run folder"):
        report.render_into(tmp_path / "nowhere")


def test_report_modules_name_no_run_folder_file():
    """Every file name comes from workbench.io.runfolder (FILES, path_of): none is spelled
    in the report or figures modules, not even in a docstring."""
    names = [v for v in {**FILES, **runfolder.COMPARISON_FILES}.values() if "." in v]
    names.append(FILES["figures"] + "/")
    root = Path(report.__file__).resolve().parents[1]
    for path in [*(root / "report").glob("*.py"), *(root / "figures").glob("*.py")]:
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Constant) and isinstance(node.value, str):
                found = [n for n in names if n in node.value]
                assert not found, f"{path.name}:{node.lineno} spells {found}"


def _big_folder(path: Path, n: int) -> Path:
    """A run folder's tables for ``n`` invented groups, written by the run-folder writer
    (no posterior: the report reads tables)."""
    rng = np.random.default_rng(2)
    trials = rng.integers(1, 3000, n)
    successes = rng.binomial(trials, 0.2)
    observed = successes / trials
    mean = 0.2 + (observed - 0.2) * trials / (trials + 40)
    half = 1.4 / np.sqrt(trials + 40)
    estimates = pd.DataFrame(
        {
            "group": [f"unit-{i:05d}" for i in range(n)],
            "successes": successes,
            "trials": trials,
            "observed_rate": observed,
            "posterior_mean": mean,
            "posterior_median": mean,
            "lower": np.clip(mean - half, 0, 1),
            "upper": np.clip(mean + half, 0, 1),
            "shrinkage": 40 / (trials + 40),
        }
    )
    population = pd.DataFrame(
        {
            "quantity": ["population_mean"],
            "parameter": ["mu"],
            "mean": [0.2],
            "median": [0.2],
            "lower": [0.19],
            "upper": [0.21],
        }
    )
    record = runfolder.new_record(
        final=True,
        verdict="ready",
        model="beta-binomial",
        engine="exact",
        settings={"level": 0.95, "target": None},
        input={"groups": n},
    )
    parts = runfolder.FolderParts(
        record,
        {"estimates": estimates, "population": population},
        {"diagnostics": {"verdict": "ready", "reasons": []}},
        None,
    )
    return runfolder.write_folder(path, parts)


@pytest.mark.slow
def test_large_run_keeps_the_page_small(tmp_path):
    n = 5000
    folder = _big_folder(tmp_path / "big", n)
    result = report.render_into(folder, table_rows=400)
    page = result.path.read_text(encoding="utf-8")
    body = page.split('id="estimates-table"', 1)[1].split("</table>", 1)[0]
    assert body.count("<tr") == 1 + 400 + 1  # heading, the rows shown, the gap note
    assert f"{n - 400:,} groups between these are not shown here" in body
    assert result.bytes < 1_500_000


@pytest.mark.slow
def test_staging_folder_is_named_by_its_final_place(run_folder, tmp_path):
    staging = tmp_path / ".run.x1.part"
    shutil.copytree(run_folder, staging)
    result = report.render_into(staging, final=tmp_path / "north-run")
    page = path_of(staging, "report").read_text(encoding="utf-8")
    assert result.path == path_of(tmp_path / "north-run", "report")
    assert "run folder north-run" in page and ".run.x1.part" not in page
    assert "<code>workbench report north-run</code>" in page


CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def _open_report(browser, folder: Path) -> tuple:
    """Open a folder's report; returns the page and what it logged: errors, requests, dialogs."""
    page = browser.new_page()
    errors, requests, dialogs = [], [], []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.on("request", lambda r: requests.append(r.url))
    page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
    url = path_of(folder, "report").resolve().as_uri()
    page.goto(url)
    page.wait_for_load_state("load")
    page.wait_for_timeout(200)  # time for any stray script or dialog to show itself
    others = [u for u in requests if u != url and not u.startswith("data:")]
    return page, errors, others, dialogs


def _check_page(page, errors, others, dialogs, query: str) -> None:
    assert errors == [], errors
    assert others == [], others  # nothing fetched but the file itself and data: URLs
    widths = page.eval_on_selector_all("img", "els => els.map(e => e.naturalWidth)")
    assert widths and all(w > 0 for w in widths)
    assert page.locator("#verdict").is_visible()
    assert "READY" in page.locator("#verdict .word").inner_text()
    table = page.locator("#estimates-table")
    assert table.is_visible()
    total = table.locator("tbody tr").count()
    page.fill("#estimates-filter", query)
    shown = page.locator("#estimates-table tbody tr:not([hidden])").count()
    assert 0 < shown < total
    page.fill("#estimates-filter", "")
    page.click("#estimates-table thead th:nth-child(3) button")
    sort = page.get_attribute("#estimates-table thead th:nth-child(3)", "aria-sort")
    assert sort == "ascending"
    assert dialogs == []


@pytest.mark.slow  # a whole process or several fits: seconds (iterate with -m 'not slow')
@pytest.mark.browser
def test_reports_in_headless_chromium(run_folder, tmp_path):
    if not CHROMIUM.exists():
        pytest.skip("no /usr/bin/chromium: install Debian's chromium (apt-get install chromium)")
    sync_api = pytest.importorskip(
        "playwright.sync_api", reason="playwright's Python package is not installed"
    )
    big = _big_folder(tmp_path / "big", 3000)
    report.render_into(big, table_rows=400)
    estimates = runfolder.read_table(path_of(big, "estimates"))
    top = estimates.sort_values("posterior_mean", ascending=False)["group"].iloc[0]
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            page, *logged = _open_report(browser, big)
            _check_page(page, *logged, query=top)
            page.close()
            page, *logged = _open_report(browser, run_folder)
            _check_page(page, *logged, query="script")
            names = page.locator("#estimates-table tbody td:first-child").all_inner_texts()
            assert XSS in names and IMG in names  # shown as text
            assert page.evaluate("document.querySelectorAll('script').length") == 1
            assert page.evaluate("document.querySelectorAll('img[onerror]').length") == 0
            assert logged[2] == []  # no dialog fired
            page.close()
        finally:
            browser.close()


@pytest.mark.slow
def test_a_misfit_run_is_named_misfit_not_a_convergence_failure(tmp_path):
    # issue 10: complete pooling on the demo's spread-out branches converges (exact engine)
    # but the predictive checks find the misfit; the banner must say so, not "READY" and not
    # "the convergence diagnostics failed"
    out = tmp_path / "misfit"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = api.fit(api.demo_data_path(), group="branch", successes="signups",
                      trials="visitors", model="complete-pooling", seed=1, out=out, report=True)
    assert run.verdict == "misfit"
    page = path_of(out, "report").read_text(encoding="utf-8")
    banner = re.search(
        r'<div id="verdict" class="verdict ([^"]+)"[^>]*>\s*<p class="word">([^<]+)', page)
    assert banner.group(1) == "not-ready"  # drawn in the warning colour
    assert banner.group(2).startswith("MISFIT")
    assert "READY: the convergence" not in page
    assert "The convergence diagnostics failed" not in page
