"""Read group counts out of core with DuckDB: event logs, large files and SQL queries.

The rows never reach pandas: DuckDB scans the file (or runs the query), checks every cell
and sums the rows per group in one pass, under a memory limit (``SET memory_limit``; it
spills to a temporary folder beyond it). Only the per-group totals come back. The result is
the same :class:`~workbench.io.inputs.LoadedData` as :func:`~workbench.io.inputs.load_groups`
gives for the same file: the same counts in the same group order (first appearance), the
same reconciliation and notes, and bad cells stop the run with the same one-line message
(row, group, column, value, fix; up to five problems).

When it is used (:func:`wanted`): always with ``query``; for a CSV, TSV or Parquet file
when it is an event log (``outcome`` given, one row per trial) or larger than
:data:`SIZE_THRESHOLD` bytes; never with covariates or a parent column (those stay on the
pandas reader).

``query`` is SQL whose result has the group column and either the successes and trials
columns or the outcome column, named as the column options say. It runs over a DuckDB
database file (``.duckdb``, ``.db``; opened read-only), or over a CSV/Parquet file that the
query names as the view ``data``; it may read further files itself
(``read_parquet('logs/*.parquet')``).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np

from ..models import DataError, GroupCounts, ParameterError
from .inputs import (
    CSV_SUFFIXES,
    DETAILED_PROBLEMS,
    FALSE_WORDS,
    MAX_COUNT,
    PARQUET_SUFFIXES,
    RESERVED_NAMES,
    TRUE_WORDS,
    LoadedData,
    _check_header,
    _csv_header,
    _raise_problems,
    _refuse_nul,
    _refuse_shared_columns,
    read_count,
    reconcile,
)

#: Files larger than this (bytes) are read with DuckDB even when they hold counts.
SIZE_THRESHOLD = 64 * 2**20
#: DuckDB's memory limit (``SET memory_limit``); WORKBENCH_DUCKDB_MEMORY overrides it.
MEMORY_LIMIT = "1GB"
DATABASE_SUFFIXES = {".duckdb", ".db", ".ddb"}
#: the view a query names for the file given as the data
DATA_VIEW = "data"
#: a count written as text, the pandas reader's rule (inputs.COUNT_TEXT): digits, optional .0
NUMBER_PATTERN = r"[0-9]+(\.0+)?"
_SPACE = " \t\n\r\x0b\x0c"


def wanted(source, *, outcome=None, query=None, covariates=(), parent=None) -> bool:
    """Whether the DuckDB reader serves this source (see the module docstring)."""
    if query is not None:
        if covariates or parent is not None:
            raise ParameterError(
                "a query gives counts only; covariates and a parent column need a CSV or Parquet"
                " file without the query."
            )
        return True
    if covariates or parent is not None or not isinstance(source, str | os.PathLike):
        return False
    path = Path(source)
    suffix = path.suffix.lower()
    if suffix not in CSV_SUFFIXES | PARQUET_SUFFIXES or not path.is_file():
        return False
    return outcome is not None or path.stat().st_size > SIZE_THRESHOLD


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def connect(database: str | None = None, *, memory_limit: str | None = None):
    """A DuckDB connection with the memory limit set and a temporary folder to spill to."""
    import duckdb

    limit = memory_limit or os.environ.get("WORKBENCH_DUCKDB_MEMORY", MEMORY_LIMIT)
    try:
        con = duckdb.connect(database or ":memory:", read_only=database is not None)
    except duckdb.Error as exc:
        raise DataError(f"cannot open {database!r} as a DuckDB database: {_first(exc)}.") from exc
    con.execute(f"SET memory_limit = {_literal(limit)}")
    con.execute(f"SET temp_directory = {_literal(tempfile.gettempdir())}")
    return con


def _first(exc: Exception) -> str:
    text = str(exc).strip()
    return text.splitlines()[0].rstrip(".") if text else type(exc).__name__


def _scan(path: Path) -> tuple[str, bool]:
    """The table function reading ``path``, and whether the rows are strings as written."""
    suffix = path.suffix.lower()
    if suffix in PARQUET_SUFFIXES:
        return f"read_parquet({_literal(str(path))}, file_row_number = true)", False
    sep = "\t" if suffix == ".tsv" else ","
    return (
        f"read_csv({_literal(str(path))}, header = true, all_varchar = true,"
        f" delim = {_literal(sep)}, quote = '\"', escape = '\"', auto_detect = false"
        f", columns = COLUMNS_HERE)",
        True,
    )


def _csv_columns(con, path: Path) -> dict[str, str]:
    """The CSV header as DuckDB reads it, for an explicit all-text column list."""
    sep = "\t" if path.suffix.lower() == ".tsv" else ","
    rel = con.sql(
        f"SELECT * FROM read_csv({_literal(str(path))}, header = true, all_varchar = true,"
        f" delim = {_literal(sep)}, sample_size = 1) LIMIT 0"
    )
    return {name: "VARCHAR" for name in rel.columns}


class _Source:
    """A relation of input rows with a row number, and how its cells are typed."""

    def __init__(self, con, relation: str, name: str, types: dict[str, str], text: bool,
                 row_number: str | None) -> None:
        self.con, self.relation, self.name, self.types = con, relation, name, types
        self.text = text  # CSV cells as written (pandas reads them as text too)
        self.row_number = row_number
        self.path: Path | None = None
        self.sep = ","

    def rows(self) -> str:
        """SELECT of every row with its 0-based row number ``_rn``."""
        if self.row_number is not None:
            return f"SELECT *, {_quote(self.row_number)} AS _rn FROM {self.relation}"
        # CSV and query rows: numbered in scan order (insertion order is preserved)
        return f"SELECT *, (row_number() OVER ()) - 1 AS _rn FROM {self.relation}"


def _open(source, query: str | None) -> _Source:
    if isinstance(source, str | os.PathLike):
        path = Path(source)
        name = str(path)
        if not path.exists():
            raise DataError(f"cannot read {name!r}: no such file; check the path.")
        if path.is_dir():
            raise DataError(f"cannot read {name!r}: it is a folder; give a CSV or Parquet file.")
        if path.stat().st_size == 0:
            raise DataError(
                f"{name!r} is empty; it needs a header row and at least one data row.")
        suffix = path.suffix.lower()
    else:
        raise ParameterError("the DuckDB reader takes a file path (a data file or a database).")
    import duckdb

    is_db = suffix in DATABASE_SUFFIXES
    if not is_db and suffix not in CSV_SUFFIXES | PARQUET_SUFFIXES and suffix != "":
        raise DataError(
            f"cannot read {name!r}: unknown file type {suffix!r}; use .csv, .tsv, .parquet or a"
            " DuckDB database (.duckdb) with a query."
        )
    if is_db and query is None:
        raise ParameterError(
            f"{name!r} is a DuckDB database: give a query (--query 'SELECT ...') that returns"
            " the group and count columns."
        )
    con = connect(str(path) if is_db else None)
    try:
        relation, text = (None, False) if is_db else _scan(path)
        if text:
            _refuse_nul(path, name)
            _check_header(_csv_header(path, "\t" if suffix == ".tsv" else ",", name), name)
            header = _csv_columns(con, path)
            columns = "{" + ", ".join(f"{_literal(c)}: 'VARCHAR'" for c in header) + "}"
            relation = relation.replace("COLUMNS_HERE", columns)
        if query is not None:
            if relation is not None:
                con.execute(f"CREATE TEMP VIEW {DATA_VIEW} AS SELECT * FROM {relation}")
            relation = f"({query.strip().rstrip(';')}) AS _query"
            name = f"the query over {name}"
            row_number = None
        else:
            row_number = None if text else "file_row_number"
        described = con.sql(f"SELECT * FROM {relation} LIMIT 0")
        types = {c: str(t) for c, t in zip(described.columns, described.types, strict=True)}
    except duckdb.Error as exc:
        con.close()
        what = "run the query" if query is not None else "read"
        raise DataError(f"cannot {what} ({name}): {_first(exc)}; check it.") from exc
    types.pop("file_row_number", None)
    if not is_db and not text:
        _check_header(list(types), name)
    out = _Source(con, relation, name, types, text and query is None, row_number)
    out.path, out.sep = path, "\t" if suffix == ".tsv" else ","
    return out


def _resolve(src: _Source, wanted_cols: dict[str, str]) -> dict[str, str]:
    """Column names as the file spells them (the pandas reader strips header names)."""
    stripped = {c.strip(): c for c in src.types}
    found = list(stripped)
    out = {}
    for option, column in wanted_cols.items():
        if column not in stripped:
            raise DataError(
                f"no column {column!r} in {src.name}; found {found}. Pass {option}=COLUMN"
                " naming it."
            )
        out[option] = stripped[column]
    return out


def _kind(duck_type: str) -> str:
    t = duck_type.upper()
    if t == "BOOLEAN":
        return "bool"
    if t in {"TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT",
             "UINTEGER", "UBIGINT", "UHUGEINT"}:
        return "int"
    if t in {"FLOAT", "DOUBLE", "REAL"} or t.startswith("DECIMAL"):
        return "float"
    return "text"


def _label(src: _Source, column: str) -> str:
    c = _quote(column)
    if src.types[column] == "VARCHAR":
        # pandas' skipinitialspace drops the spaces after a delimiter in a CSV
        value = f"ltrim({c}, ' ')" if src.text else c
        return f"coalesce({value}, '')"
    return f"coalesce(CAST({c} AS VARCHAR), '')"


def _count(src: _Source, column: str) -> tuple[str, str]:
    """SQL for (cell is a usable count by inputs.read_count's rule, its value as BIGINT)."""
    c = _quote(column)
    kind = _kind(src.types[column])
    if kind == "int":
        ok = f"coalesce({c} >= 0 AND {c} <= {MAX_COUNT}, false)"
        return ok, f"(CASE WHEN {ok} THEN CAST({c} AS BIGINT) ELSE 0 END)"
    if kind == "float":
        x = f"CAST({c} AS DOUBLE)"
        ok = (f"coalesce(isfinite({x}) AND {x} = round({x}) AND {x} >= 0"
              f" AND {x} <= {MAX_COUNT}, false)")
        return ok, f"(CASE WHEN {ok} THEN CAST({x} AS BIGINT) ELSE 0 END)"
    if kind != "text":  # true/false and other types are never counts
        return "false", "0"
    t = f"trim(coalesce({c}, ''), ' \t')"
    digits = f"coalesce(nullif(ltrim(split_part({t}, '.', 1), '0'), ''), '0')"
    ok = (f"(regexp_full_match({t}, {_literal(NUMBER_PATTERN)}) AND length({digits}) <= 16"
          f" AND TRY_CAST({digits} AS BIGINT) <= {MAX_COUNT})")
    return ok, f"(CASE WHEN {ok} THEN CAST({digits} AS BIGINT) ELSE 0 END)"


def _outcome(src: _Source, column: str) -> tuple[str, str]:
    """SQL for (cell is a known outcome, 1 for a success else 0)."""
    c = _quote(column)
    kind = _kind(src.types[column])
    if kind == "bool":
        return f"({c} IS NOT NULL)", f"CAST(coalesce({c}, false) AS BIGINT)"
    if kind in ("int", "float"):
        ok = f"({c} IN (0, 1))"
        return f"coalesce({ok}, false)", f"(CASE WHEN {c} = 1 THEN 1 ELSE 0 END)"
    w = f"lower(trim(coalesce(CAST({c} AS VARCHAR), ''), {_literal(_SPACE)}))"
    true = ", ".join(_literal(x) for x in sorted(TRUE_WORDS))
    false = ", ".join(_literal(x) for x in sorted(FALSE_WORDS))
    return f"({w} IN ({true}, {false}))", f"(CASE WHEN {w} IN ({true}) THEN 1 ELSE 0 END)"


def _raw(src: _Source, column: str, value):
    """A cell as the pandas reader would hold it (for the same problem sentence)."""
    if value is not None:
        return value
    kind = _kind(src.types[column])
    if kind == "text":
        return "" if src.text else None
    return None if kind == "bool" else float("nan")


def load_events(
    source,
    *,
    group: str = "group",
    successes: str = "successes",
    trials: str = "trials",
    outcome: str | None = None,
    query: str | None = None,
) -> LoadedData:
    """Counts per group from a file or a query, aggregated in DuckDB (see the module doc).

    Raises
    ------
    DataError
        The same one-line messages as :func:`workbench.io.inputs.load_groups`.
    """
    import duckdb

    src = _open(source, query)
    try:
        return _load(src, group=group, successes=successes, trials=trials, outcome=outcome)
    except duckdb.Error as exc:
        raise DataError(f"cannot aggregate {src.name}: {_first(exc)}.") from exc
    finally:
        src.con.close()


def _load(src: _Source, *, group, successes, trials, outcome) -> LoadedData:
    events = outcome is not None
    _refuse_shared_columns(group=group, successes=None if events else successes,
                           trials=None if events else trials, outcome=outcome)
    if events:
        cols = _resolve(src, {"group": group, "outcome": outcome})
        ok_y, y = _outcome(src, cols["outcome"])
        ok_n, n = "true", "1"
    else:
        cols = _resolve(src, {"group": group, "successes": successes, "trials": trials})
        ok_y, y = _count(src, cols["successes"])
        ok_n, n = _count(src, cols["trials"])
    label = _label(src, cols["group"])
    reserved = ", ".join(_literal(r) for r in RESERVED_NAMES)
    per_row = (
        f"SELECT {label} AS g, {y} AS y, {n} AS n, _rn,"
        f" (trim({label}, {_literal(_SPACE)}) = '') AS bad_g,"
        f" (strpos({label}, chr(0)) > 0) AS nul_g,"
        f" (trim({label}, {_literal(_SPACE)}) IN ({reserved})) AS own_g,"
        f" NOT {ok_y} AS bad_y, NOT {ok_n} AS bad_n"
        f" FROM ({src.rows()})"
    )
    flags = ("CAST(bad_g AS BIGINT) + CAST(nul_g AS BIGINT) + CAST(own_g AS BIGINT)"
             " + CAST(bad_y AS BIGINT) + CAST(bad_n AS BIGINT)")
    over = f"(CASE WHEN {flags} = 0 AND y > n THEN 1 ELSE 0 END)"
    summed = src.con.sql(
        f"SELECT g, CAST(sum(y) AS BIGINT), CAST(sum(n) AS BIGINT), count(*), min(_rn),"
        f" sum({flags} + {over}) FROM ({per_row}) GROUP BY g ORDER BY min(_rn)"
    ).fetchnumpy()
    names, ys, ns, rows, _, bad = (summed[k] for k in summed)
    rows_read = int(np.asarray(rows).sum())
    if rows_read == 0:
        raise DataError(
            f"no groups: {src.name} has a header but no data rows; add at least one row.")
    problems_total = int(np.asarray(bad, dtype=np.int64).sum())
    if problems_total:
        _report_problems(src, cols, per_row, flags, over, problems_total, events)
    names = np.asarray(names, dtype=object)
    ys, ns, rows = (np.asarray(v, dtype=np.int64) for v in (ys, ns, rows))
    counts = GroupCounts(names, ys, ns)
    return reconcile(
        counts, source=src.name, rows_read=rows_read, rows_per_group=rows,
        group=group, successes=successes, trials=trials, outcome=outcome,
    )


def _report_problems(src, cols, per_row, flags, over, total, events) -> None:
    """The first rows with problems, in the pandas reader's words; the rest counted."""
    value_cols = [cols["outcome"]] if events else [cols["successes"], cols["trials"]]
    raw_cols = ", ".join(f"r.{_quote(c)}" for c in value_cols)
    rows = src.con.sql(
        f"SELECT p._rn, p.g, p.bad_g, p.nul_g, p.own_g, p.bad_y, p.bad_n, p.over, p.y, p.n,"
        f" {raw_cols} FROM (SELECT *, {over} AS over FROM ({per_row})) AS p"
        f" JOIN ({src.rows()}) AS r USING (_rn)"
        f" WHERE ({flags.replace('CAST(', 'CAST(p.')}) + p.over > 0"
        f" ORDER BY p._rn LIMIT {DETAILED_PROBLEMS}"
    ).fetchall()
    label = _row_labels(src, [int(r[0]) for r in rows])
    group = cols["group"].strip()
    problems: list = []
    for rn, g, bad_g, nul_g, own_g, bad_y, bad_n, too_many, y, n, *raw in rows:
        i = int(rn)
        where = f"{label(i)} (group {g!r})"
        if bad_g:
            problems.append((i, lambda i=i: (
                f"{label(i)}: column {group!r} is blank; every row needs a group label")))
        if nul_g:
            problems.append((i, lambda i=i, g=g: (
                f"{label(i)}: column {group!r} is {g!r}, with a NUL character;"
                " remove it from the name")))
        if own_g:
            problems.append((i, lambda i=i, g=g: (
                f"{label(i)}: group {g!r} is a name the tool uses for its own"
                " new-group row; rename the group")))
        if events:
            value = _raw(src, cols["outcome"], raw[0])
            column = cols["outcome"].strip()
            if bad_y:
                problems.append((i, lambda w=where, v=value, c=column: (
                    f"{w}: column {c!r} has {str(v)!r}; outcomes must be 1/0, true/false or"
                    " yes/no")))
            continue
        names = (cols["successes"], cols["trials"])
        for bad, column, value in zip((bad_y, bad_n), names, raw, strict=True):
            if bad:
                value, shown = _raw(src, column, value), column.strip()
                problems.append((i, lambda w=where, v=value, c=shown: (
                    f"{w}: column {c!r} {read_count(v)[1]}")))
        if too_many:
            s_col, n_col = (c.strip() for c in names)
            problems.append((i, lambda w=where, y=y, n=n, s_col=s_col, n_col=n_col: (
                f"{w}: {s_col}={y} exceeds {n_col}={n}; each row needs"
                f" 0 <= {s_col} <= {n_col}")))
    # the pandas reader lists every problem; those past the shown ones are only counted
    problems.extend((2**62, lambda: "") for _ in range(max(0, total - len(problems))))
    _raise_problems(problems)


def _row_labels(src: _Source, wanted: list[int]):
    """``row N (line L)`` as the pandas reader says it: lines only in a CSV file."""
    if not src.text or not wanted:
        return lambda i: f"row {i + 1}"
    import csv

    lines: dict[int, int] = {}
    last = max(wanted)
    with open(src.path, encoding="utf-8-sig", newline="") as f:
        reader = csv.reader(f, delimiter=src.sep, skipinitialspace=True)
        before, header, row = 0, True, -1
        for record in reader:
            first, before = before + 1, reader.line_num
            if not record or record == [""]:
                continue
            if header:
                header = False
                continue
            row += 1
            lines[row] = first
            if row >= last:
                break
    return lambda i: f"row {i + 1}" + (f" (line {lines[i]})" if i in lines else "")
