"""The public API: everything the command line does, callable from Python.

>>> from workbench import api
>>> run = api.fit(api.demo_data_path(), group="branch", successes="signups",
...               trials="visitors", seed=1)                      # doctest: +SKIP
>>> run                                                           # doctest: +SKIP
Run(model='beta-binomial', engine='exact', groups=64, verdict='ready', path='not written')
>>> api.write_run(run, "demo-run")                                # doctest: +SKIP
"""

from __future__ import annotations

import inspect
from collections.abc import Iterable
from importlib import resources
from pathlib import Path

from . import pipeline, steps
from .analysis.comparison import compare_posteriors
from .io.inputs import load_groups
from .io.runfolder import check_replaceable
from .models import MODELS, SUMMARY_COLUMNS, ParameterError
from .options import FIT_OPTIONS, FitSettings, refuse_unknown
from .results import Run, RunFolder
from .steps import (
    check_folder,
    compare_folders,
    open_run,
    predict_folder,
    rank_folder,
    write_run,
)

DEFAULT_MODEL = FIT_OPTIONS["model"].default
#: Models fitted by ``compare`` when no list is given.
COMPARE_MODELS = ("beta-binomial", "complete-pooling", "no-pooling")


def demo_data_path() -> Path:
    """The bundled demo CSV (installed with the package, or beside it in a checkout)."""
    here = Path(__file__).resolve().parent
    for candidate in (here / "_datasets", here.parent / "datasets"):
        if (candidate / "branch_signups.csv").exists():
            return candidate / "branch_signups.csv"
    with resources.as_file(resources.files("workbench") / "_datasets" / "branch_signups.csv") as p:
        return Path(p)


def numpydoc(names: Iterable[str]) -> str:
    """A numpydoc Parameters block for the declared options."""
    lines = []
    for name in names:
        o = FIT_OPTIONS[name]
        default = o.default_text or repr(o.default)
        kind = o.check.describe() if hasattr(o.check, "describe") else ""
        lines.append(f"{name} : {kind}, default={default}")
        lines.append(f"    {o.help[0].upper()}{o.help[1:]}.")
    return "\n".join(lines)


def fit(source, **options) -> Run:
    given = options.get("dask")
    client = given if given is not None and not isinstance(given, str) else None
    settings = FitSettings.from_options(**options)
    run = pipeline.fit_run(source, settings, client=client if settings["dask"] else None)
    if settings["out"] is not None:
        write_run(run, settings["out"], report=settings["report"])
    return run


fit.__signature__ = inspect.Signature(
    [inspect.Parameter("source", inspect.Parameter.POSITIONAL_OR_KEYWORD)]
    + [
        inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=o.default)
        for name, o in FIT_OPTIONS.items()
    ],
    return_annotation=Run,
)
fit.__doc__ = f"""Load, fit, summarise, diagnose and rank: one run.

The run is written to a folder only when ``out`` is given (with its report when ``report``
is true); :func:`write_run` writes it later. Every option is declared once, in
:mod:`workbench.options`; the command line's ``workbench fit`` takes the same ones as
``--name-with-dashes``, and the run record keeps them all under "settings".

Parameters
----------
source : path, DataFrame or LoadedData
    CSV, TSV or Parquet file, or a table: one row per group (counts) or per trial.
{numpydoc(FIT_OPTIONS)}

Returns
-------
Run
    Estimates (with rank and target columns), population, diagnostics and every table.

Raises
------
ParameterError
    An option is unknown (the message lists the known ones) or out of range.
DataError
    The input table is unusable (row, column, value and fix are named).
"""


def write_report(path: str | Path):
    """Write report.html and figures/*.png into a run folder (the folder is replaced whole).

    Returns the :class:`workbench.report.render.Report` (path, figures, seconds, bytes).
    """
    return steps.report_folder(path)


def fit_and_compare(source, *, models=COMPARE_MODELS, out: str | Path, settings=None,
                    **options):
    """Fit several models to one data source and compare them; one folder holds it all.

    ``out`` gets one run folder per model (named by the model) and the comparison files;
    the whole folder is replaced in one move. ``options`` are :func:`fit`'s (not ``model``,
    ``out`` or ``report``); columns such as ``parent`` and ``covariates`` go to the models
    that use them. Returns ``(runs by model, Comparison)``.
    """
    refuse_unknown(options, [k for k in FIT_OPTIONS if k not in ("model", "out", "report")],
                   "compare")
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
    marker = "comparison"
    from .io.runfolder import COMPARISON_FILES

    check_replaceable(Path(out), kind="comparison", marker=COMPARISON_FILES[marker])
    base = FitSettings.from_options(**options)
    loaded = pipeline.load(source, base)
    if base["parent"] is not None and not set(models) & set(pipeline.PARENT_MODELS):
        pipeline.check_model_inputs(loaded, base.replace(model=models[0]))
    if base["covariates"] and not set(models) & set(pipeline.COVARIATE_MODELS):
        pipeline.check_model_inputs(loaded, base.replace(model=models[0]))
    runs = {}
    for m in models:
        data, settings_m = pipeline.for_model(loaded, base.replace(model=m, checks=True))
        runs[m] = pipeline.fit_run(data, settings_m)
    comparison = compare_posteriors(
        {m: r.idata for m, r in runs.items()},
        final={m: r.ready for m, r in runs.items()},
        settings=settings or pipeline.check_settings(base),
    )
    steps.write_comparison(out, runs, comparison)
    return runs, comparison


__all__ = [
    "COMPARE_MODELS",
    "DEFAULT_MODEL",
    "Run",
    "RunFolder",
    "SUMMARY_COLUMNS",
    "check_folder",
    "compare_folders",
    "demo_data_path",
    "fit",
    "fit_and_compare",
    "load_groups",
    "open_run",
    "predict_folder",
    "rank_folder",
    "write_report",
    "write_run",
]
