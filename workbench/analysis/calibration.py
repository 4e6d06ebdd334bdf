"""Simulation-based calibration on the user's own trial counts (Talts et al. 2018).

Each replicate draws the population parameters from the prior, the group rates from the
population, and successes from Binomial(trials_j, theta_j) with the user's own ``trials_j``;
it then fits the chosen model and engine to the simulated table and records

- the rank of each true value among ``draws`` posterior draws (evenly thinned) for the
  population parameters and a sample of groups: under a correct engine every rank is uniform
  on 0..draws (Talts et al. 2018, Theorem 1);
- the share of all groups whose true rate lies in the central 50%, 80% and 95% intervals
  (the run's interval method: closed forms for the exact engine);
- with a target rate, the target flags (largest set with posterior expected share of false
  flags at most ``fdr``): how many were flagged, how many wrongly, and the posterior's own
  expected share. Averaged over replicates, the realised share of false flags equals the
  expected one when the posterior is calibrated.

:func:`summarise` turns the replicates into tables and a verdict. Ranks are binned and tested
against uniform with Pearson's chi-square (scipy.stats.chisquare); coverage is compared with
its nominal value within ``z`` standard errors across replicates, where ``z`` holds the
family-wise error of all the checks at ``FAMILY_ERROR`` (Bonferroni). Nothing here writes a
file or prints; the run-folder step (:func:`workbench.steps.calibrate_folder`) runs the
replicates in parallel and keeps finished ones so that a stopped run resumes.
"""

from __future__ import annotations

import hashlib
import json
import math
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd
from scipy import special, stats

from ..models import GroupCounts, ParameterError, make_model
from .targets import fdr_flags

LEVELS = (0.5, 0.8, 0.95)
#: family-wise false-alarm rate of all checks of one calibration together
FAMILY_ERROR = 0.01
#: fewest expected replicates per rank bin for the chi-square test (common practice: 5)
MIN_PER_BIN = 5
#: kappa's prior is truncated to this range in both engines (models/_grid.py, V_BOUNDS)
KAPPA_RANGE = (1e-6, 1e8)
POPULATION = ("mu", "kappa", "between_group_sd")
VERDICTS = ("calibrated", "miscalibrated")
SUPPORTED = ("beta-binomial",)


