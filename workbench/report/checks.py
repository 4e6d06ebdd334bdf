"""Section 4 of the report: posterior predictive checks, held-out groups, model comparison."""

from __future__ import annotations

import pandas as pd

from ..io.runfolder import FolderContents
from ._format import Table, fmt, page_table, pretty
from .sections import STATISTIC_NAMES


def checks(folder: FolderContents) -> tuple[dict | None, str]:
    """The checks section and the one line under the banner, from the checks document."""
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
    loo_rows = _loo_rows(doc)
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


def _loo_rows(doc: dict) -> list | None:
    """Leave-one-group-out: elpd, Pareto k, LOO-PIT, as (label, text) rows."""
    loo = doc.get("loo") or {}
    if not loo.get("available"):
        return None
    high = loo.get("high_k_groups") or []
    loo_rows = [
        ("elpd_loo (SE)", f"{fmt(loo.get('elpd_loo'))} ({fmt(loo.get('se'))})"),
        ("p_loo", fmt(loo.get("p_loo"))),
        ("groups", fmt(loo.get("groups"), "int")),
        ("likelihood", pretty(loo.get("likelihood"))),
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
    return loo_rows


def comparison(found: tuple[dict, pd.DataFrame | None] | None) -> tuple[Table | None, list[str]]:
    """The comparison across models this run belongs to (``read_comparison``'s answer)."""
    doc, frame = found if found is not None else ({}, None)
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


__all__ = ["checks", "comparison"]
