"""Tables + figures -> one self-contained HTML file, ``report.html``, in the run folder.

The report reads what the run folder holds and computes nothing: every number on the page
is a value from one of its files (estimates.csv, population.csv, diagnostics.json, run.json,
and where present ranks.csv, funnel.csv, funnel_curve.csv, targets.json, pairwise.csv,
trials_needed.csv, checks.json, ppc_statistics.csv, group_checks.csv, predictions and
comparison tables). A part whose file is absent says "not computed for this run". Sorting
rows, choosing which rows to show and formatting numbers is all it does to them.

The page is one file: figures are embedded as base64 PNG, the style sheet and the one small
script are inline, and a Content-Security-Policy forbids everything else (no network, no
other script). The figures are also written as PNG files under ``figures/`` for slides.
Every file is written atomically.

>>> from workbench import report
>>> report.write_report("demo-run")                     # doctest: +SKIP
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
import math
import shlex
import struct
import time
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from jinja2 import Environment, StrictUndefined
from markupsafe import Markup

from ..models import DataError, versions

from ..figures import plots
from ..io import atomic as _io
from . import page as _report_page

REPORT_FILE = "report.html"
FIGURES_DIR = "figures"
#: Estimates table: up to this many rows shown whole; beyond, the highest and lowest half each.
TABLE_ROWS = 1000
#: rows of the shorter tables (best/worst placed, groups outside the limits, trials needed)
SHORT_ROWS = 15

CAUTIONS = (
    "Intervals overlap. Groups whose intervals overlap are not shown to differ, and neighbouring"
    " ranks are rarely distinguishable; read every estimate and rank with its interval.",
    "Case mix and data quality are not modelled unless covariates say so. A group that serves"
    " harder cases, or records its outcomes differently, can look worse without being worse.",
    "A rank is no verdict on a person or an institution. It summarises these data under this"
    " model, nothing more.",
    "Decisions defer to local governance and qualified review. This report is one input to"
    " that review, never a substitute for it.",
)

CAUTION_SHORT = (
    "Intervals overlap; case mix and data quality are not modelled unless covariates say so; a"
    " rank is no verdict on a person or an institution; decisions defer to local governance and"
    " qualified review."
)

#: display names of the estimates columns (others keep their file name)
COLUMN_LABELS = {
    "group": "group",
    "successes": "successes",
    "trials": "trials",
    "observed_rate": "observed",
    "posterior_mean": "estimate",
    "posterior_median": "median",
    "lower": "lower",
    "upper": "upper",
    "shrinkage": "shrinkage",
    "rank_median": "rank",
    "rank_lower": "rank low",
    "rank_upper": "rank high",
    "prob_above_target": "P(above target)",
    "prob_below_target": "P(below target)",
    "target_flag": "target flag",
}

STATISTIC_NAMES = {
    "sd_rate": "sd of observed rates",
    "max_rate": "highest observed rate",
    "min_rate": "lowest observed rate",
    "zero_success_groups": "groups with no successes",
    "chi_square": "chi-square discrepancy",
}

#: estimates.csv columns left off the page to keep the table narrow (they stay in the file)
PAGE_HIDDEN = ("posterior_median", "prob_below_target")

HYPER_ORDER = ("mu", "kappa", "between_group_sd", "alpha", "sigma")

#: tables the report reads, by file name (besides estimates.csv and population.csv)
TABLE_FILES = (
    "ranks",
    "funnel",
    "funnel_curve",
    "pairwise",
    "trials_needed",
    "ppc_statistics",
    "group_checks",
    "predictions",
    "comparison",
)
DOCUMENT_FILES = ("checks", "targets", "comparison", "predictions")


# -- reading the folder ------------------------------------------------------------------------


@dataclass
class Folder:
    """What the report reads from a run folder: tables, documents and a few draws."""

    path: Path
    record: dict
    diagnostics: dict
    estimates: pd.DataFrame
    population: pd.DataFrame | None
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    documents: dict[str, dict] = field(default_factory=dict)
    draws: dict[str, np.ndarray] = field(default_factory=dict)
    divergent: np.ndarray | None = None


def _read_csv(path: Path) -> pd.DataFrame:
    """A run-folder CSV with names kept as text ("NA" stays a name) and blanks as missing."""
    text_columns = {
        c: str
        for c in (
            "group",
            "group_a",
            "group_b",
            "status",
            "target_flag",
            "outside_95",
            "outside_998",
            "model",
            "run",
            "engine",
            "preference",
            "loo_method",
        )
    }
    return pd.read_csv(path, dtype=text_columns, keep_default_na=False, na_values=[""])


def read_folder(path: str | Path) -> Folder:
    """Read a run folder's tables and documents; raise DataError if it is not a run folder."""
    path = Path(path)
    record_path = path / "run.json"
    if not record_path.exists() or not (path / "estimates.csv").exists():
        raise DataError(
            f"{str(path)!r} is not a run folder (no run.json or estimates.csv); give a folder"
            " written by 'workbench fit' or 'workbench demo'."
        )
    record = json.loads(record_path.read_text(encoding="utf-8"))
    diag_path = path / "diagnostics.json"
    diagnostics = json.loads(diag_path.read_text(encoding="utf-8")) if diag_path.exists() else {}
    population = _read_csv(path / "population.csv") if (path / "population.csv").exists() else None
    folder = Folder(path, record, diagnostics, _read_csv(path / "estimates.csv"), population)
    for name in TABLE_FILES:
        if (path / f"{name}.csv").exists():
            folder.tables[name] = _read_csv(path / f"{name}.csv")
    for name in DOCUMENT_FILES:
        if (path / f"{name}.json").exists():
            folder.documents[name] = json.loads((path / f"{name}.json").read_text(encoding="utf-8"))
    _read_comparison(folder)
    if (path / "posterior.nc").exists():
        folder.draws, folder.divergent = _read_draws(path / "posterior.nc")
    return folder


