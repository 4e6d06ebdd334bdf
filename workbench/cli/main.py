"""Command line: argparse over the public API. Prints, writes, exits.

Exit codes: 0 success (verdict ``ready``); 2 bad input or usage (one ``error:`` line on
stderr); 3 the run was written but is not final: its verdict is ``not-ready`` (convergence or
too few draws) or ``misfit`` (the model checks say the model does not reproduce the data).
The last line of a fit says which.

Every option's flag, help and check come from its one declaration in
:mod:`workbench.options`; values are taken as text and checked there, so a bad value is
one ``error:`` line that names the flag, whatever the command.
"""

from __future__ import annotations

import argparse
import os
import shlex
import signal
import sys
import threading
import warnings
from pathlib import Path

from .. import api, progress
from ..analysis.settings import CheckSettings
from ..io.runfolder import COMPARISON_FILES, FILES, path_of
from ..models import ConvergenceWarning, ParameterError, WorkbenchError
from ..options import FIT_OPTIONS, MODELS, aliases, invoked_as, spelling
from . import text

EXIT_OK, EXIT_INPUT, EXIT_NOT_READY = 0, 2, 3


class UsageError(WorkbenchError):
    """A command line argparse could not take; printed as one ``error:`` line."""


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse's own usage errors: one line, not the usage
        raise UsageError(message)


def _emit(*blocks: str) -> None:
    """Print, ending quietly if the reader went away (``workbench fit ... | head``)."""
    for block in blocks:
        if block:
            try:
                print(block, flush=True)
            except BrokenPipeError:
                devnull = os.open(os.devnull, os.O_WRONLY)
                os.dup2(devnull, sys.stdout.fileno())
                return


# -- options from their declarations ---------------------------------------------------------------


def _add(group, name: str, *, sticky: bool = False, flag: str | None = None,
         dest: str | None = None) -> None:
    o = FIT_OPTIONS[name]
    shown = o.default_text or (" ".join(map(str, o.default)) if isinstance(o.default, tuple)
                               else str(o.default))
    default = "as recorded in the run" if sticky else shown
    help_text = f"{o.help} (default: {default})"
    kw: dict = {"default": None, "dest": dest or name, "help": help_text}
    takes = o.takes
    if takes == "switch":
        if o.default is True:
            kw["action"] = argparse.BooleanOptionalAction
        else:
            kw["action"] = "store_const"
            kw["const"] = True
    else:
        kw["metavar"] = o.metavar
        if takes == "pair":
            kw["nargs"] = 2
        elif takes == "list":
            kw["nargs"] = "+"
        if name == "model":
            kw["choices"] = list(MODELS)
            kw.pop("metavar")
    group.add_argument(flag or o.flag, **kw)


def _add_all(parser, names, *, sticky: bool = False) -> None:
    groups: dict[str, object] = {}
    for name in names:
        g = FIT_OPTIONS[name].group
        if g not in groups:
            groups[g] = parser.add_argument_group(g)
        _add(groups[g], name, sticky=sticky)


def _given(args: argparse.Namespace, names) -> dict:
    """The declared options the user gave (left-out ones keep the API's default)."""
    out = {}
    for name in names:
        value = getattr(args, name, None)
        if value is not None:
            out[name] = tuple(value) if isinstance(value, list) else value
    return out


FIT_NAMES = tuple(FIT_OPTIONS)
COLUMN_NAMES = tuple(n for n, o in FIT_OPTIONS.items() if o.group == "columns")
DEMO_NAMES = tuple(n for n, o in FIT_OPTIONS.items() if o.group not in ("columns",))
COMPARE_NAMES = tuple(n for n in FIT_OPTIONS if n not in ("model", "out", "report"))
CHECK_NAMES = ("replicates", "p_bounds", "refit_limit")
RANK_NAMES = ("top", "better", "fdr", "target", "level", "compare_groups", "settle_chance",
              "max_trials")


# -- commands ----------------------------------------------------------------------------------


def _fit_and_print(source, options: dict) -> int:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # the verdict is printed instead
        run = api.fit(source, **options)
    out = run.path
    blocks = [text.format_fit(run)]
    if "checks" in run.documents:
        blocks.append(text.format_checks(run.documents["checks"]))
    if "predictions" in run.tables:
        blocks.append(text.format_prediction(_Prediction(run)))
    report = path_of(out, "report")
    if report.exists():
        figures = len(list(path_of(out, "figures").glob("*.png")))
        blocks.append(f"wrote {report} ({report.stat().st_size / 1024:.0f} KB, {figures}"
                      f" figures in {path_of(out, 'figures')}/)")
    blocks.append(text.format_written(run, out))
    _emit(*blocks)
    return EXIT_OK if run.ready else EXIT_NOT_READY


