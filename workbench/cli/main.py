"""Command line: argparse over the public API. Prints, writes, exits.

Exit codes: 0 success; 2 bad input or usage (one ``error:`` line on stderr); 3 the run was
written but its convergence verdict is ``not-ready`` (nothing in it is final).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

from ..models import MODELS, ConvergenceWarning, WorkbenchError

from .. import api
from ..analysis import predictions as predict
from ..analysis import ranking
from ..analysis.comparison import format_comparison
from ..analysis.checks import CheckSettings, format_checks
from ..report.render import format_report

EXIT_OK, EXIT_INPUT, EXIT_NOT_READY = 0, 2, 3


def _rate(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0 < value < 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be strictly between 0 and 1")
    return value


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 1")
    return value


def _count(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 0")
    return value


def _positive(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be positive")
    return value


def _add_model_options(
    p: argparse.ArgumentParser, *, model_default: str, several: bool = False
) -> None:
    g = p.add_argument_group("model")
    if several:  # workbench compare --data: a comma-separated list instead of one model
        g.add_argument("--models", type=_model_list, default=None, metavar="A,B,...",
                       help="models to fit and compare, comma-separated (default:"
                            f" {','.join(COMPARE_MODELS)})")
    else:
        g.add_argument("--model", default=model_default, choices=list(MODELS),
                       help=f"which model to fit (default: {model_default}). beta-binomial pools"
                            " partially; no-pooling treats each group alone; complete-pooling"
                            " gives every group one shared rate")
    g.add_argument("--engine", default="auto", choices=["auto", "exact", "mcmc"],
                   help="how the posterior is computed: exact (quadrature / closed forms) or"
                        " mcmc (PyMC NUTS); auto picks exact wherever the model has it")
    g.add_argument("--beta-prior", nargs=2, type=_positive, metavar=("A", "B"), default=(1.0, 1.0),
                   help="Beta(A, B) prior of each rate for no-pooling and complete-pooling"
                        " (default 1 1, uniform; 0.5 0.5 is the Jeffreys prior)")
    g.add_argument("--mu-prior", nargs=2, type=_positive, metavar=("A", "B"), default=(1.0, 1.0),
                   help="beta-binomial: Beta(A, B) prior of the population mean rate (default 1 1)")
    g.add_argument("--kappa-prior", nargs=2, type=_positive, metavar=("MEDIAN", "LOGSD"),
                   default=(20.0, 3.0),
                   help="beta-binomial: LogNormal prior of the concentration, by its median and"
                        " log-scale sd (default 20 3: allows both weak and strong pooling)")
    g.add_argument("--sigma-prior", type=_positive, metavar="SCALE", default=1.0,
                   help="logit-normal, nested: HalfNormal(SCALE) prior of the between-group"
                        " sd of log-odds (default 1)")
    g.add_argument("--tau-prior", type=_positive, metavar="SCALE", default=1.0,
                   help="nested: HalfNormal(SCALE) prior of the between-parent sd of log-odds"
                        " (default 1)")
    s = p.add_argument_group("sampling")
    s.add_argument("--draws", type=_positive_int, default=None,
                   help="draws per chain kept (default 1000; exact engines on more than 25,000"
                        " groups keep fewer, at most 1e8 values of theta, as their intervals come"
                        " from closed forms)")
    s.add_argument("--tune", type=_count, default=1000,
                   help="mcmc: warm-up steps per chain, discarded (default 1000)")
    s.add_argument("--chains", type=_positive_int, default=4, help="number of chains (default 4)")
    s.add_argument("--target-accept", type=float, default=None,
                   help="mcmc: NUTS target acceptance in [0.5, 1) (default 0.9; 0.99 for nested,"
                        " whose between-parent sd often sits near zero)")
    s.add_argument("--seed", type=_count, default=None,
                   help="random seed; the one used is recorded in run.json (default: fresh)")
    s.add_argument("--verify", action="store_true",
                   help="also run the other engine and report per-group agreement in Monte Carlo"
                        " standard errors")
    s.add_argument("--retry", action="store_true",
                   help="if the convergence verdict is not-ready, apply the first remedy once and"
                        " refit (the record says so)")
    r = p.add_argument_group("results")
    r.add_argument("--level", type=_rate, default=0.95,
                   help="mass of the central intervals (default 0.95)")
    r.add_argument("--target", type=_rate, default=None,
                   help="a target rate: adds prob_above_target and the target flags")
    r.add_argument("--predict-trials", metavar="M", default=None,
                   help="also predict successes in M future trials per group (predictions.csv),"
                        " as 'workbench predict' does")
    r.add_argument("--out", type=Path, default=None,
                   help="folder for one run folder per model and the comparison (default"
                        " compare-<data file name>; replaced whole if it is an earlier one)"
                   if several else
                   "run folder to write (replaced whole if it is an earlier run folder)")


def _fit_kwargs(args: argparse.Namespace) -> dict:
    return {
        "model": args.model,
        "engine": args.engine,
        "level": args.level,
        "target": args.target,
        "top": args.top,
        "better": args.better,
        "fdr": args.fdr,
        "seed": args.seed,
        "draws": args.draws,
        "chains": args.chains,
        "tune": args.tune,
        "target_accept": args.target_accept,
        "beta_prior": tuple(args.beta_prior),
        "mu_prior": tuple(args.mu_prior),
        "kappa_prior": tuple(args.kappa_prior),
        "sigma_prior": args.sigma_prior,
        "tau_prior": args.tau_prior,
        "verify": args.verify,
        "retry": args.retry,
    }


def _fit_and_write(source, args, out: Path, **columns) -> int:
    if getattr(args, "predict_trials", None) is not None:
        predict.check_whole(args.predict_trials, "--predict-trials")  # fail before fitting
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # the verdict is printed instead
        run = api.fit(source, **columns, **_fit_kwargs(args))
    api.write_run(run, out)
    print(api.format_fit(run))
    if "checks" in run.documents:
        print(format_checks(run.documents["checks"]))
    if getattr(args, "predict_trials", None):
        pred = predict.predict_folder(out, trials=args.predict_trials, level=args.level)
        print(predict.format_prediction(pred))
    if getattr(args, "report", False):
        print(format_report(api.write_report(out)))
    print(api.format_written(run, out))
    return EXIT_OK if run.ready else EXIT_NOT_READY


def _column_kwargs(args: argparse.Namespace) -> dict:
    if args.outcome is not None and (args.successes or args.trials):
        raise WorkbenchError(
            "give either --outcome (one row per trial) or --successes/--trials (counts), not both."
        )
    columns = {"group": args.group}
    if getattr(args, "covariates", ()):
        columns["covariates"] = tuple(args.covariates)
    if getattr(args, "parent", None):
        columns["parent"] = args.parent
    if args.outcome is not None:
        columns["outcome"] = args.outcome
    else:
        columns["successes"] = args.successes or "successes"
        columns["trials"] = args.trials or "trials"
    return columns


def cmd_fit(args: argparse.Namespace) -> int:
    columns = _column_kwargs(args)
    out = args.out or Path(f"run-{Path(args.data).stem}")
    return _fit_and_write(args.data, args, out, **columns)


def cmd_demo(args: argparse.Namespace) -> int:
    out = args.out or Path("demo-run")
    path = api.demo_data_path()
    print(f"demo: invented sign-up data of 64 studio branches ({path.name})")
    return _fit_and_write(path, args, out, group="branch", successes="signups", trials="visitors")


# -- rank and predict (issue 5) ------------------------------------------------------------
# Numbers are taken as text and checked by the API, so a bad value is one "error:" line.


def _add_ranking_options(p: argparse.ArgumentParser, *, sticky: bool = False) -> None:
    keep = " (default: as recorded in the run, else {})" if sticky else " (default: {})"
    g = p.add_argument_group("ranking")
    g.add_argument("--top", metavar="K", default=None if sticky else ranking.DEFAULT_TOP,
                   help="P(in best K) and P(in worst K) per group, K capped at the number of"
                        " groups" + keep.format(ranking.DEFAULT_TOP))
    g.add_argument("--better", metavar="higher|lower", default=None if sticky else "higher",
                   help="which direction of the rate is better; rank 1 is the best"
                        + keep.format("higher"))
    g.add_argument("--fdr", metavar="Q", default=None if sticky else ranking.DEFAULT_FDR,
                   help="target flags: largest set whose expected share of false flags is at"
                        " most Q" + keep.format(ranking.DEFAULT_FDR))


def cmd_rank(args: argparse.Namespace) -> int:
    result = ranking.rank_folder(
        args.folder, top=args.top, better=args.better, fdr=args.fdr, level=args.level,
        target=args.target, compare=args.compare_groups, settle_chance=args.settle_chance,
        max_trials=args.max_trials,
    )
    print(ranking.format_result(result))
    print(f"wrote ranking files into {args.folder}/"
          + ("" if result.final else " (NOT FINAL: the run's diagnostics failed)"))
    return EXIT_OK if result.final else EXIT_NOT_READY


def cmd_predict(args: argparse.Namespace) -> int:
    pred = predict.predict_folder(args.folder, trials=args.future_trials, level=args.level,
                                  seed=args.seed)
    print(predict.format_prediction(pred))
    print(f"wrote {args.folder}/{predict.PREDICTIONS_FILE}"
          + ("" if pred.final else " (NOT FINAL: the run's diagnostics failed)"))
    return EXIT_OK if pred.final else EXIT_NOT_READY


def _add_rank_parser(sub) -> None:
    r = sub.add_parser(
        "rank", help="recompute ranks, target flags, pairwise, funnel data of a run folder",
        description="Recompute the ranking step of a run folder: ranks.csv, pairwise.csv,"
                    " funnel.csv, funnel_curve.csv, and with a target targets.json and"
                    " trials_needed.csv; updates the rank and target columns of estimates.csv."
                    " Rank intervals overlap; a rank is no verdict on a group or its people.",
    )
    r.add_argument("folder", type=Path, help="a run folder written by 'workbench fit'")
    _add_ranking_options(r, sticky=True)
    r.add_argument("--target", metavar="P", default=None,
                   help="target rate: P(above/below), flags, trials still needed (default: as"
                        " recorded in the run)")
    r.add_argument("--level", metavar="L", default=None,
                   help="mass of the central rank intervals (default: the run's level)")
    r.add_argument("--compare-groups", metavar="A,B,C", default=None,
                   help="groups for pairwise.csv (default: the best 10 by posterior mean)")
    r.add_argument("--settle-chance", metavar="C", default=None,
                   help="trials needed: chance that the comparison with the target is settled"
                        f" (default {ranking.DEFAULT_SETTLE_CHANCE})")
    r.add_argument("--max-trials", metavar="N", default=None,
                   help=f"trials needed: search up to N more trials (default"
                        f" {ranking.DEFAULT_MAX_TRIALS})")
    r.set_defaults(func=cmd_rank)


def _add_predict_parser(sub) -> None:
    p = sub.add_parser(
        "predict", help="successes in M future trials per group and for a new group",
        description="Posterior predictive successes in M future trials for every group of a"
                    " run folder and for a new, unseen group; writes predictions.csv.",
    )
    p.add_argument("folder", type=Path, help="a run folder written by 'workbench fit'")
    p.add_argument("--trials", dest="future_trials", metavar="M", required=True,
                   help="number of future trials per group")
    p.add_argument("--level", metavar="L", default=None,
                   help="mass of the central intervals (default: the run's level)")
    p.add_argument("--seed", metavar="S", default=None,
                   help="random seed of the simulation (default: one past the run's seed)")
    p.set_defaults(func=cmd_predict)


def _add_column_options(p: argparse.ArgumentParser) -> None:
    c = p.add_argument_group("columns")
    c.add_argument("--group", default="group", help="column naming the group (default: group)")
    c.add_argument("--successes", default=None,
                   help="column of success counts (default: successes)")
    c.add_argument("--trials", default=None, help="column of trial counts (default: trials)")
    c.add_argument("--outcome", default=None,
                   help="instead of counts: column of one outcome per row (1/0, true/false,"
                        " yes/no); rows are counted per group")
    c.add_argument("--covariates", nargs="+", default=(), metavar="COL",
                   help="numeric group-level columns (one value per group) for --model"
                        " logit-normal or nested, e.g. a case-mix score; standardised before"
                        " fitting")
    c.add_argument("--parent", default=None, metavar="COL",
                   help="column naming each group's parent (a region for stores; one per"
                        " group) for --model nested")


# -- check and compare (issue 4) -------------------------------------------------------------

#: Models fitted by ``workbench compare --data`` when --models is not given.
COMPARE_MODELS = ("beta-binomial", "complete-pooling", "no-pooling")


def _model_list(text: str) -> list[str]:
    models = [m.strip() for m in text.split(",") if m.strip()]
    unknown = [m for m in models if m not in MODELS]
    if unknown:
        raise argparse.ArgumentTypeError(f"{', '.join(unknown)} not among {', '.join(MODELS)}")
    if len(models) < 2 or len(set(models)) != len(models):
        raise argparse.ArgumentTypeError(f"{text!r}: give at least two different models")
    return models


def _add_check_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("checks")
    g.add_argument("--replicates", type=_positive_int, default=1000,
                   help="posterior draws used for replicated data sets, thinned evenly"
                        " (default 1000)")
    g.add_argument("--p-bounds", nargs=2, type=_rate, metavar=("LOW", "HIGH"),
                   default=(0.01, 0.99),
                   help="a posterior predictive p-value below LOW or above HIGH reads misfit"
                        " (default 0.01 0.99)")
    g.add_argument("--refit-limit", type=_count, default=50,
                   help="most groups with high Pareto k given their exact leave-one-group-out"
                        " value instead of PSIS, worst first (default 50)")


def _check_settings(args: argparse.Namespace) -> CheckSettings:
    low, high = args.p_bounds
    return CheckSettings(draws=args.replicates, lower=low, upper=high,
                         refit_limit=args.refit_limit).validate()


def cmd_check(args: argparse.Namespace) -> int:
    folder, checks = api.check_folder(args.run, _check_settings(args))
    print(format_checks(checks))
    print(f"wrote {folder.path}/: checks.json, ppc_statistics.csv, group_checks.csv")
    if not folder.final:
        print("note: this run's convergence verdict is not-ready; the checks are provisional.")
    return EXIT_OK


def cmd_compare(args: argparse.Namespace) -> int:
    settings = _check_settings(args)
    if args.data is None:
        if len(args.runs) < 2:
            raise WorkbenchError(
                f"compare needs two or more run folders (got {len(args.runs)}), or --data FILE"
                " to fit several models at once."
            )
        if args.models is not None:
            raise WorkbenchError("--models goes with --data; run folders are already fitted.")
        out = args.out or Path("comparison")
        comparison = api.compare_folders(args.runs, out, settings)
        print(format_comparison(comparison))
        print(f"wrote {out}/: comparison.csv, comparison_pointwise.csv, comparison.json")
        return EXIT_OK
    if args.runs:
        raise WorkbenchError(
            "give either run folders or --data FILE, not both: --data fits the models afresh."
        )
    options = _fit_kwargs(argparse.Namespace(**vars(args), model=None))
    options.pop("model")
    out = args.out or Path(f"compare-{Path(args.data).stem}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # each verdict is printed instead
        runs, comparison = api.fit_and_compare(
            args.data, models=args.models or list(COMPARE_MODELS), out=out, settings=settings,
            **_column_kwargs(args), **options,
        )
    for name, run in runs.items():
        checks = run.documents.get("checks", {})
        misfit = ", ".join(checks.get("misfit_statistics", [])) or "none"
        print(f"{name}: convergence {run.diagnostics.verdict}, checks"
              f" {checks.get('verdict', '-')} (misfit: {misfit}), {run.seconds:.1f} s")
    print(format_comparison(comparison))
    print(f"wrote {out}/: {', '.join(runs)} run folders, comparison.csv,"
          " comparison_pointwise.csv, comparison.json")
    return EXIT_OK if all(r.ready for r in runs.values()) else EXIT_NOT_READY


def _add_check_parser(sub) -> None:
    p = sub.add_parser("check", help="posterior predictive checks and held-out-group predictions"
                                     " of a run folder",
                       description="Replicate the data from the posterior of a run folder, test"
                                   " five statistics with posterior predictive p-values, and"
                                   " predict each group left out (PSIS-LOO, Pareto k, LOO-PIT);"
                                   " writes checks.json, ppc_statistics.csv and group_checks.csv"
                                   " into the folder.")
    p.add_argument("run", type=Path, help="a run folder written by 'workbench fit'")
    _add_check_options(p)
    p.set_defaults(func=cmd_check)


def _add_compare_parser(sub) -> None:
    p = sub.add_parser("compare", help="compare models by how well they predict held-out groups",
                       description="Compare run folders fitted to the same data (workbench"
                                   " compare RUN RUN ...), or fit several models to one file and"
                                   " compare them (workbench compare --data FILE --models"
                                   " A,B,...). Writes comparison.csv, comparison_pointwise.csv and"
                                   " comparison.json.")
    p.add_argument("runs", nargs="*", type=Path, metavar="RUN",
                   help="run folders to compare (or none, with --data)")
    p.add_argument("--data", default=None,
                   help="CSV, TSV or Parquet file to fit every model of --models to")
    _add_column_options(p)
    _add_model_options(p, model_default=api.DEFAULT_MODEL, several=True)
    _add_ranking_options(p)
    _add_check_options(p)
    p.set_defaults(func=cmd_compare)


# -- report (issue 6) -------------------------------------------------------------------------


def cmd_report(args: argparse.Namespace) -> int:
    result = api.write_report(args.folder)
    print(format_report(result))
    if not result.final:
        print("note: this run's convergence verdict is not-ready; the report says it is not final.")
        return EXIT_NOT_READY
    return EXIT_OK


def _add_report_parser(sub) -> None:
    p = sub.add_parser("report", help="write report.html (and figures/*.png) into a run folder",
                       description="Write one self-contained HTML report of a run folder"
                                   " (figures embedded; it loads nothing from the network) and the"
                                   " figures as PNG files under figures/. Exits 3 when the run's"
                                   " convergence verdict is not-ready.")
    p.add_argument("folder", type=Path, help="a run folder written by 'workbench fit'")
    p.set_defaults(func=cmd_report)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="workbench",
        description="Estimate and rank a success rate across many groups with partial pooling;"
                    " check convergence and fit before anything is reported.",
        epilog="Exit codes: 0 success; 2 bad input or usage; 3 written but not final"
               " (convergence verdict not-ready).",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("fit", help="fit a model to a table of groups and write a run folder",
                       description="Fit a model to group counts (CSV, TSV or Parquet) and write a"
                                   " run folder: estimates.csv, population.csv, diagnostics.json,"
                                   " posterior.nc, run.json.")
    p.add_argument("data", help="CSV, TSV or Parquet file: one row per group (or per trial)")
    _add_column_options(p)
    _add_model_options(p, model_default=api.DEFAULT_MODEL)
    _add_ranking_options(p)
    p.add_argument("--report", action="store_true",
                   help="also write report.html (and figures/*.png) into the run folder")
    p.set_defaults(func=cmd_fit)

    d = sub.add_parser("demo", help="fit the bundled invented demo data and write a run folder",
                       description="Fit the bundled, invented studio-branch sign-up data and write"
                                   " a run folder (default ./demo-run) with its report, against"
                                   " an invented sign-up target of 0.20 (--target changes it)"
                                   " and predictions for 100 future visitors per branch.")
    _add_model_options(d, model_default=api.DEFAULT_MODEL)
    _add_ranking_options(d)
    # the demo always writes its report, against an invented sign-up target of 20%
    d.set_defaults(func=cmd_demo, report=True, target=0.2, predict_trials="100")
    _add_rank_parser(sub)
    _add_predict_parser(sub)
    _add_check_parser(sub)
    _add_compare_parser(sub)
    _add_report_parser(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: --help (0) or a usage error (2)
        return int(exc.code or 0)
    try:
        return args.func(args)
    except WorkbenchError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("error: interrupted; no partial files were left.", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