def _read_comparison(folder: Folder) -> None:
    """comparison.csv / comparison.json: in the run folder, or in the folder around it when
    the run is one of several fitted and compared together (``workbench compare --data``)."""
    for where in (folder.path, folder.path.parent):
        doc_path = where / "comparison.json"
        if not doc_path.exists():
            continue
        doc = json.loads(doc_path.read_text(encoding="utf-8"))
        runs = [str(m.get("run")) for m in doc.get("models", [])]
        if where != folder.path and folder.path.name not in runs:
            continue
        folder.documents["comparison"] = {
            **doc,
            "_here": folder.path.name if where != folder.path else None,
        }
        if (where / "comparison.csv").exists():
            folder.tables["comparison"] = _read_csv(where / "comparison.csv")
        return


def _read_draws(path: Path) -> tuple[dict[str, np.ndarray], np.ndarray | None]:
    """Draws of the population parameters (chain, draw) and the divergence flags, if stored.

    Only these small variables are read; the per-group draws stay on disk.
    """
    import h5netcdf

    draws: dict[str, np.ndarray] = {}
    divergent = None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with h5netcdf.File(str(path), "r") as nc:
            if "posterior" in nc.groups:
                post = nc.groups["posterior"]
                scalars = [
                    name
                    for name, var in post.variables.items()
                    if tuple(var.dimensions) == ("chain", "draw") and name != "theta_new"
                ]
                ordered = [n for n in HYPER_ORDER if n in scalars]
                ordered += sorted(n for n in scalars if n not in ordered)
                for name in ordered[:4]:
                    draws[name] = np.asarray(post.variables[name][...], dtype=float)
            stats = nc.groups.get("sample_stats")
            if stats is not None and "diverging" in stats.variables:
                divergent = np.asarray(stats.variables["diverging"][...], dtype=bool)
    return draws, divergent


# -- figures -------------------------------------------------------------------------------------


@dataclass
class Image:
    """One rendered figure: PNG bytes and what the page needs to show it."""

    name: str
    png: bytes
    alt: str
    width: int = 0
    height: int = 0

    def __post_init__(self) -> None:
        # PNG header: width and height are the two big-endian ints after the IHDR tag;
        # shown at the figures' own scale (FIGURE_DPI px per inch), sharp on dense screens
        w, h = struct.unpack(">II", self.png[16:24])
        self.width, self.height = round(w * PAGE_DPI / FIGURE_DPI), round(h * PAGE_DPI / FIGURE_DPI)

    @property
    def uri(self) -> str:
        return "data:image/png;base64," + base64.b64encode(self.png).decode("ascii")


#: pixels per inch of the PNG files (sharp on slides) and of the figures on the page
FIGURE_DPI = 140
PAGE_DPI = 110


def _png(fig) -> bytes:
    """The figure as a 256-colour PNG: about a third of the size, palette colours kept exact
    to within one unit (octree quantisation, no dithering)."""
    from PIL import Image as PILImage

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=FIGURE_DPI, metadata={"Software": None}, facecolor="white")
    buf.seek(0)
    with PILImage.open(buf) as full:
        small = full.convert("RGB").quantize(
            colors=256, method=PILImage.Quantize.FASTOCTREE, dither=PILImage.Dither.NONE
        )
    out = io.BytesIO()
    small.save(out, format="PNG")
    return out.getvalue()


def figure_makers(folder: Folder) -> dict[str, tuple[Callable[[], object], str]]:
    """The figures this folder can show: name -> (make figure, alt text)."""
    t, d = folder.tables, folder.documents
    settings = folder.record.get("settings", {})
    ranking = folder.record.get("ranking") or {}
    n = len(folder.estimates)
    makers: dict[str, tuple[Callable[[], object], str]] = {}
    makers["intervals"] = (
        lambda: plots.plot_intervals(
            folder.estimates, target=settings.get("target"), level=settings.get("level")
        ),
        f"Estimates and intervals of {n} groups, ordered from the highest estimate.",
    )
    makers["shrinkage"] = (
        lambda: plots.plot_shrinkage(folder.estimates, folder.population),
        f"Observed rate against estimate for {n} groups, marker area by trials.",
    )
    if "ranks" in t:
        makers["ranks"] = (
            lambda: plots.plot_ranks(t["ranks"], k=ranking.get("top_k")),
            "Rank medians and intervals, best placed first.",
        )
    if "funnel" in t:
        source = ranking.get("funnel_benchmark_source") or "benchmark"
        makers["funnel"] = (
            lambda: plots.plot_funnel(t["funnel"], t.get("funnel_curve"), benchmark_name=source),
            "Funnel plot: observed rate against trials with 95% and 99.8% control limits.",
        )
    checks = d.get("checks")
    if checks and "ppc_statistics" in t:
        rows = [r for r in checks.get("statistics", []) if r.get("verdict") != "not computed"]
        makers["predictive"] = (
            lambda: plots.plot_predictive(rows, t["ppc_statistics"], names=STATISTIC_NAMES),
            "Posterior predictive checks: replicated test statistics against the observed ones.",
        )
    if (
        "group_checks" in t
        and "loo_pit" in t["group_checks"]
        and t["group_checks"]["loo_pit"].notna().any()
    ):
        makers["loo_pit"] = (
            lambda: plots.plot_loo_pit(t["group_checks"]),
            "Histogram of LOO-PIT values.",
        )
    if folder.draws:
        makers["population"] = (
            lambda: plots.plot_population(folder.draws, folder.population),
            "Posterior histograms of the population parameters.",
        )
        if not _independent(folder):
            makers["mixing"] = (
                lambda: plots.plot_mixing(folder.draws, divergent=folder.divergent),
                "Trace and rank histogram per chain of each population parameter.",
            )
    return makers


