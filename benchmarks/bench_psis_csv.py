"""Benchmark: vectorised PSIS against ArviZ's, and the fast CSV writer against pandas.

Prints figures, asserts only that the answers agree (ArviZ and pandas are the references):

- PSIS log weights and Pareto k (``workbench.analysis.fast_psis.psis_log_weights``) against
  ``arviz.psislw`` on invented log-ratios of 10,000 groups x 4,000 draws and 100,000 x 400;
- ``workbench.io.atomic.write_csv`` (the compiled encoder for 20,000 rows or more) against
  ``DataFrame.to_csv(index=False, float_format="%.10g")`` on an invented 1,000,000-row table
  shaped like estimates.csv (a text column, 2 int, 15 float with NaN, 2 bool).

Wall time and this process's CPU time (the machine may be shared).

Usage::

    python benchmarks/bench_psis_csv.py [--rows 1000000]
"""

from __future__ import annotations

import argparse
import csv
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from workbench.analysis import fast_psis
from workbench.io import atomic, fast_csv

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from helpers import estimates_like  # noqa: E402  (the tests' invented table, one home)


def timed(fn):
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def psis(groups: int, samples: int) -> None:
    import arviz as az

    rng = np.random.default_rng(0)
    ll = -2 + rng.uniform(0.1, 3, (groups, 1)) * rng.standard_normal((groups, samples))
    (mine_lw, mine_k), mine_w, mine_c = timed(lambda: fast_psis.psis_log_weights(-ll, 0.9))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        (ref_lw, ref_k), ref_w, ref_c = timed(lambda: az.psislw(np.array(-ll), 0.9))
    np.testing.assert_allclose(mine_k, ref_k, rtol=1e-10)
    np.testing.assert_allclose(mine_lw, ref_lw, rtol=1e-10)
    print(f"PSIS of {groups:,} groups x {samples:,} draws: ArviZ {ref_w:.2f} s (CPU {ref_c:.2f}),"
          f" fast_psis {mine_w:.2f} s (CPU {mine_c:.2f}): {ref_w / mine_w:.1f}x wall,"
          f" equal to 1e-10")


def csv_writer(rows: int) -> None:
    table = estimates_like(rows, np.random.default_rng(4))
    fast_csv.plan(table.head(1000), csv.QUOTE_MINIMAL).encode()  # compile or load kernels
    with tempfile.TemporaryDirectory() as tmp:
        old, new = Path(tmp) / "old.csv", Path(tmp) / "new.csv"
        _, old_w, old_c = timed(lambda: table.to_csv(old, index=False, float_format="%.10g"))
        _, new_w, new_c = timed(lambda: atomic.write_csv(new, table))
        same = old.read_bytes() == new.read_bytes()
    print(f"CSV of {rows:,} rows x {table.shape[1]} columns: pandas {old_w:.2f} s (CPU"
          f" {old_c:.2f}), write_csv {new_w:.2f} s (CPU {new_c:.2f}): {old_w / new_w:.1f}x wall,"
          f" {old_c / new_c:.1f}x CPU; same bytes: {same}")
    if not same:
        raise SystemExit("the fast CSV differs from pandas' bytes")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=1_000_000)
    args = p.parse_args()
    for groups, samples in ((10_000, 4_000), (100_000, 400)):
        psis(groups, samples)
    csv_writer(args.rows)


if __name__ == "__main__":
    main()
