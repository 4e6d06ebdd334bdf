"""Read group counts from files and tables; reconcile every row; report problems by row.

Accepted sources: a CSV (``.csv``, ``.tsv``, ``.txt``), a Parquet file, or a pandas
DataFrame. Two layouts: aggregated rows (group, successes, trials) or one row per trial
(group, outcome) with outcomes 1/0, true/false, yes/no, y/n, t/f, success/failure.
Rows naming the same group are summed and the run record says how many. No row is ever
dropped: a row that cannot be used stops the run with a message naming it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..models import DataError, GroupCounts
from ..models.exceptions import join_problems

TRUE_WORDS = {"1", "true", "t", "yes", "y", "success", "1.0"}
FALSE_WORDS = {"0", "false", "f", "no", "n", "failure", "0.0"}
CSV_SUFFIXES = {".csv", ".txt", ".tsv"}
PARQUET_SUFFIXES = {".parquet", ".pq"}
MAX_COUNT = 10**15  # exact in float64 and int64 alike
DETAILED_PROBLEMS = 5  # rows described in full in one message; further ones are counted


@dataclass
class LoadedData:
    """Validated counts and the reconciliation of the rows they came from."""

    counts: GroupCounts
    reconciliation: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def read_table(source: str | Path | pd.DataFrame) -> tuple[pd.DataFrame, str]:
    """The raw table (CSV read as text, so values are checked as written) and its name."""
    if isinstance(source, pd.DataFrame):
        return source.reset_index(drop=True), "<DataFrame>"
    path = Path(source)
    name = str(path)
    if not path.exists():
        raise DataError(f"cannot read {name!r}: no such file; check the path.")
    if path.is_dir():
        raise DataError(f"cannot read {name!r}: it is a folder; give a CSV or Parquet file.")
    suffix = path.suffix.lower()
    if path.stat().st_size == 0:
        raise DataError(f"{name!r} is empty; it needs a header row and at least one data row.")
    try:
        if suffix in PARQUET_SUFFIXES:
            table = pd.read_parquet(path)
        elif suffix in CSV_SUFFIXES or suffix == "":
            table = pd.read_csv(
                path,
                sep="\t" if suffix == ".tsv" else ",",
                dtype=str,
                keep_default_na=False,
                skipinitialspace=True,
                encoding="utf-8-sig",
            )
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
    table.columns = [str(c).strip() for c in table.columns]
    return table, name


def _require_columns(table: pd.DataFrame, wanted: dict[str, str], name: str) -> None:
    found = list(table.columns)
    for option, column in wanted.items():
        if column not in table.columns:
            raise DataError(
                f"no column {column!r} in {name}; found {found}. Pass {option}=COLUMN naming it."
            )


def _row_label(i: int) -> str:
    # i is the 0-based data row; files count a header line first
    return f"row {i + 1} (line {i + 2})"


def _count_problem(v: object, column: str) -> str | None:
    """Why one cell is not a usable count, or None if it is."""
    text = str(v).strip() if v is not None else ""
    try:
        number = float(text) if isinstance(v, str) or v is None else float(v)
    except (TypeError, ValueError):
        number = None
    if number is None or text == "" or (isinstance(v, float) and np.isnan(v)):
        return (
            f"column {column!r} has {text or 'a blank'!r} where a whole number is needed;"
            " fill in the count"
        )
    if not np.isfinite(number):
        return f"column {column!r} is {text!r}; counts must be finite"
    if number != round(number):
        return f"column {column!r} is {text!r}, not a whole number; counts are integers"
    if number < 0:
        return f"column {column!r} is {text!r}; counts must be >= 0"
    if number > MAX_COUNT:
        return f"column {column!r} is {text!r}; counts above {MAX_COUNT:.0e} are not supported"
    return None


def _report(bad: np.ndarray, groups: pd.Series, problems: list, describe) -> None:
    # (row, sentence-maker): sentences are made only for the rows a message shows
    for i in bad:
        problems.append(
            (int(i), lambda i=i: f"{_row_label(i)} (group {str(groups.iloc[i])!r}): {describe(i)}")
        )


def _raise_problems(problems: list) -> None:
    problems.sort(key=lambda p: p[0])
    shown = [make() for _, make in problems[:DETAILED_PROBLEMS]]
    raise DataError(join_problems(shown + [""] * (len(problems) - len(shown))) + ".")


def _parse_counts(values: pd.Series, column: str, groups: pd.Series, problems: list[str]):
    """Whole numbers >= 0 from a column (vectorised), one problem per bad row."""
    if values.dtype.kind in "iu":
        numbers = values.to_numpy(dtype=float)
    else:
        text = (
            values.astype("string").str.strip()
            if values.dtype.kind in "OSUT" or str(values.dtype).startswith("str")
            else values
        )
        numbers = pd.to_numeric(text, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(numbers) & (numbers == np.round(numbers)) & (numbers >= 0)
        ok &= numbers <= MAX_COUNT
    bad = np.flatnonzero(~ok)
    raw = values.to_numpy(dtype=object)
    bad = np.array([i for i in bad if _count_problem(raw[i], column) is not None], dtype=int)
    _report(bad, groups, problems, lambda i: _count_problem(raw[i], column))
    out = np.zeros(len(values), dtype=np.int64)
    out[ok] = numbers[ok].astype(np.int64)
    return out


def _parse_outcomes(values: pd.Series, column: str, groups: pd.Series, problems: list[str]):
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
    )
    return is_true.astype(np.int64)


def load_groups(
    source: str | Path | pd.DataFrame,
    *,
    group: str = "group",
    successes: str = "successes",
    trials: str = "trials",
    outcome: str | None = None,
    covariates: list[str] | tuple[str, ...] = (),
    parent: str | None = None,
) -> LoadedData:
    """Read, validate and aggregate a table into :class:`models.GroupCounts`.

    ``covariates`` name numeric group-level columns (one value per group: rows of one group
    must agree); they are kept beside the counts for models that use them. ``parent`` names
    the column of each group's parent (a region for stores), one per group, for the nested
    model.

    Raises
    ------
    DataError
        One line naming the row(s), group, column, value and the fix; up to five problems.
    """
    table, name = read_table(source)
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
    column = table[group]
    labels = column.where(column.notna(), "").astype(str)
    problems: list = []
    blank = np.flatnonzero(labels.str.strip().eq("").to_numpy())
    for i in blank:
        problems.append(
            (
                int(i),
                lambda i=i: (
                    f"{_row_label(i)}: column {group!r} is blank; every row needs a group label"
                ),
            )
        )
    if outcome is not None:
        y = _parse_outcomes(table[outcome], outcome, labels, problems)
        n = np.ones(len(table), dtype=np.int64)
    else:
        y = _parse_counts(table[successes], successes, labels, problems)
        n = _parse_counts(table[trials], trials, labels, problems)
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
        )
    x = {}
    for c in covariates:
        values = pd.to_numeric(table[c].astype("string").str.strip(), errors="coerce")
        values = values.to_numpy(dtype=float, na_value=np.nan)
        bad = np.flatnonzero(~np.isfinite(values))
        raw = table[c].to_numpy(dtype=object)
        _report(
            bad,
            labels,
            problems,
            lambda i, c=c, raw=raw: (
                f"covariate column {c!r} has {str(raw[i])!r}; covariates must be finite numbers"
            ),
        )
        x[c] = values
    if problems:
        _raise_problems(problems)

    frame = pd.DataFrame({"group": labels.to_numpy(), "successes": y, "trials": n})
    summed = frame.groupby("group", sort=False).agg(
        successes=("successes", "sum"), trials=("trials", "sum"), rows=("successes", "size")
    )
    cov_frame = None
    if covariates:
        per_row = pd.DataFrame(x)
        per_row["group"] = labels.to_numpy()
        spread = per_row.groupby("group", sort=False).agg(["min", "max"])
        for c in covariates:
            differ = spread.index[(spread[(c, "min")] != spread[(c, "max")]).to_numpy()]
            if len(differ):
                i = int(np.flatnonzero(labels.to_numpy() == differ[0])[1])
                raise DataError(
                    f"{_row_label(i)} (group {differ[0]!r}): covariate {c!r} differs between"
                    f" rows of the same group ({len(differ)} group(s) so); a covariate takes one"
                    " value per group."
                )
        cov_frame = per_row.groupby("group", sort=False)[list(covariates)].first()
        cov_frame = cov_frame.loc[summed.index].reset_index(drop=True)
    parents = None
    if parent is not None:
        column = table[parent]
        plabels = column.where(column.notna(), "").astype(str)
        blank = np.flatnonzero(plabels.str.strip().eq("").to_numpy())
        if len(blank):
            i = int(blank[0])
            raise DataError(
                f"{_row_label(i)} (group {labels.iloc[i]!r}): column {parent!r} is blank;"
                f" every row needs its parent ({len(blank)} row(s) so)."
            )
        pairs = pd.DataFrame({"group": labels.to_numpy(), "parent": plabels.to_numpy()})
        per_group = pairs.groupby("group", sort=False)["parent"].nunique()
        if (per_group > 1).any():
            g = per_group.index[(per_group > 1).to_numpy()][0]
            rows = np.flatnonzero(labels.to_numpy() == g)
            first = plabels.iloc[rows[0]]
            i = int(next(r for r in rows if plabels.iloc[r] != first))
            raise DataError(
                f"{_row_label(i)} (group {g!r}): column {parent!r} is {plabels.iloc[i]!r} but an"
                f" earlier row of the group says {first!r}; a group has one parent."
            )
        parents = pairs.groupby("group", sort=False)["parent"].first().loc[summed.index]
        parents = parents.to_numpy()
    counts = GroupCounts(
        summed.index.to_numpy(),
        summed["successes"],
        summed["trials"],
        covariates=cov_frame,
        parents=parents,
    )
    repeated = int((summed["rows"] > 1).sum())
    zero = summed.index[summed["trials"].to_numpy() == 0].astype(str).tolist()
    notes = []
    if outcome is not None:
        notes.append(f"{len(table)} trial rows were counted into {counts.n_groups} groups.")
    elif repeated:
        notes.append(f"{repeated} groups appeared on more than one row; their rows were summed.")
    if zero:
        shown = ", ".join(repr(z) for z in zero[:5]) + (" ..." if len(zero) > 5 else "")
        notes.append(
            f"{len(zero)} group(s) have zero trials ({shown}); they are kept and their estimate"
            " is the model's view of an unseen group."
        )
    reconciliation = {
        "source": name,
        "layout": "one row per trial" if outcome is not None else "aggregated counts",
        "covariates": list(covariates),
        "parent": parent,
        "columns": {
            "group": group,
            **({"outcome": outcome} if outcome else {"successes": successes, "trials": trials}),
        },
        "rows_read": int(len(table)),
        "rows_used": int(len(table)),
        "rows_dropped": 0,
        "groups": counts.n_groups,
        "groups_on_several_rows": repeated,
        "zero_trial_groups": zero,
        "total_successes": int(counts.successes.sum()),
        "total_trials": int(counts.trials.sum()),
    }
    return LoadedData(counts, reconciliation, notes)
