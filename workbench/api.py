"""The public API: everything the CLI does, callable from Python.

>>> from workbench import api
>>> run = api.fit(api.demo_data_path(), seed=1)          # doctest: +SKIP
>>> api.write_run(run, "demo-run")                          # doctest: +SKIP
"""

from __future__ import annotations

import sys
import time
import warnings
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd

from .models import (
    MODELS,
    SUMMARY_COLUMNS,
    ConvergenceWarning,
    DataError,
    ParameterError,
    attr,
    make_model,
    versions,
)

from .analysis import ranking
from .io import atomic as _io
from .io.inputs import LoadedData, load_groups
from .analysis.diagnostics import Diagnostics, Thresholds, diagnose, first_remedy_settings
from .analysis.checks import CheckSettings, attach_checks

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

DEFAULT_MODEL = "beta-binomial"
COVARIATE_MODELS = ("logit-normal", "nested")
PARENT_MODELS = ("nested",)
ESTIMATE_FILE = "estimates.csv"
POSTERIOR_FILE = "posterior.nc"
RUN_FILE = "run.json"
DIAGNOSTICS_FILE = "diagnostics.json"
POPULATION_FILE = "population.csv"
#: Present only in a run folder whose convergence verdict is not-ready.
NOT_FINAL_FILE = "NOT-FINAL.txt"


def demo_data_path() -> Path:
    """The bundled demo CSV (installed with the package, or beside it in a checkout)."""
    here = Path(__file__).resolve().parent
    for candidate in (here / "_datasets", here.parent / "datasets"):
        if (candidate / "branch_signups.csv").exists():
            return candidate / "branch_signups.csv"
    with resources.as_file(resources.files("workbench") / "_datasets" / "branch_signups.csv") as p:
        return Path(p)


@dataclass
class Run:
    """A fitted run: the data, the model, and every table computed from its posterior."""

    loaded: LoadedData
    model: object
    settings: dict
    estimates: pd.DataFrame
    population: pd.DataFrame
    diagnostics: Diagnostics
    #: extra tables, each written as <name>.csv ("estimate_columns": a list of per-group
    #: DataFrames keyed by "group", merged into estimates.csv instead)
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    #: extra documents, each written as <name>.json (but RECORD_DOCUMENTS go into run.json;
    #: "_files": {filename: writer(path)} for anything else, such as figures)
    documents: dict[str, dict] = field(default_factory=dict)
    messages: list[str] = field(default_factory=list)
    seconds: float = 0.0

    @property
    def idata(self):
        return self.model.idata_

    @property
    def ready(self) -> bool:
        return self.diagnostics.ready

    def record(self) -> dict:
        """The content of run.json."""
        return {
            "workbench_run": 1,
            "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            "final": self.ready,
            "verdict": self.diagnostics.verdict,
            "command": " ".join(sys.argv)
            if sys.argv and sys.argv[0].endswith("workbench")
            else None,
            "settings": self.settings,
            "model": attr(self.idata, "model"),
            "engine": attr(self.idata, "engine"),
            "priors": attr(self.idata, "priors"),
            "random_seed": int(attr(self.idata, "random_seed")),
            "versions": versions(),
            "input": {
                "fingerprint": self.loaded.counts.fingerprint(),
                **self.loaded.reconciliation,
            },
            "notes": self.loaded.notes + self.messages,
            "population": self.population.to_dict(orient="records"),
            "fit_seconds": round(self.seconds, 3),
            **{k: v for k, v in self.documents.items() if k in RECORD_DOCUMENTS},
        }


#: documents kept inside run.json rather than in files of their own
RECORD_DOCUMENTS = ("verification", "retry", "ranking")


