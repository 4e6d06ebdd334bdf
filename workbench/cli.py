"""Command line: argparse over the public API. Prints, writes, exits.

Exit codes: 0 success; 2 bad input or usage (one ``error:`` line on stderr); 3 the run was
written but its convergence verdict is ``not-ready`` (nothing in it is final).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

from models import MODELS, ConvergenceWarning, WorkbenchError

from . import api

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


def _add_model_options(p: argparse.ArgumentParser, *, model_default: str) -> None:
    g = p.add_argument_group("model")
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
    s = p.add_argument_group("sampling")
    s.add_argument("--draws", type=_positive_int, default=1000,
                   help="draws per chain kept (default 1000)")
    s.add_argument("--tune", type=_count, default=1000,
                   help="mcmc: warm-up steps per chain, discarded (default 1000)")
    s.add_argument("--chains", type=_positive_int, default=4, help="number of chains (default 4)")
    s.add_argument("--target-accept", type=float, default=0.9,
                   help="mcmc: NUTS target acceptance in [0.5, 1) (default 0.9)")
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
    r.add_argument("--out", type=Path, default=None,
                   help="run folder to write (replaced whole if it is an earlier run folder)")


def _fit_kwargs(args: argparse.Namespace) -> dict:
    return {
        "model": args.model,
        "engine": args.engine,
        "level": args.level,
        "target": args.target,
        "seed": args.seed,
        "draws": args.draws,
        "chains": args.chains,
        "tune": args.tune,
        "target_accept": args.target_accept,
        "beta_prior": tuple(args.beta_prior),
        "mu_prior": tuple(args.mu_prior),
        "kappa_prior": tuple(args.kappa_prior),
        "verify": args.verify,
        "retry": args.retry,
    }


def _fit_and_write(source, args, out: Path, **columns) -> int:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # the verdict is printed instead
        run = api.fit(source, **columns, **_fit_kwargs(args))
    api.write_run(run, out)
    print(api.format_fit(run, out))
    return EXIT_OK if run.ready else EXIT_NOT_READY


def cmd_fit(args: argparse.Namespace) -> int:
    if args.outcome is not None and (args.successes or args.trials):
        raise WorkbenchError(
            "give either --outcome (one row per trial) or --successes/--trials (counts), not both."
        )
    columns = {"group": args.group}
    if args.outcome is not None:
        columns["outcome"] = args.outcome
    else:
        columns["successes"] = args.successes or "successes"
        columns["trials"] = args.trials or "trials"
    out = args.out or Path(f"run-{Path(args.data).stem}")
    return _fit_and_write(args.data, args, out, **columns)


def cmd_demo(args: argparse.Namespace) -> int:
    out = args.out or Path("demo-run")
    path = api.demo_data_path()
    print(f"demo: invented sign-up data of 64 studio branches ({path.name})")
    return _fit_and_write(path, args, out, group="branch", successes="signups", trials="visitors")


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
    c = p.add_argument_group("columns")
    c.add_argument("--group", default="group", help="column naming the group (default: group)")
    c.add_argument("--successes", default=None,
                   help="column of success counts (default: successes)")
    c.add_argument("--trials", default=None, help="column of trial counts (default: trials)")
    c.add_argument("--outcome", default=None,
                   help="instead of counts: column of one outcome per row (1/0, true/false,"
                        " yes/no); rows are counted per group")
    _add_model_options(p, model_default=api.DEFAULT_MODEL)
    p.set_defaults(func=cmd_fit)

    d = sub.add_parser("demo", help="fit the bundled invented demo data and write a run folder",
                       description="Fit the bundled, invented studio-branch sign-up data and write"
                                   " a run folder (default ./demo-run).")
    _add_model_options(d, model_default=api.DEFAULT_MODEL)
    d.set_defaults(func=cmd_demo)
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
