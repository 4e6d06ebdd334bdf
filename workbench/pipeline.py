"""The fit pipeline: source -> counts -> model -> posterior -> tables -> (a run folder).

One function, :func:`fit_run`, ties the stages in the order the data flow: read and
reconcile the input (:mod:`workbench.io.inputs`), fit the model (:mod:`workbench.models`),
diagnose it, then compute every table from the posterior (:mod:`workbench.analysis`), and,
when the settings name a folder, write it through :mod:`workbench.io.runfolder`.
"""

from __future__ import annotations

import dataclasses
import time
import warnings

import numpy as np
import pandas as pd

from . import progress
from .analysis import partitioned
from .analysis import verify as verification
from .analysis.casemix import adjusted_draws, adjusted_ranking_columns, case_mix_tables
from .analysis.checks import check_posterior
from .analysis.diagnostics import (
    MISFIT,
    Thresholds,
    after_retry,
    diagnose,
    first_remedy_settings,
    include_checks,
)
from .analysis.draws import group_draws
from .analysis.effects import effects_table
from .analysis.predictions import default_seed, predict
from .analysis.ranking import compute as compute_ranking
from .analysis.ranking import merge_estimate_columns, rank_options
from .analysis.settings import CheckSettings
from .io import cluster, events
from .io.inputs import LoadedData, load_groups
from .io.runfolder import check_replaceable
from .models import MODELS, ConvergenceWarning, ParameterError, attr, make_model
from .options import FIT_OPTIONS, FitSettings, label
from .results import Run

COVARIATE_MODELS = ("logit-normal", "nested")
PARENT_MODELS = ("nested",)
#: prior options and the models that use them
PRIOR_USERS = {
    "beta_prior": ("no-pooling", "complete-pooling"),
    "mu_prior": ("beta-binomial",),
    "kappa_prior": ("beta-binomial",),
    "sigma_prior": ("logit-normal", "nested"),
    "tau_prior": ("nested",),
}
#: Most theta cells (draws x groups) an exact engine stores unless draws are asked for.
EXACT_STORED_CELLS = 100_000_000
#: Fewest draws in all (chains x draws) an exact engine keeps by default: the pass mark for
#: independent draws, so a default fit can be final whatever its size.
EXACT_FEWEST_DRAWS = Thresholds().independent_draws


def load(source, settings: FitSettings, client=None) -> LoadedData:
    """The input table, read and reconciled with the settings' columns."""
    if isinstance(source, LoadedData):
        return source
    if settings["dask"] is not None:  # checked and summed on the cluster
        cluster.check_source(source, settings)
        with cluster.connect(settings["dask"], client) as client:
            return cluster.load_on_cluster(source, client, group=settings["group"],
                                           successes=settings["successes"],
                                           trials=settings["trials"],
                                           outcome=settings["outcome"])
    if events.wanted(source, outcome=settings["outcome"], query=settings["query"],
                     covariates=settings["covariates"], parent=settings["parent"]):
        return events.load_events(source, group=settings["group"],
                                  successes=settings["successes"], trials=settings["trials"],
                                  outcome=settings["outcome"], query=settings["query"])
    return load_groups(
        source,
        group=settings["group"],
        successes=settings["successes"],
        trials=settings["trials"],
        outcome=settings["outcome"],
        covariates=tuple(settings["covariates"]),
        parent=settings["parent"],
        reference_level=tuple(settings["reference_level"]),
    )


def has_covariates(counts) -> bool:
    """Covariates per group or per cell (trial-level case mix)."""
    return counts.covariates is not None or counts.cells is not None


def check_model_inputs(loaded: LoadedData, settings: FitSettings) -> None:
    """Refuse columns and priors the chosen model would not use."""
    model = settings["model"]
    if (loaded.counts.parents is not None) != (model in PARENT_MODELS):
        if model in PARENT_MODELS:
            raise ParameterError(
                f"model {model!r} needs each group's parent; pass {label('parent')} COLUMN."
            )
        raise ParameterError(
            f"a parent column is used only by {', '.join(PARENT_MODELS)}; choose"
            f" {label('model')} {PARENT_MODELS[0]} or drop {label('parent')}."
        )
    if has_covariates(loaded.counts) and model not in COVARIATE_MODELS:
        raise ParameterError(
            f"covariates are used only by {', '.join(COVARIATE_MODELS)}; choose"
            f" {label('model')} {COVARIATE_MODELS[0]} or drop {label('covariates')}."
        )
    for name, users in PRIOR_USERS.items():
        default = FIT_OPTIONS[name].validate(FIT_OPTIONS[name].default)
        if model not in users and settings[name] != default:
            raise ParameterError(
                f"{label(name)} is used only by {', '.join(users)}, not by {model}; drop it or"
                f" choose {label('model')} {users[0]}."
            )


