"""Prior sensitivity: how far the conclusions move under other reasonable hyperpriors.

The run is refitted under a fixed, documented set of alternative priors (:func:`prior_variants`)
and every fit is summarised the same way (:func:`conclusions`): each group's posterior mean,
sd and central interval, its rank interval, whether it is among the best ``top`` by posterior
mean, and its target flag. :func:`compare` sets each alternative against the baseline (the
run's own prior, refitted with the same engine, so the comparison is like with like) and gives
a one-line verdict.

The alternatives (beta-binomial, around the run's own prior mu ~ Beta(A, B),
log kappa ~ Normal(log M, S)):

- ``weaker pooling``: kappa's prior median M / 10 (the groups believed less alike);
- ``stronger pooling``: M x 10;
- ``weaker pooling, confident`` and ``stronger pooling, confident``: the same medians with the
  log-scale sd halved (S / 2), a prior that insists;
- ``Jeffreys mean prior``: mu ~ Beta(1/2, 1/2);
- ``firmer mean prior``: mu ~ Beta(5A, 5B), the same prior mean five times as informative.

For no-pooling and complete-pooling the rate prior becomes Beta(1/2, 1/2) and Beta(2, 2); for
logit-normal and nested the HalfNormal scales are divided and multiplied by 3. An alternative
equal to the baseline is left out.

The verdict is ``sensitive`` when any alternative changes a group's target flag, changes who is
among the best ``top``, or moves a posterior mean by more than ``SHIFT_LIMIT`` baseline
posterior sds; ``robust`` otherwise. The limit of half a posterior sd is this project's choice:
a move that size is visible against the interval a reader is shown.

Caution: a robust ranking is still no verdict on a group or the people in it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..models import theta_draws
from .draws import group_draws
from .ranks import rank_summary
from .targets import target_tables

#: a posterior mean moving by more than this many baseline posterior sds reads "sensitive"
SHIFT_LIMIT = 0.5
VERDICTS = ("robust", "sensitive")


@dataclass(frozen=True)
class Variant:
    """One alternative prior: its name, what it says, and the settings it changes."""

    name: str
    description: str
    changes: dict


def _pair(value) -> tuple[float, float]:
    a, b = value
    return float(a), float(b)


def prior_variants(settings) -> list[Variant]:
    """The documented alternatives to the run's prior (see the module docstring)."""
    model = settings["model"]
    out: list[Variant] = []
    if model == "beta-binomial":
        med, sd = _pair(settings["kappa_prior"])
        a, b = _pair(settings["mu_prior"])
        for name, m, s, what in (
            ("weaker pooling", med / 10, sd, "kappa prior median / 10"),
            ("stronger pooling", med * 10, sd, "kappa prior median x 10"),
            ("weaker pooling, confident", med / 10, sd / 2,
             "kappa prior median / 10, log-sd / 2"),
            ("stronger pooling, confident", med * 10, sd / 2,
             "kappa prior median x 10, log-sd / 2"),
        ):
            if 0 < m <= 1e6:
                out.append(Variant(name, f"{what}: LogNormal(log {m:g}, {s:g})",
                                   {"kappa_prior": (m, s)}))
        for name, pa, pb, what in (
            ("Jeffreys mean prior", 0.5, 0.5, "population mean ~ Beta(0.5, 0.5)"),
            ("firmer mean prior", 5 * a, 5 * b,
             f"population mean ~ Beta({5 * a:g}, {5 * b:g}), same mean, 5x the weight"),
        ):
            if (pa, pb) != (a, b):
                out.append(Variant(name, what, {"mu_prior": (pa, pb)}))
    elif model in ("no-pooling", "complete-pooling"):
        a, b = _pair(settings["beta_prior"])
        for name, pa, pb in (("Jeffreys rate prior", 0.5, 0.5), ("firmer rate prior", 2.0, 2.0)):
            if (pa, pb) != (a, b):
                out.append(Variant(name, f"rate ~ Beta({pa:g}, {pb:g})",
                                   {"beta_prior": (pa, pb)}))
    else:
        names = ["sigma_prior"] + (["tau_prior"] if model == "nested" else [])
        for option in names:
            scale = float(settings[option])
            what = "between-group" if option == "sigma_prior" else "between-parent"
            out.append(Variant(f"weaker {what} spread", f"{option} / 3: HalfNormal({scale / 3:g})",
                               {option: scale / 3}))
            out.append(Variant(f"stronger {what} spread",
                               f"{option} x 3: HalfNormal({scale * 3:g})", {option: scale * 3}))
    return out


