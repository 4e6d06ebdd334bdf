"""The report's sections built from a run folder's tables and documents (one function each).

Every function takes the folder as read back (:class:`workbench.io.runfolder.FolderContents`)
and returns what the page shows: rows of (label, text), page tables and notes. Values are
the files' values, formatted; nothing is computed.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from ..cautions import REPORT_CAUTIONS
from ..io.runfolder import FILES, FolderContents
from ._format import Table, add_gap, fmt, page_table, pretty

#: Estimates table: up to this many rows shown whole; beyond, the highest and lowest half each.
TABLE_ROWS = 1000
#: rows of the shorter tables (best/worst placed, groups outside the limits, trials needed)
SHORT_ROWS = 15

CAUTIONS = REPORT_CAUTIONS

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
    "dispersion": "standardised dispersion",
    "tail_share": "share outside their central 95%",
    "central_share": "share inside their central 50%",
    "zero_success_groups": "groups with no successes",
    "chi_square": "chi-square discrepancy",
}

#: estimates columns left off the page to keep the table narrow (they stay in the file)
PAGE_HIDDEN = ("posterior_median", "prob_below_target")


def title(record: dict, path: Path) -> tuple[str, str]:
    """The page's title (the data file's name) and the line under it."""
    source = (record.get("input") or {}).get("source")
    name = Path(str(source)).name if source else path.name
    rec_input = record.get("input") or {}
    sub = (
        f"{record.get('model', '?')} model, {record.get('engine', '?')} engine;"
        f" {rec_input.get('groups', '?')} groups; run folder {path.name};"
        f" fitted {record.get('created', '?')}"
    )
    return name, sub


#: The banner's headline and meaning for each verdict (README, "Exit codes and the verdict").
BANNERS = {
    "ready": (
        "READY: the convergence and model checks passed",
        "R-hat, effective sample sizes, the sampler's own checks and the posterior predictive"
        " checks are within their pass marks, so the numbers below may be used, with the"
        " cautions at the end.",
    ),
    "not-ready": (
        "NOT READY: nothing in this report is final",
        "The convergence diagnostics failed, or too few draws back the numbers computed from"
        " them. Every estimate, rank and flag below is provisional and must not be used for"
        " decisions until a re-run is ready.",
    ),
    "misfit": (
        "MISFIT: the model does not reproduce the data; nothing in this report is final",
        "The sampler converged, but the posterior predictive checks found data the model does"
        " not reproduce (see the checks section). Every estimate, rank and flag below rests on"
        " that model and must not be used for decisions until a model that fits is chosen.",
    ),
}


def verdict(folder: FolderContents) -> dict:
    """The banner and section 3: verdict, reasons, remedies, diagnostics and pass marks."""
    diag = folder.diagnostics
    word = diag.get("verdict") or folder.record.get("verdict") or "unknown"
    ready = word == "ready"
    headline, meaning = BANNERS.get(word, BANNERS["not-ready"])
    return {
        "cls": "ready" if ready else "not-ready",
        "headline": headline,
        "meaning": meaning,
        "reasons": [r.get("text", pretty(r)) for r in diag.get("reasons", [])],
        "remedies": list(diag.get("remedies", [])),
        "notes": list(diag.get("notes", [])),
        "rows": _diagnostic_rows(diag, word),
        "worst": _worst_table(diag),
    }


def _diagnostic_rows(diag: dict, word: str) -> list:
    summary = diag.get("summary", {})
    run = diag.get("run", {})
    rows = [
        ("verdict", word),
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
            shown = (
                ", ".join(fmt(v) for v in value) if isinstance(value, list) else fmt(value, "int")
            )
            rows.append((label, shown))
    rows.append(("chains x draws", f"{run.get('chains', '?')} x {run.get('draws_per_chain', '?')}"))
    th = diag.get("thresholds", {})
    if th:
        marks = f"R-hat < {th.get('rhat')}, bulk and tail ESS >= {fmt(th.get('ess_bulk'), 'int')}"
        if run.get("independent_draws"):
            marks += (
                f"; grid: density at its edge <= {th.get('grid_edge_density')}, change"
                f" under refinement <= {th.get('grid_refinement_change')} (means),"
                f" <= {th.get('grid_refinement_rate_sd')} posterior sd (rates),"
                f" <= {th.get('grid_refinement_probability')} (probabilities)"
            )
        else:
            marks += (
                f", divergences <= {th.get('divergences')}, E-BFMI >= {th.get('ebfmi')},"
                f" share at maximum tree depth <= {th.get('treedepth_share')}"
            )
        rows.append(("pass marks", marks))
    return rows


def _worst_table(diag: dict) -> Table | None:
    if not diag.get("worst_quantities"):
        return None
    return page_table(
        pd.DataFrame(diag["worst_quantities"]).head(8),
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


def data_rows(record: dict) -> tuple[list, list]:
    """Section 1: the input's reconciliation (rows read, used, dropped) and reading notes."""
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
            rows.append((label, pretty(inp.pop(key))))
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
        rows.append((key.replace("_", " "), pretty(value)))
    if fingerprint:
        rows.append(("data fingerprint (SHA-256)", fingerprint))
    return rows, list(record.get("notes") or [])