class _Prediction:
    """What the prediction summary reads, from a fitted run."""

    def __init__(self, run) -> None:
        self.table = run.tables["predictions"]
        self.record = run.record_parts["prediction"]


def cmd_fit(args: argparse.Namespace) -> int:
    options = _given(args, FIT_NAMES)
    options.setdefault("out", f"run-{Path(args.data).stem}")
    return _fit_and_print(args.data, options)


def cmd_demo(args: argparse.Namespace) -> int:
    options = {"target": 0.2, "predict_trials": 100, "seed": 1, "out": "demo-run",
               **_given(args, DEMO_NAMES), "report": True}
    path = api.demo_data_path()
    _emit(f"demo: invented sign-up data of 64 studio branches ({path.name}), seed"
          f" {options['seed']}")
    return _fit_and_print(path, {**options, "group": "branch", "successes": "signups",
                                 "trials": "visitors"})


def cmd_rank(args: argparse.Namespace) -> int:
    folder, result = api.rank_folder(args.folder, **_given(args, RANK_NAMES))
    report = "; report rewritten" if path_of(folder.path, "report").exists() else ""
    _emit(text.format_ranking(result.tables, result.record, result.targets),
          f"wrote ranking files into {args.folder}/{report}"
          + ("" if result.final else " (NOT FINAL: the run's diagnostics failed)"))
    return EXIT_OK if result.final else EXIT_NOT_READY


def cmd_predict(args: argparse.Namespace) -> int:
    with aliases(predict_trials="--trials"):
        folder, pred = api.predict_folder(args.folder, trials=args.predict_trials,
                                          level=args.level, seed=args.seed)
    _emit(text.format_prediction(pred),
          f"wrote {path_of(args.folder, 'predictions')}"
          + ("" if pred.final else " (NOT FINAL: the run's diagnostics failed)"))
    return EXIT_OK if pred.final else EXIT_NOT_READY


def _check_settings(args: argparse.Namespace) -> CheckSettings:
    given = {n: FIT_OPTIONS[n].validate(getattr(args, n, None) or FIT_OPTIONS[n].default)
             for n in CHECK_NAMES}
    low, high = given["p_bounds"]
    return CheckSettings(draws=given["replicates"], lower=low, upper=high,
                         refit_limit=given["refit_limit"]).validate()


def cmd_check(args: argparse.Namespace) -> int:
    folder, checks = api.check_folder(args.run, _check_settings(args))
    names = ", ".join(FILES[n] for n in ("checks", "ppc_statistics", "group_checks"))
    _emit(text.format_checks(checks.to_dict()), f"wrote {folder.path}/: {names}")
    if not folder.final:
        _emit("note: this run's convergence verdict is not-ready; the checks are provisional.")
    return EXIT_OK


def _model_list(value: str) -> list[str]:
    models = [m.strip() for m in value.split(",") if m.strip()]
    unknown = [m for m in models if m not in MODELS]
    if unknown:
        raise UsageError(f"--models {value}: {', '.join(unknown)} not among {', '.join(MODELS)}")
    return models