def fit(
    source,
    *,
    group: str = "group",
    successes: str = "successes",
    trials: str = "trials",
    outcome: str | None = None,
    model: str = DEFAULT_MODEL,
    engine: str = "auto",
    level: float = 0.95,
    target: float | None = None,
    top: int = ranking.DEFAULT_TOP,
    better: str = "higher",
    fdr: float = ranking.DEFAULT_FDR,
    seed: int | None = None,
    draws: int | None = None,
    chains: int = 4,
    tune: int = 1000,
    target_accept: float | None = None,
    beta_prior: tuple[float, float] = (1.0, 1.0),
    mu_prior: tuple[float, float] = (1.0, 1.0),
    kappa_prior: tuple[float, float] = (20.0, 3.0),
    sigma_prior: float = 1.0,
    tau_prior: float = 1.0,
    covariates: tuple[str, ...] = (),
    parent: str | None = None,
    verify: bool = False,
    retry: bool = False,
    thresholds: Thresholds | None = None,
    progress: bool | None = None,
    checks: bool | CheckSettings = True,
) -> Run:
    """Load, fit, summarise and diagnose: one run, not yet written anywhere.

    ``checks`` (True, or a :class:`workbench.ppc.CheckSettings`) adds the posterior predictive
    checks, leave-one-group-out predictive and LOO-PIT: ``documents["checks"]`` (checks.json),
    ``tables["ppc_statistics"]`` and ``tables["group_checks"]``. False skips them.
    """
    loaded = (
        source
        if isinstance(source, LoadedData)
        else load_groups(
            source,
            group=group,
            successes=successes,
            trials=trials,
            outcome=outcome,
            covariates=tuple(covariates),
            parent=parent,
        )
    )
    if model not in MODELS:
        quoted = ", ".join(repr(m) for m in MODELS)
        raise ParameterError(f"model={model!r} is not one of {quoted}.")
    if (loaded.counts.parents is not None) != (model in PARENT_MODELS):
        if model in PARENT_MODELS:
            raise ParameterError(
                f"model {model!r} needs each group's parent; pass --parent COLUMN (parent=...)."
            )
        raise ParameterError(
            f"a parent column is used only by {', '.join(PARENT_MODELS)}; add --model"
            f" {PARENT_MODELS[0]} or drop --parent."
        )
    if loaded.counts.covariates is not None and model not in COVARIATE_MODELS:
        raise ParameterError(
            f"covariates are used only by {', '.join(COVARIATE_MODELS)}; add --model"
            f" {COVARIATE_MODELS[0]} or drop --covariates."
        )
    rank_opts = ranking.rank_options(top=top, better=better, fdr=fdr, level=level, target=target)
    settings = {
        "model": model,
        "engine": engine,
        "level": level,
        "target": target,
        "top": rank_opts.top,
        "better": rank_opts.better,
        "fdr": rank_opts.fdr,
        "seed": seed,
        "draws": draws,
        "chains": chains,
        "tune": tune,
        "target_accept": target_accept,
        "beta_prior": list(beta_prior),
        "mu_prior": list(mu_prior),
        "kappa_prior": list(kappa_prior),
        "sigma_prior": sigma_prior,
        "tau_prior": tau_prior,
        "covariates": list(covariates),
        "parent": parent,
        "verify": verify,
        "retry": retry,
    }
    started = time.perf_counter()
    estimator = _fit_model(loaded, settings, progress)
    diagnostics = diagnose(estimator.idata_, thresholds)
    documents: dict = {}
    messages: list[str] = []
    if not diagnostics.ready and retry:
        change = first_remedy_settings(diagnostics, settings)
        if change is not None:
            settings, said = change
            messages.append(f"not ready at first: {said}.")
            documents["retry"] = {"applied": said, "first_reasons": diagnostics.reasons}
            estimator = _fit_model(loaded, settings, progress)
            diagnostics = diagnose(estimator.idata_, thresholds)
    settings["draws_per_chain"] = int(estimator.draws)
    estimates = estimator.summary(level, target=target)
    population = estimator.population(level)
    run = Run(
        loaded,
        estimator,
        settings,
        estimates,
        population,
        diagnostics,
        documents=documents,
        messages=messages,
    )
    note = spread_note(estimator, level)
    if note:
        messages.append(note)
    if hasattr(estimator, "parent_summary"):
        run.tables["parents"] = estimator.parent_summary(level)
    if verify:
        run.documents["verification"] = verify_run(run, progress=progress)
    if checks is not False:
        attach_checks(run, checks if isinstance(checks, CheckSettings) else None)
    ranking.add_to_run(run, top=rank_opts.top, better=rank_opts.better, fdr=rank_opts.fdr)
    run.seconds = time.perf_counter() - started
    if not diagnostics.ready:
        warnings.warn(
            "convergence diagnostics failed; the results are not final: "
            + "; ".join(r["text"] for r in diagnostics.reasons[:3]),
            ConvergenceWarning,
            stacklevel=2,
        )
    return run