def _independent(folder: Folder) -> bool:
    run = folder.diagnostics.get("run", {})
    if "independent_draws" in run:
        return bool(run["independent_draws"])
    return folder.record.get("engine") == "exact"


def render_figures(folder: Folder) -> dict[str, Image]:
    """Draw every figure the folder can show and keep it as PNG bytes."""
    images = {}
    for name, (make, alt) in figure_makers(folder).items():
        images[name] = Image(name, _png(plots.figure_of(make())), alt)
    return images


# -- formatting (no statistics: values from the files, shown as text) ---------------------------


def _missing(v) -> bool:
    return v is None or (isinstance(v, float) and not math.isfinite(v)) or v is pd.NA


def fmt(v, kind: str = "num") -> str:
    """A value as text: ``rate`` (3 decimals), ``prob``, ``int``, ``rank``, ``num``."""
    if _missing(v):
        return ""
    if isinstance(v, bool | np.bool_):
        return "yes" if v else "no"
    if isinstance(v, str):
        return v
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(x):
        return ""
    if abs(x) < 1e-12:
        x = 0.0  # rounding noise such as -1.1e-15 reads as zero
    if kind == "int":
        return f"{x:.0f}"
    if kind == "rank":
        return f"{x:g}"
    if kind == "prob":
        return f"{x:.3f}"
    if kind == "rate":
        return f"{x:.3g}" if 0 < abs(x) < 0.01 else f"{x:.3f}"
    return f"{x:.4g}"


def _column_kind(name: str, series: pd.Series) -> str:
    if name in ("successes", "trials", "trials_needed", "replicates", "flagged"):
        return "int"
    if name.startswith("rank_"):
        return "rank"
    if name.startswith("prob_") or name in ("p_value", "shrinkage"):
        return "prob"
    if name in (
        "observed_rate",
        "posterior_mean",
        "posterior_median",
        "lower",
        "upper",
        "benchmark",
    ) or name.startswith(("lower_", "upper_")):
        return "rate"
    if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
        return "num"
    return "t"


@dataclass
class Table:
    """A table ready for the page: columns (label, kind) and rows of cells (text, class)."""

    columns: list[dict]
    rows: list[dict]


def page_table(
    frame: pd.DataFrame,
    *,
    labels: Mapping[str, str] | None = None,
    row_class: Callable[[dict], str] | None = None,
    kinds: Mapping[str, str] | None = None,
) -> Table:
    """Turn a DataFrame into a page table, every value formatted as text."""
    labels = dict(labels or {})
    kinds = dict(kinds or {})
    cols = list(frame.columns)
    col_kinds = {c: kinds.get(c) or _column_kind(str(c), frame[c]) for c in cols}
    columns = [
        {"label": labels.get(str(c), str(c)), "kind": "num" if col_kinds[c] != "t" else "t"}
        for c in cols
    ]
    rows = []
    for record in frame.to_dict(orient="records"):
        cells = []
        for c in cols:
            cls = "t" if col_kinds[c] == "t" else ""
            if c == "target_flag":
                cls = "t flag"
            cells.append({"text": fmt(record[c], col_kinds[c]), "cls": cls})
        rows.append({"cells": cells, "cls": row_class(record) if row_class else "", "gap": None})
    return Table(columns, rows)


def _gap(table: Table, text: str, at: int) -> None:
    table.rows.insert(at, {"gap": text, "cells": [], "cls": ""})


def _pretty(value) -> str:
    if isinstance(value, dict | list) and not value:
        return "none"
    if isinstance(value, dict | list):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, float):
        return fmt(value)
    return "" if value is None else str(value)


# -- the page's parts ----------------------------------------------------------------------------


def _title(record: dict, path: Path) -> tuple[str, str]:
    source = (record.get("input") or {}).get("source")
    name = Path(str(source)).name if source else path.name
    rec_input = record.get("input") or {}
    sub = (
        f"{record.get('model', '?')} model, {record.get('engine', '?')} engine;"
        f" {rec_input.get('groups', '?')} groups; run folder {path.name};"
        f" fitted {record.get('created', '?')}"
    )
    return name, sub