def conclusions(estimator, *, level: float, target: float | None, fdr: float, top: int,
                better: str) -> pd.DataFrame:
    """What a reader takes from one fit, per group: estimate, interval, ranks, top-k, flag."""
    summary = estimator.summary(level, target=target)
    draws = group_draws(estimator.idata_, summary, target=target,
                        closed=getattr(estimator, "exact_", None))
    mean, var = draws.moments()
    theta = theta_draws(estimator.idata_)
    ranks = rank_summary(theta, better=better, top=top, level=level)
    order = np.argsort(-mean if better == "higher" else mean, kind="stable")
    in_top = np.zeros(len(mean), dtype=bool)
    in_top[order[: min(top, len(mean))]] = True
    table = pd.DataFrame({
        "group": draws.names.astype(str),
        "posterior_mean": mean,
        "posterior_sd": np.sqrt(np.maximum(var, 0.0)),
        "lower": summary["lower"].to_numpy(),
        "upper": summary["upper"].to_numpy(),
        "rank_median": ranks.rank_median,
        "rank_lower": ranks.rank_lower,
        "rank_upper": ranks.rank_upper,
        "in_top": in_top,
    })
    if target is not None:
        flags, _ = target_tables(draws.names, draws.prob_above(target), target, fdr,
                                 better=better, trials=draws.trials)
        table["prob_above_target"] = flags["prob_above_target"].to_numpy()
        table["target_flag"] = flags["target_flag"].to_numpy()
    return table


def _flag_word(flag: str) -> str:
    return flag if flag else "not flagged"


def compare(baseline: pd.DataFrame, alternatives: dict[str, tuple[Variant, pd.DataFrame]], *,
            top: int, target: float | None) -> tuple[pd.DataFrame, dict]:
    """sensitivity.csv (one row per group and alternative) and sensitivity.json.

    ``alternatives`` maps a variant's name to the variant and its :func:`conclusions`.
    """
    base = baseline.set_index("group")
    rows = []
    per_variant = []
    for name, (variant, alt) in alternatives.items():
        alt = alt.set_index("group").loc[base.index]
        sd = base["posterior_sd"].to_numpy()
        shift = alt["posterior_mean"].to_numpy() - base["posterior_mean"].to_numpy()
        shift_sd = np.divide(np.abs(shift), sd, out=np.zeros_like(shift), where=sd > 0)
        end = np.maximum(np.abs(alt["lower"].to_numpy() - base["lower"].to_numpy()),
                         np.abs(alt["upper"].to_numpy() - base["upper"].to_numpy()))
        rank_move = np.maximum.reduce([
            np.abs(alt[c].to_numpy() - base[c].to_numpy())
            for c in ("rank_median", "rank_lower", "rank_upper")
        ])
        top_change = alt["in_top"].to_numpy() != base["in_top"].to_numpy()
        if target is not None:
            flag_base = base["target_flag"].to_numpy()
            flag_alt = alt["target_flag"].to_numpy()
            flag_change = flag_base != flag_alt
            prob_move = np.abs(alt["prob_above_target"].to_numpy()
                               - base["prob_above_target"].to_numpy())
        else:
            prob_move = np.zeros(len(base))
            flag_base = flag_alt = np.full(len(base), "")
            flag_change = np.zeros(len(base), dtype=bool)
        frame = pd.DataFrame({
            "group": base.index.astype(str),
            "alternative": name,
            "baseline_mean": base["posterior_mean"].to_numpy(),
            "alternative_mean": alt["posterior_mean"].to_numpy(),
            "mean_shift": shift,
            "mean_shift_sd": shift_sd,
            "interval_end_shift": end,
            "baseline_lower": base["lower"].to_numpy(),
            "baseline_upper": base["upper"].to_numpy(),
            "alternative_lower": alt["lower"].to_numpy(),
            "alternative_upper": alt["upper"].to_numpy(),
            "rank_interval_shift": rank_move,
            "baseline_rank_interval": [f"{lo:g}-{hi:g}" for lo, hi in
                                       zip(base["rank_lower"], base["rank_upper"], strict=True)],
            "alternative_rank_interval": [f"{lo:g}-{hi:g}" for lo, hi in
                                          zip(alt["rank_lower"], alt["rank_upper"], strict=True)],
            "top_k_changes": top_change,
            "baseline_flag": flag_base,
            "alternative_flag": flag_alt,
            "prob_above_target_shift": prob_move,
            "flag_changes": flag_change,
        })
        rows.append(frame)
        worst = int(np.argmax(shift_sd)) if len(shift_sd) else 0
        per_variant.append({
            "alternative": name,
            "prior": variant.description,
            "changes": {k: list(v) if isinstance(v, tuple) else v
                        for k, v in variant.changes.items()},
            "max_mean_shift_sd": float(shift_sd.max()) if len(shift_sd) else 0.0,
            "max_mean_shift_group": str(base.index[worst]) if len(shift_sd) else None,
            "max_interval_end_shift": float(end.max()) if len(end) else 0.0,
            "max_rank_interval_shift": float(rank_move.max()) if len(rank_move) else 0.0,
            "flag_changes": [
                {"group": str(g), "baseline": _flag_word(a), "alternative": _flag_word(b),
                 "prob_above_target_shift": float(m)}
                for g, a, b, m in zip(base.index[flag_change], flag_base[flag_change],
                                      flag_alt[flag_change], prob_move[flag_change],
                                      strict=True)
            ],
            "top_k_changes": [
                {"group": str(g), "baseline": "in top" if t else "not in top",
                 "alternative": "not in top" if t else "in top"}
                for g, t in zip(base.index[top_change], base["in_top"].to_numpy()[top_change],
                                strict=True)
            ],
        })
    table = pd.concat(rows, ignore_index=True) if rows else pd.DataFrame()
    doc = summarise(per_variant, top=top, target=target, groups=len(base))
    return table, doc


