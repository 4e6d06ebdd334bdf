"""Every sentence the command line prints, built from the API's results (never computed here).

Each ``format_*`` returns text; :mod:`workbench.cli.main` prints it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..analysis.diagnostics import MEANINGS, READY
from ..analysis.settings import MISFIT, NOT_COMPUTED
from ..cautions import TERMINAL_CAUTION
from ..io.runfolder import NEW_GROUP_LABEL
from ..models import attr


def format_written(run, out: Path) -> str:
    """The last line of a fit: where the run folder is and whether it is final (and why not)."""
    return f"wrote {out}/ ({final_words(run.diagnostics.verdict)})"


def final_words(verdict: str) -> str:
    """'final', or NOT FINAL with the reason the verdict gives."""
    if verdict == READY:
        return "final"
    if verdict == MISFIT:
        return "NOT FINAL: the model checks found a misfit"
    return "NOT FINAL: diagnostics failed"


def format_fit(run, *, rows: int = 5) -> str:
    """The terminal summary of a fit: what was fitted, population, extremes, verdict."""
    rec = run.loaded.reconciliation
    idata = run.idata
    lines = [
        f"data: {rec['rows_read']} rows read, {rec['rows_used']} used, {rec['groups']} groups"
        f" ({rec['total_successes']} successes in {rec['total_trials']} trials)",
    ]
    lines += [f"  note: {n}" for n in run.loaded.notes + run.messages]
    lines.append(
        f"model: {attr(idata, 'model')}, engine {attr(idata, 'engine')},"
        f" {idata.posterior.sizes['chain']} x {idata.posterior.sizes['draw']} draws,"
        f" {run.seconds:.1f} s"
    )
    level = run.settings["level"]
    for row in run.population.itertuples():
        note = getattr(row, "note", "")
        note = note if isinstance(note, str) else ""
        centre = f"median {row.median:.4g}" if note else f"{row.mean:10.4g}"
        lines.append(
            f"  {row.quantity:<18} {centre:>10}   {level:.0%} interval"
            f" [{row.lower:.4g}, {row.upper:.4g}]"
        )
        if note:
            lines.append(f"    note: {note}")
    lines += format_parents(run.tables.get("parents"), level, rows=rows)
    est = run.estimates.sort_values("posterior_mean", ascending=False)
    show = est if len(est) <= 2 * rows else pd.concat([est.head(rows), est.tail(rows)])
    lines.append(
        f"groups by posterior mean ({'all' if len(est) <= 2 * rows else 'top and bottom'}):"
    )
    width = min(max(len(str(g)) for g in show["group"]), 28)
    for r in show.itertuples():
        observed = "   -  " if np.isnan(r.observed_rate) else f"{r.observed_rate:6.3f}"
        lines.append(
            f"  {str(r.group)[:width]:<{width}}  {r.successes:>7}/{r.trials:<7}  observed"
            f" {observed}  estimate {r.posterior_mean:6.3f} [{r.lower:.3f}, {r.upper:.3f}]"
        )
    lines.append(format_diagnostics(run.diagnostics))
    ver = run.record_parts.get("verification")
    if ver:
        lines.append(
            f"verify: {ver['what']}: {ver['share_within_4_mcse']:.1%} of groups within 4 MCSE"
            f" (max |z| {ver['max_abs_z']:.2f}; largest interval-end difference"
            f" {ver['max_abs_interval_difference']:.2g})"
            f" -> {'AGREE' if ver['agree'] else 'DISAGREE'}"
        )
    ranking = run.record_parts.get("ranking")
    if ranking:
        lines.append(format_ranking(run.tables, ranking, run.documents.get("targets")))
    return "\n".join(lines)


def format_parents(parents, level: float, *, rows: int = 5) -> list[str]:
    """The nested model's parents: effect on the log-odds and the typical group's rate."""
    if parents is None or not len(parents):
        return []
    table = parents.sort_values("effect_mean", ascending=False)
    many = len(table) > 2 * rows
    shown = pd.concat([table.head(rows), table.tail(rows)]) if many else table
    width = min(max(len(str(p)) for p in shown["parent"]), 28)
    lines = [f"parents ({len(table)}{', top and bottom' if many else ''}): effect on the"
             f" log-odds [{level:.0%}], typical group's rate [{level:.0%}]"]
    for r in shown.itertuples():
        lines.append(
            f"  {str(r.parent)[:width]:<{width}}  {r.groups:>5} groups  effect"
            f" {r.effect_mean:+7.3f} [{r.effect_lower:+.3f}, {r.effect_upper:+.3f}]  rate"
            f" {r.typical_rate_median:.3f} [{r.typical_rate_lower:.3f},"
            f" {r.typical_rate_upper:.3f}]"
        )
    return lines


def format_diagnostics(d) -> str:
    """Ten-second terminal summary: convergence and draws, then the verdict over everything."""
    s = d.to_dict()["summary"]
    sampling = [r for r in d.reasons if r.get("quantity") != "model checks"]
    lines = [
        f"convergence: {'NOT-READY' if sampling else 'READY'}"
        f"  (max R-hat {s['max_r_hat'] or float('nan'):.4f},"
        f" min bulk ESS {s['min_ess_bulk'] or float('nan'):.0f},"
        f" min tail ESS {s['min_ess_tail'] or float('nan'):.0f}"
        + (f", divergences {d.run['divergences']}" if "divergences" in d.run else "")
        + ")"
    ]
    for r in sampling[:5]:
        lines.append(f"  - {r['text']}")
    if d.run.get("independent_draws"):
        lines.append("  (independent draws from the exact engine: mixing holds by construction;"
                     f" {d.run['chains'] * d.run['draws_per_chain']} stored draws)")
    lines.append(format_verdict(d))
    return "\n".join(lines)


def format_verdict(d) -> str:
    """The verdict over convergence, draws and the model checks, with its first remedy."""
    lines = [f"verdict: {d.verdict.upper()} ({MEANINGS.get(d.verdict, d.verdict)})"]
    lines += [f"  - {r['text']}" for r in d.reasons if r.get("quantity") == "model checks"]
    if d.remedies and d.verdict != READY:
        lines.append(f"  remedy: {d.remedies[0]}")
    return "\n".join(lines)


def format_ranking(
    tables: dict, record: dict, targets: dict | None = None, *, rows: int = 3
) -> str:
    """A summary of the ranking step readable in ten seconds."""
    ranks = tables.get("ranks")
    if ranks is None or record is None:
        return ""
    k = record["top_k"]
    level = record["level"]
    ranked = ranks.dropna(subset=["rank_median"])
    note = record.get("ranking_note") or ""
    if ranked.empty:
        lines = [f"ranks: none: {note or 'no group has a rank'}"]
    else:
        lines = [
            f"ranks: {len(ranked)} groups, {record['better']} rate is better, rank 1 = best,"
            f" {record['draws']} draws; median {level:.0%} rank interval spans"
            f" {float((ranked['rank_upper'] - ranked['rank_lower']).median()):.0f} places"
        ]
        for r in ranked.head(rows).itertuples():
            lines.append(
                f"  {str(r.group)[:28]:<28} rank {r.rank_median:g}"
                f" [{r.rank_lower:g}, {r.rank_upper:g}]  P(best {k}) {r.prob_best_k:.2f}"
            )
        sure = int((ranked["prob_best_k"] >= 0.9).sum())
        lines.append(f"  {sure} group(s) with P(in best {k}) >= 0.9")
        if note:
            lines.append(f"  {note}")
    if targets is not None:
        ab, be = targets["above"], targets["below"]
        words = targets.get("flag_words") or {"above": "above", "below": "below"}
        lines.append(
            f"target {targets['target']:g}: {ab['flagged']} flagged {words['above']}, expected"
            f" false share {ab['expected_false_share']:.3f}; {be['flagged']} {words['below']},"
            f" {be['expected_false_share']:.3f}; level {targets['fdr_level']:g}"
        )
    funnel = tables.get("funnel")
    if funnel is not None:
        o998 = funnel["outside_998"]
        o95 = funnel["outside_95"]
        lines.append(
            f"funnel vs {record['funnel_benchmark_source']} {record['funnel_benchmark']:.4g}:"
            f" {int((o998 != '').sum())} outside 99.8% limits ({int((o998 == 'high').sum())} high,"
            f" {int((o998 == 'low').sum())} low), {int((o95 != '').sum())} outside 95%"
        )
    needed = record.get("trials_needed")
    if isinstance(needed, dict):
        more = tables["trials_needed"]
        more = more[more["status"] == "settles with more trials"]["trials_needed"]
        median = f", median {int(more.median())} more" if len(more) else ""
        lines.append(
            f"trials needed ({needed['settle_chance']:.0%} chance to settle vs target):"
            f" {needed['already_settled']} already settled,"
            f" {needed['settles_with_more_trials']} need more{median},"
            f" {needed['not_within_max_trials']} not within {needed['max_trials']}"
        )
    else:
        lines.append("trials needed: give --target to compute")
    lines.append(TERMINAL_CAUTION)
    return "\n".join(lines)


_LABELS = {
    "dispersion": "dispersion",
    "tail_share": "outer 5% share",
    "central_share": "central 50% share",
    "zero_success_groups": "groups with 0",
    "chi_square": "chi-square",
}


def format_checks(doc: dict) -> str:
    """Ten-second terminal summary of checks (a Checks or the content of checks.json)."""
    if not isinstance(doc, dict):
        doc = doc.to_dict()
    s = doc["settings"]
    lines = [
        f"checks: {doc['verdict'].upper()}  ({doc['model']}, {doc['replicated_draws']} replicated"
        + (f" data sets; misfit when p < {doc['statistic_bounds'][0]:.3g} or"
           f" p > {doc['statistic_bounds'][1]:.4g}: level {doc['nominal_level']:.2g} over all)"
           if "statistic_bounds" in doc else
           f" data sets; misfit when p < {s['lower']:g} or p > {s['upper']:g})")
    ]
    lines.append(f"  {'statistic':<15}{'observed':>10}   {'replicated 90%':<22}{'p':>6}")
    for row in doc["statistics"]:
        label = _LABELS.get(row["statistic"], row["statistic"])
        if row["verdict"] == NOT_COMPUTED:
            lines.append(f"  {label:<15}{'-':>10}   {'(not computed)':<22}")
            continue
        span = f"[{row['replicated_lower']:.4g}, {row['replicated_upper']:.4g}]"
        mark = "  MISFIT" if row["verdict"] == MISFIT else ""
        lines.append(
            f"  {label:<15}{row['observed']:>10.4g}   {span:<22}{row['p_value']:>6.3f}{mark}"
        )
    loo = doc["loo"]
    if loo["available"]:
        high = loo["high_k_groups"]
        lines.append(
            f"held-out groups: elpd_loo {loo['elpd_loo']:.1f} ± {loo['se']:.1f}"
            f" (p_loo {loo['p_loo']:.1f}, {loo['groups']} groups, PSIS-LOO on y_group);"
            f" Pareto k above {loo['good_k']:.2f}: {len(high)}"
        )
        if high:
            shown = ", ".join(
                f"{h['group']} ({'-' if h['pareto_k'] is None else format(h['pareto_k'], '.2f')},"
                f" {h['loo_method']})" for h in high[:5]
            )
            more = f" and {len(high) - 5} more" if len(high) > 5 else ""
            lines.append(f"  high k: {shown}{more}")
        if loo["unresolved_groups"]:
            lines.append(
                f"  {len(loo['unresolved_groups'])} high-k groups not refitted: their elpd may be"
                " optimistic"
            )
    else:
        lines.append("held-out groups: " + "; ".join(loo["notes"]))
    cal = doc["loo_pit"]
    if cal.get("verdict") != NOT_COMPUTED:
        lines.append(
            f"LOO-PIT: {cal['verdict']} (KS distance {cal['ks_statistic']:.3f}, p"
            f" {cal['ks_p_value']:.3g}; {cal['share_below_0.05']:.0%} below 0.05,"
            f" {cal['share_above_0.95']:.0%} above 0.95)"
        )
    if doc["verdict"] == MISFIT:
        names = ", ".join(_LABELS.get(m, m) for m in doc["misfit_statistics"])
        lines.append(
            f"  the model does not reproduce the data's {names}; compare other pooling choices"
            " (workbench compare) before reporting."
        )
    return "\n".join(lines)


def format_comparison(comparison) -> str:
    """Ten-second terminal summary: the table, best first, and the plain-words readings."""
    t = comparison.table
    width = max(12, min(28, max(len(str(r)) for r in t["run"])))
    lines = [
        f"comparison: {len(t)} runs, {comparison.info['groups']} groups, leave one group out"
        " (PSIS-LOO on y_group; larger elpd is better)",
        f"  {'#':<3}{'run':<{width}}  {'elpd_loo':>9} {'se':>6}  {'difference':>10} {'se':>6}"
        f" {'z':>6}  high k",
    ]
    for r in t.itertuples():
        if r.rank == 1:
            diff = f"{'0.0':>10} {'-':>6} {'-':>6}"
        else:
            diff = f"{r.elpd_difference:>10.1f} {r.difference_se:>6.1f} {r.difference_z:>6.1f}"
        flag = "" if r.final else "  (not final)"
        high = f"{r.high_k_groups}"
        if r.high_k_groups:
            high += f" ({r.unresolved_groups} not refitted)" if r.unresolved_groups else " (exact)"
        lines.append(
            f"  {r.rank:<3}{str(r.run)[:width]:<{width}}  {r.elpd_loo:>9.1f} {r.se:>6.1f}  {diff}"
            f"  {high}{flag}"
        )
    lines += [f"  {s}" for s in comparison.readings]
    lines += [f"  note: {n}" for n in comparison.notes]
    return "\n".join(lines)


def format_prediction(pred, *, rows: int = 3) -> str:
    """A summary of the predictions readable in ten seconds."""
    t = pred.table
    m = pred.record["future_trials"]
    level = pred.record["level"]
    groups = t[~t["is_new_group"]].sort_values("predicted_mean", ascending=False)
    new = t[t["is_new_group"]].iloc[0]
    lines = [
        f"predictions: successes in {m} future trials, {level:.0%} intervals,"
        f" {pred.record['groups']} groups"
    ]
    shown = groups if len(groups) <= 2 * rows else pd.concat([groups.head(rows), groups.tail(rows)])
    for r in shown.itertuples():
        lines.append(f"  {str(r.group)[:28]:<28} {r.predicted_mean:9.1f}  [{r.lower}, {r.upper}]")
    lines.append(
        f"  {NEW_GROUP_LABEL:<28} {new['predicted_mean']:9.1f}  [{new['lower']}, {new['upper']}]"
    )
    return "\n".join(lines)


def format_report(report) -> str:
    """One line for the terminal."""
    return (
        f"wrote {report.path} ({report.bytes / 1024:.0f} KB, {len(report.figures)} figures"
        f" beside it, {report.seconds:.1f} s)"
    )


def format_progress(what: str, done: int, total: int, seconds: float) -> str:
    """One progress line: done of total, time so far and an estimate of the rest."""
    left = seconds / done * (total - done) if done else float("nan")
    rest = f", about {left:.0f} s left" if done and done < total else ""
    return f"{what} {done}/{total} ({seconds:.0f} s{rest})"


def format_sensitivity(doc: dict) -> str:
    """Prior sensitivity: the verdict, then each alternative in one line."""
    lines = [f"prior sensitivity: {doc['sentence']}",
             f"  {'alternative':<29}{'max move':>9}  {'flags':>5}  {'best-' + str(doc['top_k']):>6}"
             "  prior"]
    for v in doc["alternatives"]:
        lines.append(
            f"  {v['alternative']:<29}{v['max_mean_shift_sd']:>6.2f} sd  {len(v['flag_changes']):>5}"
            f"  {len(v['top_k_changes']):>6}  {v['prior']}")
    if doc.get("target") is None:
        lines.append("  (no target: flags not compared; give one with 'workbench rank DIR"
                     " --target P')")
    lines.append(f"  rule: {doc['rule']}")
    return "\n".join(lines)


def format_calibration(doc: dict) -> str:
    """Simulation-based calibration: verdict, ranks, coverage, false flags."""
    lines = [
        f"calibration: {doc['sentence']}",
        f"  {doc['model']}, engine {doc['engine']}, {doc['replicates']} simulated data sets on"
        f" the data's {doc['groups']} trial counts, ranks among {doc['draws']} draws",
    ]
    for r in doc["ranks"]:
        mark = "" if r["uniform"] is not False else "  NOT UNIFORM"
        lines.append(f"  ranks {r['quantity'][:30]:<30} chi-square {r['chi_square']:7.2f}"
                     f" ({r['df']} df), p {r['p_value']:.3f}{mark}")
    for c in doc["coverage"]:
        mark = "" if c["within"] else "  OUTSIDE TOLERANCE"
        lines.append(f"  {c['level']:.0%} intervals cover {c['realised']:.1%} of true rates"
                     f" (tolerance ±{c['tolerance']:.1%}){mark}")
    f = doc["false_flags"]
    if isinstance(f, dict):
        mark = "" if f["within"] else "  TOO MANY"
        lines.append(
            f"  target {f['target']:g}: false-flag share {f['realised_false_share']:.1%} against"
            f" the posterior's expected {f['expected_false_share']:.1%} (level"
            f" {f['fdr_level']:g}; {f['flagged_per_replicate']:.1f} flags per data set){mark}")
    else:
        lines.append(f"  target flags: {f}")
    return "\n".join(lines)
