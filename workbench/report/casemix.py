"""The report's part on covariates: effects as odds ratios, and the risk-adjusted comparison.

Shown in section 2 (effects, from the effects table) and in its own section before the cautions
(adjusted rates, observed/expected and their funnel, from the adjusted-rates table). Values are the
tables' values, formatted; nothing is computed. With covariates the cautions gain the
case-mix caution naming them.
"""

from __future__ import annotations

from ..cautions import case_mix_caution
from ..io.runfolder import FILES, FolderContents
from ._format import page_table
from .sections import CAUTIONS, SHORT_ROWS

#: the effects table's columns shown, with their labels
EFFECT_LABELS = {
    "term": "covariate", "level": "level", "reference": "against",
    "odds_ratio_median": "odds ratio",
    "odds_ratio_lower": "lower", "odds_ratio_upper": "upper",
    "odds_ratio_per_sd_median": "per sd", "odds_ratio_per_sd_lower": "per sd lower",
    "odds_ratio_per_sd_upper": "per sd upper", "prob_positive": "P(raises odds)",
}
ADJUSTED_LABELS = {
    "group": "group", "trials": "trials", "observed_rate": "observed",
    "adjusted_median": "adjusted rate", "adjusted_lower": "lower", "adjusted_upper": "upper",
    "successes": "observed (O)", "expected": "expected (E)", "observed_expected": "O/E",
    "oe_lower": "O/E lower", "oe_upper": "O/E upper", "oe_outside_998": "outside 99.8%",
    "rank_median": "rank", "rank_lower": "rank lower", "rank_upper": "rank upper",
}


def parts(folder: FolderContents) -> dict:
    """What the page template reads: effects, adjusted table, notes."""
    t = folder.tables
    effects = t.get("effects")
    out = {"effects": None, "adjusted": None, "effects_file": FILES["effects"],
           "adjusted_file": FILES["adjusted_rates"]}
    if effects is not None and len(effects):
        cols = [c for c in EFFECT_LABELS if c in effects]
        out["effects"] = page_table(effects[cols], labels=EFFECT_LABELS)
    adjusted = t.get("adjusted_rates")
    if adjusted is not None and len(adjusted):
        order = "rank_median" if "rank_median" in adjusted else "adjusted_median"
        shown = adjusted.sort_values(order, ascending=order == "rank_median")
        cols = [c for c in ADJUSTED_LABELS if c in shown]
        out["adjusted"] = page_table(shown[cols].head(SHORT_ROWS * 4), labels=ADJUSTED_LABELS)
        out["adjusted_rows"] = int(len(adjusted))
    return out


def cautions(folder: FolderContents) -> list[str]:
    """The report's cautions, with the case-mix caution when covariates were used."""
    columns = folder.settings.get("covariates") or []
    return list(CAUTIONS) + ([case_mix_caution(columns)] if columns else [])


#: effects in section 2 (inserted before the population table)
EFFECTS = """
{% if covariates.effects %}<h3>Covariate effects</h3>
<p class="small">Odds ratios with {{ "%.0f"|format(100 * (level or 0.95)) }}% intervals, from {{ covariates.effects_file }}: per unit of a numeric covariate (and per sd), and for each level of a text covariate against its reference level.</p>
<div class="scroll">{{ data_table(covariates.effects) }}</div>{% endif %}
"""

#: the risk-adjusted comparison (inserted before the cautions)
SECTION = """
{% if covariates.adjusted %}<section id="case-mix">
<h2><span class="no">C</span>Risk-adjusted comparison</h2>
<p>Each group's adjusted rate is its modelled rate for the population's case mix; ranks and flags are on it. Expected (E) is the number of successes the population-average group would have on this group's own cases (indirect standardisation); O/E above 1 means more successes than expected. The O/E interval is the exact Poisson interval of O divided by E. Adjustment covers only the measured case mix: see the cautions.</p>
{{ figure("oe_funnel", "Observed/expected against expected successes, with 95% (shaded) and 99.8% (dashed) control limits around 1 from a Poisson count; points outside them are marked by colour and shape.") }}
<p class="small muted">{{ covariates.adjusted_rows }} groups in {{ covariates.adjusted_file }}; the first rows by adjusted rank are shown.</p>
<div class="scroll">{{ data_table(covariates.adjusted) }}</div>
</section>{% endif %}
"""
