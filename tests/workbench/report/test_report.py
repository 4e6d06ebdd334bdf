"""The report: one self-contained HTML file that shows names as text and runs no injected code."""

from __future__ import annotations

import base64
import hashlib
import json
import re
import shlex
import shutil
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from workbench import api
from workbench.report import render as report
from workbench.cli import build_parser, main

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
    assert main(["report", str(out)]) == 0  # the run is ready: exit 0
    return out


@pytest.fixture(scope="module")
def html(run_folder) -> str:
    return (run_folder / report.REPORT_FILE).read_text(encoding="utf-8")


def test_report_has_every_section_and_the_verdict(html):
    for anchor in SECTION_IDS:
        assert f'id="{anchor}"' in html, anchor
    assert "READY: the convergence checks passed" in html
    assert 'id="estimates-table"' in html
    for caution in report.CAUTIONS:
        assert caution.replace("'", "&#39;") in html


def test_user_strings_are_text_never_markup(html):
    assert XSS not in html and IMG not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;img src=x onerror=alert(2)&gt;" in html
    assert "O&#39;Brien &amp; &#34;Sons&#34;" in html
    assert html.count("<script") == 1  # the page's own
    assert "onerror=" not in html.replace("onerror=alert(2)&gt;", "")


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


def test_figures_are_png_files_written_whole(run_folder):
    figures = sorted(p.name for p in (run_folder / report.FIGURES_DIR).iterdir())
    assert {"intervals.png", "shrinkage.png", "ranks.png", "funnel.png", "population.png"} <= set(
        figures
    )
    assert all(not name.startswith(".") for name in figures)  # no temporary left behind
    for name in figures:
        assert (run_folder / report.FIGURES_DIR / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not [p for p in run_folder.iterdir() if p.name.endswith(".part")]


def test_figure_files_keep_the_palette_colours(run_folder):
    from PIL import Image

    from workbench.figures.plots import PALETTE

    with Image.open(run_folder / report.FIGURES_DIR / "ranks.png") as im:
        pixels = np.asarray(im.convert("RGB")).reshape(-1, 3).astype(int)
    for name in ("harbour", "ochre", "ink"):  # best k, worst k, medians
        want = np.array([int(PALETTE[name][i : i + 2], 16) for i in (1, 3, 5)])
        assert np.abs(pixels - want).max(axis=1).min() <= 2, name


def test_values_on_the_page_are_the_files_values(run_folder, html):
    est = pd.read_csv(run_folder / "estimates.csv", keep_default_na=False, na_values=[""])
    row = est[est["group"] == "North Pier"].iloc[0]
    cells = re.search(r"<tr[^>]*><td class=\"t\">North Pier</td>(.*?)</tr>", html).group(1)
    shown = re.findall(r"<td[^>]*>([^<]*)</td>", cells)
    assert f"{row['posterior_mean']:.3f}" in shown and f"{row['upper']:.3f}" in shown
    assert '<td class="t">NA</td>' in html  # a group called NA stays a name


def test_absent_tables_say_not_computed(run_folder, tmp_path):
    bare = tmp_path / "bare"
    shutil.copytree(run_folder, bare)
    for name in (
        "ranks.csv",
        "funnel.csv",
        "funnel_curve.csv",
        "pairwise.csv",
        "checks.json",
        "ppc_statistics.csv",
        "group_checks.csv",
        "targets.json",
        "trials_needed.csv",
    ):
        (bare / name).unlink(missing_ok=True)
    shutil.rmtree(bare / "figures")
    record = json.loads((bare / "run.json").read_text())
    record.pop("ranking", None)
    (bare / "run.json").write_text(json.dumps(record))
    result = report.write_report(bare)
    page = result.path.read_text(encoding="utf-8")
    for what in (
        "Ranks",
        "Funnel plot",
        "Posterior predictive checks and leave-one-group-out",
        "Comparison",
        "Predictions of future trials",
    ):
        assert f"{what}: not computed for this run" in page, what
    assert not (bare / "figures" / "ranks.png").exists()
    assert (bare / "figures" / "intervals.png").exists()


def test_not_ready_run_says_so_in_red_words(run_folder, tmp_path):
    failed = tmp_path / "failed"
    shutil.copytree(run_folder, failed)
    diag = json.loads((failed / "diagnostics.json").read_text())
    diag.update(
        verdict="not-ready",
        final=False,
        remedies=["run longer (--draws 2000)"],
        reasons=[{"text": "theta[Mill Lane]: R-hat = 1.08 is above the limit 1.01"}],
    )
    (failed / "diagnostics.json").write_text(json.dumps(diag))
    record = json.loads((failed / "run.json").read_text())
    record.update(final=False, verdict="not-ready")
    (failed / "run.json").write_text(json.dumps(record))
    assert main(["report", str(failed)]) == 3  # written, but not final
    page = (failed / report.REPORT_FILE).read_text(encoding="utf-8")
    banner = re.search(
        r'<div id="verdict" class="verdict ([^"]+)"[^>]*>\s*<p class="word">([^<]+)', page
    )
    assert banner.group(1) == "not-ready"
    assert banner.group(2) == "NOT READY: nothing in this report is final"
    assert '<li class="red">theta[Mill Lane]: R-hat = 1.08 is above the limit 1.01</li>' in page
    assert "run longer (--draws 2000)" in page
    assert "these numbers are provisional" in page


def test_reproduce_command_parses_back_to_the_recorded_settings(run_folder):
    record = json.loads((run_folder / "run.json").read_text())
    line = report.command_line(record)
    args = build_parser().parse_args(shlex.split(line)[1:])
    s = record["settings"]
    assert args.data == record["input"]["source"]
    assert (args.group, args.successes, args.trials) == ("site", "passed", "attempts")
    assert args.seed == record["random_seed"] == 5
    assert (args.model, args.level, args.target, args.draws) == (
        s["model"],
        s["level"],
        s["target"],
        s["draws"],
    )
    assert [float(x) for x in args.kappa_prior] == s["kappa_prior"]
    assert str(args.top) == str(s["top"]) and args.better == s["better"]


def test_cli_report_refuses_a_folder_that_is_no_run(tmp_path, capsys):
    assert main(["report", str(tmp_path / "nowhere")]) == 2
    assert "not a run folder" in capsys.readouterr().err


def _big_folder(path: Path, n: int) -> Path:
    """A run folder's tables for ``n`` invented groups (no posterior: the report reads tables)."""
    rng = np.random.default_rng(2)
    trials = rng.integers(1, 3000, n)
    successes = rng.binomial(trials, 0.2)
    observed = successes / trials
    mean = 0.2 + (observed - 0.2) * trials / (trials + 40)
    half = 1.4 / np.sqrt(trials + 40)
    path.mkdir()
    pd.DataFrame(
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
    ).to_csv(path / "estimates.csv", index=False)
    pd.DataFrame(
        {
            "quantity": ["population_mean"],
            "parameter": ["mu"],
            "mean": [0.2],
            "median": [0.2],
            "lower": [0.19],
            "upper": [0.21],
        }
    ).to_csv(path / "population.csv", index=False)
    (path / "diagnostics.json").write_text(json.dumps({"verdict": "ready", "reasons": []}))
    (path / "run.json").write_text(
        json.dumps(
            {
                "final": True,
                "verdict": "ready",
                "model": "beta-binomial",
                "engine": "exact",
                "settings": {"level": 0.95, "target": None},
                "input": {"groups": n},
            }
        )
    )
    return path


def test_large_run_keeps_the_page_small(tmp_path):
    n = 5000
    folder = _big_folder(tmp_path / "big", n)
    started = time.perf_counter()
    result = report.write_report(folder, table_rows=400)
    page = result.path.read_text(encoding="utf-8")
    body = page.split('id="estimates-table"', 1)[1].split("</table>", 1)[0]
    assert body.count("<tr") == 1 + 400 + 1  # heading, the rows shown, the gap note
    assert f"{n - 400:,} groups between these are not shown here" in body
    assert result.bytes < 1_500_000
    assert time.perf_counter() - started < 20


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
    url = (folder / report.REPORT_FILE).resolve().as_uri()
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


@pytest.mark.browser
def test_demo_report_in_headless_chromium(run_folder, tmp_path):
    if not CHROMIUM.exists():
        pytest.skip("no /usr/bin/chromium: install Debian's chromium (apt-get install chromium)")
    sync_api = pytest.importorskip(
        "playwright.sync_api", reason="playwright's Python package is not installed"
    )
    demo = tmp_path / "demo"
    assert main(["demo", "--out", str(demo), "--seed", "1"]) == 0  # the demo writes its report
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            page, *logged = _open_report(browser, demo)
            _check_page(page, *logged, query="Row")
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
