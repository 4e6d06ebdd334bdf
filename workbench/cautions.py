"""The cautions every ranking and every report carries: one home for their wording.

Rankings of people and institutions can hurt. Each output that ranks or flags groups says
that intervals overlap, that case mix is not modelled unless covariates say so, that a rank
is no verdict on a person or an institution, and that decisions defer to local governance
and qualified review.
"""

from __future__ import annotations

#: one sentence for files and terminal summaries (targets.json, run.json, the CLI)
RANKING_CAUTION = (
    "Rank intervals overlap: neighbouring ranks are rarely distinguishable, and a rank is no"
    " verdict on a group or on the people in it. Case mix and data quality are not modelled"
    " unless covariates are given; decisions defer to local governance and qualified review."
)

#: the report's cautions, one paragraph each
REPORT_CAUTIONS = (
    "Intervals overlap. Groups whose intervals overlap are not shown to differ, and neighbouring"
    " ranks are rarely distinguishable; read every estimate and rank with its interval.",
    "Case mix and data quality are not modelled unless covariates say so. A group that serves"
    " harder cases, or records its outcomes differently, can look worse without being worse.",
    "A rank is no verdict on a person or an institution. It summarises these data under this"
    " model, nothing more.",
    "Decisions defer to local governance and qualified review. This report is one input to"
    " that review, never a substitute for it.",
)

#: the same in one line, for the top of the report
SHORT_CAUTION = (
    "Intervals overlap; case mix and data quality are not modelled unless covariates say so; a"
    " rank is no verdict on a person or an institution; decisions defer to local governance and"
    " qualified review."
)

#: the terminal's closing caution after a ranking
TERMINAL_CAUTION = (
    "caution: rank intervals overlap; a rank is no verdict on a group or the people in it."
)

#: the caution of a fit with covariates (the report's cautions and run.json): {columns}
CASE_MIX_CAUTION = (
    "Adjustment covers only the measured case mix ({columns}). Differences between groups in"
    " anything these columns do not record (other risk factors, how cases are selected or"
    " recorded) remain in every adjusted rate, observed/expected ratio and rank; an adjusted"
    " comparison is fairer, not fair."
)


def case_mix_caution(columns) -> str:
    """The case-mix caution naming the covariates used."""
    return CASE_MIX_CAUTION.format(columns=", ".join(str(c) for c in columns))