def summarise(per_variant: list[dict], *, top: int, target: float | None, groups: int) -> dict:
    """The verdict and the groups whose conclusions hinge on the prior."""
    flag_groups = sorted({c["group"] for v in per_variant for c in v["flag_changes"]})
    top_groups = sorted({c["group"] for v in per_variant for c in v["top_k_changes"]})
    moved = [v for v in per_variant if v["max_mean_shift_sd"] > SHIFT_LIMIT]
    causes = []
    for v in per_variant:
        what = []
        if v["flag_changes"]:
            what.append("target flags")
        if v["top_k_changes"]:
            what.append(f"best-{top} membership")
        if v["max_mean_shift_sd"] > SHIFT_LIMIT:
            what.append("estimates")
        if what:
            causes.append(f"{v['alternative']} ({', '.join(what)})")
    sensitive = bool(flag_groups or top_groups or moved)
    worst = max(per_variant, key=lambda v: v["max_mean_shift_sd"]) if per_variant else None
    if not per_variant:
        sentence = "robust: no alternative prior applies to this model"
    elif sensitive:
        named = []
        if flag_groups:
            moves = [c["prob_above_target_shift"] for v in per_variant for c in v["flag_changes"]]
            named.append("target flag of " + ", ".join(flag_groups)
                         + f" (their P(above target) moves by at most {max(moves):.3f}"
                         + (": flags at the false-flag boundary" if max(moves) < 0.05 else "")
                         + ")")
        if top_groups:
            named.append(f"best-{top} membership of " + ", ".join(top_groups))
        if moved and not named:
            named.append(f"estimates (largest move {worst['max_mean_shift_sd']:.2f} sd,"
                         f" {worst['max_mean_shift_group']})")
        sentence = ("sensitive: " + "; ".join(named) + " change under "
                    + "; ".join(causes))
    else:
        sentence = (f"robust: no target flag or best-{top} membership changes under"
                    f" {len(per_variant)} alternative priors; largest move of a posterior mean"
                    f" {worst['max_mean_shift_sd']:.2f} sd ({worst['max_mean_shift_group']})")
    return {
        "verdict": VERDICTS[int(sensitive)],
        "sentence": sentence,
        "groups": groups,
        "top_k": top,
        "target": target,
        "shift_limit_sd": SHIFT_LIMIT,
        "flag_change_groups": flag_groups,
        "top_k_change_groups": top_groups,
        "alternatives": per_variant,
        "rule": (
            "sensitive when an alternative prior changes a target flag, changes membership of"
            f" the best {top} by posterior mean, or moves a posterior mean by more than"
            f" {SHIFT_LIMIT:g} baseline posterior sd; robust otherwise"
        ),
    }


__all__ = ["SHIFT_LIMIT", "Variant", "compare", "conclusions", "prior_variants", "summarise"]
