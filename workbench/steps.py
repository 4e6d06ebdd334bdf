"""Steps that write or change a run folder: write a fitted run, rank, predict, check, report.

Each step goes through :mod:`workbench.io.runfolder` (one writer, one updater), so a folder
is replaced whole, and each records itself in run.json's "steps" so the folder's reproduce
command is complete. A step that changes the tables a report was drawn from re-renders the
report inside the same update, so no file describes settings run.json does not hold.
"""

from __future__ import annotations

import time
from pathlib import Path

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
from .results import Run, RunFolder

def render_into(folder: Path):
    from .report.render import render_into as render  # TODO(issue 9): top-level import

    return render(folder)


#: keys of run.json written from a fitted run's record parts
RECORD_PARTS = ("ranking", "verification", "retry", "sampling", "prediction")


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
    then = (lambda staging: render_into(staging)) if report else None
    runfolder.write_folder(out, parts_of(run), then=then)
    run.path = out
    return out


def open_run(path: str | Path) -> RunFolder:
    """Read a run folder written by :func:`write_run` (tables now, posterior on first use)."""
    return RunFolder(runfolder.read_folder(path))


def _rerender(staging: Path) -> str:
    render_into(staging)
    return "report rewritten to match the new tables"


def _update(folder: RunFolder, what: str, **changes) -> dict:
    return runfolder.update_folder(
        folder.path, step=runfolder.step_entry(current_command(), what), derived=_rerender,
        **changes,
    )


def consistent(folder: RunFolder) -> RunFolder:
    """The folder, or DataError when run.json and posterior.nc disagree about the data."""
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
    draws = group_draws(folder.idata, folder.estimates, target=opts.target)
    result = compute_ranking(draws, opts)
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
        made["report"] = render_into(staging)

    runfolder.update_folder(
        folder.path, step=runfolder.step_entry(current_command(), "wrote the report"),
        then=derived,
    )
    report = made["report"]
    report.path = runfolder.path_of(folder.path, "report")
    return report


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
