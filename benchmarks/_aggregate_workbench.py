"""bench_events.py --command helper: aggregate an event file with workbench's DuckDB reader.

Usage: python benchmarks/_aggregate_workbench.py EVENTS.parquet OUT.parquet
Prints ``RESULT {"query_s": ...}`` (the reader's own time) and writes group,successes,trials.
"""

from __future__ import annotations

import json
import sys
import time

import pyarrow as pa
import pyarrow.parquet as pq

from workbench.io.events import load_events

start = time.perf_counter()
loaded = load_events(sys.argv[1], group="group", outcome="outcome")
seconds = time.perf_counter() - start
c = loaded.counts
pq.write_table(
    pa.table({"group": c.names.astype(str), "successes": c.successes, "trials": c.trials}),
    sys.argv[2],
)
print(f"RESULT {json.dumps({'query_s': seconds})}", flush=True)
