"""A run folder's tables -> one self-contained HTML page and its figures as PNG files.

The report reads the run folder through :mod:`workbench.io.runfolder` and computes nothing:
every number on the page is a value from one of its tables or documents. A part whose table
is absent says "not computed for this run". Sorting rows, choosing which rows to show and
formatting numbers is all it does to them.

The page is one file: figures are embedded as base64 PNG, the style sheet and the one small
script are inline, and a Content-Security-Policy forbids everything else (no network, no
other script). The figures are also written as PNG files for slides.

:func:`render_into` writes the page and the figures into the folder it is given, each file
atomically. It is meant for a staging folder: the run-folder writer and updater call it
before they swap the folder in whole (``write_folder(..., then=...)``,
``update_folder(..., derived=...)``), so a reader never sees a report that belongs to other
tables.

>>> from workbench.report import render
>>> render.render_into(staging, final="demo-run")       # doctest: +SKIP
"""

from __future__ import annotations

import base64
import hashlib
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
from jinja2 import Environment, StrictUndefined
from markupsafe import Markup

from ..io import atomic
from ..io.runfolder import (
    FILES,
    FolderContents,
    path_of,
    read_comparison,
    read_folder,
    refresh_record,
)
from ..models import versions
from . import audit as _audit
from . import casemix as _casemix
from . import checks as _checks
from . import page as _page
from . import ranking as _ranking
from . import sections as _sections
from ._format import fmt, pretty
from .images import Image, independent_draws, render_figures, write_figures
from .reproduce import reproduce
from .sections import CAUTION_SHORT, CAUTIONS, TABLE_ROWS

_ENV = Environment(autoescape=True, undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)
_TEMPLATE = _ENV.from_string(_page.TEMPLATE.replace(
    '\n<section id="cautions">', _audit.SECTION + '\n<section id="cautions">', 1).replace(
    '\n<section id="cautions">', _casemix.SECTION + '\n<section id="cautions">', 1).replace(
    "\n<h3>Population</h3>", _casemix.EFFECTS + "\n<h3>Population</h3>", 1))
_SCRIPT_HASH = base64.b64encode(hashlib.sha256(_page.SCRIPT.encode()).digest()).decode()
CSP = (
    "default-src 'none'; img-src data:; style-src 'unsafe-inline';"
    f" script-src 'sha256-{_SCRIPT_HASH}'; base-uri 'none'; form-action 'none'"
)

SECTIONS = (
    ("verdict-detail", "Verdict"),
    ("data", "Data"),
    ("model", "Model"),
    ("checks", "Checks"),
    ("estimates", "Estimates"),
    ("ranks", "Ranks"),
    ("predictions", "Predictions"),
    ("audit", "Audit"),
    ("cautions", "Cautions"),
    ("reproduce", "Reproduce"),
)


def _mixing_note(folder: FolderContents) -> str:
    if independent_draws(folder):
        return (
            "Not drawn: the exact engine draws independently from the posterior, so its chains"
            " mix by construction."
        )
    return f"Not drawn: the run folder holds no {FILES['population_draws']}."


def _model_parts(folder: FolderContents) -> dict:
    record = folder.record
    data_rows, notes = _sections.data_rows(record)
    return {
        "verdict": _sections.verdict(folder),
        "data_rows": data_rows,
        "notes": notes,
        "model_rows": _sections.model_rows(folder),
        "population": _sections.population(folder),
        "population_file": FILES["population"],
        "parents": _sections.parents(folder),
        "parents_file": FILES["parents"],
        "mixing_note": _mixing_note(folder),
        "verification": [
            (k.replace("_", " "), pretty(v)) for k, v in (record.get("verification") or {}).items()
        ],
    }


def _result_parts(folder: FolderContents, comparison, table_rows: int) -> dict:
    checks, checks_line = _checks.checks(folder)
    comparison_table, comparison_lines = _checks.comparison(comparison)
    estimates, estimates_note = _sections.estimates(folder, table_rows)
    needed, needed_why = _ranking.needed(folder)
    predictions, predictions_note = _ranking.predictions(folder)
    ranking = folder.record.get("ranking") or {}
    source = ranking.get("funnel_benchmark_source") or "benchmark"
    return {
        "checks": checks,
        "checks_line": checks_line,
        "comparison": comparison_table,
        "comparison_lines": comparison_lines,
        "estimates": estimates,
        "estimates_note": estimates_note,
        "ranks": _ranking.ranks(folder),
        "targets": _ranking.targets(folder),
        "target_why": "no target rate was given (--target)"
        if folder.settings.get("target") is None
        else "not computed for this run",
        "funnel_caption": f"Observed rates against trials. The lines are exact binomial control"
        f" limits around the {source} {fmt(ranking.get('funnel_benchmark'))}: 95% (grey,"
        " shaded) and 99.8% (dashed). Points outside them are marked by colour and shape.",
        "funnel_outside": _ranking.funnel_outside(folder),
        "new_group": _ranking.new_group(folder),
        "predictions": predictions,
        "predictions_note": predictions_note,
        "needed": needed,
        "needed_why": needed_why or "not computed for this run",
    }