def cmd_compare(args: argparse.Namespace) -> int:
    settings = _check_settings(args)
    files = ", ".join(COMPARISON_FILES.values())
    if args.data is None:
        if len(args.runs) < 2:
            raise UsageError(
                f"compare needs two or more run folders (got {len(args.runs)}), or --data FILE"
                " to fit several models at once")
        if args.models is not None:
            raise UsageError("--models goes with --data; run folders are already fitted")
        out = args.out or Path("comparison")
        comparison = api.compare_folders(args.runs, out, settings)
        _emit(text.format_comparison(comparison), f"wrote {out}/: {files}")
        return EXIT_OK
    if args.runs:
        raise UsageError(
            "give either run folders or --data FILE, not both: --data fits the models afresh")
    models = _model_list(args.models) if args.models else list(api.COMPARE_MODELS)
    out = args.out or Path(f"compare-{Path(args.data).stem}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # each verdict is printed instead
        runs, comparison = api.fit_and_compare(
            args.data, models=models, out=out, settings=settings,
            **_given(args, COMPARE_NAMES))
    lines = []
    for name, run in runs.items():
        checks = run.documents.get("checks", {})
        misfit = ", ".join(checks.get("misfit_statistics", [])) or "none"
        lines.append(f"{name}: convergence {run.diagnostics.verdict}, checks"
                     f" {checks.get('verdict', '-')} (misfit: {misfit}), {run.seconds:.1f} s")
    _emit("\n".join(lines), text.format_comparison(comparison),
          f"wrote {out}/: {', '.join(runs)} run folders, {files}")
    # a model that misfits is the comparison's finding; only an unconverged fit is not final
    unconverged = [r for r in runs.values() if r.verdict == "not-ready"]
    return EXIT_NOT_READY if unconverged else EXIT_OK


def cmd_report(args: argparse.Namespace) -> int:
    result = api.write_report(args.folder)
    _emit(text.format_report(result))
    if not result.final:
        _emit("note: this run's convergence verdict is not-ready; the report says it is not"
              " final.")
        return EXIT_NOT_READY
    return EXIT_OK


def _progress_printer(what: str, quiet: bool):
    """A one-line progress meter on a terminal's stderr; nothing when quiet or redirected."""
    if quiet or not sys.stderr.isatty():
        return None

    def show(done: int, total: int, seconds: float) -> None:
        print("\r" + text.format_progress(what, done, total, seconds), end="", file=sys.stderr,
              flush=True)
        if done >= total:
            print(file=sys.stderr)

    return show


def cmd_sensitivity(args: argparse.Namespace) -> int:
    from .. import steps

    folder, table, doc = steps.sensitivity_folder(
        args.folder, progress=_progress_printer("sensitivity: fits", args.quiet))
    _emit(text.format_sensitivity(doc),
          f"wrote {path_of(args.folder, 'sensitivity')} and"
          f" {path_of(args.folder, 'sensitivity_summary')}"
          + ("" if folder.final else " (NOT FINAL: the run's diagnostics failed)"))
    return EXIT_OK if folder.final else EXIT_NOT_READY


#: fit options calibrate takes for a run folder (the rest are the run's own)
CALIBRATE_FOLDER_NAMES = ("engine", "seed", "target")


def cmd_calibrate(args: argparse.Namespace) -> int:
    from .. import steps
    from ..io.runfolder import is_run_folder

    given = _given(args, FIT_NAMES)
    source = Path(args.source)
    if is_run_folder(source):
        extra = [n for n in given if n not in CALIBRATE_FOLDER_NAMES]
        if extra:
            raise UsageError(
                f"{FIT_OPTIONS[extra[0]].flag} goes with a data file; a run folder keeps its own"
                f" settings (with a folder give only {', '.join('--' + n for n in CALIBRATE_FOLDER_NAMES)})")
        folder_path = source
    else:
        fit_options = {k: v for k, v in given.items()}
        fit_options.setdefault("out", f"run-{source.stem}")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            run = api.fit(source, **fit_options)
        _emit(f"fitted {source} -> {run.path}/ ({run.diagnostics.verdict})")
        folder_path = run.path
        given = {}
    try:
        folder, result = steps.calibrate_folder(
            folder_path, simulations=args.simulations, groups=args.tracked_groups,
            rank_draws=args.rank_draws, engine=given.get("engine"), seed=given.get("seed"),
            target=given.get("target"), workers=args.workers,
            progress=_progress_printer("calibrate: replicates", args.quiet))
    except steps.CalibrationInterrupted as stop:
        print(f"\ninterrupted: {stop.done} of {stop.total} replicates kept in {stop.staging};"
              " run the same command again to resume.", file=sys.stderr)
        return 130
    _emit(text.format_calibration(result.summary),
          f"wrote {path_of(folder_path, 'calibration')},"
          f" {path_of(folder_path, 'calibration_replicates')} and"
          f" {path_of(folder_path, 'calibration_summary')}")
    return EXIT_OK


def _add_audit_parsers(sub) -> None:
    s = sub.add_parser(
        "sensitivity", help="refit a run folder under other reasonable priors and say what moves",
        description="Refit a run folder under a documented set of alternative hyperpriors"
                    " (weaker and stronger pooling, a different population-mean prior; exact"
                    " engine where the model has one) and report per group how far the"
                    " estimate, its interval, its rank interval and its target flag move;"
                    " names the groups whose flag or best-k membership changes. Writes"
                    f" {FILES['sensitivity']} and {FILES['sensitivity_summary']}.")
    _folder_argument(s)
    s.add_argument("--quiet", action="store_true", help="no progress line on the terminal")
    s.set_defaults(func=cmd_sensitivity)

    c = sub.add_parser(
        "calibrate", help="simulation-based calibration of the model and engine on your trials",
        description="Simulation-based calibration (Talts et al. 2018) with the data's own trial"
                    " counts: draw truths from the prior, simulate successes, fit each with the"
                    " run's model and engine, and test the ranks of the truths for uniformity"
                    " and the coverage of 50/80/95% intervals and the false-flag share against"
                    " their nominal values. Runs in parallel; stop it with Ctrl-C and run the"
                    " same command again to resume. Give a run folder, or a data file (fitted"
                    f" first, as 'workbench fit' does). Writes {FILES['calibration']},"
                    f" {FILES['calibration_replicates']} and {FILES['calibration_summary']}.")
    c.add_argument("source", help="a run folder, or a CSV, TSV or Parquet file to fit first")
    g = c.add_argument_group("calibration")
    g.add_argument("--simulations", default=100, metavar="N",
                   help="simulated data sets, each fitted once (default: 100)")
    g.add_argument("--tracked-groups", default=8, metavar="N",
                   help="groups whose rate ranks are tested, spread over the trial counts"
                        " (default: 8)")
    g.add_argument("--rank-draws", default=99, metavar="L",
                   help="posterior draws each truth is ranked among (default: 99)")
    g.add_argument("--workers", default=None, type=int, metavar="N",
                   help="worker processes (default: one per core)")
    g.add_argument("--quiet", action="store_true", help="no progress line on the terminal")
    _add_all(c, FIT_NAMES)
    c.set_defaults(func=cmd_calibrate)


# -- the parser --------------------------------------------------------------------------------


def _folder_argument(p, dest: str = "folder") -> None:
    p.add_argument(dest, type=Path, help="a run folder written by 'workbench fit'")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="workbench",
        description="Estimate and rank a success rate across many groups with partial pooling;"
                    " check convergence and fit before anything is reported.",
        epilog="Exit codes: 0 success (verdict ready); 2 bad input or usage; 3 written but"
               " not final (verdict not-ready: convergence or too few draws; or misfit: the"
               " model checks say the model does not reproduce the data).",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    main_files = ", ".join(FILES[n] for n in ("estimates", "population", "diagnostics",
                                              "posterior", "record"))
    p = sub.add_parser("fit", help="fit a model to a table of groups and write a run folder",
                       description="Fit a model to group counts (CSV, TSV or Parquet) and write"
                                   f" a run folder: {main_files} and the ranking and check"
                                   " tables.")
    p.add_argument("data", help="CSV, TSV or Parquet file: one row per group (or per trial)")
    _add_all(p, FIT_NAMES)
    p.add_argument("--quiet", action="store_true",
                   help="no progress display on the terminal (it never shows in a pipe or log)")
    p.set_defaults(func=cmd_fit)

    d = sub.add_parser("demo", help="fit the bundled invented demo data and write a run folder",
                       description="Fit the bundled, invented studio-branch sign-up data and"
                                   " write a run folder (default ./demo-run) with its report,"
                                   " against an invented sign-up target of 0.20 (--target"
                                   " changes it), predictions for 100 future visitors per"
                                   " branch, and seed 1 (--seed changes it).")
    _add_all(d, DEMO_NAMES)
    d.add_argument("--quiet", action="store_true",
                   help="no progress display on the terminal (it never shows in a pipe or log)")
    d.set_defaults(func=cmd_demo)

    ranked = ", ".join(FILES[n] for n in ("ranks", "pairwise", "funnel", "funnel_curve"))
    r = sub.add_parser(
        "rank", help="recompute ranks, target flags, pairwise, funnel data of a run folder",
        description=f"Recompute the ranking step of a run folder: {ranked}, and with a target"
                    f" {FILES['targets']} and {FILES['trials_needed']}; updates the rank and"
                    f" target columns of {FILES['estimates']} and rewrites the report if the"
                    " folder has one. Rank intervals overlap; a rank is no verdict on a group"
                    " or its people.")
    _folder_argument(r)
    _add_all(r, RANK_NAMES, sticky=True)
    r.set_defaults(func=cmd_rank)

    pr = sub.add_parser(
        "predict", help="successes in M future trials per group and for a new group",
        description="Posterior predictive successes in M future trials for every group of a"
                    f" run folder and for a new, unseen group; writes {FILES['predictions']}.")
    _folder_argument(pr)
    g = pr.add_argument_group("prediction")
    _add(g, "predict_trials", flag="--trials")
    _add(g, "level", sticky=True)
    _add(g, "seed", sticky=True)
    pr.set_defaults(func=cmd_predict)

    c = sub.add_parser(
        "check", help="posterior predictive checks and held-out-group predictions of a run"
                      " folder",
        description="Replicate the data from the posterior of a run folder, test the predictive"
                    " statistics, and predict each group left out (PSIS-LOO, Pareto k,"
                    f" LOO-PIT); writes {FILES['checks']}, {FILES['ppc_statistics']} and"
                    f" {FILES['group_checks']} into the folder.")
    _folder_argument(c, "run")
    _add_all(c, CHECK_NAMES)
    c.set_defaults(func=cmd_check)

    cp = sub.add_parser(
        "compare", help="compare models by how well they predict held-out groups",
        description="Compare run folders fitted to the same data (workbench compare RUN RUN"
                    " ...), or fit several models to one file and compare them (workbench"
                    f" compare --data FILE --models A,B,...). Writes"
                    f" {', '.join(COMPARISON_FILES.values())}.")
    cp.add_argument("runs", nargs="*", type=Path, metavar="RUN",
                    help="run folders to compare (or none, with --data)")
    cp.add_argument("--data", default=None,
                    help="CSV, TSV or Parquet file to fit every model of --models to")
    cp.add_argument("--models", default=None, metavar="A,B,...",
                    help="models to fit and compare, comma-separated (default:"
                         f" {','.join(api.COMPARE_MODELS)})")
    cp.add_argument("--out", type=Path, default=None,
                    help="folder for one run folder per model and the comparison (default"
                         " compare-<data file name>, or comparison; replaced whole if it is an"
                         " earlier one)")
    _add_all(cp, [n for n in COMPARE_NAMES if n not in CHECK_NAMES] + list(CHECK_NAMES))
    cp.set_defaults(func=cmd_compare)

    rp = sub.add_parser(
        "report", help=f"write {FILES['report']} (and {FILES['figures']}/*.png) into a run"
                       " folder",
        description="Write one self-contained HTML report of a run folder (figures embedded;"
                    " it loads nothing from the network) and the figures as PNG files. Exits 3"
                    " when the run's convergence verdict is not-ready.")
    _folder_argument(rp)
    rp.set_defaults(func=cmd_report)
    _add_audit_parsers(sub)
    return parser


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where the process is so that staging folders are removed on the way."""


def _on_sigterm(signum, frame):
    raise Terminated()


def main(argv: list[str] | None = None) -> int:
    main_thread = threading.current_thread() is threading.main_thread()
    before = signal.signal(signal.SIGTERM, _on_sigterm) if main_thread else None
    try:
        with warnings.catch_warnings():
            # a tab or other control character in a group name has no glyph in any font:
            # matplotlib's notice about it is no news to the user
            warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from",
                                    category=UserWarning)
            return _main(argv)
    finally:
        if main_thread:
            signal.signal(signal.SIGTERM, before)


def _main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser()
    command = "workbench " + " ".join(shlex.quote(a) for a in argv)
    try:
        with spelling("cli"):
            try:
                args = parser.parse_args(argv)
            except SystemExit as exc:  # --help (0)
                return int(exc.code or 0)
            # --quiet is a terminal matter, not a setting of the run: never in run.json
            shown = progress.Display(enabled=not getattr(args, "quiet", False))
            with invoked_as(command), progress.showing(shown):
                return args.func(args)
    except WorkbenchError as exc:
        message = str(exc).replace("\n", " ").rstrip(".")
        hint = ""
        if isinstance(exc, UsageError | ParameterError) and "--help'" not in message:
            known = argv and argv[0] in parser._subparsers._group_actions[0].choices
            hint = f"; see 'workbench {argv[0] + ' ' if known else ''}--help'"
        print(f"error: {message}{hint}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt as exc:
        print("error: interrupted; no partial files were left.", file=sys.stderr)
        return 143 if isinstance(exc, Terminated) else 130
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
