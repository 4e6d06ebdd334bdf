"""Read group counts from files and tables; reconcile every row; report problems by row.

Accepted sources: a CSV (``.csv``, ``.tsv``, ``.txt``), a Parquet file, or a pandas
DataFrame. Two layouts: aggregated rows (group, successes, trials) or one row per trial
(group, outcome) with outcomes 1/0, true/false, yes/no, y/n, t/f, success/failure.
Rows naming the same group are summed and the run record says how many. No row is ever
dropped: a row that cannot be used stops the run with a message naming it.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..models import DataError, GroupCounts
from ..models.exceptions import join_problems
from ..options import label
from . import covariates as covariate_coding
from .runfolder import NEW_GROUP_LABEL

TRUE_WORDS = {"1", "true", "t", "yes", "y", "success", "1.0"}
FALSE_WORDS = {"0", "false", "f", "no", "n", "failure", "0.0"}
CSV_SUFFIXES = {".csv", ".txt", ".tsv"}
PARQUET_SUFFIXES = {".parquet", ".pq"}
MAX_COUNT = 10**15  # exact in float64 and int64 alike
DETAILED_PROBLEMS = 5  # rows described in full in one message; further ones are counted
#: Most columns an input table may have: a wider header is refused before it is parsed
#: (a header of millions of columns would otherwise take minutes to read).
MAX_COLUMNS = 10_000
#: The one spelling of a count written as text: ASCII digits, optionally ".0" (or ".00").
#: Python's int()/float() also take "1_0", full-width and Arabic-Indic digits: never used here.
COUNT_TEXT = re.compile(r"[0-9]+(?:\.0+)?")
#: Group names the tool uses for rows of its own (the new-group row of predictions).
RESERVED_NAMES = (NEW_GROUP_LABEL,)


@dataclass
class LoadedData:
    """Validated counts and the reconciliation of the rows they came from."""

    counts: GroupCounts
    reconciliation: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def read_table(source: str | Path | pd.DataFrame) -> tuple[pd.DataFrame, str]:
    """The raw table (CSV read as text, so values are checked as written) and its name."""
    table, name, _ = _read(source)
    return table, name


def _read(source: str | Path | pd.DataFrame) -> tuple[pd.DataFrame, str, _Rows]:
    if isinstance(source, pd.DataFrame):
        table = source.reset_index(drop=True)
        _check_header([str(c) for c in table.columns], "<DataFrame>")
        table.columns = [str(c).strip() for c in table.columns]
        return table, "<DataFrame>", _NO_LINES
    path = Path(source)
    name = str(path)
    if not path.exists():
        raise DataError(f"cannot read {name!r}: no such file; check the path.")
    if path.is_dir():
        raise DataError(f"cannot read {name!r}: it is a folder; give a CSV or Parquet file.")
    suffix = path.suffix.lower()
    if path.stat().st_size == 0:
        raise DataError(f"{name!r} is empty; it needs a header row and at least one data row.")
    rows = _NO_LINES
    try:
        if suffix in PARQUET_SUFFIXES:
            table = pd.read_parquet(path)
        elif suffix in CSV_SUFFIXES or suffix == "":
            sep = "\t" if suffix == ".tsv" else ","
            _refuse_nul(path, name)
            _check_header(_csv_header(path, sep, name), name)
            table = pd.read_csv(
                path,
                sep=sep,
                dtype=str,
                keep_default_na=False,
                skipinitialspace=True,
                encoding="utf-8-sig",
            )
            rows = _Rows(path, sep)
        else:
            raise DataError(
                f"cannot read {name!r}: unknown file type {suffix!r}; use .csv, .tsv or .parquet."
            )
    except DataError:
        raise
    except pd.errors.EmptyDataError as exc:
        raise DataError(
            f"{name!r} is empty; it needs a header row and at least one data row."
        ) from exc
    except UnicodeDecodeError as exc:
        raise DataError(
            f"cannot read {name!r}: it is not UTF-8 text; save it as UTF-8 CSV."
        ) from exc
    except Exception as exc:  # noqa: BLE001 - any reader failure becomes a one-line DataError
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise DataError(
            f"cannot read {name!r}: {first}; check that it is a valid {suffix or 'CSV'} file."
        ) from exc
    if suffix in PARQUET_SUFFIXES:
        _check_header([str(c) for c in table.columns], name)
    table.columns = [str(c).strip() for c in table.columns]
    return table, name, rows


def _refuse_nul(path: Path, name: str, chunk: int = 1 << 22) -> None:
    """A NUL byte would be dropped or cut a value short by the parser: refuse it, by line."""
    seen_lines = 0
    with open(path, "rb") as f:
        while block := f.read(chunk):
            at = block.find(b"\x00")
            if at >= 0:
                line = seen_lines + block.count(b"\n", 0, at) + 1
                raise DataError(
                    f"cannot read {name!r}: line {line} holds a NUL byte (character 0), which"
                    " a CSV cannot carry; remove it, or save the file as UTF-8 text."
                )
            seen_lines += block.count(b"\n")


def _csv_header(path: Path, sep: str, name: str) -> list[str]:
    """The header record as written (pandas would rename a repeated name to 'trials.1')."""
    try:
        with open(path, encoding="utf-8-sig", newline="") as f:
            reader = csv.reader(f, delimiter=sep, skipinitialspace=True)
            for record in reader:
                if record and record != [""]:
                    return record
    except csv.Error as exc:
        raise DataError(f"cannot read {name!r}: its header row is not valid CSV ({exc}).") from exc
    except UnicodeDecodeError as exc:
        raise DataError(
            f"cannot read {name!r}: it is not UTF-8 text; save it as UTF-8 CSV."
        ) from exc
    return []


def _check_header(columns: list[str], name: str) -> None:
    if len(columns) > MAX_COLUMNS:
        raise DataError(
            f"{name!r} has {len(columns):,} columns, more than the {MAX_COLUMNS:,} read; keep"
            " the group and count columns (and any covariates) and try again."
        )
    stripped = [c.strip() for c in columns]
    seen: dict[str, int] = {}
    for j, c in enumerate(stripped):
        if "\x00" in c:
            raise DataError(
                f"column {j + 1} of {name!r} has a NUL character in its name {c!r}; rename it."
            )
        if c in seen:
            raise DataError(
                f"{name!r} has two columns named {c!r} (columns {seen[c] + 1} and {j + 1}); which"
                " one holds the counts is unclear: rename or remove one."
            )
        seen[c] = j


def _naming(option: str) -> str:
    """How the caller names a column for ``option``: ``--group COLUMN`` or ``group=COLUMN``."""
    spelled = label(option)
    return f"{spelled}COLUMN" if spelled.endswith("=") else f"{spelled} COLUMN"


def _require_columns(table: pd.DataFrame, wanted: dict[str, str], name: str) -> None:
    found = list(table.columns)
    for option, column in wanted.items():
        if column not in table.columns:
            raise DataError(
                f"no column {column!r} in {name}; found {found}. Pass {_naming(option)} naming it."
            )


class _Rows:
    """How a message names a data row: its row number, and in a text file its line.

    Lines are found only when a message needs them, by reading the file again as CSV:
    a quoted name that spans several lines moves every later row down, so "row + 1" is not
    the line.
    """

    def __init__(self, path: Path | None = None, sep: str = ",") -> None:
        self.path, self.sep = path, sep
        self._lines: list[int] | None = None

    def line(self, i: int) -> int | None:
        if self.path is None:
            return None
        if self._lines is None:
            self._lines = _record_lines(self.path, self.sep)
        return self._lines[i] if i < len(self._lines) else None

    def label(self, i: int) -> str:
        line = self.line(i)
        return f"row {i + 1}" + (f" (line {line})" if line is not None else "")


def _record_lines(path: Path, sep: str) -> list[int]:
    """The first line of every data record of a CSV file (blank lines skipped, as pandas)."""
    starts = []
    with open(path, encoding="utf-8-sig", newline="") as f:
        reader = csv.reader(f, delimiter=sep, skipinitialspace=True)
        before = 0
        header = True
        for record in reader:
            first = before + 1
            before = reader.line_num
            if not record or record == [""]:
                continue
            if header:
                header = False
                continue
            starts.append(first)
    return starts


#: the rows of an in-memory table or a Parquet file: no lines
_NO_LINES = _Rows()


def read_count(v: object) -> tuple[int | None, str | None]:
    """The count a cell holds and None, or None and why it is not one (the strict rule).

    Text must be ASCII digits with an optional ``.0`` (``"12"``, ``"12.0"``); numbers must be
    whole, finite and in [0, MAX_COUNT]. Every input path (CSV, Parquet, DataFrame) goes
    through this rule: a count is never read in a second, more lenient way.
    """
    if v is None or (isinstance(v, float | np.floating) and np.isnan(v)) or v is pd.NA:
        return None, "has 'a blank' where a whole number is needed; fill in the count"
    if isinstance(v, bool | np.bool_):
        return None, f"is {v!r}, a true/false value where a whole number is needed"
    if isinstance(v, int | np.integer):
        number = int(v)
    elif isinstance(v, float | np.floating):
        if not np.isfinite(v):
            return None, f"is {str(v)!r}; counts must be finite"
        if v != round(v):
            return None, f"is {str(v)!r}, not a whole number; counts are integers"
        number = int(v)
    elif isinstance(v, str):
        text = v.strip(" \t")
        if text == "":
            return None, "has 'a blank' where a whole number is needed; fill in the count"
        if COUNT_TEXT.fullmatch(text):
            digits = text.split(".")[0].lstrip("0") or "0"
            if len(digits) > 16:
                return None, f"is {text!r}; counts above {MAX_COUNT:.0e} are not supported"
            number = int(digits)
        else:
            return None, _text_problem(text)
    else:
        return None, f"has {str(v)!r} ({type(v).__name__}) where a whole number is needed"
    if number < 0:
        return None, f"is {str(v)!r}; counts must be >= 0"
    if number > MAX_COUNT:
        return None, f"is {str(v)!r}; counts above {MAX_COUNT:.0e} are not supported"
    return number, None


def _text_problem(text: str) -> str:
    """Why a text that is not ASCII digits (with an optional .0) is not a count, and the fix."""
    lowered = text.lower()
    if lowered.lstrip("+-") in ("inf", "infinity", "nan"):
        return f"is {text!r}; counts must be finite"
    if text.startswith("-") and COUNT_TEXT.fullmatch(text[1:]):
        return f"is {text!r}; counts must be >= 0"
    if not text.isascii() and any(c.isdigit() for c in text):
        try:
            same = int(text.replace("_", "x"))  # int() reads other scripts' digits
            fix = f"write it as {same}"
        except ValueError:
            fix = "write it with the digits 0-9"
        return f"is {text!r}, written with digits other than ASCII 0-9; {fix}"
    if re.fullmatch(r"[0-9]{1,3}(?:[_,' ][0-9]{3})+(?:\.0+)?", text):
        return (f"is {text!r}, with a digit-group separator; write it as"
                f" {re.sub(r'[^0-9.]', '', text).split('.')[0]} (digits only)")
    try:
        number = float(text)
    except ValueError:
        return f"has {text!r} where a whole number is needed; fill in the count"
    if "_" in text:
        return (f"is {text!r}, with an underscore; write it with the digits 0-9 only"
                f" ({text.replace('_', '')})")
    if not np.isfinite(number):
        return f"is {text!r}; counts must be finite"
    if number != round(number):
        return f"is {text!r}, not a whole number; counts are integers"
    if number < 0:
        return f"is {text!r}; counts must be >= 0"
    if number > MAX_COUNT:
        return f"is {text!r}; counts above {MAX_COUNT:.0e} are not supported"
    return (f"is {text!r}; write counts as plain digits, e.g. {int(number)}, without sign,"
            " exponent or decimals")


def _report(bad, groups: pd.Series, problems: list, describe, rows: _Rows = _NO_LINES) -> None:
    # (row, sentence-maker): sentences are made only for the rows a message shows
    for i in bad:
        problems.append(
            (int(i), lambda i=i: f"{rows.label(i)} (group {str(groups.iloc[i])!r}): {describe(i)}")
        )


def _raise_problems(problems: list) -> None:
    problems.sort(key=lambda p: p[0])
    shown = [make() for _, make in problems[:DETAILED_PROBLEMS]]
    raise DataError(join_problems(shown + [""] * (len(problems) - len(shown))) + ".")


def _parse_counts(values: pd.Series, column: str, groups: pd.Series, problems: list,
                  rows: _Rows = _NO_LINES) -> np.ndarray:
    """Counts from a column by :func:`read_count`'s rule, one problem per bad row.

    Whole columns of text or numbers take a vectorised path that applies the same rule
    (a property test holds them equal); every refused cell is described by read_count.
    """
    raw = values.to_numpy(dtype=object)
    out = np.zeros(len(values), dtype=np.int64)
    kind = values.dtype.kind
    if kind in "iu":
        numbers = values.to_numpy()
        ok = (numbers >= 0) & (numbers <= MAX_COUNT)
        out[ok] = numbers[ok].astype(np.int64)
    elif kind == "f":
        numbers = values.to_numpy(dtype=float)
        with np.errstate(invalid="ignore"):
            ok = np.isfinite(numbers) & (numbers == np.round(numbers)) & (numbers >= 0)
            ok &= numbers <= MAX_COUNT
        out[ok] = numbers[ok].astype(np.int64)
    elif kind != "b" and all(isinstance(v, str) for v in raw):
        text = pd.Series(raw, dtype=object).str.strip(" \t")
        ok = text.str.fullmatch(COUNT_TEXT.pattern).to_numpy(dtype=bool)
        digits = text[ok].str.split(".", n=1).str[0].str.lstrip("0").replace("", "0")
        short = (digits.str.len() <= 16).to_numpy(dtype=bool)
        good = np.flatnonzero(ok)[short]
        numbers = digits[short].astype(np.int64).to_numpy()
        within = numbers <= MAX_COUNT
        ok = np.zeros(len(values), dtype=bool)
        ok[good[within]] = True
        out[good[within]] = numbers[within]
    else:
        ok = np.zeros(len(values), dtype=bool)
        for i, v in enumerate(raw):
            number, _ = read_count(v)
            if number is not None:
                ok[i] = True
                out[i] = number
    bad = np.flatnonzero(~ok)
    _report(bad, groups, problems, lambda i: f"column {column!r} {read_count(raw[i])[1]}", rows)
    return out


def _parse_outcomes(values: pd.Series, column: str, groups: pd.Series, problems: list,
                    rows: _Rows = _NO_LINES):
    """1 / 0 from words or booleans (vectorised), one problem per unknown value."""
    if values.dtype == bool:
        return values.to_numpy(dtype=np.int64)
    raw = values.to_numpy(dtype=object)
    words = pd.Series(raw).map(
        lambda v: str(v).strip().lower() if not isinstance(v, bool | np.bool_) else str(int(v))
    )
    is_true = words.isin(TRUE_WORDS).to_numpy()
    is_false = words.isin(FALSE_WORDS).to_numpy()
    bad = np.flatnonzero(~(is_true | is_false))
    _report(
        bad,
        groups,
        problems,
        lambda i: (
            f"column {column!r} has {str(raw[i])!r}; outcomes must be 1/0, true/false or yes/no"
        ),
        rows,
    )
    return is_true.astype(np.int64)


def _refuse_shared_columns(**roles) -> None:
    """One column given two roles (``--successes trials --trials trials``) is an error."""
    seen: dict[str, str] = {}
    for role, value in roles.items():
        for column in ([] if value is None else [value] if isinstance(value, str) else value):
            if column in seen:
                raise DataError(
                    f"column {column!r} is given as both {seen[column]} and {role}; each role"
                    " needs its own column: name the right one for each."
                )
            seen[column] = role


def check_rows(table: pd.DataFrame, *, group: str, successes: str, trials: str,
               outcome: str | None, rows: _Rows = _NO_LINES):
    """Every row checked by the strict rules: group labels, counts (or outcomes), y <= n.

    Returns ``(labels, successes, trials, problems)``; ``problems`` holds (row, sentence
    maker) pairs for :func:`_raise_problems`. One home for the row rules: the pandas reader
    and the cluster reader (:mod:`workbench.io.cluster`, one partition at a time) use it.
    """
    column = table[group]
    labels = column.where(column.notna(), "").astype(str)
    problems: list = []
    blank = np.flatnonzero(labels.str.strip().eq("").to_numpy())
    for i in blank:
        problems.append(
            (
                int(i),
                lambda i=i: (
                    f"{rows.label(i)}: column {group!r} is blank; every row needs a group label"
                ),
            )
        )
    for i in np.flatnonzero(labels.str.contains("\x00", regex=False).to_numpy()):
        problems.append((int(i), lambda i=i: (
            f"{rows.label(i)}: column {group!r} is {labels.iloc[i]!r}, with a NUL character;"
            " remove it from the name")))
    for i in np.flatnonzero(labels.str.strip().isin(RESERVED_NAMES).to_numpy()):
        problems.append((int(i), lambda i=i: (
            f"{rows.label(i)}: group {labels.iloc[i]!r} is a name the tool uses for its own"
            " new-group row; rename the group")))
    if outcome is not None:
        y = _parse_outcomes(table[outcome], outcome, labels, problems, rows)
        n = np.ones(len(table), dtype=np.int64)
    else:
        y = _parse_counts(table[successes], successes, labels, problems, rows)
        n = _parse_counts(table[trials], trials, labels, problems, rows)
        flagged = np.zeros(len(table), dtype=bool)
        flagged[[i for i, _ in problems]] = True
        over = np.flatnonzero((y > n) & ~flagged)
        _report(
            over,
            labels,
            problems,
            lambda i: (
                f"{successes}={y[i]} exceeds {trials}={n[i]}; each row needs"
                f" 0 <= {successes} <= {trials}"
            ),
            rows,
        )
    return labels, y, n, problems


def load_groups(
    source: str | Path | pd.DataFrame,
    *,
    group: str = "group",
    successes: str = "successes",
    trials: str = "trials",
    outcome: str | None = None,
    covariates: list[str] | tuple[str, ...] = (),
    parent: str | None = None,
    reference_level: list[str] | tuple[str, ...] = (),
) -> LoadedData:
    """Read, validate and aggregate a table into :class:`models.GroupCounts`.

    ``covariates`` name numeric or text columns (see :mod:`workbench.io.covariates`: text
    becomes indicators against a reference level, ``reference_level`` items ``COL=LEVEL``
    name it). When every covariate takes one value per group they are group-level; when one
    differs between rows of a group the rows are summed by (group, covariate pattern) into
    the counts' cells (trial-level case mix). ``parent`` names the column of each group's
    parent (a region for stores), one per group, for the nested model.

    Raises
    ------
    DataError
        One line naming the row(s), group, column, value and the fix; up to five problems.
    """
    table, name, rows = _read(source)
    _refuse_shared_columns(group=group, successes=None if outcome is not None else successes,
                           trials=None if outcome is not None else trials, outcome=outcome,
                           parent=parent, covariates=covariates)
    if outcome is not None:
        _require_columns(table, {"group": group, "outcome": outcome}, name)
    else:
        _require_columns(table, {"group": group, "successes": successes, "trials": trials}, name)
    for c in covariates:
        _require_columns(table, {"covariates": c}, name)
    if parent is not None:
        _require_columns(table, {"parent": parent}, name)
    if len(table) == 0:
        raise DataError(f"no groups: {name} has a header but no data rows; add at least one row.")
    labels, y, n, problems = check_rows(table, group=group, successes=successes,
                                        trials=trials, outcome=outcome, rows=rows)
    references = covariate_coding.parse_references(reference_level, covariates)
    x, coding = covariate_coding.code_columns(
        table, covariates, n, references,
        lambda bad, describe: _report(bad, labels, problems, describe, rows))
    if problems:
        _raise_problems(problems)

    frame = pd.DataFrame({"group": labels.to_numpy(), "successes": y, "trials": n})
    summed = frame.groupby("group", sort=False).agg(
        successes=("successes", "sum"), trials=("trials", "sum"), rows=("successes", "size")
    )
    cov_frame = cells = None
    trial_level = covariate_coding.varies_within(labels.to_numpy(), x)
    if trial_level:
        cells = covariate_coding.cells_of(labels.to_numpy(), summed.index, y, n, x)
    elif x:
        per_row = pd.DataFrame(x)
        per_row["group"] = labels.to_numpy()
        cov_frame = per_row.groupby("group", sort=False)[list(x)].first()
        cov_frame = cov_frame.loc[summed.index].reset_index(drop=True)
    parents = None
    if parent is not None:
        parents = _parents_of(table[parent], parent, labels, summed.index, rows)
    counts = GroupCounts(
        summed.index.to_numpy(),
        summed["successes"],
        summed["trials"],
        covariates=cov_frame,
        parents=parents,
        cells=cells,
    )
    loaded = reconcile(
        counts, source=name, rows_read=int(len(table)), rows_per_group=summed["rows"].to_numpy(),
        group=group, successes=successes, trials=trials, outcome=outcome,
        covariates=covariates, parent=parent,
    )
    if coding:
        _record_case_mix(loaded, coding, cells, covariates, trial_level, rows_read=len(table))
    return loaded


def _parents_of(column: pd.Series, parent: str, labels: pd.Series, groups: pd.Index,
                rows: _Rows) -> np.ndarray:
    """Each group's parent label, in ``groups`` order; one parent per group, none blank."""
    plabels = column.where(column.notna(), "").astype(str)
    blank = np.flatnonzero(plabels.str.strip().eq("").to_numpy())
    if len(blank):
        i = int(blank[0])
        raise DataError(
            f"{rows.label(i)} (group {labels.iloc[i]!r}): column {parent!r} is blank;"
            f" every row needs its parent ({len(blank)} row(s) so)."
        )
    pairs = pd.DataFrame({"group": labels.to_numpy(), "parent": plabels.to_numpy()})
    per_group = pairs.groupby("group", sort=False)["parent"].nunique()
    if (per_group > 1).any():
        g = per_group.index[(per_group > 1).to_numpy()][0]
        members = np.flatnonzero(labels.to_numpy() == g)
        first = plabels.iloc[members[0]]
        i = int(next(r for r in members if plabels.iloc[r] != first))
        raise DataError(
            f"{rows.label(i)} (group {g!r}): column {parent!r} is {plabels.iloc[i]!r} but an"
            f" earlier row of the group says {first!r}; a group has one parent."
        )
    return pairs.groupby("group", sort=False)["parent"].first().loc[groups].to_numpy()