def _verdict(folder: Folder) -> dict:
    diag = folder.diagnostics
    verdict = diag.get("verdict") or folder.record.get("verdict") or "unknown"
    ready = verdict == "ready"
    summary = diag.get("summary", {})
    run = diag.get("run", {})
    rows = [
        ("verdict", verdict),
        ("largest R-hat", fmt(summary.get("max_r_hat"))),
        ("smallest bulk ESS", fmt(summary.get("min_ess_bulk"), "int")),
        ("smallest tail ESS", fmt(summary.get("min_ess_tail"), "int")),
        ("quantities checked", fmt(summary.get("quantities"), "int")),
    ]
    for key, label in (
        ("divergences", "divergent transitions"),
        ("treedepth_hits", "draws at the maximum tree depth"),
        ("ebfmi", "E-BFMI per chain"),
    ):
        if key in run:
            value = run[key]
            rows.append(
                (
                    label,
                    ", ".join(fmt(v) for v in value)
                    if isinstance(value, list)
                    else fmt(value, "int"),
                )
            )
    rows.append(("chains x draws", f"{run.get('chains', '?')} x {run.get('draws_per_chain', '?')}"))
    th = diag.get("thresholds", {})
    if th:
        marks = f"R-hat < {th.get('rhat')}, bulk and tail ESS >= {fmt(th.get('ess_bulk'), 'int')}"
        if run.get("independent_draws"):
            marks += (
                f"; grid: density at its edge <= {th.get('grid_edge_density')}, change"
                f" under refinement <= {th.get('grid_refinement_change')}"
            )
        else:
            marks += (
                f", divergences <= {th.get('divergences')}, E-BFMI >= {th.get('ebfmi')},"
                f" share at maximum tree depth <= {th.get('treedepth_share')}"
            )
        rows.append(("pass marks", marks))
    worst = None
    if diag.get("worst_quantities"):
        frame = pd.DataFrame(diag["worst_quantities"]).head(8)
        worst = page_table(
            frame,
            labels={
                "r_hat": "R-hat",
                "ess_bulk": "bulk ESS",
                "ess_tail": "tail ESS",
                "mcse_mean": "MCSE of mean",
                "mcse_lower": "MCSE of lower end",
                "mcse_upper": "MCSE of upper end",
            },
            kinds={"ess_bulk": "int", "ess_tail": "int"},
        )
    return {
        "cls": "ready" if ready else "not-ready",
        "headline": "READY: the convergence checks passed"
        if ready
        else "NOT READY: nothing in this report is final",
        "meaning": (
            "R-hat, effective sample sizes and the sampler's own checks are within their pass"
            " marks, so the numbers below may be used, with the cautions at the end."
            if ready
            else "The convergence diagnostics failed. Every estimate, rank and flag below is"
            " provisional and must not be used for decisions until a re-run is ready."
        ),
        "reasons": [r.get("text", _pretty(r)) for r in diag.get("reasons", [])],
        "remedies": list(diag.get("remedies", [])),
        "notes": list(diag.get("notes", [])),
        "rows": rows,
        "worst": worst,
    }


def _data_rows(record: dict) -> tuple[list, list]:
    inp = dict(record.get("input") or {})
    rows = []
    labels = [
        ("source", "source file"),
        ("layout", "layout"),
        ("rows_read", "rows read"),
        ("rows_used", "rows used"),
        ("rows_dropped", "rows dropped"),
        ("groups", "groups"),
        ("groups_on_several_rows", "groups on several rows (summed)"),
        ("total_successes", "successes in all"),
        ("total_trials", "trials in all"),
    ]
    columns = inp.pop("columns", None)
    for key, label in labels:
        if key in inp:
            rows.append((label, _pretty(inp.pop(key))))
    if columns:
        rows.insert(2, ("columns used", ", ".join(f"{k} = {v!s}" for k, v in columns.items())))
    zero = inp.pop("zero_trial_groups", None)
    if zero is not None:
        shown = ", ".join(str(z) for z in zero[:20])
        more = f" and {len(zero) - 20} more" if len(zero) > 20 else ""
        listed = f": {shown}{more}" if zero else ""
        rows.append(("groups with no trials", f"{len(zero)}{listed}"))
    fingerprint = inp.pop("fingerprint", None)
    for key, value in inp.items():
        rows.append((key.replace("_", " "), _pretty(value)))
    if fingerprint:
        rows.append(("data fingerprint (SHA-256)", fingerprint))
    return rows, list(record.get("notes") or [])


def _model_rows(folder: Folder) -> list:
    rec = folder.record
    s = rec.get("settings", {})
    rows = [
        ("model", rec.get("model")),
        ("engine", rec.get("engine")),
        ("engine asked for", s.get("engine")),
    ]
    priors = rec.get("priors") or {}
    for key, value in priors.items():
        if isinstance(value, str):
            rows.append((f"prior of {key}", value))
    run = folder.diagnostics.get("run", {})
    rows.append(
        (
            "draws",
            f"{run.get('chains', s.get('chains'))} chains x"
            f" {run.get('draws_per_chain', s.get('draws'))} draws",
        )
    )
    if rec.get("engine") == "mcmc":
        rows.append(("warm-up steps per chain", _pretty(s.get("tune"))))
        rows.append(("NUTS target acceptance", _pretty(s.get("target_accept"))))
    rows.append(("interval mass (level)", _pretty(s.get("level"))))
    rows.append(("target rate", _pretty(s.get("target")) or "none"))
    rows.append(("random seed", _pretty(rec.get("random_seed"))))
    rows.append(("fit time", f"{_pretty(rec.get('fit_seconds'))} s"))
    if rec.get("retry"):
        rows.append(("retry", _pretty(rec["retry"])))
    return rows


def _population(folder: Folder) -> Table | None:
    pop = folder.population
    if pop is None or pop.empty:
        return None
    level = folder.record.get("settings", {}).get("level")
    frame = pop.drop(columns=[c for c in ("parameter",) if c in pop.columns])
    frame = frame.assign(quantity=frame["quantity"].astype(str).str.replace("_", " "))
    label = f"{level:.0%}" if isinstance(level, float) else ""
    return page_table(
        frame,
        labels={"lower": f"{label} lower", "upper": f"{label} upper"},
        kinds={c: "num" for c in ("mean", "median", "lower", "upper")},
    )