@dataclass(frozen=True)
class Plan:
    """What one calibration simulates and fits; its :meth:`key` names it for resuming."""

    model: str
    estimator: dict  # make_model settings (without random_seed)
    names: tuple[str, ...]
    trials: tuple[int, ...]
    tracked: tuple[int, ...]  # indices of the groups whose ranks are recorded
    draws: int = 99
    seed: int = 0
    target: float | None = None
    fdr: float = 0.10
    levels: tuple[float, ...] = LEVELS

    def key(self) -> str:
        text = json.dumps(asdict(self), sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()[:16]


def make_plan(model: str, estimator: dict, names, trials, *, groups: int = 8, draws: int = 99,
              seed: int = 0, target: float | None = None, fdr: float = 0.10) -> Plan:
    """A plan with ``groups`` tracked groups spread over the range of trial counts."""
    if model not in SUPPORTED:
        raise ParameterError(
            f"calibrate simulates from the {', '.join(SUPPORTED)} prior only; the run's model"
            f" is {model}; fit a beta-binomial run to calibrate it."
        )
    trials = np.asarray(trials, dtype=np.int64)
    order = np.argsort(trials, kind="stable")
    k = min(int(groups), len(trials))
    picks = order[np.unique(np.round(np.linspace(0, len(trials) - 1, k)).astype(int))] if k else []
    settings = {key: (list(v) if isinstance(v, tuple) else v)
                for key, v in estimator.items() if key != "random_seed"}
    return Plan(model, settings, tuple(map(str, names)), tuple(int(t) for t in trials),
                tuple(sorted(int(i) for i in picks)), int(draws), int(seed), target, float(fdr))


def replicate_seed(plan: Plan, index: int) -> int:
    """Replicate ``index``'s seed: the same whatever order replicates finish in."""
    return int(np.random.SeedSequence([plan.seed, index]).generate_state(1)[0])


def draw_truth(plan: Plan, rng: np.random.Generator) -> dict:
    """Population parameters from the prior, group rates, then successes."""
    mu_a, mu_b = plan.estimator["mu_prior"]
    median, log_sd = plan.estimator["kappa_prior"]
    mu = float(rng.beta(mu_a, mu_b))
    lo, hi = np.log(KAPPA_RANGE)
    while True:  # the prior is truncated to KAPPA_RANGE
        v = rng.normal(np.log(median), log_sd)
        if lo <= v <= hi:
            break
    kappa = float(np.exp(v))
    trials = np.asarray(plan.trials, dtype=np.int64)
    theta = rng.beta(mu * kappa, (1 - mu) * kappa, size=len(trials))
    successes = rng.binomial(trials, theta)
    return {
        "mu": mu,
        "kappa": kappa,
        "between_group_sd": float(np.sqrt(mu * (1 - mu) / (kappa + 1))),
        "theta": theta,
        "successes": successes,
    }


def default_fitter(plan: Plan, counts: GroupCounts, seed: int):
    """Fit the plan's model and engine to one simulated table.

    An exact grid refines on the group means only: calibration ranks the truth among the
    draws, which that refinement already settles; the tolerance checks of printed quantiles
    (README, "How exact is exact") cost ten times the fit and feed no rank here.
    """
    estimator = make_model(plan.model, **plan.estimator, random_seed=seed)
    if hasattr(estimator, "_grid_means_only"):
        estimator._grid_means_only = True
    return estimator.fit(counts)


def _thinned(values: np.ndarray, draws: int) -> np.ndarray:
    flat = np.asarray(values).reshape(-1) if values.ndim <= 2 else values
    if len(flat) < draws:
        raise ParameterError(
            f"the fit kept {len(flat)} draws but calibration ranks among {draws}; give"
            " more --draws."
        )
    index = np.round(np.linspace(0, len(flat) - 1, draws)).astype(int)
    return flat[index]


def rank_of(truth: float, draws: np.ndarray, rng: np.random.Generator) -> int:
    """Number of draws below the truth, ties broken at random (Talts et al. 2018)."""
    below = int(np.sum(draws < truth))
    ties = int(np.sum(draws == truth))
    return below + (int(rng.integers(0, ties + 1)) if ties else 0)


def posterior_cdf_at(fitted, x: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Each group's posterior CDF at its own ``x_j``: closed form where the engine is exact.

    The central interval at level L holds x_j exactly when this lies in [(1-L)/2, (1+L)/2],
    so one evaluation gives the coverage of every level.
    """
    exact = getattr(fitted, "exact_", None)
    parts = [getattr(exact, k, None) for k in ("a", "b", "weights", "y", "n", "index")]
    if exact is not None and all(p is not None for p in parts):
        a, b, w, y, n, index = (np.asarray(p) for p in parts)
        if a.shape == b.shape == w.shape and len(index) == len(x):
            y, n = y[index], n[index]
            out = np.empty(len(x))
            for j in range(len(x)):
                out[j] = special.betainc(a + y[j], b + n[j] - y[j], x[j]) @ (w / w.sum())
            return np.clip(out, 0.0, 1.0)
    return (theta < x[None, :]).mean(axis=0)


def prob_above(fitted, target: float, theta: np.ndarray) -> np.ndarray:
    """P(theta_j > target): closed form where the engine is exact, else the draws."""
    exact = getattr(fitted, "exact_", None)
    if exact is not None:
        return np.clip(exact.sf(target), 0.0, 1.0)
    return (theta > target).mean(axis=0)


def run_replicate(plan: Plan, index: int,
                  fitter: Callable | None = None) -> dict:
    """One replicate: simulate, fit, rank, cover, flag. Returns a JSON-ready dict."""
    started = time.perf_counter()
    seed = replicate_seed(plan, index)
    rng = np.random.default_rng(seed)
    truth = draw_truth(plan, rng)
    counts = GroupCounts(np.asarray(plan.names), truth["successes"],
                         np.asarray(plan.trials, dtype=np.int64))
    fitted = (fitter or default_fitter)(plan, counts, int(rng.integers(0, 2**32 - 1)))
    post = fitted.idata_.posterior
    ranks = {}
    for name in POPULATION:
        draws = _thinned(post[name].transpose("chain", "draw").values.ravel(), plan.draws)
        ranks[name] = rank_of(truth[name], draws, rng)
    theta = post["theta"].transpose("chain", "draw", "group").values
    theta = theta.reshape(-1, theta.shape[-1])
    for j in plan.tracked:
        ranks[f"theta[{plan.names[j]}]"] = rank_of(truth["theta"][j],
                                                    _thinned(theta[:, j], plan.draws), rng)
    pit = posterior_cdf_at(fitted, truth["theta"], theta)
    covered = {}
    for level in plan.levels:
        inside = (pit >= (1 - level) / 2) & (pit <= (1 + level) / 2)
        covered[f"{level:g}"] = float(inside.mean())
    flags = None
    if plan.target is not None:
        above = prob_above(fitted, plan.target, theta)
        up, share_up = fdr_flags(above, plan.fdr)
        down, share_down = fdr_flags(1 - above, plan.fdr)
        wrong = int(np.sum(up & (truth["theta"] <= plan.target))
                    + np.sum(down & (truth["theta"] >= plan.target)))
        flagged = int(up.sum() + down.sum())
        expected = (share_up * up.sum() + share_down * down.sum()) / flagged if flagged else 0.0
        flags = {"flagged": flagged, "false": wrong,
                 "false_share": wrong / flagged if flagged else 0.0,
                 "expected_false_share": float(expected)}
    return {
        "index": int(index),
        "seed": seed,
        "truth": {k: truth[k] for k in POPULATION},
        "ranks": ranks,
        "coverage": covered,
        "flags": flags,
        "seconds": round(time.perf_counter() - started, 3),
    }


def _bins(draws: int, replicates: int) -> int:
    """Most bins (dividing draws + 1 evenly) with at least MIN_PER_BIN expected per bin."""
    values = draws + 1
    best = 1
    for b in range(2, min(values, 20) + 1):
        if values % b == 0 and replicates / b >= MIN_PER_BIN:
            best = b
    return best


@dataclass
class Calibration:
    """The tables and the summary of a calibration."""

    ranks: pd.DataFrame  # calibration.csv: one row per replicate and quantity
    replicates: pd.DataFrame  # calibration_replicates.csv: one row per replicate
    summary: dict  # calibration.json
    notes: list[str] = field(default_factory=list)

    @property
    def verdict(self) -> str:
        return self.summary["verdict"]


def _tables(plan: Plan, results: list[dict]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """One row per (replicate, quantity) rank, and one row per replicate."""
    quantities = list(results[0]["ranks"])
    ranks = pd.DataFrame([
        {"replicate": r["index"], "quantity": q, "rank": r["ranks"][q], "draws": plan.draws,
         "truth": r["truth"].get(q, np.nan)}
        for r in results for q in quantities
    ])
    rep = pd.DataFrame([
        {"replicate": r["index"], "seed": r["seed"], "seconds": r["seconds"],
         **{k: r["truth"][k] for k in POPULATION},
         **{f"coverage_{lev}": r["coverage"][lev] for lev in r["coverage"]},
         **({"flagged": r["flags"]["flagged"], "false_flags": r["flags"]["false"],
             "false_share": r["flags"]["false_share"],
             "expected_false_share": r["flags"]["expected_false_share"]}
            if r["flags"] is not None else {})}
        for r in results
    ])
    return ranks, rep


def _rank_uniformity(ranks: pd.DataFrame, draws: int, bins: int, per_check: float) -> list[dict]:
    """Pearson's chi-square on the binned ranks of each quantity."""
    docs = []
    for q in ranks["quantity"].unique():
        r = ranks.loc[ranks["quantity"] == q, "rank"].to_numpy()
        counts = np.bincount(r * bins // (draws + 1), minlength=bins)
        if bins >= 2:
            chi = stats.chisquare(counts)
            statistic, p = float(chi.statistic), float(chi.pvalue)
        else:
            statistic, p = float("nan"), float("nan")
        docs.append({
            "quantity": q, "bins": bins, "counts": counts.tolist(), "chi_square": statistic,
            "df": bins - 1, "p_value": p,
            "uniform": bool(not (p < per_check)) if bins >= 2 else None,
        })
    return docs


def _coverage(rep: pd.DataFrame, levels, groups: int, z: float) -> list[dict]:
    """Realised coverage per level, within z standard errors across replicates."""
    n = len(rep)
    docs = []
    for level in levels:
        col = rep[f"coverage_{level:g}"].to_numpy()
        mean = float(col.mean())
        se = float(col.std(ddof=1) / math.sqrt(n)) if n > 1 else float("nan")
        floor = math.sqrt(level * (1 - level) / (n * groups))
        tol = z * max(se if np.isfinite(se) else floor, floor)
        docs.append({
            "level": level, "realised": mean, "se": se, "tolerance": tol,
            "within": bool(abs(mean - level) <= tol),
        })
    return docs


def _false_flags(rep: pd.DataFrame, plan: Plan, z: float) -> dict | str:
    """The realised false-flag share against the share the flags' own FDR promises."""
    if plan.target is None:
        return "not computed: no target rate"
    n = len(rep)
    realised = rep["false_share"].to_numpy()
    expected = rep["expected_false_share"].to_numpy()
    diff = realised - expected
    se = float(diff.std(ddof=1) / math.sqrt(n)) if n > 1 else float("nan")
    total_flagged = int(rep["flagged"].sum())
    tol = z * se if np.isfinite(se) and se > 0 else 0.0
    return {
        "target": plan.target, "fdr_level": plan.fdr,
        "flagged_per_replicate": total_flagged / n,
        "realised_false_share": float(realised.mean()),
        "expected_false_share": float(expected.mean()),
        "pooled_false_share": (float(rep["false_flags"].sum() / total_flagged)
                               if total_flagged else 0.0),
        "se": se, "tolerance": tol,
        "within": bool(float(diff.mean()) <= tol + 1e-12
                       and float(realised.mean()) <= plan.fdr + tol),
    }


def _verdict(rank_docs, cover_docs, flag_doc, bins: int, n: int) -> tuple[str, str]:
    """The verdict word and its sentence."""
    problems = [f"ranks of {d['quantity']} not uniform (p {d['p_value']:.2g})"
                for d in rank_docs if d["uniform"] is False]
    problems += [f"{d['level']:.0%} intervals cover {d['realised']:.1%}" for d in cover_docs
                 if not d["within"]]
    if isinstance(flag_doc, dict) and not flag_doc["within"]:
        problems.append(f"false flags {flag_doc['realised_false_share']:.1%} against expected"
                        f" {flag_doc['expected_false_share']:.1%}")
    verdict = VERDICTS[int(bool(problems))]
    if bins < 2:
        verdict = "too few replicates"
    coverage_text = ", ".join(f"{d['level']:.0%}: {d['realised']:.1%}" for d in cover_docs)
    if problems:
        return verdict, f"{verdict}: " + "; ".join(problems)
    if bins < 2:
        return verdict, (f"too few replicates: {n} cannot test rank uniformity (need at least"
                         f" {2 * MIN_PER_BIN})")
    return verdict, (f"calibrated: ranks uniform for {len(rank_docs)} quantities; coverage"
                     f" {coverage_text}")


def summarise(plan: Plan, results: list[dict], *, engine: str) -> Calibration:
    """Rank uniformity, coverage and false-flag share over the finished replicates."""
    results = sorted(results, key=lambda r: r["index"])
    n = len(results)
    if n == 0:
        raise ParameterError("calibration has no finished replicate; give --replicates >= 1.")
    ranks, rep = _tables(plan, results)
    bins = _bins(plan.draws, n)
    checks = len(results[0]["ranks"]) + len(plan.levels) + (1 if plan.target is not None else 0)
    per_check = FAMILY_ERROR / checks
    z = float(stats.norm.ppf(1 - per_check / 2))
    rank_docs = _rank_uniformity(ranks, plan.draws, bins, per_check)
    cover_docs = _coverage(rep, plan.levels, len(plan.trials), z)
    flag_doc = _false_flags(rep, plan, z)
    verdict, sentence = _verdict(rank_docs, cover_docs, flag_doc, bins, n)
    doc = {
        "verdict": verdict,
        "sentence": sentence,
        "model": plan.model,
        "engine": engine,
        "replicates": n,
        "draws": plan.draws,
        "groups": len(plan.trials),
        "tracked_groups": [plan.names[j] for j in plan.tracked],
        "seed": plan.seed,
        "plan_key": plan.key(),
        "prior": {k: plan.estimator[k] for k in ("mu_prior", "kappa_prior")
                  if k in plan.estimator},
        "family_error": FAMILY_ERROR,
        "z": z,
        "ranks": rank_docs,
        "coverage": cover_docs,
        "false_flags": flag_doc,
        "seconds": float(rep["seconds"].sum()),
        "method": (
            "simulation-based calibration (Talts et al. 2018): truths drawn from the prior,"
            " successes simulated with the data's own trials per group, each replicate fitted"
            " with the run's model and engine; ranks binned and tested with Pearson's"
            " chi-square; coverage and false-flag share within z standard errors across"
            " replicates, Bonferroni over all checks at family error"
            f" {FAMILY_ERROR:g}"
        ),
    }
    return Calibration(ranks, rep, doc)


__all__ = [
    "Calibration",
    "LEVELS",
    "Plan",
    "default_fitter",
    "draw_truth",
    "make_plan",
    "rank_of",
    "replicate_seed",
    "run_replicate",
    "summarise",
]