def _record_case_mix(loaded: LoadedData, coding: dict, cells, covariates, trial_level,
                     *, rows_read: int) -> None:
    """The covariates' coding and, for trial-level case mix, the cells, in the reconciliation."""
    loaded.reconciliation["covariate_coding"] = coding
    loaded.reconciliation["case_mix"] = "trial-level" if cells is not None else "group-level"
    if cells is None:
        return
    loaded.reconciliation["cells"] = int(cells.n_cells)
    varying = "trial_level_covariates"
    loaded.reconciliation[varying] = [
        c for c in covariates if any(m == c or m in coding[c].get("indicators", ())
                                     for m in trial_level)]
    loaded.notes.append(
        f"covariate(s) {', '.join(map(repr, loaded.reconciliation[varying]))}"
        " differ within groups: the"
        f" {int(rows_read):,} rows were summed into {cells.n_cells:,} cells of (group,"
        " covariate pattern) and the fit adjusts for case mix.")


def reconcile(counts: GroupCounts, *, source: str, rows_read: int, rows_per_group,
              group: str, successes: str, trials: str, outcome: str | None,
              covariates=(), parent: str | None = None) -> LoadedData:
    """The counts with their row reconciliation and notes: one rule for every reader."""
    rows_per_group = np.asarray(rows_per_group)
    repeated = int((rows_per_group > 1).sum())
    zero = [str(z) for z in counts.names[counts.trials == 0]]
    notes = []
    if outcome is not None:
        notes.append(f"{rows_read} trial rows were counted into {counts.n_groups} groups.")
    elif repeated:
        notes.append(f"{repeated} groups appeared on more than one row; their rows were summed.")
    if zero:
        shown = ", ".join(repr(z) for z in zero[:5]) + (" ..." if len(zero) > 5 else "")
        notes.append(
            f"{len(zero)} group(s) have zero trials ({shown}); they are kept and their estimate"
            " is the model's view of an unseen group."
        )
    reconciliation = {
        "source": source,
        "layout": "one row per trial" if outcome is not None else "aggregated counts",
        "covariates": list(covariates),
        "parent": parent,
        "columns": {
            "group": group,
            **({"outcome": outcome} if outcome else {"successes": successes, "trials": trials}),
        },
        "rows_read": int(rows_read),
        "rows_used": int(rows_read),
        "rows_dropped": 0,
        "groups": counts.n_groups,
        "groups_on_several_rows": repeated,
        "zero_trial_groups": zero,
        "total_successes": int(counts.successes.sum()),
        "total_trials": int(counts.trials.sum()),
    }
    return LoadedData(counts, reconciliation, notes)