def _checks(folder: Folder) -> tuple[dict | None, str]:
    doc = folder.documents.get("checks")
    if not doc:
        return None, ""
    rows = []
    for r in doc.get("statistics", []):
        rows.append(
            {
                "statistic": STATISTIC_NAMES.get(r.get("statistic"), r.get("statistic")),
                "observed": r.get("observed"),
                "replicated 90% range": ""
                if r.get("replicated_lower") is None
                else f"{fmt(r.get('replicated_lower'))} to {fmt(r.get('replicated_upper'))}",
                "p-value": r.get("p_value"),
                "verdict": r.get("verdict"),
                "what it measures": r.get("description"),
            }
        )
    frame = pd.DataFrame(rows)
    table = page_table(
        frame,
        kinds={"p-value": "prob", "observed": "num", "replicated 90% range": "t", "verdict": "t"},
        row_class=lambda r: "flag-below" if r.get("verdict") == "misfit" else "",
    )
    loo = doc.get("loo") or {}
    loo_rows = None
    if loo.get("available"):
        high = loo.get("high_k_groups") or []
        loo_rows = [
            ("elpd_loo (SE)", f"{fmt(loo.get('elpd_loo'))} ({fmt(loo.get('se'))})"),
            ("p_loo", fmt(loo.get("p_loo"))),
            ("groups", fmt(loo.get("groups"), "int")),
            ("likelihood", _pretty(loo.get("likelihood"))),
            (
                f"groups with Pareto k above {fmt(loo.get('good_k'))}",
                f"{len(high)}"
                + (
                    ": "
                    + ", ".join(
                        f"{h['group']} ({fmt(h.get('pareto_k'))}, {h.get('loo_method')})"
                        for h in high[:10]
                    )
                    if high
                    else ""
                ),
            ),
            ("largest Pareto k", fmt(loo.get("max_pareto_k"))),
        ]
        for n in loo.get("notes") or []:
            loo_rows.append(("note", n))
        pit = doc.get("loo_pit") or {}
        if pit.get("verdict"):
            loo_rows.append(
                (
                    "LOO-PIT",
                    f"{pit['verdict']}"
                    + (
                        f" (Kolmogorov-Smirnov distance {fmt(pit.get('ks_statistic'))},"
                        f" p {fmt(pit.get('ks_p_value'))})"
                        if pit.get("ks_statistic") is not None
                        else ""
                    ),
                )
            )
    verdict = doc.get("verdict", "?")
    misfits = [STATISTIC_NAMES.get(m, m) for m in doc.get("misfit_statistics", [])]
    line = (
        "Checks: the model reproduces every test statistic of the data."
        if verdict == "consistent"
        else f"Checks: {verdict}"
        + (f" on {', '.join(misfits)}" if misfits else "")
        + "; see section 4."
    )
    return {
        "verdict": verdict,
        "badge": "good" if verdict == "consistent" else "bad",
        "reading": doc.get("p_value_reading", ""),
        "table": table,
        "loo": loo_rows,
    }, line


def _comparison(folder: Folder) -> tuple[Table | None, list[str]]:
    frame = folder.tables.get("comparison")
    doc = folder.documents.get("comparison") or {}
    if frame is None and isinstance(doc.get("models"), list):
        frame = pd.DataFrame(doc["models"])
    if frame is None or frame.empty:
        return None, []
    here = doc.get("_here")
    keep = [
        c
        for c in (
            "rank",
            "run",
            "model",
            "engine",
            "elpd_loo",
            "se",
            "p_loo",
            "elpd_difference",
            "difference_se",
            "preference",
            "high_k_groups",
            "final",
        )
        if c in frame.columns
    ]
    labels = {
        "elpd_loo": "elpd_loo",
        "se": "SE",
        "elpd_difference": "difference from best",
        "difference_se": "SE of difference",
        "high_k_groups": "groups with high k",
    }
    table = page_table(
        frame[keep] if keep else frame,
        labels=labels,
        kinds={"rank": "int", "high_k_groups": "int"},
        row_class=lambda r: "flag-above" if here and str(r.get("run")) == here else "",
    )
    lines = []
    if doc.get("criterion"):
        lines.append(f"Criterion: {doc['criterion']}.")
    if here:
        lines.append(f"This run is {here!r} (highlighted); the comparison was written beside it.")
    lines += [str(x) for x in doc.get("readings", [])]
    lines += [f"Note: {x}" for x in doc.get("notes", [])]
    return table, lines


def _estimates(folder: Folder, table_rows: int) -> tuple[Table, str]:
    est = folder.estimates
    n = len(est)
    first = [c for c in COLUMN_LABELS if c in est.columns and c not in PAGE_HIDDEN]
    est = est[first + [c for c in est.columns if c not in first and c not in PAGE_HIDDEN]]
    order = est.sort_values(["posterior_mean", "group"], ascending=[False, True], kind="stable")
    level = folder.record.get("settings", {}).get("level")
    lab = dict(COLUMN_LABELS)
    if isinstance(level, float):
        lab["lower"], lab["upper"] = f"{level:.0%} lower", f"{level:.0%} upper"

    def row_class(r):
        flag = str(r.get("target_flag") or "")
        return "flag-above" if flag.startswith("above") else "flag-below" if flag else ""

    if n <= table_rows:
        note = (
            f"All {n} groups, highest estimate first. Interval: central {fmt(level)}"
            " posterior interval. The same numbers, with the posterior median and"
            " P(below target), are in estimates.csv."
        )
        return page_table(order, labels=lab, row_class=row_class), note
    half = table_rows // 2
    shown = pd.concat([order.head(half), order.tail(half)])
    table = page_table(shown, labels=lab, row_class=row_class)
    _gap(
        table,
        f"{n - 2 * half:,} groups between these are not shown here; all {n:,} are in estimates.csv",
        half,
    )
    note = (
        f"The {half:,} highest and the {half:,} lowest estimates of {n:,} groups (the page"
        f" stays small); every group is in estimates.csv. The filter searches the rows"
        " shown."
    )
    return table, note