#: Most theta cells (draws x groups) an exact engine stores unless draws are asked for.
EXACT_STORED_CELLS = 100_000_000


def default_draws(settings: dict, groups: int) -> int:
    """Draws per chain: as asked; else 1000, fewer for exact engines on very many groups.

    Exact engines report means and intervals from closed forms, so their stored draws only
    feed ranks and checks: they keep at most EXACT_STORED_CELLS values of theta (at least
    100 per chain). 100,000 groups x 4 chains get 250 draws per chain.
    """
    if settings.get("draws") is not None:
        return int(settings["draws"])
    engines = MODELS[settings["model"]].engines
    engine = engines[0] if settings["engine"] == "auto" else settings["engine"]
    chains = int(settings["chains"])
    if engine == "exact" and chains * 1000 * groups > EXACT_STORED_CELLS:
        return max(100, EXACT_STORED_CELLS // (chains * groups))
    return 1000


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


def _fit_model(loaded: LoadedData, settings: dict, progress: bool | None):
    a, b = settings["beta_prior"]
    estimator = make_model(
        settings["model"],
        engine=settings["engine"],
        draws=default_draws(settings, loaded.counts.n_groups),
        chains=int(settings["chains"]),
        tune=int(settings["tune"]),
        target_accept=settings["target_accept"],
        random_seed=settings["seed"],
        a=float(a),
        b=float(b),
        mu_prior=tuple(settings["mu_prior"]),
        kappa_prior=tuple(settings["kappa_prior"]),
        sigma_prior=float(settings.get("sigma_prior", 1.0)),
        tau_prior=float(settings.get("tau_prior", 1.0)),
        progress=progress,
    )
    return estimator.fit(loaded.counts)


def verify_run(run: Run, *, progress: bool | None = None) -> dict:
    """Self-check: fit the other engine (or compare draws with closed forms) and measure agreement.

    Agreement of posterior means is in units of the Monte Carlo standard error of the
    sampled side; interval endpoints are compared as differences.
    """
    fitted = run.model
    model_cls = MODELS[attr(fitted.idata_, "model")]
    used = attr(fitted.idata_, "engine")
    others = [e for e in model_cls.engines if e != used]
    level = run.settings["level"]
    if others:
        other_settings = dict(run.settings, engine=others[0])
        if other_settings["seed"] is not None:
            other_settings["seed"] = int(other_settings["seed"]) + 1
        other = _fit_model(run.loaded, other_settings, progress)
        exact, sampled = (fitted, other) if used == "exact" else (other, fitted)
        what = f"{used} engine against the {others[0]} engine"
    elif used == "mcmc":
        # no second engine: an independent second run, agreement in combined MCSE units
        other_settings = dict(run.settings, seed=int(attr(fitted.idata_, "random_seed")) + 1)
        other = _fit_model(run.loaded, other_settings, progress)
        return _agreement_of_two_runs(run, fitted, other, level)
    else:
        exact, sampled = fitted, fitted
        what = "closed-form posterior against the engine's own draws"
    truth = exact.summary(level)
    draws = sampled.idata_.posterior["theta"].stack(sample=("chain", "draw")).values
    if sampled is not exact:
        mc = sampled.summary(level)
        lower_mc, upper_mc = mc["lower"].to_numpy(), mc["upper"].to_numpy()
    else:
        lower_mc, upper_mc = np.quantile(draws, [(1 - level) / 2, (1 + level) / 2], axis=1)
    return _agreement(
        run, what, truth, draws.mean(axis=1), lower_mc, upper_mc, _theta_mcse(sampled)
    )


def _theta_mcse(fitted) -> np.ndarray:
    """Monte Carlo standard error of each group's posterior mean (ArviZ)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return az.mcse(fitted.idata_.posterior[["theta"]], method="mean")["theta"].values


def _agreement_of_two_runs(run: Run, first, second, level: float) -> dict:
    """Two independent MCMC runs of one model: differences in combined-MCSE units."""
    a, b = first.summary(level), second.summary(level)
    mcse = np.hypot(_theta_mcse(first), _theta_mcse(second))
    return _agreement(
        run,
        "two independent MCMC runs (no exact engine for this model)",
        a,
        b["posterior_mean"].to_numpy(),
        b["lower"].to_numpy(),
        b["upper"].to_numpy(),
        mcse,
    )


def _agreement(run: Run, what: str, reference: pd.DataFrame, mean, lower, upper, mcse) -> dict:
    """The verification table (run.tables["verification"]) and its summary for run.json."""
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (mean - reference["posterior_mean"].to_numpy()) / mcse
    z = np.where(np.isfinite(z), z, 0.0)
    table = pd.DataFrame(
        {
            "group": reference["group"],
            "mean_reference": reference["posterior_mean"],
            "mean_sampled": mean,
            "mcse": mcse,
            "z": z,
            "lower_difference": lower - reference["lower"].to_numpy(),
            "upper_difference": upper - reference["upper"].to_numpy(),
        }
    )
    run.tables["verification"] = table
    within = float(np.mean(np.abs(z) <= 4))
    return {
        "what": what,
        "groups": int(len(table)),
        "share_within_4_mcse": within,
        "max_abs_z": float(np.max(np.abs(z))),
        "max_abs_interval_difference": float(
            np.max(np.abs(table[["lower_difference", "upper_difference"]].to_numpy()))
        ),
        "agree": within >= 0.99,
    }


def estimates_table(run: Run) -> pd.DataFrame:
    """estimates.csv: the summary columns, then any extra per-group columns of later tables."""
    table = run.estimates.copy()
    for extra in run.tables.get("estimate_columns", []):
        table = table.merge(extra, on="group", how="left")
    return table


def not_final_text(run: Run) -> str:
    """The NOT-FINAL.txt marker: why nothing in this folder may be reported yet."""
    d = run.diagnostics
    lines = [
        "NOT FINAL: the convergence diagnostics of this run failed.",
        "Nothing in this folder may be reported as a result until a run passes them.",
        "",
        "Reasons:",
        *[f"  - {r['text']}" for r in d.reasons],
        "",
        "Remedies, the first to try first:",
        *[f"  - {m}" for m in d.remedies],
    ]
    return "\n".join(lines) + "\n"


def write_run(run: Run, out: str | Path) -> Path:
    """Write the run folder atomically; returns its path."""
    out = Path(out)
    record = run.record()
    diag = run.diagnostics.to_dict()
    files = dict(run.documents.get("_files", {}))

    def fill(folder: Path) -> None:
        _io.write_csv(folder / ESTIMATE_FILE, estimates_table(run))
        _io.write_csv(folder / POPULATION_FILE, run.population)
        _io.write_json(folder / DIAGNOSTICS_FILE, diag)
        for name, table in run.tables.items():
            if isinstance(table, pd.DataFrame) and name != "estimate_columns":
                _io.write_csv(folder / f"{name}.csv", table)
        for name, doc in run.documents.items():
            if not name.startswith("_") and name not in RECORD_DOCUMENTS:
                _io.write_json(folder / f"{name}.json", doc)
        for name, writer in files.items():
            writer(folder / name)
        if not run.ready:
            _io.write_text(folder / NOT_FINAL_FILE, not_final_text(run))
        run.idata.to_netcdf(str(folder / POSTERIOR_FILE), engine="h5netcdf")
        record["files"] = sorted(p.name for p in folder.iterdir()) + [RUN_FILE]
        _io.write_json(folder / RUN_FILE, record)

    _io.replace_folder(out, fill)
    return out


@dataclass
class RunFolder:
    """A run folder read back: its posterior, record and estimates."""

    path: Path
    idata: object
    record: dict
    estimates: pd.DataFrame

    @property
    def final(self) -> bool:
        return bool(self.record.get("final"))


def open_run(path: str | Path) -> RunFolder:
    """Read a run folder written by :func:`write_run`."""
    import json

    path = Path(path)
    if not (path / RUN_FILE).exists() or not (path / POSTERIOR_FILE).exists():
        raise DataError(
            f"{str(path)!r} is not a run folder (no {RUN_FILE} or {POSTERIOR_FILE});"
            " give a folder written by 'workbench fit'."
        )
    record = json.loads((path / RUN_FILE).read_text(encoding="utf-8"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        idata = az.from_netcdf(str(path / POSTERIOR_FILE), engine="h5netcdf")
    idata.load() if hasattr(idata, "load") else None
    estimates = pd.read_csv(
        path / ESTIMATE_FILE, dtype={"group": str}, keep_default_na=False, na_values=[""]
    )
    return RunFolder(path, idata, record, estimates)


def format_written(run: Run, out: Path) -> str:
    """The last line of a fit: where the run folder is and whether it is final."""
    return f"wrote {out}/ ({'final' if run.ready else 'NOT FINAL: diagnostics failed'})"


def format_fit(run: Run, out: Path | None = None, *, rows: int = 5) -> str:
    """The terminal summary of a fit: what was fitted, population, extremes, verdict."""
    from .analysis.diagnostics import format_diagnostics

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
        lines.append(
            f"  {row.quantity:<18} {row.mean:10.4g}   {level:.0%} interval"
            f" [{row.lower:.4g}, {row.upper:.4g}]"
        )
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
    ver = run.documents.get("verification")
    if ver:
        lines.append(
            f"verify: {ver['what']}: {ver['share_within_4_mcse']:.1%} of groups within 4 MCSE"
            f" (max |z| {ver['max_abs_z']:.2f}; largest interval-end difference"
            f" {ver['max_abs_interval_difference']:.2g})"
            f" -> {'AGREE' if ver['agree'] else 'DISAGREE'}"
        )
    if run.documents.get("ranking"):
        lines.append(ranking.format_run(run))
    if out is not None:
        lines.append(format_written(run, out))
    return "\n".join(lines)


# -- checks and comparison of run folders (workbench check / compare) -----------------------


def _consistent(folder: RunFolder) -> RunFolder:
    """The folder, or DataError when run.json and posterior.nc disagree about the data."""
    from .models import counts_of

    said = (folder.record.get("input") or {}).get("fingerprint")
    stored = attr(folder.idata, "data_fingerprint")
    actual = counts_of(folder.idata).fingerprint()
    if not said or said != stored or stored != actual:
        raise DataError(
            f"run folder {str(folder.path)!r} is inconsistent: run.json, posterior.nc and the"
            f" counts inside it give data fingerprints {str(said)[:12]}, {str(stored)[:12]},"
            f" {actual[:12]}; fit it again with 'workbench fit'."
        )
    return folder


def check_folder(path: str | Path, settings: CheckSettings | None = None):
    """Run the checks on a run folder and write checks.json, ppc_statistics.csv and
    group_checks.csv into it (atomically). Returns ``(RunFolder, Checks)``."""
    from .analysis.checks import check_posterior, write_checks

    folder = _consistent(open_run(path))
    checks = check_posterior(folder.idata, settings)
    write_checks(folder.path, checks)
    return folder, checks


def _labels(paths: list[Path]) -> list[str]:
    names = [p.name or str(p) for p in paths]
    return names if len(set(names)) == len(names) else [str(p) for p in paths]


def compare_folders(paths, out: str | Path | None = None, settings: CheckSettings | None = None):
    """Compare run folders fitted to the same data; write the comparison to ``out`` if given.

    Runs are labelled by folder name (by path where names repeat).
    """
    from .analysis.comparison import compare_posteriors, write_comparison

    paths = [Path(p) for p in paths]
    seen: dict[Path, Path] = {}
    for p in paths:
        key = p.resolve()
        if key in seen:
            raise DataError(f"run folder {str(p)!r} is given twice; give each run once.")
        seen[key] = p
    folders = [_consistent(open_run(p)) for p in paths]
    labels = _labels(paths)
    comparison = compare_posteriors(
        {lab: f.idata for lab, f in zip(labels, folders, strict=True)},
        final={lab: f.final for lab, f in zip(labels, folders, strict=True)},
        settings=settings,
    )
    if out is not None:
        write_comparison(out, comparison)
    return comparison


def fit_and_compare(
    source,
    *,
    models: list[str],
    out: str | Path,
    group: str = "group",
    successes: str = "successes",
    trials: str = "trials",
    outcome: str | None = None,
    settings: CheckSettings | None = None,
    **options,
):
    """Fit several models to one data source and compare them; one folder holds it all.

    ``out`` gets one run folder per model (named by the model) and the comparison files;
    the whole folder is replaced in one move (an earlier comparison folder or an empty one).
    ``options`` are :func:`fit`'s. Returns ``(runs by model, Comparison)``.
    """
    from .analysis.comparison import COMPARISON_FILE, compare_posteriors, write_comparison

    models = list(models)
    unknown = [m for m in models if m not in MODELS]
    if unknown:
        quoted = ", ".join(repr(m) for m in MODELS)
        raise ParameterError(f"models {unknown!r}: each must be one of {quoted}.")
    if len(set(models)) != len(models) or len(models) < 2:
        raise ParameterError(
            f"models={','.join(models)!r}: give at least two different models, e.g."
            " beta-binomial,complete-pooling,no-pooling."
        )
    _io.check_replaceable(Path(out), marker=COMPARISON_FILE, kind="comparison")  # before fitting
    loaded = (
        source
        if isinstance(source, LoadedData)
        else load_groups(source, group=group, successes=successes, trials=trials, outcome=outcome)
    )
    runs = {m: fit(loaded, model=m, checks=settings or True, **options) for m in models}
    comparison = compare_posteriors(
        {m: r.idata for m, r in runs.items()},
        final={m: r.ready for m, r in runs.items()},
        settings=settings,
    )

    def fill(folder: Path) -> None:
        for m, r in runs.items():
            write_run(r, folder / m)
        write_comparison(folder, comparison)

    _io.replace_folder(Path(out), fill, marker=COMPARISON_FILE, kind="comparison")
    return runs, comparison


def write_report(path: str | Path, **options):
    """Write report.html and figures/*.png into a run folder; see :mod:`workbench.report`.

    ``options`` are :func:`workbench.report.write_report`'s (``table_rows``). Returns its
    :class:`workbench.report.Report` (path, figures, seconds, bytes).
    """
    from .report.render import write_report as _write_report

    return _write_report(path, **options)


__all__ = [
    "DEFAULT_MODEL",
    "Run",
    "RunFolder",
    "SUMMARY_COLUMNS",
    "check_folder",
    "compare_folders",
    "demo_data_path",
    "estimates_table",
    "fit",
    "fit_and_compare",
    "format_fit",
    "load_groups",
    "open_run",
    "verify_run",
    "write_report",
    "write_run",
]
