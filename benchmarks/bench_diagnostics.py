"""Benchmark: the convergence table's per-quantity figures at many groups.

Times, on invented Beta(5, 30) draws of shape (4 chains, 1000 draws, G groups): ArviZ 0.23's
rhat/ess/mcse calls (the six the table used), the vectorised equivalents
(workbench.analysis.fast_diagnostics.summary) and the independent-draw figures an exact engine
now reports (independent_summary). Prints wall and CPU seconds; asserts nothing.

Usage: python benchmarks/bench_diagnostics.py [--groups 10000] [--skip-arviz]
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np

from workbench.analysis import fast_diagnostics as fast


def timed(label, fn):
    wall, cpu = time.perf_counter(), time.process_time()
    fn()
    print(f"{label}: wall {time.perf_counter() - wall:.1f} s, cpu {time.process_time() - cpu:.1f} s",
          flush=True)


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--groups", type=int, default=10_000)
    p.add_argument("--skip-arviz", action="store_true")
    args = p.parse_args()
    x = np.random.default_rng(1).beta(5, 30, size=(4, 1000, args.groups))
    print(f"{args.groups:,} groups x 4 x 1000 draws; load average {os.getloadavg()[0]:.1f}"
          " on 2 shared cores", flush=True)
    timed("independent_summary (exact engine)", lambda: fast.independent_summary(x))
    timed("fast_diagnostics.summary (vectorised, ArviZ-equal)", lambda: fast.summary(x))
    if not args.skip_arviz:
        import arviz as az

        ds = az.convert_to_dataset({"theta": x})

        def arviz_calls():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                az.rhat(ds, method="rank")
                az.ess(ds, method="bulk")
                az.ess(ds, method="tail")
                az.mcse(ds, method="mean")
                az.mcse(ds, method="quantile", prob=0.025)
                az.mcse(ds, method="quantile", prob=0.975)

        timed("ArviZ rhat/ess/mcse (six calls)", arviz_calls)


if __name__ == "__main__":
    main()
