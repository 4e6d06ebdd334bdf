"""The report's audit section: prior sensitivity and simulation-based calibration.

Both read the run folder's own files (the sensitivity and calibration documents) and format them;
nothing is computed. A folder without them shows "not computed for this run" and the command
that writes them.
"""

from __future__ import annotations

import pandas as pd

from ..io.runfolder import FILES, FolderContents
from ._format import Table, fmt, page_table


def sensitivity(folder: FolderContents) -> dict | None:
    """Verdict, one row per alternative prior, and the groups whose conclusions move."""
    doc = folder.documents.get("sensitivity_summary")
    if not doc:
        return None
    rows = pd.DataFrame([
        {"alternative prior": v["alternative"], "prior": v["prior"],
         "largest move (sd)": v["max_mean_shift_sd"],
         "largest interval-end move": v["max_interval_end_shift"],
         "largest rank-interval move": v["max_rank_interval_shift"],
         "flags changed": len(v["flag_changes"]),
         f"best-{doc['top_k']} changed": len(v["top_k_changes"])}
        for v in doc["alternatives"]
    ])
    table: Table | None = page_table(rows, kinds={"alternative prior": "t", "prior": "t"}) \
        if len(rows) else None
    return {
        "verdict": doc["verdict"],
        "sentence": doc["sentence"],
        "table": table,
        "rows": [("engine", doc.get("engine", "")), ("rule", doc["rule"]),
                 ("groups whose target flag changes",
                  ", ".join(doc["flag_change_groups"]) or "none"),
                 (f"groups whose best-{doc['top_k']} membership changes",
                  ", ".join(doc["top_k_change_groups"]) or "none"),
                 ("per group", f"every group and alternative is in {FILES['sensitivity']}")],
    }


def calibration(folder: FolderContents) -> dict | None:
    """Verdict, rank-uniformity tests, coverage and false-flag share."""
    doc = folder.documents.get("calibration_summary")
    if not doc:
        return None
    ranks = pd.DataFrame([
        {"quantity": r["quantity"], "chi-square": r["chi_square"], "df": r["df"],
         "p": r["p_value"], "uniform": "yes" if r["uniform"] else "NO"}
        for r in doc["ranks"]
    ])
    cover = pd.DataFrame([
        {"interval": f"{c['level']:.0%}", "realised coverage": c["realised"],
         "tolerance": c["tolerance"], "within": "yes" if c["within"] else "NO"}
        for c in doc["coverage"]
    ])
    flags = doc["false_flags"]
    flag_text = flags if isinstance(flags, str) else (
        f"target {fmt(flags['target'])}: realised false-flag share"
        f" {flags['realised_false_share']:.1%}, the posterior's expected"
        f" {flags['expected_false_share']:.1%} (level {fmt(flags['fdr_level'])}),"
        f" {flags['flagged_per_replicate']:.1f} flags per simulated data set;"
        f" {'within tolerance' if flags['within'] else 'OUTSIDE tolerance'}")
    return {
        "verdict": doc["verdict"],
        "sentence": doc["sentence"],
        "ranks": page_table(ranks, kinds={"quantity": "t", "uniform": "t"}),
        "coverage": page_table(cover, kinds={"interval": "t", "within": "t"}),
        "rows": [("model and engine", f"{doc['model']}, {doc['engine']}"),
                 ("simulated data sets", str(doc["replicates"])),
                 ("ranks among", f"{doc['draws']} posterior draws"),
                 ("target flags", flag_text),
                 ("method", doc["method"])],
    }


def parts(folder: FolderContents) -> dict:
    """What the page template reads for the audit section."""
    return {"sensitivity": sensitivity(folder), "calibration": calibration(folder)}


#: the section as the page shows it (inserted before the cautions)
SECTION = """
<section id="audit">
<h2><span class="no">A</span>Audit: prior sensitivity and calibration</h2>
<h3>Prior sensitivity</h3>
{% if audit.sensitivity %}<p><strong>{{ audit.sensitivity.verdict|upper }}</strong>: {{ audit.sensitivity.sentence }}</p>
{% if audit.sensitivity.table %}<div class="scroll">{{ data_table(audit.sensitivity.table) }}</div>{% endif %}
{{ kv(audit.sensitivity.rows) }}
{% else %}{{ absent("Prior sensitivity", "not computed for this run (workbench sensitivity DIR writes it)") }}{% endif %}
<h3>Simulation-based calibration</h3>
{% if audit.calibration %}<p><strong>{{ audit.calibration.verdict|upper }}</strong>: {{ audit.calibration.sentence }}</p>
{{ figure("calibration", "Ranks of the true values among posterior draws in simulated data sets shaped like these (flat when the engine is calibrated), and the coverage of the central intervals.") }}
<div class="scroll">{{ data_table(audit.calibration.ranks) }}</div>
{{ data_table(audit.calibration.coverage) }}
{{ kv(audit.calibration.rows) }}
{% else %}{{ absent("Simulation-based calibration", "not computed for this run (workbench calibrate DIR writes it)") }}{% endif %}
</section>
"""

__all__ = ["SECTION", "calibration", "parts", "sensitivity"]