def _ranks(folder: Folder) -> dict | None:
    ranks = folder.tables.get("ranks")
    if ranks is None:
        return None
    rec = folder.record.get("ranking") or {}
    k = rec.get("top_k") or rec.get("top") or 5
    better = rec.get("better", "higher")
    order = ranks.sort_values(["rank_median", "group"], kind="stable")
    labels = {
        "rank_median": "rank",
        "rank_lower": "rank low",
        "rank_upper": "rank high",
        "prob_best_k": f"P(in best {k})",
        "prob_worst_k": f"P(in worst {k})",
    }
    best = page_table(
        order.head(SHORT_ROWS)[
            [
                c
                for c in ("group", "rank_median", "rank_lower", "rank_upper", "prob_best_k")
                if c in order
            ]
        ],
        labels=labels,
    )
    worst = page_table(
        order.tail(SHORT_ROWS).iloc[::-1][
            [
                c
                for c in ("group", "rank_median", "rank_lower", "rank_upper", "prob_worst_k")
                if c in order
            ]
        ],
        labels=labels,
    )
    level = rec.get("level") or folder.record.get("settings", {}).get("level")
    note = (
        f"Rank 1 is the best placed: the {better} rate is better. In every posterior draw"
        f" the groups are ranked; the rank shown is the median over the draws, with its"
        f" central {fmt(level)} interval. P(in best {k}) is the share of draws in which the"
        f" group is among the best {k}."
    )
    pair = folder.tables.get("pairwise")
    pair_table = None
    if pair is not None and not pair.empty:
        names = list(dict.fromkeys(pair["group_a"].tolist()))
        wide = pair.pivot(index="group_a", columns="group_b", values="prob_a_better")
        wide = wide.reindex(index=names, columns=names)
        wide.insert(0, "group", wide.index.astype(str))
        wide.columns = ["group", *[plots.text_label(c, 18) for c in names]]
        pair_table = page_table(
            wide.reset_index(drop=True), kinds={c: "prob" for c in wide.columns[1:]}
        )
    return {
        "note": note,
        "caption": f"Rank medians and intervals; the best {k} and worst {k} positions in colour,"
        f" with P(in best {k}) or P(in worst {k}) at the right.",
        "best": best,
        "worst": worst,
        "pairwise": pair_table,
        "pairwise_note": f"Groups compared: {rec.get('pairwise_groups', 'as listed')}."
        " Ties count one half.",
    }


def _targets(folder: Folder) -> list | None:
    doc = folder.documents.get("targets")
    if not doc:
        return None
    rows = [
        ("target rate", fmt(doc.get("target"))),
        ("false-flag level", fmt(doc.get("fdr_level"))),
    ]
    for side in ("above", "below"):
        part = doc.get(side) or {}
        rows.append(
            (
                f"flagged {side} target",
                f"{fmt(part.get('flagged'), 'int')} groups"
                f" (expected share of false flags {fmt(part.get('expected_false_share'))})",
            )
        )
    if doc.get("rule"):
        rows.append(("rule", doc["rule"]))
    return rows


def _funnel_outside(folder: Folder) -> Table | None:
    fun = folder.tables.get("funnel")
    if fun is None or "outside_998" not in fun:
        return None
    flagged = fun[fun["outside_998"].fillna("").astype(str).str.strip() != ""]
    if flagged.empty:
        return None
    cols = [
        c
        for c in ("group", "successes", "trials", "observed_rate", "outside_998", "posterior_mean")
        if c in flagged
    ]
    shown = flagged.sort_values(["trials", "group"], ascending=[False, True]).head(SHORT_ROWS * 2)
    return page_table(
        shown[cols],
        labels={"observed_rate": "observed", "outside_998": "side", "posterior_mean": "estimate"},
    )


def _needed(folder: Folder) -> tuple[dict | None, str]:
    rec = folder.record.get("ranking") or {}
    doc = rec.get("trials_needed")
    table = folder.tables.get("trials_needed")
    if not isinstance(doc, dict) or table is None:
        why = doc if isinstance(doc, str) else "not computed for this run"
        return None, why.removeprefix("not computed: ")
    rows = [
        ("target rate", fmt(doc.get("target"))),
        ("settled when", _pretty(doc.get("settled_when"))),
        ("chance asked for", fmt(doc.get("settle_chance"))),
        ("already settled", fmt(doc.get("already_settled"), "int")),
        ("settle with more trials", fmt(doc.get("settles_with_more_trials"), "int")),
        (
            f"not within {fmt(doc.get('max_trials'), 'int')} more trials",
            fmt(doc.get("not_within_max_trials"), "int"),
        ),
        ("method", _pretty(doc.get("method"))),
    ]
    more = table[table["status"].astype(str) == "settles with more trials"]
    more = more.sort_values(["trials_needed", "group"], kind="stable").head(SHORT_ROWS * 2)
    shown = None
    if not more.empty:
        more = more.drop(columns=["status"])
        shown = page_table(
            more,
            labels={"trials_needed": "more trials needed", "prob_settled": "chance then settled"},
        )
    return {
        "rows": rows,
        "table": shown,
        "note": f"The groups closest to settled first (at most {SHORT_ROWS * 2});"
        " every group is in trials_needed.csv.",
    }, ""