def for_model(loaded: LoadedData, settings: FitSettings) -> tuple[LoadedData, FitSettings]:
    """The counts and settings one model of several uses (compare: parents, covariates)."""
    model = settings["model"]
    counts = loaded.counts
    changes = {}
    if model not in PARENT_MODELS and counts.parents is not None:
        changes["parent"] = None
    if model not in COVARIATE_MODELS and has_covariates(counts):
        changes["covariates"] = ()
        changes["reference_level"] = ()
    for name, users in PRIOR_USERS.items():
        if model not in users:
            changes[name] = FIT_OPTIONS[name].default
    if "parent" not in changes and "covariates" not in changes:
        return loaded, settings.replace(**changes)
    keep_cov = None if "covariates" in changes else counts.covariates
    keep_par = None if "parent" in changes else counts.parents
    keep_cells = None if "covariates" in changes else counts.cells
    counts = type(counts)(counts.names, counts.successes, counts.trials, keep_cov, keep_par,
                          cells=keep_cells)
    return dataclasses.replace(loaded, counts=counts), settings.replace(**changes)


def default_draws(settings: FitSettings, groups: int) -> int:
    """Draws per chain: as asked; else 1000, fewer for exact engines on very many groups.

    Exact engines report means and intervals from closed forms, so their stored draws only
    feed ranks and checks: they keep at most EXACT_STORED_CELLS values of theta (at least
    EXACT_FEWEST_DRAWS in all). 100,000 groups x 4 chains get 250 draws per chain; 1,000,000
    groups x 4 chains 100, x 2 chains 200.
    """
    if settings["draws"] is not None:
        return int(settings["draws"])
    engines = MODELS[settings["model"]].engines
    engine = engines[0] if settings["engine"] == "auto" else settings["engine"]
    chains = int(settings["chains"])
    if engine == "exact" and chains * 1000 * groups > EXACT_STORED_CELLS:
        return max(-(-EXACT_FEWEST_DRAWS // chains), EXACT_STORED_CELLS // (chains * groups))
    return 1000


#: Largest posterior array of group rates (draws x chains x groups, float64) a fit may hold.
MAX_THETA_GB = 4.0


def check_size(settings: FitSettings, groups: int) -> None:
    """Refuse, before any work, a fit whose draws of theta would not fit in memory."""
    draws = default_draws(settings, groups)
    chains = int(settings["chains"])
    gb = draws * chains * groups * 8 / 1e9
    if gb > MAX_THETA_GB:
        fit_draws = max(1, int(MAX_THETA_GB * 1e9 / (8 * chains * groups)))
        raise ParameterError(
            f"{label('draws')} {draws} x {label('chains')} {chains} x {groups} groups would"
            f" hold {gb:.1f} GB of draws, more than the {MAX_THETA_GB:g} GB allowed; give"
            f" {label('draws')} {fit_draws} or fewer (or fewer chains)."
        )


def model_settings(settings: FitSettings, groups: int) -> dict:
    """The estimator's own settings, only those its model takes."""
    a, b = settings["beta_prior"]
    candidates = {
        "engine": settings["engine"],
        "draws": default_draws(settings, groups),
        "chains": settings["chains"],
        "tune": settings["tune"],
        "target_accept": settings["target_accept"],
        "random_seed": settings["seed"],
        "a": float(a),
        "b": float(b),
        "mu_prior": tuple(settings["mu_prior"]),
        "kappa_prior": tuple(settings["kappa_prior"]),
        "sigma_prior": float(settings["sigma_prior"]),
        "tau_prior": float(settings["tau_prior"]),
    }
    accepted = MODELS[settings["model"]]._param_names()
    return {k: v for k, v in candidates.items() if k in accepted}


def fit_model(loaded: LoadedData, settings: FitSettings):
    estimator = make_model(settings["model"], **model_settings(settings, loaded.counts.n_groups))
    return estimator.fit(loaded.counts)


def check_settings(settings: FitSettings) -> CheckSettings:
    low, high = settings["p_bounds"]
    return CheckSettings(draws=settings["replicates"], lower=low, upper=high,
                         refit_limit=settings["refit_limit"]).validate()


def spread_note(estimator, level: float) -> str | None:
    """Say in words when the data cannot tell the groups apart (beta-binomial models).

    When even the low end of kappa's interval outweighs the median group's trials, every
    typical group is pulled more than halfway to the population mean.
    """
    post = estimator.idata_.posterior
    if "kappa" not in post:
        return None
    trials = estimator.data_.trials
    seen = trials[trials > 0]
    if not len(seen):
        return None
    low = float(np.quantile(post["kappa"].values, (1 - level) / 2))
    median_trials = float(np.median(seen))
    if low <= median_trials:
        return None
    return (
        "no clearly detectable between-group spread: even the low end of the concentration"
        f" interval ({low:.3g}) outweighs the median group's {median_trials:.0f} trials, so"
        " every typical group is pulled more than halfway to the population mean."
    )


def population_draws(idata) -> pd.DataFrame:
    """population_draws.csv: every scalar population parameter per (chain, draw)."""
    post = idata.posterior
    chains, draws = post.sizes["chain"], post.sizes["draw"]
    table = {
        "chain": np.repeat(np.arange(chains), draws),
        "draw": np.tile(np.arange(draws), chains),
    }
    for name, var in post.data_vars.items():
        if name == "theta_new" or "group" in var.dims:
            continue
        values = var.transpose("chain", "draw", ...).values
        if values.ndim == 2:
            table[name] = values.ravel()
        else:  # one column per coordinate (covariate effects, parent effects)
            extra = var.dims[2:]
            coords = [str(c) for c in post[extra[0]].values] if len(extra) == 1 else None
            flat = values.reshape(chains * draws, -1)
            for j in range(flat.shape[1]):
                key = coords[j] if coords and len(coords) == flat.shape[1] else str(j)
                table[f"{name}[{key}]"] = flat[:, j]
    stats = idata.sample_stats if "sample_stats" in idata.groups() else None
    if stats is not None and "diverging" in stats:
        table["diverging"] = stats["diverging"].transpose("chain", "draw").values.ravel()
    else:
        table["diverging"] = np.zeros(chains * draws, dtype=bool)
    return pd.DataFrame(table)


def verify_run(run: Run) -> None:
    """Self-check: fit the other engine (or compare with closed forms, or a second run)."""
    fitted = run.model
    used = attr(fitted.idata_, "engine")
    others = [e for e in MODELS[run.settings["model"]].engines if e != used]
    if run.loaded.counts.cells is not None:  # trial-level case mix: the collapsed engine only
        others = []
    level = run.settings["level"]
    settings = FitSettings(run.settings)
    if others:
        seed = None if settings["seed"] is None else int(settings["seed"]) + 1
        other = fit_model(run.loaded, settings.replace(engine=others[0], seed=seed))
        reference, sampled = (fitted, other) if used == "exact" else (other, fitted)
        summary = sampled.summary(level)
        mean, lower, upper = (summary[c].to_numpy() for c in ("posterior_mean", "lower", "upper"))
        mcse = verification.theta_mcse(sampled.idata_)
        what = f"{used} engine against the {others[0]} engine"
        if used != "exact" and "exact" not in MODELS[run.settings["model"]].engines:
            mcse = np.hypot(mcse, verification.theta_mcse(other.idata_))
    elif used == "mcmc":
        other = fit_model(
            run.loaded, settings.replace(seed=int(attr(fitted.idata_, "random_seed")) + 1))
        reference, sampled = fitted, other
        summary = other.summary(level)
        mean, lower, upper = (summary[c].to_numpy() for c in ("posterior_mean", "lower", "upper"))
        mcse = np.hypot(verification.theta_mcse(fitted.idata_),
                        verification.theta_mcse(other.idata_))
        what = "two independent MCMC runs (no exact engine for this model)"
    else:
        reference = fitted
        mean, lower, upper = verification.draw_summary(fitted.idata_, level)
        mcse = verification.theta_mcse(fitted.idata_)
        what = "closed-form posterior against the engine's own draws"
    table, doc = verification.agreement(what, reference.summary(level), mean, lower, upper, mcse)
    run.tables["verification"] = table
    run.record_parts["verification"] = doc


def add_checks(run: Run) -> None:
    checks = check_posterior(run.idata, check_settings(FitSettings(run.settings)))
    run.documents["checks"] = checks.to_dict()
    run.tables["ppc_statistics"] = checks.replicates
    run.tables["group_checks"] = checks.groups


def add_covariate_tables(run: Run, level: float) -> None:
    """effects.csv (odds ratios) and, with trial-level case mix, the adjustment's tables."""
    effects = effects_table(run.idata, run.loaded.reconciliation.get("covariate_coding"), level)
    if effects is not None:
        run.tables["effects"] = effects
    run.tables.update(case_mix_tables(run.idata, level))


def add_ranking(run: Run) -> None:
    s = run.settings
    opts = rank_options(**{k: s[k] for k in ("top", "better", "fdr", "level", "target",
                                               "compare_groups", "settle_chance", "max_trials")})
    draws = group_draws(run.idata, run.estimates, target=s["target"],
                        closed=getattr(run.model, "exact_", None))
    result = compute_ranking(adjusted_draws(run.idata, draws), opts)  # adjusted with case mix
    run.tables.update(result.tables)
    run.estimates = merge_estimate_columns(run.estimates, result.estimate_columns)
    run.record_parts["ranking"] = result.record
    if result.targets is not None:
        run.documents["targets"] = result.targets


def add_predictions(run: Run) -> None:
    s = run.settings
    pred = predict(run.idata, group_draws(run.idata, run.estimates).posterior_mean,
                   trials=s["predict_trials"], level=s["level"], seed=default_seed(s["seed"]))
    run.tables["predictions"] = pred.table
    run.record_parts["prediction"] = pred.record


def summarise(estimator, settings: FitSettings, client=None) -> tuple[pd.DataFrame, dict]:
    """The estimates table; on a cluster, its closed forms scored in partitions there."""
    level, target = settings["level"], settings["target"]
    if client is not None and partitioned.can_score(estimator):
        return partitioned.score_on_cluster(client, estimator, level, target)
    return estimator.summary(level, target=target), {"scored_on": "this machine"}


def fit_run(source, settings: FitSettings, client=None) -> Run:
    """Load, fit, summarise, diagnose and compute every table: one run, not yet written.

    With the ``dask`` setting, the scheduler is reached first (``client``, a
    ``distributed.Client``, is used as given), the file is read on the cluster and the
    group estimates are scored there (:mod:`workbench.io.cluster`,
    :mod:`workbench.analysis.partitioned`).
    """
    if settings["dask"] is not None and client is None:
        if not isinstance(source, LoadedData):
            cluster.check_source(source, settings)
        with cluster.connect(settings["dask"]) as client:
            return fit_run(source, settings, client)
    if settings["out"] is not None:  # --out problems are known now, not after the fit
        check_replaceable(settings["out"])
    with progress.step("reading data"):
        loaded = load(source, settings, client)
    check_model_inputs(loaded, settings)
    check_size(settings, loaded.counts.n_groups)
    started = time.perf_counter()
    with progress.step(f"fitting {settings['model']} to {loaded.counts.n_groups:,} groups"):
        estimator = fit_model(loaded, settings)
    with progress.step("convergence diagnostics"):
        diagnostics = diagnose(estimator.idata_)
    record_parts: dict = {}
    messages: list[str] = []
    if not diagnostics.ready and settings["retry"]:
        change = first_remedy_settings(diagnostics, settings.record())
        if change is not None:
            new, said = change
            settings = settings.replace(**{k: new[k] for k in new if k in FIT_OPTIONS})
            messages.append(f"not ready at first: {said}.")
            record_parts["retry"] = {"applied": said, "first_reasons": diagnostics.reasons}
            estimator = fit_model(loaded, settings)
            diagnostics = diagnose(estimator.idata_)
            if not diagnostics.ready:  # settings did what they could: change the model
                after_retry(diagnostics, estimator.idata_, said)
    level = settings["level"]
    estimates, scored = summarise(estimator, settings, client)
    run = Run(
        loaded,
        estimator,
        settings.record(),
        estimates,
        estimator.population(level),
        diagnostics,
        record_parts=record_parts,
        messages=messages,
    )
    run.record_parts["sampling"] = {"draws_per_chain": int(estimator.draws),
                                    "chains": int(estimator.chains)}
    if client is not None:
        read = "this machine" if isinstance(source, LoadedData) else "cluster"
        run.record_parts["cluster"] = {**cluster.describe(client), "read_on": read, **scored}
    note = spread_note(estimator, level)
    if note:
        messages.append(note)
    if hasattr(estimator, "parent_summary"):
        run.tables["parents"] = estimator.parent_summary(level)
    run.tables["population_draws"] = population_draws(run.idata)
    add_covariate_tables(run, level)
    if settings["verify"]:
        verify_run(run)
    if settings["checks"]:
        with progress.step("posterior predictive checks"):
            add_checks(run)
    include_checks(diagnostics, run.documents.get("checks"))
    with progress.step("ranks, flags and trials needed"):
        add_ranking(run)
    if "adjusted_rates" in run.tables:
        run.tables["adjusted_rates"] = adjusted_ranking_columns(run.tables["adjusted_rates"],
                                                                run.tables["ranks"])
    if settings["predict_trials"] is not None:
        add_predictions(run)
    run.seconds = time.perf_counter() - started
    if not diagnostics.ready:
        warnings.warn(
            ("the model checks found a misfit" if diagnostics.verdict == MISFIT
             else "convergence diagnostics failed")
            + "; the results are not final: "
            + "; ".join(r["text"] for r in diagnostics.reasons[:3]),
            ConvergenceWarning,
            stacklevel=3,
        )
    return run
