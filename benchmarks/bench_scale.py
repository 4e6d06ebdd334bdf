"""Benchmark at scale: ``workbench fit`` end to end against hand-written PyMC models.

On simulated, invented counts (G groups; trials log-uniform on 2..2,000, rounded to integers;
true rates from a Beta distribution with mean 0.15 and concentration 40; fixed seed), written
as a CSV with columns ``group,successes,trials``, this script times, each in a fresh child
process with a wall-time limit:

- ``workbench``: ``workbench fit DATA.csv --group group --successes successes --trials trials
  --target 0.15 --report --out DIR --seed 1``, end to end (start-up, reading, fitting, checks,
  every output file and the report);
- ``pymc``: a plain full-joint PyMC model a user would write (mu ~ Beta(1, 1),
  kappa ~ LogNormal(log 20, 3), theta_j ~ Beta(mu kappa, (1 - mu) kappa), y_j ~ Binomial)
  sampled with ``pm.sample(chains=4, draws=1000, tune=1000)`` and otherwise default settings,
  followed by ``az.summary`` of theta. PyMC 5.28's default ``cores`` is half of the CPU count
  (``pymc.sampling.parallel._cpu_count`` assumes hyper-threads), so on 2 cores the four
  chains run one after another in one process ("Sequential sampling" in the log);
- ``nutpie``: the same model and call with ``nuts_sampler="nutpie"``.

A child over the limit (default 20 minutes) is killed and reported as "did not finish"; larger
sizes of that side are then skipped. Peak memory is measured from outside (see ``_proc.py``).
It then prints how far workbench's posterior means (``estimates.csv``, ``posterior_mean``) lie
from each sampled model's theta means, in units of that sampled model's MCSE of the mean
(share within 4 MCSE and the largest |z|), and a markdown table for the README.

Figures are wall-clock on whatever machine runs this; with other jobs on the same cores they
are noisy. ``--repeat N`` runs each case N times and the table quotes medians. Nothing here
asserts a timing. Every measurement is appended to a JSON-lines record, so separate runs (for
example the slow baselines in the background) can be merged with ``--table-only``.

Usage::

    python benchmarks/bench_scale.py [--groups 1000 10000 100000 1000000]
        [--sides workbench pymc nutpie] [--limit 1200] [--repeat 1] [--workdir DIR]
    python benchmarks/bench_scale.py --table-only [--workdir DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import psutil

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _proc import run_measured  # noqa: E402

SIDES = ("workbench", "pymc", "nutpie")
MEAN, CONCENTRATION = 0.15, 40.0
SEED = 20240611


# --- data -------------------------------------------------------------------------------------


def simulate(groups: int, seed: int = SEED) -> pd.DataFrame:
    """Invented counts: log-uniform trials on 2..2,000, Beta(mean 0.15, concentration 40) rates."""
    rng = np.random.default_rng([seed, groups])
    trials = np.round(np.exp(rng.uniform(np.log(2), np.log(2000), size=groups))).astype(np.int64)
    rates = rng.beta(MEAN * CONCENTRATION, (1 - MEAN) * CONCENTRATION, size=groups)
    width = len(str(groups))
    return pd.DataFrame(
        {
            "group": [f"unit-{i:0{width}d}" for i in range(groups)],
            "successes": rng.binomial(trials, rates),
            "trials": trials,
        }
    )


def data_file(workdir: Path, groups: int) -> Path:
    path = workdir / f"counts-{groups}.csv"
    if not path.exists():
        tmp = path.with_suffix(".tmp")
        simulate(groups).to_csv(tmp, index=False)
        tmp.rename(path)
    return path


# --- child: the hand-written models -----------------------------------------------------------


def child_baseline(kind: str, data: str, out: str) -> None:
    """Fit the plain model as a user would, then ``az.summary`` of theta; save means and MCSE."""
    t0 = time.perf_counter()
    import arviz as az
    import pymc as pm

    frame = pd.read_csv(data)
    y = frame["successes"].to_numpy()
    n = frame["trials"].to_numpy()
    t_import = time.perf_counter()
    with pm.Model():
        mu = pm.Beta("mu", 1, 1)
        kappa = pm.LogNormal("kappa", np.log(20), 3)
        theta = pm.Beta("theta", mu * kappa, (1 - mu) * kappa, shape=len(y))
        pm.Binomial("y", n=n, p=theta, observed=y)
        options = {"chains": 4, "draws": 1000, "tune": 1000, "random_seed": 1}
        options["progressbar"] = False  # only keeps the log readable; no effect on sampling
        if kind == "nutpie":
            options["nuts_sampler"] = "nutpie"
        idata = pm.sample(**options)
    t_sample = time.perf_counter()
    # round_to="none": same cost as the default call, but MCSE is not rounded to 2 decimals.
    table = az.summary(idata, var_names=["theta"], round_to="none")
    t_summary = time.perf_counter()
    hyper = az.summary(idata, var_names=["mu", "kappa"], round_to="none")
    stats = idata.sample_stats
    depth_names = ("reached_max_treedepth", "maxdepth_reached")  # PyMC's and nutpie's names
    depth_name = next((k for k in depth_names if k in stats), None)
    np.savez(
        out,
        mean=table["mean"].to_numpy(),
        mcse=table["mcse_mean"].to_numpy(),
        r_hat=table["r_hat"].to_numpy(),
        ess_bulk=table["ess_bulk"].to_numpy(),
    )
    result = {
        "phases": {
            "import_read_s": t_import - t0,
            "build_and_sample_s": t_sample - t_import,
            "summary_s": t_summary - t_sample,
        },
        "draws_shape": list(idata.posterior["theta"].shape[:2]),
        "divergences": int(stats["diverging"].sum()),
        "max_depth_share": float(stats[depth_name].mean()) if depth_name else None,
        "theta_max_r_hat": float(np.nanmax(table["r_hat"])),
        "theta_min_ess_bulk": float(np.nanmin(table["ess_bulk"])),
        "hyper": {
            name: {"mean": float(row["mean"]), "r_hat": float(row["r_hat"])}
            for name, row in hyper.iterrows()
        },
    }
    print("RESULT " + json.dumps(result), flush=True)


# --- parent: measuring ------------------------------------------------------------------------


def workbench_command() -> str:
    local = Path(sys.executable).with_name("workbench")
    return str(local) if local.exists() else (shutil.which("workbench") or "workbench")


def code_version() -> str:
    """HEAD of the checkout, plus "+changes" if workbench/ or models/ differ from it."""
    repo = Path(__file__).resolve().parent.parent
    git = ["git", "-C", str(repo)]
    try:
        head = subprocess.run([*git, "rev-parse", "--short", "HEAD"], capture_output=True)
        dirty = subprocess.run(
            [*git, "status", "--porcelain", "--", "workbench", "models"], capture_output=True
        )
    except OSError:
        return "unknown"
    return head.stdout.decode().strip() + ("+changes" if dirty.stdout.strip() else "")


def measure(side: str, groups: int, rep: int, args: argparse.Namespace) -> dict:
    workdir = Path(args.workdir)
    data = data_file(workdir, groups)
    stamp = time.strftime("%Y%m%d-%H%M%S")  # one folder per run: earlier runs stay comparable
    tag = f"{side}-{groups}-r{rep}-{stamp}"
    record: dict = {"side": side, "groups": groups, "repeat": rep, "time": time.time()}
    record["code"] = code_version()  # the workbench side changes as the project moves on
    record["load_before"] = os.getloadavg()[0]  # other jobs on the same cores
    if side == "workbench":
        out_dir = workdir / f"run-{groups}-r{rep}-{stamp}"
        cmd = [workbench_command(), "fit", str(data), "--group", "group", "--successes"]
        cmd += ["successes", "--trials", "trials", "--target", "0.15", "--report"]
        cmd += ["--out", str(out_dir), "--seed", "1"]
        record["artefact"] = str(out_dir / "estimates.csv")
    else:
        artefact = workdir / f"{tag}.npz"
        cmd = [sys.executable, __file__, "--child", side, str(data), str(artefact)]
        record["artefact"] = str(artefact)
    record["command"] = cmd
    got = run_measured(
        cmd, limit=args.limit, memory_limit_mb=args.memory_limit, log_path=str(workdir / tag)
    )
    record.update(got.as_record())
    for line in got.stdout.splitlines():
        if line.startswith("RESULT "):
            record["child"] = json.loads(line[7:])
    if side == "workbench" and got.finished:
        run_json = Path(record["artefact"]).with_name("run.json")
        if run_json.exists():
            run = json.loads(run_json.read_text())
            keys = ("engine", "verdict", "final", "fit_seconds")
            record["workbench"] = {k: run.get(k) for k in keys}
    return record


def killed_text(record: dict) -> str:
    if record.get("killed_for") == "memory":
        return f"stopped at the {record['memory_limit_mb']:,.0f} MB memory guard"
    limit = record["limit_s"]
    return (
        f"did not finish in {limit / 60:.0f} min"
        if limit >= 120
        else f"did not finish in {limit:.0f} s"
    )


def describe(record: dict) -> str:
    code = f" at {record['code']}" if record.get("code") else ""
    if record.get("load_before") is not None:
        code += f", load {record['load_before']:.1f}"
    head = f"[{record['side']} G={record['groups']:,} rep {record['repeat']}{code}]"
    if record.get("skipped"):
        return f"{head} not run: {record['skipped']}"
    if not record["finished"]:
        return f"{head} {killed_text(record)} (killed)"
    text = (
        f"{head} exit {record['returncode']}, wall {record['wall_s']:.1f} s, peak memory"
        f" {record['tree_peak_mb']:.0f} MB (process tree, sampled), largest process"
        f" {record['maxrss_mb']:.0f} MB"
    )
    if record.get("workbench"):
        wb = record["workbench"]
        text += f"\n    engine {wb['engine']}, verdict {wb['verdict']}, final {wb['final']}"
        if wb.get("fit_seconds") is not None:
            text += f", fit_seconds in run.json {wb['fit_seconds']:.1f} s"
    child = record.get("child")
    if child:
        ph = child["phases"]
        text += (
            f"\n    import+read {ph['import_read_s']:.1f} s, build+sample"
            f" {ph['build_and_sample_s']:.1f} s, az.summary(theta) {ph['summary_s']:.1f} s;"
            f" draws (chain, draw) {child['draws_shape']}; divergences {child['divergences']};"
            f" share at max tree depth {child['max_depth_share']};"
            f" theta max R-hat {child['theta_max_r_hat']:.3f}, min bulk ESS"
            f" {child['theta_min_ess_bulk']:.0f};"
            + "".join(
                f" {k} mean {v['mean']:.4g} (R-hat {v['r_hat']:.3f})"
                for k, v in child["hyper"].items()
            )
        )
    if record["returncode"] not in (0, None):
        text += f"\n    stderr tail: {record['stderr'][-600:].strip()}"
    return text


# --- agreement and table ----------------------------------------------------------------------


def agreement(workbench_csv: str, baseline_npz: str, data: Path) -> dict | None:
    if not (Path(workbench_csv).exists() and Path(baseline_npz).exists()):
        return None
    order = pd.read_csv(data, usecols=["group"], dtype={"group": str})["group"]
    est = pd.read_csv(workbench_csv, usecols=["group", "posterior_mean"], dtype={"group": str})
    ours = est.set_index("group")["posterior_mean"].reindex(order).to_numpy()
    base = np.load(baseline_npz)
    z = (ours - base["mean"]) / base["mcse"]
    return {
        "within4": float(np.mean(np.abs(z) <= 4)),
        "max_abs_z": float(np.nanmax(np.abs(z))),
        "max_abs_diff": float(np.nanmax(np.abs(ours - base["mean"]))),
        "median_mcse": float(np.median(base["mcse"])),
        "missing": int(np.isnan(ours).sum()),
    }


def load_records(path: Path) -> list[dict]:
    if not path.exists():
        return []
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def summarise(records: list[dict], side: str, groups: int) -> dict | None:
    mine = [r for r in records if r["side"] == side and r["groups"] == groups]
    if not mine:
        return None
    done = [r for r in mine if not r.get("skipped") and r["finished"] and r["returncode"] in (0, 3)]
    if not done:
        if all(r.get("skipped") for r in mine):
            status = "skipped"
        elif any(not r.get("skipped") and not r["finished"] for r in mine):
            status = "dnf"
        else:
            status = "failed"
        return {"status": status, "runs": mine}
    return {
        "status": "ok",
        "wall": statistics.median(r["wall_s"] for r in done),
        "peak": statistics.median(r["tree_peak_mb"] for r in done),
        "n": len(done),
        "not_ready": any(r["returncode"] == 3 for r in done),
        "artefact": done[0]["artefact"],
        "runs": mine,
    }


def cell(s: dict | None) -> str:
    if s is None:
        return "not run"
    if s["status"] == "skipped":
        return "not run (a smaller size did not finish or failed)"
    if s["status"] == "failed":
        codes = sorted({str(r["returncode"]) for r in s["runs"] if not r.get("skipped")})
        return f"failed (exit {', '.join(codes)})"
    if s["status"] == "dnf":
        return next(killed_text(r) for r in s["runs"] if not r.get("skipped"))
    median = f" (median of {s['n']})" if s["n"] > 1 else ""
    ready = " (exit 3: not-ready)" if s["not_ready"] else ""
    return f"{s['wall']:.1f} s{median}{ready}"


def table(records: list[dict], workdir: Path) -> str:
    sizes = sorted({r["groups"] for r in records})
    lines = [
        "| groups | workbench fit end to end: wall | peak memory | plain PyMC: wall"
        " | nutpie: wall | ratio (PyMC / workbench, nutpie / workbench)"
        " | agreement (share within 4 MCSE, max abs z) |",
        "|---|---|---|---|---|---|---|",
    ]
    for g in sizes:
        wb = summarise(records, "workbench", g)
        base = {side: summarise(records, side, g) for side in ("pymc", "nutpie")}
        ratios, agree = [], []
        for side, s in base.items():
            label = "PyMC" if side == "pymc" else "nutpie"
            if wb and wb["status"] == "ok" and s and s["status"] == "ok":
                ratios.append(f"{label} {s['wall'] / wb['wall']:.1f}x")
                a = agreement(wb["artefact"], s["artefact"], workdir / f"counts-{g}.csv")
                if a:
                    agree.append(f"{label}: {100 * a['within4']:.2f}%, {a['max_abs_z']:.1f}")
            elif (
                wb
                and wb["status"] == "ok"
                and s
                and s["status"] == "dnf"
                and s["runs"][0].get("killed_for", "time") == "time"
            ):
                limit = max(r.get("limit_s", 0) for r in s["runs"])
                ratios.append(f"{label} > {limit / wb['wall']:.0f}x")
        peak = f"{wb['peak']:.0f} MB" if wb and wb["status"] == "ok" else "-"
        lines.append(
            f"| {g:,} | {cell(wb)} | {peak} | {cell(base['pymc'])} | {cell(base['nutpie'])}"
            f" | {'; '.join(ratios) or '-'} | {'; '.join(agree) or '-'} |"
        )
    return "\n".join(lines)


def agreement_lines(records: list[dict], workdir: Path) -> list[str]:
    out = []
    for g in sorted({r["groups"] for r in records}):
        wb = summarise(records, "workbench", g)
        if not wb or wb["status"] != "ok":
            continue
        for side in ("pymc", "nutpie"):
            s = summarise(records, side, g)
            if not s or s["status"] != "ok":
                continue
            a = agreement(wb["artefact"], s["artefact"], workdir / f"counts-{g}.csv")
            if a:
                out.append(
                    f"G={g:,} workbench vs {side}: {100 * a['within4']:.2f}% of groups within"
                    f" 4 MCSE, max |z| {a['max_abs_z']:.2f}, max |diff| {a['max_abs_diff']:.2g}"
                    f" (median MCSE {a['median_mcse']:.2g}), groups missing {a['missing']}"
                )
    return out


def machine_line() -> str:
    load = os.getloadavg()
    return (
        f"machine: {os.cpu_count()} cores (shared with other jobs; load average"
        f" {load[0]:.1f} / {load[1]:.1f} / {load[2]:.1f}); wall-clock figures are noisy"
    )


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--groups", type=int, nargs="+", default=[1000, 10000, 100000, 1000000])
    p.add_argument("--sides", nargs="+", choices=SIDES, default=list(SIDES))
    p.add_argument("--limit", type=float, default=1200.0, help="per-run wall limit, seconds")
    p.add_argument(
        "--memory-limit",
        type=float,
        default=0.7 * psutil.virtual_memory().total / 2**20,
        help="stop a run whose process tree exceeds this many MB (default 70%% of RAM)",
    )
    p.add_argument("--repeat", type=int, default=1, help="runs per case; the table quotes medians")
    p.add_argument("--workdir", default="/tmp/workbench-bench-scale")
    p.add_argument("--record", help="JSON-lines record (default: WORKDIR/records.jsonl)")
    p.add_argument("--table-only", action="store_true", help="print the table from the record")
    p.add_argument("--child", nargs=3, metavar=("KIND", "DATA", "OUT"), help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.child:
        child_baseline(*args.child)
        return
    workdir = Path(args.workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    record_path = Path(args.record) if args.record else workdir / "records.jsonl"
    print(machine_line(), flush=True)
    if not args.table_only:
        given_up: dict[str, int] = {}
        for g in sorted(args.groups):
            print(f"data: {data_file(workdir, g)} ({g:,} groups, seed {SEED})", flush=True)
            for side in args.sides:
                for rep in range(args.repeat):
                    if side in given_up:
                        rec = {"side": side, "groups": g, "repeat": rep, "finished": False}
                        rec["skipped"] = f"{given_up[side]:,} groups did not finish or failed"
                    else:
                        rec = measure(side, g, rep, args)
                        rec["limit_s"] = args.limit
                        rec["memory_limit_mb"] = args.memory_limit
                        if not rec["finished"] or rec["returncode"] not in (0, 3):
                            given_up[side] = g  # a larger size would not finish either
                    with record_path.open("a") as fh:
                        fh.write(json.dumps(rec) + "\n")
                    print(describe(rec), flush=True)
                    if side in given_up:
                        break
    records = load_records(record_path)
    if args.table_only:
        for rec in records:
            print(describe(rec))
    print()
    for line in agreement_lines(records, workdir):
        print(line)
    print()
    print(table(records, workdir))
    print(f"\n{machine_line()}\nrecord: {record_path}")


if __name__ == "__main__":
    main()