def _predictions(folder: Folder) -> tuple[Table | None, str]:
    frame = folder.tables.get("predictions")
    if frame is None or frame.empty:
        return None, ""
    rec = folder.record.get("prediction") or {}
    new = (
        frame["is_new_group"].astype(str).str.lower() == "true"
        if "is_new_group" in frame
        else pd.Series(False, index=frame.index)
    )
    groups = frame[~new]
    if "predicted_mean" in frame:
        groups = groups.sort_values(
            ["predicted_mean", "group"], ascending=[False, True], kind="stable"
        )
    n = len(groups)
    cut = SHORT_ROWS
    shown = groups if n <= 2 * cut else pd.concat([groups.head(cut), groups.tail(cut)])
    shown = pd.concat([frame[new], shown])
    cols = [
        c
        for c in (
            "group",
            "future_trials",
            "predicted_mean",
            "lower",
            "upper",
            "predicted_rate_mean",
        )
        if c in shown
    ]
    level = rec.get("level") or folder.record.get("settings", {}).get("level")
    lab = f"{level:.0%} " if isinstance(level, float) else ""
    table = page_table(
        shown[cols] if cols else shown,
        labels={
            "future_trials": "future trials",
            "predicted_mean": "expected successes",
            "lower": f"{lab}lower",
            "upper": f"{lab}upper",
            "predicted_rate_mean": "expected rate",
        },
        kinds={
            "lower": "int",
            "upper": "int",
            "future_trials": "int",
            "predicted_mean": "num",
            "predicted_rate_mean": "rate",
        },
        row_class=lambda r: "flag-above" if str(r.get("group")) == "(new group)" else "",
    )
    if n > 2 * cut:
        _gap(table, f"{n - 2 * cut:,} groups between are in predictions.csv", cut + int(new.sum()))
    m = rec.get("future_trials")
    how = f" in {m} future trials each" if m else ""
    note = (
        f"Successes expected{how}, with central intervals of the simulated counts; the first"
        " row is a new, unseen group. "
        + (
            f"The {cut} highest and {cut} lowest of {n} groups; all are in predictions.csv."
            if n > 2 * cut
            else ""
        )
    )
    return table, note


def _new_group(folder: Folder) -> str:
    pop = folder.population
    rows = pop[pop["quantity"] == "new_group_rate"] if pop is not None else []
    if not len(rows):
        return ""
    row = rows.iloc[0]
    level = folder.record.get("settings", {}).get("level")
    return (
        f"its rate is expected near {fmt(row['mean'], 'rate')}, with a central {fmt(level)}"
        f" interval of {fmt(row['lower'], 'rate')} to {fmt(row['upper'], 'rate')}"
        " (from population.csv)."
    )


#: settings -> fit options, in the order the command spells them
_FLAGS = (
    ("model", "--model"),
    ("engine", "--engine"),
    ("draws", "--draws"),
    ("chains", "--chains"),
    ("tune", "--tune"),
    ("target_accept", "--target-accept"),
    ("level", "--level"),
    ("target", "--target"),
    ("top", "--top"),
    ("better", "--better"),
    ("fdr", "--fdr"),
)
_PRIOR_FLAGS = {
    "beta_prior": ("--beta-prior", ("no-pooling", "complete-pooling")),
    "mu_prior": ("--mu-prior", ("beta-binomial",)),
    "kappa_prior": ("--kappa-prior", ("beta-binomial",)),
}


def command_line(record: dict) -> str | None:
    """A ``workbench fit`` command that repeats the run, from run.json's settings."""
    s = record.get("settings") or {}
    inp = record.get("input") or {}
    if not s or not inp.get("source"):
        return None
    parts = ["workbench", "fit", str(inp["source"])]
    for key, name in (inp.get("columns") or {}).items():
        parts += [f"--{key}", str(name)]
    for key, flag in _FLAGS:
        if s.get(key) is not None:
            parts += [flag, _pretty(s[key]) if not isinstance(s[key], float) else repr(s[key])]
    seed = record.get("random_seed", s.get("seed"))
    if seed is not None:
        parts += ["--seed", str(seed)]
    for key, (flag, models) in _PRIOR_FLAGS.items():
        if s.get(key) is not None and s.get("model") in models:
            parts += [flag, *(repr(float(v)) for v in s[key])]
    if s.get("sigma_prior") is not None and s.get("model") in ("logit-normal", "nested"):
        parts += ["--sigma-prior", repr(float(s["sigma_prior"]))]
    if s.get("tau_prior") is not None and s.get("model") == "nested":
        parts += ["--tau-prior", repr(float(s["tau_prior"]))]
    if s.get("covariates"):
        parts += ["--covariates", *(str(c) for c in s["covariates"])]
    if s.get("parent"):
        parts += ["--parent", str(s["parent"])]
    for key in ("verify", "retry"):
        if s.get(key):
            parts.append(f"--{key}")
    return " ".join(shlex.quote(p) for p in parts)


