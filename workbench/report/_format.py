"""Values as page text and DataFrames as page tables: formatting only, no statistics."""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

#: what an empty rank reads (a group with no trials is not ranked)
NO_DATA = "no data"


def _missing(v) -> bool:
    return v is None or (isinstance(v, float) and not math.isfinite(v)) or v is pd.NA


def fmt(v, kind: str = "num") -> str:
    """A value as text: ``rate`` (3 decimals), ``prob``, ``int``, ``rank``, ``num``.

    A missing rank reads "no data": only groups with no trials go unranked.
    """
    if _missing(v):
        return NO_DATA if kind == "rank" else ""
    if isinstance(v, bool | np.bool_):
        return "yes" if v else "no"
    if isinstance(v, str):
        return v
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(x):
        return NO_DATA if kind == "rank" else ""
    if abs(x) < 1e-12:
        x = 0.0  # rounding noise such as -1.1e-15 reads as zero
    if kind == "int":
        return f"{x:.0f}"
    if kind == "rank":
        return f"{x:g}"
    if kind == "prob":
        return f"{x:.3f}"
    if kind == "rate":
        return f"{x:.3g}" if 0 < abs(x) < 0.01 else f"{x:.3f}"
    return f"{x:.4g}"


def _column_kind(name: str, series: pd.Series) -> str:
    if name in ("successes", "trials", "trials_needed", "replicates", "flagged"):
        return "int"
    if name.startswith("rank_"):
        return "rank"
    if name.startswith("prob_") or name in ("p_value", "shrinkage"):
        return "prob"
    if name in (
        "observed_rate",
        "posterior_mean",
        "posterior_median",
        "lower",
        "upper",
        "benchmark",
    ) or name.startswith(("lower_", "upper_")):
        return "rate"
    if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
        return "num"
    return "t"


@dataclass
class Table:
    """A table ready for the page: columns (label, kind) and rows of cells (text, class)."""

    columns: list[dict]
    rows: list[dict]


def page_table(
    frame: pd.DataFrame,
    *,
    labels: Mapping[str, str] | None = None,
    row_class: Callable[[dict], str] | None = None,
    kinds: Mapping[str, str] | None = None,
) -> Table:
    """Turn a DataFrame into a page table, every value formatted as text."""
    labels = dict(labels or {})
    kinds = dict(kinds or {})
    cols = list(frame.columns)
    col_kinds = {c: kinds.get(c) or _column_kind(str(c), frame[c]) for c in cols}
    columns = [
        {"label": labels.get(str(c), str(c)), "kind": "num" if col_kinds[c] != "t" else "t"}
        for c in cols
    ]
    rows = []
    for record in frame.to_dict(orient="records"):
        cells = []
        for c in cols:
            cls = "t" if col_kinds[c] == "t" else ""
            if c == "target_flag":
                cls = "t flag"
            cells.append({"text": fmt(record[c], col_kinds[c]), "cls": cls})
        rows.append({"cells": cells, "cls": row_class(record) if row_class else "", "gap": None})
    return Table(columns, rows)


def add_gap(table: Table, text: str, at: int) -> None:
    """A row that says what is left out between the rows shown."""
    table.rows.insert(at, {"gap": text, "cells": [], "cls": ""})


def pretty(value) -> str:
    """A recorded value as text: numbers formatted, lists and dicts as JSON, None empty."""
    if isinstance(value, dict | list) and not value:
        return "none"
    if isinstance(value, dict | list):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, float):
        return fmt(value)
    return "" if value is None else str(value)


__all__ = ["Table", "add_gap", "fmt", "page_table", "pretty"]
