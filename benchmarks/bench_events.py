"""Benchmark: aggregate an event-level Parquet file (one row per trial) to group counts.

Generates invented events, one row per trial with columns ``group`` (string, dictionary
encoded) and ``outcome`` (0/1, int8): G groups whose shares of the rows are log-uniform
(like trials on 2..2,000) and whose true rates come from a Beta distribution with mean 0.15 and
concentration 40, fixed seed. Rows are written in chunks with pyarrow's ``ParquetWriter``, so
the generator holds one chunk at a time whatever the row count; it prints its own peak memory.
Per-group tallies are kept while generating (a ``.tallies.npz`` beside the file).

Then it times, in a fresh child process with a wall limit, the command given by ``--command``
(a template; ``{input}``, ``{output}`` and ``{python}`` are filled in), which must aggregate
the file to ``group, successes, trials``. The default is a plain DuckDB query run through the
duckdb Python package. It prints wall time, rows per second and peak memory (measured from
outside, see ``_proc.py``), and whether the output file equals the generator's tallies
exactly. Figures are wall-clock on shared cores and noisy; ``--repeat N`` prints the median.
Nothing here asserts a timing.

Usage::

    python benchmarks/bench_events.py --rows 1e6 1e7 [--groups 10000] [--repeat 3]
        [--command "{python} my_aggregate.py {input} {output}"] [--workdir DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shlex
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _proc import run_measured  # noqa: E402

MEAN, CONCENTRATION = 0.15, 40.0
SEED = 20240612
DEFAULT_COMMAND = "{python} {script} --aggregate {input} {output}"


def generate(path: Path, rows: int, groups: int, chunk: int) -> dict:
    """Write ``rows`` events in chunks; return the per-group tallies kept along the way."""
    rng = np.random.default_rng([SEED, rows, groups])
    share = np.exp(rng.uniform(np.log(2), np.log(2000), size=groups))
    share /= share.sum()
    cumulative = np.cumsum(share)
    cumulative[-1] = 1.0
    rates = rng.beta(MEAN * CONCENTRATION, (1 - MEAN) * CONCENTRATION, size=groups)
    width = len(str(groups))
    names = pa.array([f"unit-{i:0{width}d}" for i in range(groups)], pa.string())
    schema = pa.schema([("group", pa.dictionary(pa.int32(), pa.string())), ("outcome", pa.int8())])
    successes = np.zeros(groups, np.int64)
    trials = np.zeros(groups, np.int64)
    tmp = path.with_suffix(".tmp")
    with pq.ParquetWriter(tmp, schema) as writer:
        left = rows
        while left > 0:
            size = min(chunk, left)
            idx = np.searchsorted(cumulative, rng.random(size), side="right").astype(np.int32)
            outcome = (rng.random(size) < rates[idx]).astype(np.int8)
            successes += np.bincount(idx, weights=outcome, minlength=groups).astype(np.int64)
            trials += np.bincount(idx, minlength=groups)
            batch = pa.record_batch(
                [pa.DictionaryArray.from_arrays(pa.array(idx), names), pa.array(outcome)],
                schema=schema,
            )
            writer.write_batch(batch, row_group_size=chunk)
            left -= size
    tmp.rename(path)
    return {"names": np.asarray(names.to_pylist()), "successes": successes, "trials": trials}


def events_file(workdir: Path, rows: int, groups: int, chunk: int) -> tuple[Path, Path]:
    path = workdir / f"events-{rows}-{groups}.parquet"
    tallies = path.with_suffix(".tallies.npz")
    if path.exists() and tallies.exists():
        print(f"events: reusing {path}", flush=True)
        return path, tallies
    start = time.perf_counter()
    got = generate(path, rows, groups, chunk)
    np.savez(tallies, **got)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(
        f"events: wrote {rows:,} rows, {groups:,} groups to {path}"
        f" ({path.stat().st_size / 2**20:.0f} MB) in {time.perf_counter() - start:.1f} s;"
        f" generator peak memory so far {peak:.0f} MB (chunks of {chunk:,} rows)",
        flush=True,
    )
    return path, tallies


def aggregate_with_duckdb(source: str, target: str) -> None:
    """The default command: one DuckDB query from Parquet to Parquet."""
    import duckdb

    start = time.perf_counter()
    con = duckdb.connect()
    query = (
        'SELECT "group", SUM(outcome)::BIGINT AS successes, COUNT(*)::BIGINT AS trials'
        f' FROM read_parquet({source!r}) GROUP BY "group"'
    )
    con.execute(f"COPY ({query}) TO {target!r} (FORMAT parquet)")
    print(f"RESULT {json.dumps({'query_s': time.perf_counter() - start})}", flush=True)


def check_output(output: Path, tallies: Path) -> str:
    """Compare the command's output with the generator's tallies, exactly."""
    if not output.exists():
        return "no output file to check"
    if output.suffix == ".parquet":
        frame = pq.read_table(output).to_pandas()
    else:
        import pandas as pd

        frame = pd.read_csv(output)
    missing = {"group", "successes", "trials"} - set(frame.columns)
    if missing:
        return f"output lacks columns {sorted(missing)}; found {list(frame.columns)}"
    truth = np.load(tallies)
    frame = frame.set_index(frame["group"].astype(str))
    # Groups the generator never drew (possible with few rows) do not appear in the output.
    present = truth["trials"] > 0
    names = truth["names"][present]
    if len(frame) != present.sum() or not frame.index.isin(names).all():
        return f"group sets differ: {len(frame):,} in output, {present.sum():,} expected"
    got = frame.loc[names]
    same = np.array_equal(got["successes"].to_numpy(), truth["successes"][present]) and (
        np.array_equal(got["trials"].to_numpy(), truth["trials"][present])
    )
    verdict = "equal to" if same else "DIFFERENT from"
    return f"output {verdict} the generator's tallies ({present.sum():,} groups)"


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--rows", type=float, nargs="+", default=[1e6, 1e7], help="e.g. 1e6 1e7 1e8")
    p.add_argument("--groups", type=int, default=10_000)
    p.add_argument("--chunk", type=int, default=1_000_000, help="rows generated per batch")
    p.add_argument("--command", default=DEFAULT_COMMAND, help="template: {input} {output} {python}")
    p.add_argument("--output-name", default="aggregated.parquet", help="file name for {output}")
    p.add_argument("--repeat", type=int, default=1)
    p.add_argument("--limit", type=float, default=1200.0, help="per-run wall limit, seconds")
    p.add_argument("--workdir", default="/tmp/workbench-bench-events")
    p.add_argument("--aggregate", nargs=2, metavar=("IN", "OUT"), help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.aggregate:
        aggregate_with_duckdb(*args.aggregate)
        return
    workdir = Path(args.workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    print(
        f"machine: {os.cpu_count()} cores, shared with other jobs (load average"
        f" {os.getloadavg()[0]:.1f}); wall-clock figures are noisy",
        flush=True,
    )
    print(f"command: {args.command}", flush=True)
    lines = ["| rows | groups | wall | rows per second | peak memory | output check |"]
    lines.append("|---|---|---|---|---|---|")
    for rows in sorted(int(r) for r in args.rows):
        source, tallies = events_file(workdir, rows, args.groups, args.chunk)
        output = workdir / args.output_name
        walls, peaks, check = [], [], "not run"
        for rep in range(args.repeat):
            if output.exists():
                output.unlink()
            fill = {"input": str(source), "output": str(output), "python": sys.executable}
            fill["script"] = str(Path(__file__).resolve())
            cmd = [part.format(**fill) for part in shlex.split(args.command)]
            got = run_measured(cmd, limit=args.limit)
            if not got.finished:
                print(f"[{rows:,} rows rep {rep}] did not finish in {args.limit / 60:.0f} min")
                break
            inner = ""
            for line in got.stdout.splitlines():
                if line.startswith("RESULT "):
                    inner = f", query alone {json.loads(line[7:])['query_s']:.2f} s"
            check = check_output(output, tallies) if got.returncode == 0 else "command failed"
            print(
                f"[{rows:,} rows rep {rep}] exit {got.returncode}, wall {got.wall_s:.2f} s"
                f"{inner}, {rows / got.wall_s:,.0f} rows/s, peak memory"
                f" {got.tree_peak_mb:.0f} MB (process tree, sampled), largest process"
                f" {got.maxrss_mb:.0f} MB; {check}",
                flush=True,
            )
            if got.returncode != 0:
                print(f"    stderr tail: {got.stderr[-600:].strip()}")
                break
            walls.append(got.wall_s)
            peaks.append(max(got.tree_peak_mb, got.maxrss_mb))
        if walls:
            wall = statistics.median(walls)
            median = f" (median of {len(walls)})" if len(walls) > 1 else ""
            lines.append(
                f"| {rows:,} | {args.groups:,} | {wall:.2f} s{median} | {rows / wall:,.0f}"
                f" | {statistics.median(peaks):.0f} MB | {check} |"
            )
        else:
            lines.append(f"| {rows:,} | {args.groups:,} | did not finish | - | - | {check} |")
    print()
    print("\n".join(lines))


if __name__ == "__main__":
    main()