def _versions(record: dict) -> list:
    rows = [(name, str(v)) for name, v in (record.get("versions") or {}).items()]
    inp = record.get("input") or {}
    if inp.get("fingerprint"):
        rows.append(("input fingerprint (SHA-256)", inp["fingerprint"]))
    rows.append(("run created", _pretty(record.get("created"))))
    rows.append(("final", "yes" if record.get("final") else "no"))
    return rows


# -- the page ------------------------------------------------------------------------------------

_ENV = Environment(autoescape=True, undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)
_TEMPLATE = _ENV.from_string(_report_page.TEMPLATE)
_SCRIPT_HASH = base64.b64encode(hashlib.sha256(_report_page.SCRIPT.encode()).digest()).decode()
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
    ("cautions", "Cautions"),
    ("reproduce", "Reproduce"),
)


def render(folder: Folder, images: Mapping[str, Image], *, table_rows: int = TABLE_ROWS) -> str:
    """The report's HTML text for a folder and its rendered figures."""
    record = folder.record
    title, subtitle = _title(record, folder.path)
    data_rows, notes = _data_rows(record)
    checks, checks_line = _checks(folder)
    comparison, comparison_lines = _comparison(folder)
    estimates, estimates_note = _estimates(folder, table_rows)
    needed, needed_why = _needed(folder)
    predictions, predictions_note = _predictions(folder)
    settings = record.get("settings") or {}
    ranking = record.get("ranking") or {}
    cautions = list(CAUTIONS)
    source = ranking.get("funnel_benchmark_source") or "benchmark"
    context = {
        "csp": CSP,
        "version": versions().get("workbench", "?"),
        "style": Markup(_report_page.STYLE),
        "script": Markup(_report_page.SCRIPT),
        "title": title,
        "subtitle": subtitle,
        "sections": SECTIONS,
        "images": images,
        "verdict": _verdict(folder),
        "checks_line": checks_line,
        "caution_short": CAUTION_SHORT,
        "data_rows": data_rows,
        "notes": notes,
        "model_rows": _model_rows(folder),
        "population": _population(folder),
        "mixing_note": (
            "Not drawn: the exact engine draws independently from the posterior, so its chains"
            " mix by construction."
            if _independent(folder)
            else "Not drawn: no population-parameter draws were found in posterior.nc."
        ),
        "verification": [
            (k.replace("_", " "), _pretty(v)) for k, v in (record.get("verification") or {}).items()
        ],
        "checks": checks,
        "comparison": comparison,
        "comparison_lines": comparison_lines,
        "final": bool(record.get("final")),
        "estimates": estimates,
        "estimates_note": estimates_note,
        "ranks": _ranks(folder),
        "targets": _targets(folder),
        "target_why": "no target rate was given (--target)"
        if settings.get("target") is None
        else "not computed for this run",
        "funnel_caption": f"Observed rates against trials. The lines are exact binomial control"
        f" limits around the {source}"
        f" {fmt(ranking.get('funnel_benchmark'))}: 95% (grey, shaded) and"
        f" 99.8% (dashed). Points outside them are marked by colour and"
        f" shape.",
        "funnel_outside": _funnel_outside(folder),
        "new_group": _new_group(folder),
        "predictions": predictions,
        "predictions_note": predictions_note,
        "needed": needed,
        "needed_why": needed_why or "not computed for this run",
        "cautions": cautions,
        "recorded_command": record.get("command"),
        "command": command_line(record),
        "folder_name": folder.path.name,
        "settings_rows": [(k.replace("_", " "), _pretty(v)) for k, v in settings.items()],
        "version_rows": _versions(record),
        "files": sorted(
            {
                *record.get("files", []),
                *(p.name for p in folder.path.iterdir() if not p.name.startswith(".")),
            }
        ),
        "created": time.strftime("%Y-%m-%d %H:%M:%S %z"),
    }
    return _TEMPLATE.render(**context)


@dataclass
class Report:
    """What :func:`write_report` wrote."""

    path: Path
    figures: list[Path]
    seconds: float
    bytes: int
    final: bool


def write_report(path: str | Path, *, table_rows: int = TABLE_ROWS) -> Report:
    """Write ``report.html`` and ``figures/*.png`` into a run folder, each file atomically.

    Figures no longer drawn (their table is gone) are removed from ``figures/``.
    """
    started = time.perf_counter()
    folder = read_folder(path)
    images = render_figures(folder)
    html = render(folder, images, table_rows=table_rows)
    out = folder.path / FIGURES_DIR
    written = []
    for name, image in images.items():
        target = out / f"{name}.png"
        _io.write_atomic(target, lambda p, data=image.png: p.write_bytes(data))
        written.append(target)
    if out.exists():
        for stale in out.glob("*.png"):
            if stale.stem not in images:
                stale.unlink()
    report_path = folder.path / REPORT_FILE
    _io.write_text(report_path, html)
    return Report(
        report_path,
        written,
        time.perf_counter() - started,
        len(html.encode()),
        bool(folder.record.get("final")),
    )


def format_report(report: Report) -> str:
    """One line for the terminal."""
    return (
        f"wrote {report.path} ({report.bytes / 1024:.0f} KB, {len(report.figures)} figures"
        f" in {report.path.parent.name}/{FIGURES_DIR}/, {report.seconds:.1f} s)"
    )


__all__ = [
    "CAUTIONS",
    "CSP",
    "FIGURES_DIR",
    "Folder",
    "REPORT_FILE",
    "Report",
    "TABLE_ROWS",
    "command_line",
    "figure_makers",
    "fmt",
    "format_report",
    "read_folder",
    "render",
    "render_figures",
    "write_report",
]
