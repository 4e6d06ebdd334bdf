"""Benchmark: the exact beta-binomial engine against a plain hand-written PyMC model.

Prints one table: wall time, peak memory (resident set of a fresh process per case) and the
agreement of posterior means, for 1,000 / 10,000 / 100,000 simulated groups (invented data,
known truth). The baseline is the textbook full-joint model with default ``pm.sample()``
settings; it runs in its own process with a time limit (default 20 minutes) and the table says
where it did not finish. Usage::

    python benchmarks/bench_engines.py [--groups 1000 10000 100000] [--limit 1200]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np


def simulate(groups: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    theta = rng.beta(0.15 * 40, 0.85 * 40, size=groups)
    trials = np.round(np.exp(rng.uniform(np.log(2), np.log(2000), size=groups))).astype(int)
    return rng.binomial(trials, theta), trials


def run_exact(groups: int) -> dict:
    from workbench.models import BetaBinomial, GroupCounts

    y, n = simulate(groups)
    counts = GroupCounts([f"g{i}" for i in range(groups)], y, n)
    start = time.perf_counter()
    model = BetaBinomial(engine="exact", random_seed=1).fit(counts)
    table = model.summary()
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "means": table["posterior_mean"].to_numpy().tolist()}


def run_baseline(groups: int) -> dict:
    import pymc as pm

    y, n = simulate(groups)
    start = time.perf_counter()
    with pm.Model():
        mu = pm.Beta("mu", 1, 1)
        kappa = pm.LogNormal("kappa", np.log(20), 3)
        theta = pm.Beta("theta", mu * kappa, (1 - mu) * kappa, shape=groups)
        pm.Binomial("y", n=n, p=theta, observed=y)
        trace = pm.sample(progressbar=False, random_seed=1)
    seconds = time.perf_counter() - start
    th = trace.posterior["theta"]
    means = th.mean(("chain", "draw")).values
    sd = th.std(("chain", "draw")).values
    return {
        "seconds": seconds,
        "means": means.tolist(),
        "sd": sd.tolist(),
        "divergences": int(trace.sample_stats["diverging"].sum()),
    }


def child(kind: str, groups: int) -> None:
    import resource

    out = run_exact(groups) if kind == "exact" else run_baseline(groups)
    out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print("RESULT " + json.dumps(out))


def measure(kind: str, groups: int, limit: float) -> dict | None:
    cmd = [sys.executable, __file__, "--child", kind, str(groups)]
    try:
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=limit, check=False)
    except subprocess.TimeoutExpired:
        return None
    for line in done.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"{kind} {groups} failed:\n{done.stderr[-2000:]}")


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--groups", type=int, nargs="+", default=[1000, 10000, 100000])
    p.add_argument("--limit", type=float, default=1200.0, help="baseline time limit, seconds")
    p.add_argument("--child", nargs=2)
    args = p.parse_args()
    if args.child:
        child(args.child[0], int(args.child[1]))
        return
    print(f"machine: {os.cpu_count()} cores; numbers are wall-clock seconds in this run")
    print(
        "| groups | exact engine | exact peak MB | plain PyMC (default pm.sample) |"
        " PyMC peak MB | speed-up | max abs diff of means | max diff / PyMC sd |"
    )
    print("|---|---|---|---|---|---|---|---|")
    skip_baseline = False
    for g in args.groups:
        ex = measure("exact", g, 3600)
        attempted = not skip_baseline
        base = measure("baseline", g, args.limit) if attempted else None
        if base is None:
            note = "did not finish" if attempted else "not run: a smaller size did not finish"
            skip_baseline = True  # a larger problem will not finish either
            print(
                f"| {g:,} | {ex['seconds']:.1f} s | {ex['peak_mb']:.0f} | over"
                f" {args.limit / 60:.0f} min ({note}) | - | > {args.limit / ex['seconds']:.0f}x |"
                " - | - |",
                flush=True,
            )
            continue
        diff = np.abs(np.array(ex["means"]) - np.array(base["means"]))
        rel = diff / np.array(base["sd"])
        print(
            f"| {g:,} | {ex['seconds']:.1f} s | {ex['peak_mb']:.0f} | {base['seconds']:.1f} s"
            f" ({base['divergences']} divergences) | {base['peak_mb']:.0f} |"
            f" {base['seconds'] / ex['seconds']:.0f}x | {diff.max():.2g} | {rel.max():.2f} |",
            flush=True,
        )


if __name__ == "__main__":
    main()
