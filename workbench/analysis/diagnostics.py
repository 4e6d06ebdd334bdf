"""Convergence diagnostics and the verdict: nothing is final unless it says ``ready``.

The verdict covers everything a reader relies on, in three states:

- ``ready``: the sampler converged (MCMC), there are enough independent draws for every
  number computed from draws (ranks, P(best k), draw-based target flags, check p-values), and
  the model checks found no misfit (or were not run, which the notes say);
- ``not-ready``: convergence or the number of draws fails (the numbers are not yet computed
  well enough to read);
- ``misfit``: the numbers are computed well, but the posterior predictive checks say the model
  does not reproduce the data (the numbers answer the wrong model's question).

Only ``ready`` is final. The command line exits 3 on both other states and says which.

Enough draws: a probability estimated from S independent draws has Monte Carlo sd at most
0.5 / sqrt(S); at the pass mark of 400 effective draws that is 0.025, small against the 0.9
and 0.5 cut-offs P(best k) and the target flags are read at, and a check p-value at the
misfit bound 0.002 from 400 replicates is at least one replicate beyond it. Exact engines draw
independently, so their effective draws are the stored draws (chains x draws): fewer than
400 is not ready however the closed forms behave.

R-hat (rank-normalised split), bulk and tail ESS and MCSE come from ArviZ, computed once
over whole arrays. Per run: divergences, tree-depth hits and E-BFMI per chain. The exact
engines draw independently, so their chains mix by construction; their own checks (grid edge
density and refinement change) take the sampler checks' place in the verdict.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from ..models import EXACT_TOLERANCE, attr
from . import fast_diagnostics as fast

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

READY = "ready"
NOT_READY = "not-ready"
MISFIT = "misfit"
#: what each verdict means, in words (run.json, NOT-FINAL.txt, the terminal)
MEANINGS = {
    READY: "converged, enough draws, and the model checks found no misfit",
    NOT_READY: "the numbers are not computed well enough yet: convergence or too few draws",
    MISFIT: "computed well, but the model checks say the model does not reproduce the data",
}


@dataclass(frozen=True)
class Thresholds:
    """Pass marks. Defaults: R-hat < 1.01, bulk and tail ESS >= 400, no divergences,
    E-BFMI >= 0.3, at most 1% of draws at the maximum tree depth (common practice)."""

    rhat: float = 1.01
    ess_bulk: float = 400.0
    ess_tail: float = 400.0
    divergences: int = 0
    ebfmi: float = 0.3
    treedepth_share: float = 0.01
    grid_edge_density: float = 1e-8
    grid_refinement_change: float = 1e-6
    grid_refinement_rate_sd: float = EXACT_TOLERANCE["rate_sd"]  # stated in the README
    grid_refinement_probability: float = EXACT_TOLERANCE["probability"]
    independent_draws: int = 400
    replicates: int = 400


@dataclass
class Diagnostics:
    """Per-quantity table, per-run figures and the verdict."""

    table: pd.DataFrame
    run: dict
    verdict: str
    reasons: list[dict] = field(default_factory=list)
    remedies: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    thresholds: Thresholds = field(default_factory=Thresholds)

    @property
    def ready(self) -> bool:
        return self.verdict == READY

    def to_dict(self) -> dict:
        worst = self.table.sort_values("r_hat", ascending=False).head(20)
        return {
            "verdict": self.verdict,
            "final": self.ready,
            "meaning": MEANINGS.get(self.verdict, ""),
            "reasons": self.reasons,
            "remedies": self.remedies,
            "notes": self.notes,
            "thresholds": asdict(self.thresholds),
            "run": self.run,
            "summary": {
                "quantities": int(len(self.table)),
                "max_r_hat": _num(self.table["r_hat"].max()),
                "min_ess_bulk": _num(self.table["ess_bulk"].min()),
                "min_ess_tail": _num(self.table["ess_tail"].min()),
            },
            "worst_quantities": worst.replace({np.nan: None}).to_dict(orient="records"),
        }


def _num(x) -> float | None:
    x = float(x)
    return None if not np.isfinite(x) else x


def _quantity_table(idata) -> pd.DataFrame:
    post = idata.posterior
    # every group rate, hyperparameter and parent effect; theta_new and the derived
    # between-group sd are functions of these
    hyper = [
        v
        for v in post.data_vars
        if post[v].dims[:2] == ("chain", "draw")
        and len(post[v].dims) <= 3
        and v not in ("theta", "theta_new", "between_group_sd")
    ]
    names = ["theta", *hyper]
    # one vectorised pass per variable (equal to ArviZ's rhat/ess/mcse, see fast_diagnostics);
    # an exact engine's theta draws are independent: ESS is their number, MCSE by formula
    independent = bool(attr(idata, "independent_draws", 0))
    figures = {
        name: (fast.independent_summary if independent and name == "theta" else fast.summary)(
            post[name].transpose("chain", "draw", ...).values)
        for name in names
    }
    frames = []
    for name in names:
        dims = post[name].dims[2:]
        if dims:
            labels = [f"{name}[{c}]" for c in post[dims[0]].values.astype(str)]
        else:
            labels = [name]
        frames.append(
            pd.DataFrame(
                {
                    "quantity": labels,
                    **figures[name],
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


def _run_figures(idata) -> dict:
    out: dict = {
        "engine": attr(idata, "engine"),
        "independent_draws": bool(attr(idata, "independent_draws", 0)),
    }
    post = idata.posterior
    out["chains"] = int(post.sizes["chain"])
    out["draws_per_chain"] = int(post.sizes["draw"])
    if "sample_stats" not in idata.groups():
        return out
    ss = idata.sample_stats
    if "diverging" in ss:
        out["divergences"] = int(ss["diverging"].values.sum())
    depth_hit = None
    for name in ("reached_max_treedepth", "maxdepth_reached"):
        if name in ss:
            depth_hit = ss[name].values
    if depth_hit is not None:
        out["treedepth_hits"] = int(depth_hit.sum())
        out["treedepth_share"] = float(depth_hit.mean())
    if "energy" in ss:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            out["ebfmi"] = [float(x) for x in np.atleast_1d(az.bfmi(idata))]
    return out


def diagnose(idata, thresholds: Thresholds | None = None) -> Diagnostics:
    """Diagnostics for every theta_j and hyperparameter, and the verdict."""
    th = thresholds or Thresholds()
    table = _quantity_table(idata)
    run = _run_figures(idata)
    exact = run["independent_draws"]
    reasons: list[dict] = []
    notes: list[str] = []

    def fail(quantity, check, value, limit, direction):
        by = value - limit if direction == "above" else limit - value
        reasons.append(
            {
                "quantity": quantity,
                "check": check,
                "value": _num(value),
                "threshold": limit,
                "by": _num(by),
                "text": f"{quantity}: {check} = {value:.4g} is {direction} the limit {limit:g}",
            }
        )

    per_quantity = [
        ("r_hat", "R-hat", th.rhat, "above", lambda s: s >= th.rhat),
        ("ess_bulk", "bulk ESS", th.ess_bulk, "below", lambda s: s < th.ess_bulk),
        ("ess_tail", "tail ESS", th.ess_tail, "below", lambda s: s < th.ess_tail),
    ]
    sampler_reasons: list[dict] = []
    for column, label, limit, direction, bad in per_quantity:
        values = table[column]
        failing = table[bad(values.fillna(limit if direction == "below" else 0))]
        if failing.empty:
            continue
        worst = failing.sort_values(column, ascending=(direction == "below")).iloc[0]
        before = len(reasons)
        fail(worst["quantity"], label, float(worst[column]), limit, direction)
        if len(failing) > 1:
            reasons[-1]["text"] += f" (and {len(failing) - 1} more quantities fail it)"
            reasons[-1]["failing"] = int(len(failing))
        sampler_reasons.extend(reasons[before:])
    if run.get("divergences", 0) > th.divergences:
        fail("sampler", "divergences", run["divergences"], th.divergences, "above")
    if run.get("treedepth_share", 0.0) > th.treedepth_share:
        fail(
            "sampler",
            "share of draws at maximum tree depth",
            run["treedepth_share"],
            th.treedepth_share,
            "above",
        )
    for chain, value in enumerate(run.get("ebfmi", [])):
        if value < th.ebfmi:
            fail(f"chain {chain}", "E-BFMI", value, th.ebfmi, "below")

    if exact:
        notes.append(
            "The exact engine draws independently from the posterior: its chains mix by"
            " construction, so R-hat and ESS pass by design; they are reported for the record."
        )
        # independent draws: an R-hat/ESS miss is chance, not non-convergence
        for r in sampler_reasons:
            reasons.remove(r)
            notes.append("by chance on independent draws: " + r["text"])
        total = int(run["chains"]) * int(run["draws_per_chain"])
        if total < th.independent_draws:
            fail("draws", "independent draws", total, th.independent_draws, "below")
            reasons[-1]["text"] = (
                f"draws: {total} independent draws is below the {th.independent_draws} needed"
                " for ranks, P(best k), flags and check p-values (Monte Carlo sd of a"
                f" probability up to {0.5 / np.sqrt(max(total, 1)):.3f}, against"
                f" {0.5 / np.sqrt(th.independent_draws):.3f} at {th.independent_draws})"
            )
        edge = attr(idata, "grid_edge_density")
        change = attr(idata, "grid_refinement_change")
        if edge is not None and float(edge) > th.grid_edge_density:
            fail("grid", "density at the grid edge", float(edge), th.grid_edge_density, "above")
        if change is not None and float(change) > th.grid_refinement_change:
            fail(
                "grid",
                "change of posterior means under refinement",
                float(change),
                th.grid_refinement_change,
                "above",
            )
        for key, what in (("rate_sd", "change of a rate under refinement, in posterior sds"),
                          ("probability", "change of a probability under refinement")):
            value = attr(idata, f"grid_refinement_{key}")
            limit = getattr(th, f"grid_refinement_{key}")
            if value is not None and np.isfinite(float(value)) and float(value) > limit:
                fail("grid", what, float(value), limit, "above")
    verdict = READY if not reasons else NOT_READY
    return Diagnostics(table, run, verdict, reasons, remedies_for(reasons, idata), notes, th)


def remedies_for(reasons: list[dict], idata) -> list[str]:
    """Plain-words remedies, the one to try first first."""
    checks = {r["check"] for r in reasons}
    out: list[str] = []
    model = attr(idata, "model")
    accept = float(attr(idata, "target_accept", 0.0) or 0.0)
    if checks & {"divergences"} and accept < HIGH_ACCEPT:
        out.append("raise the target acceptance (--target-accept 0.99) so NUTS takes smaller steps")
    elif checks & {"divergences"}:  # small steps were already taken: the model must change
        out.extend(model_remedies(idata))
    if checks & {"R-hat", "bulk ESS", "tail ESS", "E-BFMI"}:
        draws = int(idata.posterior.sizes["draw"])
        tune = int(attr(idata, "tune", draws) or draws)
        out.append(
            f"run longer: more tuning and more draws (--tune {max(2 * tune, 1000)}"
            f" --draws {max(2 * draws, 1000)})"
        )
    if "share of draws at maximum tree depth" in checks:
        out.append("more tuning (--tune 2000); the posterior may be nearly flat in one direction")
    if model == "beta-binomial" and attr(idata, "engine") == "mcmc" and out:
        out.append("use the exact engine, which this model has (--engine exact)")
    if "independent draws" in checks:
        chains = int(idata.posterior.sizes["chain"])
        out.append(f"store more draws (--draws {-(-Thresholds().independent_draws // chains)}"
                   " or more)")
    if checks & {"density at the grid edge", "change of posterior means under refinement"}:
        out.append("the grid could not be made fine or wide enough; cross-check with --engine mcmc")
    return list(dict.fromkeys(out))


#: a target acceptance at or above this is as small a step as a remedy suggests
HIGH_ACCEPT = 0.99


def model_remedies(idata) -> list[str]:
    """What to change in the model or the data when sampler settings have done what they can."""
    model = attr(idata, "model")
    out = []
    if attr(idata, "engine") == "latent":
        out.append("use the collapsed engine (--engine mcmc), which integrates the group"
                   " log-odds out and has no funnel between them and their spread")
    if model in ("logit-normal", "nested"):
        spread = ("the between-parent sd (--tau-prior 0.5) and the between-group sd"
                  " (--sigma-prior 0.5)" if model == "nested" else
                  "the between-group sd (--sigma-prior 0.5)")
        out.append(f"change the model: a tighter prior on {spread} when the data say little"
                   " about the spread")
        out.append("change the data: check the covariates for a level or value where every"
                   " trial succeeds or every trial fails (separation) and for columns that"
                   " say the same thing twice; merge sparse levels, or drop a covariate")
    if model == "nested":
        out.append("change the data: merge parents with one or two groups, or fit the"
                   " logit-normal model without parents (--model logit-normal)")
    if model == "beta-binomial":
        out.append("use the exact engine, which this model has (--engine exact)")
    out.append("compare other pooling choices (workbench compare) and report the one whose"
               " sampler and checks pass")
    return out


def after_retry(diagnostics: Diagnostics, idata, applied: str) -> Diagnostics:
    """Remedies after a retry that still fails: never what was just done, the model first.

    ``applied`` is the retry's sentence ("retried with --target-accept 0.99"). A remedy
    whose settings the retry already applied is dropped; what to change in the model or the
    data comes first.
    """
    done = applied.removeprefix("retried with ")
    kept = [r for r in diagnostics.remedies
            if not any(flag in r for flag in done.split(" --") if flag)
            and not r.startswith(("raise the target acceptance", "run longer", "more tuning"))]
    first = [r for r in model_remedies(idata) if r not in kept]
    diagnostics.remedies = first + kept
    return diagnostics


def first_remedy_settings(diagnostics: Diagnostics, settings: dict) -> tuple[dict, str] | None:
    """New sampler settings applying the first remedy once, with a sentence saying so."""
    if not diagnostics.remedies:
        return None
    first = diagnostics.remedies[0]
    new = dict(settings)
    if first.startswith("raise the target acceptance"):
        new["target_accept"] = 0.99
        return new, "retried with --target-accept 0.99"
    if first.startswith("run longer") or first.startswith("more tuning"):
        new["tune"] = max(2 * int(settings.get("tune") or 1000), 1000)
        new["draws"] = max(2 * int(settings.get("draws") or 1000), 1000)
        return new, f"retried with --tune {new['tune']} --draws {new['draws']}"
    if first.startswith("store more draws"):
        new["draws"] = max(int(settings.get("draws") or 0) * 2, 1000)
        return new, f"retried with --draws {new['draws']}"
    if first.startswith("use the exact engine"):
        new["engine"] = "exact"
        return new, "retried with --engine exact"
    return None


def include_checks(diagnostics: Diagnostics, checks: dict | None) -> Diagnostics:
    """Fold the model checks (the content of checks.json) into the verdict, in place.

    A misfit makes a ``ready`` verdict ``misfit`` (a ``not-ready`` one stays not-ready, with
    the misfit added to its reasons); check p-values from fewer than
    ``Thresholds.replicates`` replicated data sets make it ``not-ready``. Without checks the
    verdict stands and a note says the model was not checked.
    """
    th = diagnostics.thresholds
    if not checks:
        note = "the model checks were not run: the verdict covers convergence and draws only"
        if note not in diagnostics.notes:
            diagnostics.notes.append(note)
        return diagnostics
    diagnostics.reasons = [r for r in diagnostics.reasons if r.get("quantity") != "model checks"]
    replicated = int(checks.get("replicated_draws") or 0)
    if replicated < th.replicates and checks.get("statistics"):
        diagnostics.reasons.append({
            "quantity": "model checks", "check": "replicated data sets", "value": replicated,
            "threshold": th.replicates, "by": th.replicates - replicated,
            "text": f"model checks: {replicated} replicated data sets is below the"
                    f" {th.replicates} their p-values need (--replicates, --draws)",
        })
        if diagnostics.verdict == READY:
            diagnostics.verdict = NOT_READY
    if checks.get("verdict") == MISFIT:
        names = ", ".join(checks.get("misfit_statistics", []))
        diagnostics.reasons.append({
            "quantity": "model checks", "check": "posterior predictive checks", "value": None,
            "threshold": checks.get("nominal_level"), "by": None,
            "text": f"model checks: misfit on {names} (the model does not reproduce the data)",
        })
        remedy = ("compare other pooling choices (workbench compare) and report a model whose"
                  " checks are consistent")
        if remedy not in diagnostics.remedies:
            diagnostics.remedies.append(remedy)
        if diagnostics.verdict == READY:
            diagnostics.verdict = MISFIT
    return diagnostics
