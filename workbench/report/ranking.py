"""Sections 6 and 7 of the report: ranks, targets, funnel, predictions, trials still needed."""

from __future__ import annotations

import pandas as pd

from ..figures import text_label
from ..io.runfolder import FILES, FolderContents
from ._format import Table, add_gap, fmt, page_table, pretty
from .sections import SHORT_ROWS


def ranks(folder: FolderContents) -> dict | None:
    """Section 6: best and worst placed, the pairwise table, and how to read them."""
    ranks = folder.tables.get("ranks")
    if ranks is None:
        return None
    rec = folder.record.get("ranking") or {}
    k = rec.get("top_k") or rec.get("top") or 5
    better = rec.get("better", "higher")
    unranked = int(ranks["rank_median"].isna().sum())
    order = ranks.dropna(subset=["rank_median"]).sort_values(["rank_median", "group"],
                                                             kind="stable")
    if order.empty:
        return {"none": rec.get("ranking_note") or "not ranked: fewer than two groups have"
                " trials", "note": "", "caption": "", "best": None, "worst": None,
                "pairwise": None, "pairwise_note": ""}
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
    level = rec.get("level") or folder.settings.get("level")
    note = (
        f"Rank 1 is the best placed: the {better} rate is better. In every posterior draw"
        f" the groups are ranked; the rank shown is the median over the draws, with its"
        f" central {fmt(level)} interval. P(in best {k}) is the share of draws in which the"
        f" group is among the best {k}."
        + (f" {unranked} group(s) with no trials have no rank (no data)." if unranked else "")
    )
    pair = folder.tables.get("pairwise")
    pair_table = None
    if pair is not None and not pair.empty:
        names = list(dict.fromkeys(pair["group_a"].tolist()))
        wide = pair.pivot(index="group_a", columns="group_b", values="prob_a_better")
        wide = wide.reindex(index=names, columns=names)
        wide.insert(0, "group", wide.index.astype(str))
        wide.columns = ["group", *[text_label(c, 18) for c in names]]
        pair_table = page_table(
            wide.reset_index(drop=True), kinds={c: "prob" for c in wide.columns[1:]}
        )
    return {
        "none": "",
        "note": note,
        "caption": f"Rank medians and intervals; the best {k} and worst {k} positions in colour,"
        f" with P(in best {k}) or P(in worst {k}) at the right.",
        "best": best,
        "worst": worst,
        "pairwise": pair_table,
        "pairwise_note": f"Groups compared: {rec.get('pairwise_groups', 'as listed')}."
        " Ties count one half.",
    }


def targets(folder: FolderContents) -> list | None:
    """Section 6: the target flags' summary, from the targets document."""
    doc = folder.documents.get("targets")
    if not doc:
        return None
    rows = [
        ("target rate", fmt(doc.get("target"))),
        ("false-flag level", fmt(doc.get("fdr_level"))),
    ]
    words = doc.get("flag_words") or {}
    for side in ("above", "below"):
        part = doc.get(side) or {}
        rows.append(
            (
                f"flagged {words.get(side, side + ' target')}",
                f"{fmt(part.get('flagged'), 'int')} groups"
                f" (expected share of false flags {fmt(part.get('expected_false_share'))})",
            )
        )
    if doc.get("rule"):
        rows.append(("rule", doc["rule"]))
    return rows


def funnel_outside(folder: FolderContents) -> Table | None:
    """Section 6: the groups outside the 99.8% limits, largest first."""
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


def needed(folder: FolderContents) -> tuple[dict | None, str]:
    """Section 7: trials still needed to settle each comparison with the target."""
    rec = folder.record.get("ranking") or {}
    doc = rec.get("trials_needed")
    table = folder.tables.get("trials_needed")
    if not isinstance(doc, dict) or table is None:
        why = doc if isinstance(doc, str) else "not computed for this run"
        return None, why.removeprefix("not computed: ")
    rows = [
        ("target rate", fmt(doc.get("target"))),
        ("settled when", pretty(doc.get("settled_when"))),
        ("chance asked for", fmt(doc.get("settle_chance"))),
        ("already settled", fmt(doc.get("already_settled"), "int")),
        ("settle with more trials", fmt(doc.get("settles_with_more_trials"), "int")),
        (
            f"not within {fmt(doc.get('max_trials'), 'int')} more trials",
            fmt(doc.get("not_within_max_trials"), "int"),
        ),
        ("method", pretty(doc.get("method"))),
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
        f" every group is in {FILES['trials_needed']}.",
    }, ""


def predictions(folder: FolderContents) -> tuple[Table | None, str]:
    """Section 7: predicted successes in future trials, a new group first."""
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
    level = rec.get("level") or folder.settings.get("level")
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
        gap = f"{n - 2 * cut:,} groups between are in {FILES['predictions']}"
        add_gap(table, gap, cut + int(new.sum()))
    m = rec.get("future_trials")
    how = f" in {m} future trials each" if m else ""
    note = (
        f"Successes expected{how}, with central intervals of the simulated counts; the first"
        " row is a new, unseen group. "
        + (
            f"The {cut} highest and {cut} lowest of {n} groups; all are in {FILES['predictions']}."
            if n > 2 * cut
            else ""
        )
    )
    return table, note


def new_group(folder: FolderContents) -> str:
    """Section 7: what a new, unseen group's rate is expected to be."""
    pop = folder.tables.get("population")
    rows = pop[pop["quantity"] == "new_group_rate"] if pop is not None else []
    if not len(rows):
        return ""
    row = rows.iloc[0]
    level = folder.settings.get("level")
    return (
        f"its rate is expected near {fmt(row['mean'], 'rate')}, with a central {fmt(level)}"
        f" interval of {fmt(row['lower'], 'rate')} to {fmt(row['upper'], 'rate')}"
        f" (from {FILES['population']})."
    )


__all__ = ["funnel_outside", "needed", "new_group", "predictions", "ranks", "targets"]
