"""Covariate columns: numbers stay numbers, text becomes indicators against a reference level.

A covariate column whose values are all numbers is numeric. A column whose values are all
text (no value reads as a number), or one named in ``reference_level``, is a factor: each
level other than the reference becomes a 0/1 indicator column named ``COLUMN=LEVEL``. The
reference is the level given as ``COLUMN=LEVEL`` or else the level with the most trials
(ties: the first in sorted order). A column mixing numbers and text is refused by row: a
stray word in a numeric column is never read as a level, nor a number as a category.

Whether a covariate is group-level or trial-level follows from the data: a column whose
value differs between rows of one group makes the fit trial-level, its rows aggregated by
(group, covariate pattern) into cells (:class:`workbench.models.CaseMix`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..models import DataError
from ..options import label

#: Most levels a factor may have: more is usually an identifier given as a covariate.
MAX_LEVELS = 50


def parse_references(items, covariates) -> dict[str, str]:
    """``("COL=LEVEL", ...)`` -> {COL: LEVEL}; each COL must be one of the covariates."""
    out: dict[str, str] = {}
    for item in items:
        column, sep, level = str(item).partition("=")
        column, level = column.strip(), level.strip()
        if not sep or not column or not level:
            raise DataError(
                f"{label('reference_level')} {item!r}: write COLUMN=LEVEL, e.g. channel=phone.")
        if column not in covariates:
            raise DataError(
                f"{label('reference_level')} {item!r}: {column!r} is not among the covariates"
                f" {list(covariates)}; add it to {label('covariates')} or drop the reference.")
        out[column] = level
    return out


def _texts(values: pd.Series) -> pd.Series:
    return values.where(values.notna(), "").astype(str).str.strip()


def code_columns(table: pd.DataFrame, columns, trials: np.ndarray, references: dict,
                 report) -> tuple[dict[str, np.ndarray], dict]:
    """The numeric model columns of the covariates, and the coding (run.json's record).

    ``report(bad_rows, describe)`` records one problem per refused row.
    """
    x: dict[str, np.ndarray] = {}
    coding: dict[str, dict] = {}
    for c in columns:
        text = _texts(table[c])
        values = pd.to_numeric(text, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
        raw = table[c].to_numpy(dtype=object)
        blank = np.flatnonzero(text.eq("").to_numpy())
        report(blank, lambda i, c=c: f"covariate column {c!r} is blank; give every row a value")
        filled = ~text.eq("").to_numpy()
        number = np.isfinite(values) & filled
        if c not in references and number[filled].all():
            x[c] = values
            coding[c] = {"kind": "numeric"}
            continue
        if c not in references and number.any():
            text_rows = filled & ~number
            few_text = text_rows.sum() <= number.sum()
            odd = np.flatnonzero(text_rows if few_text else number)
            others = "numbers" if few_text else "text levels"
            report(odd, lambda i, c=c, raw=raw, others=others: (
                f"covariate column {c!r} has {str(raw[i])!r} where its other values are"
                f" {others}; a covariate is numeric or a factor: fix the value, or name the"
                f" column's reference level ({label('reference_level')} {c}=LEVEL) to read"
                " every value as a level"))
            continue
        indicators, record = _factor(c, text.to_numpy(dtype=object), trials, references.get(c))
        x.update(indicators)
        coding[c] = record
    return x, coding


def _factor(column: str, levels_seen: np.ndarray, trials: np.ndarray, given: str | None):
    filled = levels_seen != ""
    weight = pd.Series(trials[filled].astype(float)).groupby(levels_seen[filled]).sum()
    levels = sorted(weight.index)
    if len(levels) > MAX_LEVELS:
        raise DataError(
            f"covariate column {column!r} has {len(levels)} distinct text values, more than the"
            f" {MAX_LEVELS} levels a factor may have; is it an identifier? Give a numeric column"
            " or group its values into fewer levels.")
    if len(levels) < 2:
        raise DataError(
            f"covariate column {column!r} has one level ({levels[0]!r}) across all rows; drop"
            " it or give a column that varies.")
    if given is not None and given not in weight.index:
        raise DataError(
            f"{label('reference_level')} {column}={given}: {given!r} is not a level of"
            f" {column!r}; its levels are {levels}.")
    if given is None:
        top = weight.max()
        reference = next(v for v in levels if weight[v] == top)
    else:
        reference = given
    others = [v for v in levels if v != reference]
    indicators = {f"{column}={v}": (levels_seen == v).astype(float) for v in others}
    record = {
        "kind": "factor",
        "reference": reference,
        "reference_from": "given" if given is not None else "the level with the most trials",
        "levels": others,
        "indicators": list(indicators),
        "trials_by_level": {str(v): float(weight[v]) for v in levels},
    }
    return indicators, record


def varies_within(groups: np.ndarray, x: dict[str, np.ndarray]) -> list[str]:
    """The model columns whose value differs between rows of one group."""
    if not x:
        return []
    frame = pd.DataFrame(x)
    frame["__group"] = groups
    spread = frame.groupby("__group", sort=False).agg(["min", "max"])
    return [c for c in x if (spread[(c, "min")] != spread[(c, "max")]).any()]


def cells_of(groups: np.ndarray, order: pd.Index, y: np.ndarray, n: np.ndarray,
             x: dict[str, np.ndarray]):
    """Rows summed by (group, covariate pattern): the cells of a trial-level fit.

    ``order`` is the groups' order in the counts; returns a :class:`CaseMix`.
    """
    from ..models import CaseMix

    names = list(x)
    frame = pd.DataFrame(x)
    frame["__group"] = pd.Categorical(groups, categories=order).codes
    frame["__y"] = y
    frame["__n"] = n
    summed = frame.groupby(["__group", *names], sort=True, observed=True).agg(
        y=("__y", "sum"), n=("__n", "sum")).reset_index()
    return CaseMix(summed["__group"].to_numpy(), summed["y"].to_numpy(), summed["n"].to_numpy(),
                   summed[names].astype(float).reset_index(drop=True))
