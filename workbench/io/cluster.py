"""Read group counts on a Dask cluster: every partition checked and summed where it lies.

The rows never reach this process. ``dask.dataframe`` reads a CSV/TSV file in blocks (or a
Parquet file by row groups) on the workers; each partition goes through the same row rules
as the pandas reader (:func:`workbench.io.inputs.check_rows`: strict counts, outcomes, blank
and reserved group names, successes <= trials) and is summed per group there; the partial
sums are merged in a tree on the cluster. Only the per-group totals and the first few
problem rows come back, so the result is the same :class:`~workbench.io.inputs.LoadedData`
as the pandas and DuckDB readers give for the same file: the same counts in the same group
order (first appearance), the same reconciliation and notes, and bad rows stop the run with
the same one-line message (row, line, group, column, value, fix; up to five problems).

The path is opened by the workers: a local path must be visible to them (the same machine
or a shared folder); a URL (``s3://...``) is read by whatever filesystem library the
workers have. The checks that need the whole file (NUL bytes, the header as written, the
line of a CSV row) run here when the file is also visible here.
"""

from __future__ import annotations

import contextlib
import os
import re
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd

from ..models import DataError, GroupCounts, ParameterError
from ..options import label
from .inputs import (
    _NO_LINES,
    CSV_SUFFIXES,
    DETAILED_PROBLEMS,
    PARQUET_SUFFIXES,
    LoadedData,
    _check_header,
    _csv_header,
    _raise_problems,
    _refuse_nul,
    _refuse_shared_columns,
    _require_columns,
    _Rows,
    check_rows,
    reconcile,
)

#: Seconds to wait for the scheduler before the run is refused (before any work).
CONNECT_TIMEOUT = 10.0
#: Bytes of CSV text per partition.
BLOCKSIZE = "64MB"
#: Partial sums merged per task in the tree on the cluster.
FAN_IN = 8
#: Where a row number stands in a sentence made on a worker (NUL never reaches a sentence:
#: every value is shown by its repr, which escapes it).
_MARK = re.compile("\x00([0-9]+)\x00")
#: One partition's first-appearance key: partition index * _SPAN + row within it.
_SPAN = 2**40
_INSTALL = "pip install 'workbench[dask]'"


def _distributed():
    try:
        import dask.dataframe  # noqa: F401
        import distributed
    except ImportError as exc:
        raise ParameterError(
            f"{label('dask')} needs the optional packages dask and distributed ({exc.name} is"
            f" missing); install them with {_INSTALL}."
        ) from exc
    return distributed


def address_of(client) -> str:
    """The scheduler address a client talks to (what run.json records)."""
    return str(client.scheduler.address)


def check_source(source, settings) -> None:
    """Refuse, before connecting, what the cluster reader does not take."""
    if settings["query"] is not None:
        raise ParameterError(
            f"{label('query')} runs in DuckDB on this machine; {label('dask')} reads a CSV or"
            " Parquet file on the cluster: give one of the two."
        )
    if settings["covariates"] or settings["parent"] is not None:
        raise ParameterError(
            f"{label('dask')} reads counts only; covariates and a parent column are read on"
            f" this machine: drop {label('dask')} for --model logit-normal or nested."
        )
    if not isinstance(source, str | os.PathLike):
        raise ParameterError(
            f"{label('dask')} reads a file path on the cluster, not a {type(source).__name__};"
            " give the CSV or Parquet path (or drop it)."
        )