def render(
    folder: FolderContents,
    images: Mapping[str, Image],
    *,
    comparison: tuple[dict, pd.DataFrame | None] | None = None,
    name: str | None = None,
    table_rows: int = TABLE_ROWS,
) -> str:
    """The report's HTML text for a folder as read back and its rendered figures.

    ``comparison`` is :func:`workbench.io.runfolder.read_comparison`'s answer; ``name`` the
    folder's name once in place (a staging folder has another).
    """
    name = name or folder.path.name
    title, subtitle = _sections.title(folder.record, Path(name))
    context = {
        "csp": CSP,
        "version": versions().get("workbench", "?"),
        "style": Markup(_page.STYLE),
        "script": Markup(_page.SCRIPT),
        "title": title,
        "subtitle": subtitle,
        "sections": SECTIONS,
        "images": images,
        "figures_dir": FILES["figures"],
        "caution_short": CAUTION_SHORT,
        "cautions": _casemix.cautions(folder),
        "final": folder.final,
        "folder_name": name,
        "reproduce": reproduce(folder.record, folder.path, name),
        "created": time.strftime("%Y-%m-%d %H:%M:%S %z"),
        **_model_parts(folder),
        **_result_parts(folder, comparison, table_rows),
        "audit": _audit.parts(folder),
        "covariates": _casemix.parts(folder),
        "level": folder.settings.get("level"),
    }
    return _TEMPLATE.render(**context)


@dataclass
class Report:
    """What :func:`render_into` wrote."""

    path: Path
    figures: list[Path]
    seconds: float
    bytes: int
    final: bool


def _comparison_of(folder: Path, final: Path) -> tuple[dict, pd.DataFrame | None] | None:
    """The comparison the run belongs to: in the folder, or beside it under its final name."""
    found = read_comparison(folder)
    if found is None and final != folder:
        found = read_comparison(final)
    return found


def render_into(
    folder: str | Path, *, final: str | Path | None = None, table_rows: int = TABLE_ROWS
) -> Report:
    """Write the report page and its PNG figures into ``folder``, each file atomically.

    Parameters
    ----------
    folder : path
        A run folder, usually the staging copy the run-folder writer fills before it swaps
        the folder in.
    final : path, optional
        Where the folder will live once swapped in (default: ``folder``): its name heads the
        page and the reproduce commands, and a comparison written beside it is found there.
    table_rows : int
        Estimates rows shown whole; beyond, the highest and lowest half each.

    Figures no longer drawn (their table is gone) are removed from the figures folder. The
    :class:`Report` names the files where they will be once the folder is in place.
    """
    started = time.perf_counter()
    folder = Path(folder)
    final = Path(final) if final is not None else folder
    contents = read_folder(folder)
    images = render_figures(contents)
    html = render(
        contents,
        images,
        comparison=_comparison_of(folder, final),
        name=final.name,
        table_rows=table_rows,
    )
    written = write_figures(path_of(folder, "figures"), images)
    atomic.write_text(path_of(folder, "report"), html)
    refresh_record(folder)  # the record lists and digests the files just written
    return Report(
        path_of(final, "report"),
        [path_of(final, "figures") / p.name for p in written],
        time.perf_counter() - started,
        len(html.encode()),
        contents.final,
    )


def format_report(report: Report) -> str:
    """One line for the terminal (moving to the command line)."""
    return (
        f"wrote {report.path} ({report.bytes / 1024:.0f} KB, {len(report.figures)} figures"
        f" in {report.path.parent.name}/{FILES['figures']}/, {report.seconds:.1f} s)"
    )


__all__ = ["CAUTIONS", "CSP", "Report", "TABLE_ROWS", "format_report", "render", "render_into"]