def model_rows(folder: FolderContents) -> list:
    """Section 2: model, engine, priors and sampling settings, from the run record."""
    rec = folder.record
    s = folder.settings
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
        rows.append(("warm-up steps per chain", pretty(s.get("tune"))))
        rows.append(("NUTS target acceptance", pretty(s.get("target_accept"))))
    rows.append(("interval mass (level)", pretty(s.get("level"))))
    rows.append(("target rate", pretty(s.get("target")) or "none"))
    rows.append(("random seed", pretty(rec.get("random_seed"))))
    rows.append(("fit time", f"{pretty(rec.get('fit_seconds'))} s"))
    if rec.get("retry"):
        rows.append(("retry", pretty(rec["retry"])))
    return rows


def population(folder: FolderContents) -> Table | None:
    """Section 2: the population table."""
    pop = folder.tables.get("population")
    if pop is None or pop.empty:
        return None
    level = folder.settings.get("level")
    frame = pop.drop(columns=[c for c in ("parameter",) if c in pop.columns])
    if "note" in frame and not frame["note"].fillna("").astype(str).str.strip().any():
        frame = frame.drop(columns="note")  # no heavy tail to warn of
    elif "note" in frame:
        frame = frame.assign(note=frame["note"].fillna("").astype(str))
    frame = frame.assign(quantity=frame["quantity"].astype(str).str.replace("_", " "))
    label = f"{level:.0%}" if isinstance(level, float) else ""
    return page_table(
        frame,
        labels={"lower": f"{label} lower", "upper": f"{label} upper"},
        kinds={c: "num" for c in ("mean", "median", "lower", "upper")},
    )


def flag_class(flag, better: str | None) -> str:
    """The row class of a target flag: ``flag-better`` or ``flag-worse`` (its colour follows
    good and bad, not the side); a folder written before the flags said better or worse is
    read with its ``better`` setting."""
    flag = "" if flag is None or (isinstance(flag, float) and flag != flag) else str(flag)
    if not flag:
        return ""
    if flag.endswith("(better)") or flag.endswith("(worse)"):
        good = flag.endswith("(better)")
    else:
        good = flag.startswith("above") == ((better or "higher") == "higher")
    return "flag-better" if good else "flag-worse"


def parents(folder: FolderContents) -> Table | None:
    """Section 2 (nested model): each parent's effect and the rate of its typical group."""
    frame = folder.tables.get("parents")
    if frame is None or frame.empty:
        return None
    level = folder.settings.get("level")
    lab = f"{level:.0%} " if isinstance(level, float) else ""
    frame = frame.sort_values(["effect_mean", "parent"], ascending=[False, True], kind="stable")
    return page_table(
        frame,
        labels={"effect_mean": "effect (log-odds)", "effect_lower": f"{lab}lower",
                "effect_upper": f"{lab}upper", "typical_rate_median": "typical group's rate",
                "typical_rate_lower": f"{lab}lower", "typical_rate_upper": f"{lab}upper"},
        kinds={"groups": "int", "effect_mean": "num", "effect_lower": "num",
               "effect_upper": "num", "typical_rate_median": "rate",
               "typical_rate_lower": "rate", "typical_rate_upper": "rate"},
    )


def estimates(folder: FolderContents, table_rows: int) -> tuple[Table, str]:
    """Section 5: the estimates table, whole or its highest and lowest rows, and a note."""
    est = folder.estimates
    n = len(est)
    first = [c for c in COLUMN_LABELS if c in est.columns and c not in PAGE_HIDDEN]
    est = est[first + [c for c in est.columns if c not in first and c not in PAGE_HIDDEN]]
    order = est.sort_values(["posterior_mean", "group"], ascending=[False, True], kind="stable")
    level = folder.settings.get("level")
    lab = dict(COLUMN_LABELS)
    if isinstance(level, float):
        lab["lower"], lab["upper"] = f"{level:.0%} lower", f"{level:.0%} upper"

    better = (folder.record.get("ranking") or {}).get("better") or folder.settings.get("better")

    def row_class(r):
        return flag_class(r.get("target_flag"), better)

    if n <= table_rows:
        note = (
            f"All {n} groups, highest estimate first. Interval: central {fmt(level)}"
            " posterior interval. The same numbers, with the posterior median and"
            f" P(below target), are in {FILES['estimates']}."
        )
        return page_table(order, labels=lab, row_class=row_class), note
    half = table_rows // 2
    shown = pd.concat([order.head(half), order.tail(half)])
    table = page_table(shown, labels=lab, row_class=row_class)
    add_gap(
        table,
        f"{n - 2 * half:,} groups between these are not shown here; all {n:,} are in"
        f" {FILES['estimates']}",
        half,
    )
    note = (
        f"The {half:,} highest and the {half:,} lowest estimates of {n:,} groups (the page"
        f" stays small); every group is in {FILES['estimates']}. The filter searches the rows"
        " shown."
    )
    return table, note
