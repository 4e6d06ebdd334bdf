"""Steps that write or change a run folder: write a fitted run, rank, predict, check, report.

Each step goes through :mod:`workbench.io.runfolder` (one writer, one updater), so a folder
is replaced whole, and each records itself in run.json's "steps" so the folder's reproduce
command is complete. A step that changes the tables a report was drawn from re-renders the
report inside the same update, so no file describes settings run.json does not hold.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

from . import progress
from .analysis.casemix import adjusted_draws
from .analysis.checks import check_posterior
from .analysis.comparison import compare_posteriors
from .analysis.draws import group_draws
from .analysis.predictions import default_seed, predict
from .analysis.ranking import compute as compute_ranking
from .analysis.ranking import merge_estimate_columns, rank_options
from .io import runfolder
from .io.runfolder import FolderParts
from .models import DataError, attr, counts_of, versions
from .options import FIT_OPTIONS, RANK_NAMES, current_command
from .report import render_into
from .results import Run, RunFolder

#: keys of run.json written from a fitted run's record parts
RECORD_PARTS = ("ranking", "verification", "retry", "sampling", "prediction", "cluster")


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


def record_of(run: Run) -> dict:
    """run.json of a fitted run."""
    idata = run.idata
    return runfolder.new_record(
        created=time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        final=run.ready,
        verdict=run.diagnostics.verdict,
        command=current_command(),
        steps=[],
        settings=run.settings,
        model=attr(idata, "model"),
        engine=attr(idata, "engine"),
        priors=attr(idata, "priors"),
        random_seed=int(attr(idata, "random_seed")),
        versions=versions(),
        input={"fingerprint": run.loaded.counts.fingerprint(), **run.loaded.reconciliation},
        notes=run.loaded.notes + run.messages,
        population=run.population.to_dict(orient="records"),
        fit_seconds=round(run.seconds, 3),
        **{k: v for k, v in run.record_parts.items() if k in RECORD_PARTS},
    )


def parts_of(run: Run) -> FolderParts:
    tables = {"estimates": run.estimates, "population": run.population, **run.tables}
    documents = {"diagnostics": run.diagnostics.to_dict(), **run.documents}
    texts = {} if run.ready else {"not_final": not_final_text(run)}
    return FolderParts(record_of(run), tables, documents, run.idata, texts)


def write_run(run: Run, out: str | Path, *, report: bool = False) -> Path:
    """Write the run folder atomically (with its report when asked); returns its path."""
    out = Path(out)
    runfolder.clean_staging(out.parent, out.name)
    then = (lambda staging: render_into(staging, final=out)) if report else None
    with progress.step(f"writing {out}" + (" and its report" if report else "")):
        runfolder.write_folder(out, parts_of(run), then=then)
    run.path = out
    return out


def open_run(path: str | Path) -> RunFolder:
    """Read a run folder written by :func:`write_run` (tables now, posterior on first use)."""
    return RunFolder(runfolder.read_folder(path))


def _update(folder: RunFolder, what: str, **changes) -> dict:
    def rerender(staging: Path) -> str:
        render_into(staging, final=folder.path)
        return "report rewritten to match the new tables"

    return runfolder.update_folder(
        folder.path, step=runfolder.step_entry(current_command(), what), derived=rerender,
        **changes,
    )


def consistent(folder: RunFolder) -> RunFolder:
    """The folder, or DataError when run.json and posterior.nc disagree about the data."""
    said = (folder.record.get("input") or {}).get("fingerprint")
    stored = attr(folder.idata, "data_fingerprint")
    actual = counts_of(folder.idata).fingerprint()
    if not said or said != stored or stored != actual:
        raise DataError(
            f"run folder {str(folder.path)!r} is inconsistent: {runfolder.FILES['record']},"
            f" {runfolder.FILES['posterior']} and the"
            f" counts inside it give data fingerprints {str(said)[:12]}, {str(stored)[:12]},"
            f" {actual[:12]}; fit it again with 'workbench fit'."
        )
    return folder


def rank_folder(path: str | Path, **given):
    """Recompute the ranking step of a run folder and replace it in the folder as a whole.

    Options left out (or None) keep the run's recorded setting. Returns ``(RunFolder,
    Ranking)``; the folder's report, if any, is rewritten at the new settings.
    """
    folder = consistent(open_run(path))
    settings = folder.contents.settings
    values = {}
    for name in RANK_NAMES:
        value = given.get(name)
        values[name] = value if value is not None else settings.get(
            name, FIT_OPTIONS[name].default)
    opts = rank_options(**values)
    # the estimates' prob_above_target column refers to the recorded target, not the new one
    draws = group_draws(folder.idata, folder.estimates, target=settings.get("target"))
    result = compute_ranking(adjusted_draws(folder.idata, draws), opts)
    result.final = folder.final
    tables = dict(result.tables)
    tables["estimates"] = merge_estimate_columns(folder.estimates, result.estimate_columns)
    # without a target, files of an earlier target would describe other settings
    remove = () if opts.target is not None else ("trials_needed", "targets")
    documents = {"targets": result.targets} if result.targets is not None else {}
    new_settings = {**settings, **{k: v if not isinstance(v, tuple) else list(v)
                                   for k, v in opts.as_dict().items() if k in RANK_NAMES}}
    _update(folder, "recomputed the ranking step", tables=tables, documents=documents,
            remove=remove, record={"settings": new_settings, "ranking": result.record})
    return open_run(path), result


def predict_folder(path: str | Path, *, trials, level=None, seed=None):
    """Write predictions.csv into a run folder; returns ``(RunFolder, Prediction)``."""
    trials = FIT_OPTIONS["predict_trials"].validate(trials)
    if trials is None:
        raise DataError("predict needs the number of future trials; give --trials M.")
    folder = consistent(open_run(path))
    level = folder.contents.settings.get("level", 0.95) if level is None else \
        FIT_OPTIONS["level"].validate(level)
    seed = default_seed(folder.record.get("random_seed")) if seed is None else \
        FIT_OPTIONS["seed"].validate(seed)
    draws = group_draws(folder.idata, folder.estimates)
    pred = predict(folder.idata, draws.posterior_mean, trials=trials, level=level, seed=seed)
    pred.final = folder.final
    _update(folder, f"predicted {trials} future trials per group",
            tables={"predictions": pred.table}, record={"prediction": pred.record})
    return open_run(path), pred


def check_folder(path: str | Path, settings=None):
    """Run the checks on a run folder and replace its check files; ``(RunFolder, Checks)``."""
    folder = consistent(open_run(path))
    checks = check_posterior(folder.idata, settings)
    _update(folder, "re-ran the posterior predictive checks",
            tables={"ppc_statistics": checks.replicates, "group_checks": checks.groups},
            documents={"checks": checks.to_dict()})
    return open_run(path), checks


def report_folder(path: str | Path):
    """Write report.html and figures/*.png into a run folder (replacing the folder whole)."""
    folder = open_run(path)
    made = {}

    def derived(staging: Path) -> None:
        made["report"] = render_into(staging, final=folder.path)

    runfolder.update_folder(
        folder.path, step=runfolder.step_entry(current_command(), "wrote the report"),
        then=derived,
    )
    return made["report"]


def _labels(paths: list[Path]) -> list[str]:
    names = [p.name or str(p) for p in paths]
    return names if len(set(names)) == len(names) else [str(p) for p in paths]


def compare_folders(paths, out: str | Path | None = None, settings=None):
    """Compare run folders fitted to the same data; write the comparison to ``out`` if given."""
    paths = [Path(p) for p in paths]
    seen: dict[Path, Path] = {}
    for p in paths:
        key = p.resolve()
        if key in seen:
            raise DataError(f"run folder {str(p)!r} is given twice; give each run once.")
        seen[key] = p
    folders = [consistent(open_run(p)) for p in paths]
    labels = _labels(paths)
    comparison = compare_posteriors(
        {lab: f.idata for lab, f in zip(labels, folders, strict=True)},
        final={lab: f.final for lab, f in zip(labels, folders, strict=True)},
        settings=settings,
    )
    if out is not None:
        marker = runfolder.COMPARISON_FILES["comparison"]
        runfolder.replace_folder(
            out, lambda folder: runfolder.write_comparison_files(
                folder, comparison.table, comparison.pointwise, comparison.to_dict()),
            kind="comparison", marker=marker)
    return comparison


def write_comparison(out: str | Path, runs: dict[str, Run], comparison) -> Path:
    """One folder: a run folder per model and the comparison files, replaced whole."""
    marker = runfolder.COMPARISON_FILES["comparison"]

    def fill(folder: Path) -> None:
        for name, run in runs.items():
            runfolder.write_folder(folder / name, parts_of(run))
        runfolder.write_comparison_files(folder, comparison.table, comparison.pointwise,
                                         comparison.to_dict())

    return runfolder.replace_folder(out, fill, kind="comparison", marker=marker)


# -- audit: prior sensitivity and simulation-based calibration ---------------------------------

SENSITIVITY_NOTE = "prior sensitivity:"


def _audit_settings(folder: RunFolder, what: str):
    """The run's recorded settings, checked; refuses runs whose counts alone cannot refit."""
    from .models import ParameterError
    from .options import FitSettings

    recorded = folder.contents.settings
    settings = FitSettings.from_options(**{k: v for k, v in recorded.items() if k in FIT_OPTIONS})
    if settings["covariates"] or settings["parent"] is not None:
        raise ParameterError(
            f"{what} refits from the run's counts alone; this run uses covariates or parents,"
            " which it does not handle yet: audit a run without them."
        )
    seed = folder.record.get("random_seed")
    return settings.replace(seed=seed) if settings["seed"] is None and seed is not None \
        else settings


def _notes_with(record: dict, note: str | None) -> list[str]:
    kept = [n for n in record.get("notes", []) if not str(n).startswith(SENSITIVITY_NOTE)]
    return kept + ([note] if note else [])


def sensitivity_folder(path: str | Path, *, progress=None):
    """Refit a run under the documented alternative priors; write sensitivity.csv/.json.

    Every fit (the baseline, the run's own prior, too) uses the exact engine where the model
    has one. Returns ``(RunFolder, table, summary)``; a sensitive verdict adds a note to
    run.json's "notes".
    """
    from .analysis import sensitivity
    from .models import MODELS, make_model
    from .pipeline import model_settings

    folder = consistent(open_run(path))
    settings = _audit_settings(folder, "sensitivity")
    model = settings["model"]
    engine = "exact" if "exact" in MODELS[model].engines else settings["engine"]
    counts = counts_of(folder.idata)
    level, target = settings["level"], settings["target"]
    top, better, fdr = int(settings["top"]), settings["better"], settings["fdr"]
    variants = sensitivity.prior_variants(settings)

    def summarised(s):
        est = make_model(model, **model_settings(s.replace(engine=engine), counts.n_groups))
        est.fit(counts)
        return sensitivity.conclusions(est, level=level, target=target, fdr=fdr, top=top,
                                       better=better)

    total = len(variants) + 1
    started = time.perf_counter()
    baseline = summarised(settings)
    if progress:
        progress(1, total, time.perf_counter() - started)
    alternatives = {}
    for i, v in enumerate(variants, start=2):
        alternatives[v.name] = (v, summarised(settings.replace(**v.changes)))
        if progress:
            progress(i, total, time.perf_counter() - started)
    table, doc = sensitivity.compare(baseline, alternatives, top=top, target=target)
    doc = {**doc, "model": model, "engine": engine, "level": level,
           "seconds": round(time.perf_counter() - started, 3)}
    note = f"{SENSITIVITY_NOTE} {doc['sentence']}" if doc["verdict"] == "sensitive" else None
    record = {"sensitivity": {k: doc[k] for k in ("verdict", "sentence", "flag_change_groups",
                                                  "top_k_change_groups", "engine")},
              "notes": _notes_with(folder.record, note)}
    _update(folder, f"prior sensitivity under {len(variants)} alternative priors",
            tables={"sensitivity": table}, documents={"sensitivity_summary": doc},
            record=record)
    return open_run(path), table, doc


class CalibrationInterrupted(Exception):
    """Raised when a calibration is stopped: finished replicates are kept for a rerun."""

    def __init__(self, done: int, total: int, staging: Path) -> None:
        super().__init__(f"{done} of {total} replicates kept in {staging}")
        self.done, self.total, self.staging = done, total, staging


def _read_staging(staging: Path, key: str) -> dict[int, dict]:
    """Finished replicates of this plan; a torn last line (a killed write) is ignored."""
    if not staging.exists():
        return {}
    done = {}
    for line in staging.read_text(encoding="utf-8").splitlines(keepends=True):
        if not line.endswith("\n"):
            continue
        try:
            entry = json.loads(line)
        except json.JSONDecodeError:
            continue
        if isinstance(entry, dict) and entry.get("plan") == key and "result" in entry:
            done[int(entry["result"]["index"])] = entry["result"]
    return done


def _append_line(staging: Path, entry: dict) -> None:
    """One JSON line, written by a single append: a reader sees it whole or not at all."""
    data = (json.dumps(entry, default=_json_default) + "\n").encode("utf-8")
    fd = os.open(staging, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, data)
        os.fsync(fd)
    finally:
        os.close(fd)


def _json_default(value):
    if hasattr(value, "item"):
        return value.item()
    if hasattr(value, "tolist"):
        return value.tolist()
    raise TypeError(type(value).__name__)


def _workers(workers: int | None) -> int:
    if workers is not None:
        return max(1, int(workers))
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:
        return max(1, os.cpu_count() or 1)


def calibration_staging(folder: str | Path) -> Path:
    """Where a calibration's finished replicates wait: beside the folder, named after it."""
    folder = Path(folder)
    return folder.parent / f".{folder.name}{runfolder.FILES['calibration_staging']}"


def calibrate_folder(path: str | Path, *, simulations: int = 100, groups: int = 8,
                     rank_draws: int = 99, engine: str | None = None, seed: int | None = None,
                     target: float | None = None, workers: int | None = None, progress=None,
                     fitter=None):
    """Simulation-based calibration of a run's model and engine on its own trial counts.

    Replicate i always uses the same seed (from ``seed``, else the run's), so a stopped
    calibration resumes where it stopped: finished replicates are appended, one JSON line
    each, to the folder's staging file, and a rerun with the same settings keeps them. When
    all are done the tables land in the folder in one update and the staging file goes.
    ``fitter(plan, counts, seed)`` replaces the model's fit (tests inject broken engines);
    it must be picklable to run in worker processes. Returns ``(RunFolder, Calibration)``.
    """
    import concurrent.futures as futures
    import math
    import multiprocessing

    from .analysis import calibration
    from .models import MODELS
    from .options import Number
    from .pipeline import model_settings

    simulations = Number(1, 100_000, whole=True)("simulations", simulations)
    groups = Number(0, 10_000, whole=True)("tracked_groups", groups)
    rank_draws = Number(9, 10_000, whole=True)("rank_draws", rank_draws)
    folder = consistent(open_run(path))
    settings = _audit_settings(folder, "calibrate")
    if engine is not None:
        settings = settings.replace(engine=engine)
    used = settings["engine"]
    if used == "auto":
        used = MODELS[settings["model"]].engines[0]
    counts = counts_of(folder.idata)
    estimator = model_settings(settings.replace(engine=used), counts.n_groups)
    if used == "exact" and settings["draws"] is None:
        estimator["draws"] = max(1, math.ceil(rank_draws / int(settings["chains"])))
    base_seed = seed if seed is not None else int(folder.record.get("random_seed") or 0)
    target = settings["target"] if target is None else FIT_OPTIONS["target"].validate(target)
    plan = calibration.make_plan(settings["model"], estimator, counts.names, counts.trials,
                                 groups=groups, draws=rank_draws, seed=base_seed,
                                 target=target, fdr=settings["fdr"])
    staging = calibration_staging(folder.path)
    done = _read_staging(staging, plan.key())
    if not done and staging.exists():
        staging.unlink()  # replicates of other settings: start afresh
    todo = [i for i in range(simulations) if i not in done]
    done = {i: r for i, r in done.items() if i < simulations}
    started = time.perf_counter()

    def finished(result: dict) -> None:
        _append_line(staging, {"plan": plan.key(), "result": result})
        done[int(result["index"])] = result
        if progress:
            progress(len(done), simulations, time.perf_counter() - started)

    if progress and done:
        progress(len(done), simulations, 0.0)
    n_workers = min(_workers(workers), max(1, len(todo)))
    try:
        if n_workers <= 1:
            for i in todo:
                finished(calibration.run_replicate(plan, i, fitter))
        else:
            method = "fork" if used == "exact" else "spawn"
            context = multiprocessing.get_context(method)
            with futures.ProcessPoolExecutor(n_workers, mp_context=context) as pool:
                pending = [pool.submit(calibration.run_replicate, plan, i, fitter) for i in todo]
                try:
                    for f in futures.as_completed(pending):
                        finished(f.result())
                except BaseException:
                    for f in pending:
                        f.cancel()
                    raise
    except KeyboardInterrupt:
        raise CalibrationInterrupted(len(done), simulations, staging) from None
    result = calibration.summarise(plan, list(done.values()), engine=used)
    doc = {**result.summary, "wall_seconds": round(time.perf_counter() - started, 3),
           "workers": n_workers}
    result.summary = doc
    _update(folder, f"simulation-based calibration, {simulations} replicates",
            tables={"calibration": result.ranks, "calibration_replicates": result.replicates},
            documents={"calibration_summary": doc},
            record={"calibration": {k: doc[k] for k in ("verdict", "sentence", "model",
                                                        "engine", "replicates")}})
    staging.unlink(missing_ok=True)
    return open_run(path), result
