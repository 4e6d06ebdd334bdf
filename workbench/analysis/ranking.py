"""The ranking step: ranks, target flags, pairwise, funnel data and trials still needed.

Every table is computed from a :class:`workbench.analysis.draws.GroupDraws` (draws of the
group rates, closed forms where the engine is exact), in chunks of draws so that memory stays
bounded whatever the number of groups. The pieces live beside this module: ranks
(:mod:`.ranks`), target flags (:mod:`.targets`), funnel limits (:mod:`.funnel`) and trials
still needed (:mod:`.decisions`). Options are declared in :mod:`workbench.options`.

Caution: rank intervals overlap; a rank is no verdict on a group or on the people in it. Case
mix and data quality are not modelled unless covariates are given; decisions defer to local
governance and qualified review.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, fields

import pandas as pd

from ..cautions import RANKING_CAUTION as CAUTION
from ..options import FIT_OPTIONS, RANK_NAMES
from .decisions import trials_needed_table
from .draws import GroupDraws
from .funnel import funnel_tables
from .ranks import informative_rank_summary, pairwise_groups, pairwise_table, ranks_table
from .targets import target_tables

DEFAULT_PAIRWISE = 10
RANK_COLUMNS = ["rank_median", "rank_lower", "rank_upper"]
TARGET_COLUMNS = ["prob_above_target", "prob_below_target", "target_flag"]
ESTIMATE_COLUMNS = RANK_COLUMNS + TARGET_COLUMNS


@dataclass(frozen=True)
class RankOptions:
    """Settings of the ranking tables, checked (see :func:`rank_options`)."""

    top: int = FIT_OPTIONS["top"].default
    better: str = FIT_OPTIONS["better"].default
    fdr: float = FIT_OPTIONS["fdr"].default
    level: float = FIT_OPTIONS["level"].default
    target: float | None = None
    compare_groups: tuple[str, ...] | None = None
    settle_chance: float = FIT_OPTIONS["settle_chance"].default
    max_trials: int = FIT_OPTIONS["max_trials"].default
    pairwise_top: int = DEFAULT_PAIRWISE

    def as_dict(self) -> dict:
        out = {f.name: getattr(self, f.name) for f in fields(self)}
        out["compare_groups"] = list(self.compare_groups) if self.compare_groups else None
        return out


def rank_options(**given) -> RankOptions:
    """The ranking options, each checked by its declaration; left out: its default."""
    values = {}
    for name in RANK_NAMES:
        value = given.get(name, FIT_OPTIONS[name].default)
        values[name] = FIT_OPTIONS[name].validate(value)
    if values["compare_groups"] is not None and len(values["compare_groups"]) < 2:
        from ..models.exceptions import ParameterError
        from ..options import label

        raise ParameterError(
            f"{label('compare_groups')} {','.join(values['compare_groups'])} names fewer than two"
            " groups; give at least two, separated by commas (A,B,C)."
        )
    return RankOptions(**values)


@dataclass
class Ranking:
    """Every table and document of the ranking step, ready to write."""

    options: RankOptions
    tables: dict[str, pd.DataFrame]
    estimate_columns: pd.DataFrame
    record: dict  # goes into run.json as "ranking"
    targets: dict | None = None
    final: bool = True


def compute(inp: GroupDraws, opts: RankOptions) -> Ranking:
    """Ranks, target flags, pairwise, funnel and (with a target) trials still needed."""
    started = time.perf_counter()
    summary = informative_rank_summary(
        inp.theta, inp.trials, better=opts.better, top=opts.top, level=opts.level
    )
    ranks = ranks_table(inp.names, summary)
    columns = pd.DataFrame(
        {
            "group": inp.names.astype(str),
            "rank_median": summary.rank_median,
            "rank_lower": summary.rank_lower,
            "rank_upper": summary.rank_upper,
        }
    )
    tables: dict[str, pd.DataFrame] = {"ranks": ranks}
    targets = None
    needed_doc: dict | str = "not computed: no target was given"
    if opts.target is not None:
        target_cols, targets = target_tables(
            inp.names, inp.prob_above(opts.target), opts.target, opts.fdr,
            better=opts.better, trials=inp.trials,
        )
        columns = columns.merge(target_cols, on="group", how="left")
        needed, needed_doc = trials_needed_table(
            inp, opts.target, chance=opts.settle_chance, max_trials=opts.max_trials
        )
        tables["trials_needed"] = needed
    if summary.ranked >= 2:
        informative = inp.trials > 0
        index, chosen = pairwise_groups(
            inp.names, inp.posterior_mean, compare_groups=opts.compare_groups,
            better=opts.better, top=opts.pairwise_top, among=informative)
        tables["pairwise"] = pairwise_table(inp.theta, inp.names, index, opts.better)
    else:
        chosen = "none: fewer than two groups with trials"
        tables["pairwise"] = pd.DataFrame(columns=["group_a", "group_b", "prob_a_better"])
    total = float(inp.trials.sum())
    if opts.target is not None:
        benchmark, source = opts.target, "target"
    elif total > 0:
        benchmark, source = float(inp.successes.sum()) / total, "pooled rate"
    else:
        benchmark, source = None, "none: no trials"
    if benchmark is not None:
        tables["funnel"], tables["funnel_curve"] = funnel_tables(inp, benchmark)
    record = {
        **opts.as_dict(),
        "top_k": summary.k,
        "groups": int(inp.n_groups),
        "draws": int(inp.n_draws),
        "rank_passes": summary.passes,
        "ranked_groups": int(summary.ranked),
        "ranking_note": summary.note,
        "ties": "a tied block at positions lo..hi shares the average rank; P(best k) gives each"
        " member the block's share of positions <= k",
        "pairwise_groups": chosen,
        "funnel_benchmark": benchmark,
        "funnel_benchmark_source": source,
        "trials_needed": needed_doc,
        "caution": CAUTION,
    }
    record["seconds"] = round(time.perf_counter() - started, 3)
    return Ranking(opts, tables, columns, record, targets)


def merge_estimate_columns(estimates: pd.DataFrame, columns: pd.DataFrame) -> pd.DataFrame:
    """estimates.csv with the ranking columns replaced; prob_above_target keeps its place."""
    keep_place = "prob_above_target" in estimates and "prob_above_target" in columns
    drop = [
        c
        for c in ESTIMATE_COLUMNS
        if c in estimates and not (keep_place and c == "prob_above_target")
    ]
    base = estimates.drop(columns=drop)
    base = base.assign(group=base["group"].astype(str))
    if keep_place:
        values = columns.set_index("group")["prob_above_target"]
        base["prob_above_target"] = base["group"].map(values).to_numpy()
        columns = columns.drop(columns=["prob_above_target"])
    return base.merge(columns, on="group", how="left")