@contextlib.contextmanager
def connect(address: str, client=None) -> Iterator[object]:
    """A client of the scheduler at ``address`` (``client`` itself when given), closed after.

    Raises
    ------
    ParameterError
        The scheduler does not answer within :data:`CONNECT_TIMEOUT` seconds.
    """
    if client is not None:
        yield client
        return
    distributed = _distributed()
    _probe(address)
    made = distributed.Client.__new__(distributed.Client)
    try:  # made first, so that a failed client is closed here, not at exit with a traceback
        made.__init__(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except Exception as exc:  # noqa: BLE001 - whatever answered was no Dask scheduler
        with contextlib.suppress(Exception):
            made.close(timeout=CONNECT_TIMEOUT)
        raise _unreachable(address, exc) from exc
    try:
        yield made
    finally:
        made.close()


def _unreachable(address: str, exc: Exception) -> ParameterError:
    return ParameterError(
        f"{label('dask')} {address}: no Dask scheduler answered within {CONNECT_TIMEOUT:g} s"
        f" ({_first(exc)}); start one ('dask scheduler', then 'dask worker ADDRESS') or give"
        " the address it prints (tcp://HOST:8786)."
    )


def _probe(address: str) -> None:
    """Refuse a malformed address, and a TCP one nobody listens at, before making a client.

    (A client that fails to connect is left to be closed at exit, where it prints a
    traceback; a plain socket tried first leaves nothing behind.)
    """
    import socket

    from distributed.comm.addressing import parse_address, parse_host_port

    try:
        scheme, location = parse_address(address)
        host, port = parse_host_port(location) if scheme in ("tcp", "tls") else (None, None)
    except (ValueError, TypeError) as exc:
        raise ParameterError(
            f"{label('dask')} {address}: not a scheduler address ({_first(exc)}); give it as"
            " the scheduler prints it, e.g. tcp://HOST:8786."
        ) from exc
    if host is None:
        return
    try:
        socket.create_connection((host, port), timeout=CONNECT_TIMEOUT).close()
    except OSError as exc:
        raise _unreachable(address, exc) from exc


def describe(client) -> dict:
    """The cluster as run.json records it: address, workers and their threads."""
    threads = client.nthreads()
    return {"address": address_of(client), "workers": len(threads),
            "threads": int(sum(threads.values()))}


# -- reading ------------------------------------------------------------------------------------


class _Marked(_Rows):
    """Row labels made on a worker: the row within the partition, filled in afterwards."""

    def label(self, i: int) -> str:
        return f"\x00{int(i)}\x00"


def _frame(source, name: str, local: bool):
    """The dask.dataframe of the file, and how this process names its rows (line numbers)."""
    import dask
    import dask.dataframe as dd

    suffix = Path(str(source)).suffix.lower()
    if suffix not in CSV_SUFFIXES | PARQUET_SUFFIXES:
        raise DataError(
            f"cannot read {name!r} on the cluster: unknown file type {suffix!r}; use .csv, .tsv"
            " or .parquet."
        )
    rows = _NO_LINES
    with dask.config.set({"dataframe.convert-string": False}):
        if suffix in PARQUET_SUFFIXES:
            frame = dd.read_parquet(str(source), blocksize=BLOCKSIZE)
            _check_header([str(c) for c in frame.columns], name)
        else:
            sep = "\t" if suffix == ".tsv" else ","
            if local:
                _refuse_nul(Path(source), name)
                _check_header(_csv_header(Path(source), sep, name), name)
                rows = _Rows(Path(source), sep)
            frame = dd.read_csv(str(source), sep=sep, dtype=str, keep_default_na=False,
                                skipinitialspace=True, encoding="utf-8-sig",
                                blocksize=BLOCKSIZE)
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame, rows


def _local_checks(source) -> tuple[str, bool]:
    """The source's name, and whether it is a file visible here (checked as the pandas reader)."""
    name = str(source)
    if "://" in name:
        return name, False
    path = Path(source)
    if not path.exists():
        raise DataError(f"cannot read {name!r}: no such file; check the path.")
    if path.is_dir():
        raise DataError(f"cannot read {name!r}: it is a folder; give a CSV or Parquet file.")
    if path.stat().st_size == 0:
        raise DataError(f"{name!r} is empty; it needs a header row and at least one data row.")
    return name, True


def _partition(table: pd.DataFrame, part: int, spec: dict) -> dict:
    """One partition, checked and summed per group (runs on a worker)."""
    table = table.reset_index(drop=True)
    labels, y, n, problems = check_rows(table, rows=_Marked(), **spec)
    problems.sort(key=lambda p: p[0])
    shown = [(part, i, make()) for i, make in problems[:DETAILED_PROBLEMS]]
    sums = pd.DataFrame({"group": labels.to_numpy(dtype=object), "successes": y,
                         "trials": n, "first": np.arange(len(table), dtype=np.int64)})
    sums = sums.groupby("group", sort=False).agg(
        successes=("successes", "sum"), trials=("trials", "sum"),
        rows=("first", "size"), first=("first", "min"))
    sums["first"] += part * _SPAN
    return {"sums": sums, "lengths": {part: len(table)}, "problems": shown,
            "total": len(problems)}


def _merge(*parts: dict) -> dict:
    """Partial sums of several partitions as one (runs on a worker)."""
    sums = pd.concat([p["sums"] for p in parts])
    sums = sums.groupby(level=0, sort=False).agg(
        successes=("successes", "sum"), trials=("trials", "sum"), rows=("rows", "sum"),
        first=("first", "min"))
    problems = sorted((q for p in parts for q in p["problems"]), key=lambda q: q[:2])
    lengths = {k: v for p in parts for k, v in p["lengths"].items()}
    return {"sums": sums, "lengths": lengths, "problems": problems[:DETAILED_PROBLEMS],
            "total": sum(p["total"] for p in parts)}


def _reduce(client, frame, spec: dict) -> dict:
    """Check and sum every partition, merge in a tree on the cluster; the small result."""
    import dask

    layer = [dask.delayed(_partition)(p, k, spec) for k, p in enumerate(frame.to_delayed())]
    while len(layer) > 1:
        layer = [dask.delayed(_merge)(*layer[i:i + FAN_IN])
                 for i in range(0, len(layer), FAN_IN)]
    return client.compute(layer[0]).result()


def _fail_on_problems(result: dict, rows: _Rows) -> None:
    lengths = result["lengths"]
    offsets = dict(zip(sorted(lengths), np.cumsum([0] + [lengths[k] for k in
                                                          sorted(lengths)])[:-1], strict=True))
    problems: list = []
    for part, i, text in result["problems"]:
        row = int(offsets[part]) + int(i)
        sentence = _MARK.sub(lambda m, part=part: rows.label(int(offsets[part])
                                                             + int(m.group(1))), text)
        problems.append((row, lambda s=sentence: s))
    problems.extend((2**62, lambda: "") for _ in range(result["total"] - len(problems)))
    _raise_problems(problems)


def load_on_cluster(
    source,
    client,
    *,
    group: str = "group",
    successes: str = "successes",
    trials: str = "trials",
    outcome: str | None = None,
) -> LoadedData:
    """Counts per group from a CSV or Parquet file, checked and summed on the cluster.

    Raises
    ------
    DataError
        The same one-line messages as :func:`workbench.io.inputs.load_groups`.
    """
    _distributed()
    name, local = _local_checks(source)
    events = outcome is not None
    _refuse_shared_columns(group=group, successes=None if events else successes,
                           trials=None if events else trials, outcome=outcome)
    try:
        frame, rows = _frame(source, name, local)
    except (DataError, ParameterError):
        raise
    except Exception as exc:  # noqa: BLE001 - any reader failure becomes a one-line DataError
        raise DataError(f"cannot read {name!r} on the cluster: {_first(exc)}; check that it"
                        " is a valid CSV or Parquet file the workers can open.") from exc
    wanted = {"group": group, "outcome": outcome} if events else \
        {"group": group, "successes": successes, "trials": trials}
    _require_columns(frame, wanted, name)
    frame = frame[list(dict.fromkeys(wanted.values()))]
    spec = {"group": group, "successes": successes, "trials": trials, "outcome": outcome}
    try:
        result = _reduce(client, frame, spec)
    except (DataError, ParameterError):
        raise
    except Exception as exc:  # noqa: BLE001 - a worker's parse failure, one line
        raise DataError(
            f"cannot read {name!r} on the cluster: {_first(exc)}; check the file (a quoted"
            " value spanning lines across a block boundary cannot be split: give Parquet)."
        ) from exc
    if result["total"]:
        _fail_on_problems(result, rows)
    sums = result["sums"].sort_values("first", kind="stable")
    rows_read = int(sum(result["lengths"].values()))
    if rows_read == 0:
        raise DataError(f"no groups: {name} has a header but no data rows; add at least one row.")
    counts = GroupCounts(sums.index.to_numpy(dtype=object),
                         sums["successes"].to_numpy(dtype=np.int64),
                         sums["trials"].to_numpy(dtype=np.int64))
    return reconcile(counts, source=name, rows_read=rows_read,
                     rows_per_group=sums["rows"].to_numpy(), group=group,
                     successes=successes, trials=trials, outcome=outcome)


def _first(exc: Exception) -> str:
    text = str(exc).strip()
    return text.splitlines()[0].rstrip(".") if text else type(exc).__name__
