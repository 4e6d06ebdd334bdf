"""GroupCounts: the model layer's own validated input."""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .exceptions import DataError, join_problems


@dataclass(frozen=True)
class GroupCounts:
    """Successes out of trials for each of a set of uniquely named groups.

    Parameters
    ----------
    names : sequence of str
        One non-blank, unique label per group.
    successes, trials : sequence of int
        Counts with ``0 <= successes <= trials``. A group with zero trials is allowed;
        its estimate is whatever the model says about a group it has not seen.
    covariates : DataFrame, optional
        Numeric group-level columns, one row per group in the same order.
    parents : sequence of str, optional
        The parent of each group (a region for stores), for the nested model.
    cells : CaseMix, optional
        Trial-level covariates: the counts of each group split by covariate pattern (one
        cell per group and pattern). The cells' counts must sum to the group's counts; with
        cells, ``covariates`` is None (every covariate lives in the cells).

    Raises
    ------
    DataError
        Naming the group, the value and the fix, for up to five problems at once.
    """

    names: np.ndarray
    successes: np.ndarray
    trials: np.ndarray
    covariates: pd.DataFrame | None = field(default=None, compare=False)
    parents: np.ndarray | None = field(default=None, compare=False)
    cells: CaseMix | None = field(default=None, compare=False)

    def __init__(
        self,
        names: Sequence[str],
        successes: Sequence[int],
        trials: Sequence[int],
        covariates: pd.DataFrame | None = None,
        parents: Sequence[str] | None = None,
        cells: CaseMix | None = None,
    ) -> None:
        names_arr = np.asarray([str(x) for x in names], dtype=object)
        y = _as_counts(successes, "successes", names_arr)
        n = _as_counts(trials, "trials", names_arr)
        if not (len(names_arr) == len(y) == len(n)):
            raise DataError(
                f"names, successes and trials have lengths {len(names_arr)}, {len(y)}, {len(n)};"
                " give one value of each per group."
            )
        if len(names_arr) == 0:
            raise DataError("no groups: the data hold no rows; give at least one group.")
        problems: list[str] = []
        for i in np.flatnonzero(y > n):
            problems.append(
                f"group {names_arr[i]!r}: successes={y[i]} exceeds trials={n[i]};"
                " each group needs 0 <= successes <= trials"
            )
        blank = [i for i, s in enumerate(names_arr) if not s.strip()]
        for i in blank:
            problems.append(f"group number {i + 1} has a blank label; give every group a name")
        uniq, counts = np.unique(names_arr.astype(str), return_counts=True)
        for name in uniq[counts > 1]:
            problems.append(f"group {name!r} appears more than once; sum its rows first")
        if problems:
            raise DataError(join_problems(problems) + ".")
        object.__setattr__(self, "names", names_arr)
        object.__setattr__(self, "successes", y)
        object.__setattr__(self, "trials", n)
        if parents is not None:
            parents = np.asarray([str(p) for p in parents], dtype=object)
            if len(parents) != len(names_arr):
                raise DataError(
                    f"parents has {len(parents)} labels for {len(names_arr)} groups; give one each."
                )
            blank = [names_arr[i] for i, p in enumerate(parents) if not p.strip()]
            if blank:
                raise DataError(
                    f"group {blank[0]!r} has a blank parent label; give every group its parent."
                )
        if cells is not None:
            cells.check(names_arr, y, n)
            if covariates is not None:
                raise DataError("give covariates either per group or in cells, not both.")
        object.__setattr__(self, "covariates", covariates)
        object.__setattr__(self, "parents", parents)
        object.__setattr__(self, "cells", cells)

    @property
    def n_groups(self) -> int:
        """Number of groups."""
        return len(self.names)

    @property
    def observed_rate(self) -> np.ndarray:
        """successes / trials, NaN where a group has no trials."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.trials > 0, self.successes / np.maximum(self.trials, 1), np.nan)

    def fingerprint(self) -> str:
        """SHA-256 of the labels and counts, stable across runs and platforms."""
        h = hashlib.sha256()
        for name, y, n in zip(self.names, self.successes, self.trials, strict=True):
            h.update(f"{name}\x1f{y}\x1f{n}\x1e".encode())
        return h.hexdigest()

    def to_frame(self) -> pd.DataFrame:
        """One row per group: group, successes, trials."""
        return pd.DataFrame(
            {"group": self.names.astype(str), "successes": self.successes, "trials": self.trials}
        )

    def subset(self, keep: np.ndarray) -> GroupCounts:
        """The groups where the boolean mask ``keep`` is true."""
        return GroupCounts(self.names[keep], self.successes[keep], self.trials[keep])


@dataclass(frozen=True)
class CaseMix:
    """Counts by (group, covariate pattern): the cells of a trial-level covariate model.

    ``group`` holds each cell's group index (0 .. groups - 1, cells sorted by it),
    ``successes`` and ``trials`` the cell's counts, ``x`` its covariate values (one numeric
    column per covariate or factor indicator, in the input's units).
    """

    group: np.ndarray
    successes: np.ndarray
    trials: np.ndarray
    x: pd.DataFrame

    def __post_init__(self) -> None:
        g = np.asarray(self.group, dtype=np.int64)
        order = np.argsort(g, kind="stable")
        object.__setattr__(self, "group", g[order])
        object.__setattr__(self, "successes", np.asarray(self.successes, dtype=np.int64)[order])
        object.__setattr__(self, "trials", np.asarray(self.trials, dtype=np.int64)[order])
        object.__setattr__(self, "x", self.x.iloc[order].reset_index(drop=True))

    @property
    def n_cells(self) -> int:
        return len(self.group)

    def starts(self, groups: int) -> np.ndarray:
        """Offsets: the cells of group j are ``starts[j]:starts[j + 1]``."""
        return np.searchsorted(self.group, np.arange(groups + 1)).astype(np.int64)

    def check(self, names: np.ndarray, y: np.ndarray, n: np.ndarray) -> None:
        if not (len(self.group) == len(self.successes) == len(self.trials) == len(self.x)):
            raise DataError("cells: group, successes, trials and x need one entry per cell.")
        if len(self.group) and (self.group.min() < 0 or self.group.max() >= len(names)):
            raise DataError(f"cells: group indices must lie in 0..{len(names) - 1}.")
        if (self.successes < 0).any() or (self.successes > self.trials).any():
            raise DataError("cells: each cell needs 0 <= successes <= trials.")
        sy = np.bincount(self.group, self.successes, minlength=len(names))
        sn = np.bincount(self.group, self.trials, minlength=len(names))
        if not (np.array_equal(sy, y) and np.array_equal(sn, n)):
            i = int(np.flatnonzero((sy != y) | (sn != n))[0])
            raise DataError(
                f"cells of group {names[i]!r} sum to {int(sy[i])}/{int(sn[i])}, not the group's"
                f" {int(y[i])}/{int(n[i])}; the cells must split the group's counts."
            )
        bad = ~np.isfinite(self.x.to_numpy(dtype=float))
        if bad.any():
            raise DataError("cells: covariate values must be finite numbers.")


def _as_counts(values: Sequence[int], what: str, names: np.ndarray) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise DataError(f"{what} must be one-dimensional; got shape {arr.shape}.")
    if arr.dtype.kind in "iu":
        out = arr.astype(np.int64)
    else:
        try:
            fl = arr.astype(float)
        except (TypeError, ValueError) as exc:
            raise DataError(f"{what} must be whole numbers; got {arr[:3].tolist()}...") from exc
        bad = ~np.isfinite(fl) | (fl != np.round(fl))
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            label = names[i] if i < len(names) else i
            raise DataError(
                f"group {label!r}: {what}={arr[i]!r} is not a whole number; counts must be"
                " finite integers."
            )
        out = fl.astype(np.int64)
    if (out < 0).any():
        i = int(np.flatnonzero(out < 0)[0])
        label = names[i] if i < len(names) else i
        raise DataError(f"group {label!r}: {what}={out[i]} is negative; counts must be >= 0.")
    return out
