"""Compare pooling choices by how well each predicts a group it has not seen.

For every run: leave-one-group-out PSIS-LOO on the group-integrated log-likelihood
``y_group`` (see :mod:`workbench.ppc`; high-k groups refitted exactly where cheap). All runs
must come from the same data (same fingerprint), so the per-group values pair up. The
difference between two models and its standard error come from the paired per-group
differences d_j: difference = sum_j d_j, se = sqrt(G var(d_j)) (Vehtari, Gelman & Gabry 2017;
the formula ``az.compare`` uses), computed here because the per-group values may include
exact refits. The reading: a difference beyond two standard errors is a clear preference;
within two, no clear preference. A difference under 4 reads as no clear preference
whatever its standard error, and with few groups (under about 100) the standard error itself
is rough (Sivula et al. 2020): on data where every group has the same rate, complete pooling
often beats the beta-binomial model by a fraction of a nat in every group, which gives a tiny
difference with a tinier standard error.

Files: ``comparison.csv`` (one row per run, best first), ``comparison_pointwise.csv``
(one row per group and run) and ``comparison.json`` (the table, the readings, notes), each
written atomically; comparison.json last.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..models import DataError, attr
from .checks import CheckSettings, GroupLoo, leave_one_group_out

#: Columns of comparison.csv, in order.
COLUMNS = [
    "rank",
    "run",
    "model",
    "engine",
    "elpd_loo",
    "se",
    "p_loo",
    "elpd_difference",
    "difference_se",
    "difference_z",
    "preference",
    "groups",
    "high_k_groups",
    "exact_groups",
    "unresolved_groups",
    "final",
]

#: Standard errors beyond which a difference reads as a clear preference (common practice).
CLEAR = 2.0
#: Differences of elpd below this are read as no clear preference whatever their standard
#: error: the normal approximation of the difference is poor there (Sivula et al. 2020).
SMALL = 4.0


@dataclass
class Comparison:
    """Models side by side on held-out groups."""

    table: pd.DataFrame
    pointwise: pd.DataFrame
    readings: list[str]
    notes: list[str] = field(default_factory=list)
    info: dict = field(default_factory=dict)

    @property
    def best(self) -> str:
        return str(self.table["run"].iloc[0])

    def to_dict(self) -> dict:
        return {
            "workbench_comparison": 1,
            **self.info,
            "best": self.best,
            "criterion": "elpd_loo: expected log predictive density of a held-out group"
            " (PSIS-LOO on y_group, leave one group out; larger is better)",
            "clear_preference_beyond_se": CLEAR,
            "no_preference_below_difference": SMALL,
            "models": self.table.replace({np.nan: None}).to_dict(orient="records"),
            "readings": self.readings,
            "notes": self.notes,
        }


def _fingerprint(idata) -> str:
    return str(attr(idata, "data_fingerprint", ""))


def check_same_data(posteriors: Mapping[str, object]) -> str:
    """The shared data fingerprint, or DataError naming the two runs that differ."""
    names = list(posteriors)
    first = _fingerprint(posteriors[names[0]])
    for name in names[1:]:
        other = _fingerprint(posteriors[name])
        if other != first:
            g0 = int(posteriors[names[0]].posterior.sizes["group"])
            g1 = int(posteriors[name].posterior.sizes["group"])
            raise DataError(
                f"runs {names[0]!r} and {name!r} were fitted to different data (fingerprints"
                f" {first[:12]} with {g0} groups vs {other[:12]} with {g1} groups);"
                " compare runs fitted to the same file."
            )
    return first


def compare_posteriors(
    posteriors: Mapping[str, object],
    *,
    final: Mapping[str, bool] | None = None,
    settings: CheckSettings | None = None,
    loos: Mapping[str, GroupLoo] | None = None,
) -> Comparison:
    """Compare posteriors (run label -> InferenceData) fitted to the same data.

    ``loos`` may hold already computed leave-one-group-out results, by the same labels.
    """
    if len(posteriors) < 2:
        raise DataError(
            f"a comparison needs at least two runs; got {len(posteriors)}. Give two or more"
            " run folders, or --data FILE with --models."
        )
    fingerprint = check_same_data(posteriors)
    loos = dict(loos or {})
    for name, idata in posteriors.items():
        if name not in loos:
            loos[name] = leave_one_group_out(idata, settings)
    for name, loo in loos.items():
        if not loo.available:
            raise DataError(
                f"run {name!r} has no leave-one-group-out predictive: {'; '.join(loo.notes)}"
            )
    final = dict(final or {})
    by_group = {
        name: loo.table.set_index("group")["elpd_loo"] for name, loo in loos.items()
    }
    order = sorted(loos, key=lambda k: -loos[k].elpd_loo)
    best = order[0]
    rows = []
    readings = []
    for rank, name in enumerate(order, start=1):
        loo = loos[name]
        idata = posteriors[name]
        d = (by_group[name] - by_group[best]).to_numpy()
        diff = float(d.sum())
        diff_se = float(np.sqrt(len(d) * np.var(d)))
        z = diff / diff_se if diff_se > 0 else (0.0 if diff == 0 else -np.inf)
        rows.append(
            {
                "rank": rank,
                "run": name,
                "model": attr(idata, "model"),
                "engine": attr(idata, "engine"),
                "elpd_loo": loo.elpd_loo,
                "se": loo.se,
                "p_loo": loo.p_loo,
                "elpd_difference": diff,
                "difference_se": diff_se if name != best else np.nan,
                "difference_z": z if name != best else np.nan,
                "preference": "best" if name == best else preference(-diff, diff_se),
                "groups": loo.groups,
                "high_k_groups": len(loo.high_k),
                "exact_groups": int((loo.table["loo_method"] == "exact").sum()),
                "unresolved_groups": len(loo.unresolved),
                "final": bool(final.get(name, True)),
            }
        )
        if name != best:
            readings.append(_reading(best, name, -diff, diff_se))
    table = pd.DataFrame(rows)[COLUMNS]
    pointwise = pd.concat(
        [
            loos[name].table[["group", "elpd_loo", "loo_method", "pareto_k"]].assign(run=name)
            for name in order
        ],
        ignore_index=True,
    )[["run", "group", "elpd_loo", "loo_method", "pareto_k"]]
    pointwise["difference_from_best"] = (
        pointwise["elpd_loo"].to_numpy()
        - by_group[best].reindex(pointwise["group"]).to_numpy()
    )
    notes = []
    for name in order:
        if loos[name].unresolved:
            notes.append(
                f"{name}: {len(loos[name].unresolved)} groups with high Pareto k were not refitted;"
                " its elpd_loo may be optimistic."
            )
        if not final.get(name, True):
            notes.append(f"{name}: convergence verdict not-ready; its numbers are provisional.")
    groups = loos[best].groups
    if groups < 100:
        notes.append(
            f"only {groups} groups: the standard errors of the differences are rough"
            " (Sivula et al. 2020); read a difference near two standard errors with care."
        )
    info = {
        "data_fingerprint": fingerprint,
        "groups": groups,
        "likelihood": "y_group (group-integrated; leave one group out)",
    }
    return Comparison(table, pointwise, readings, notes, info)


def preference(gap: float, se: float) -> str:
    """How a gap (best minus other, >= 0) with standard error ``se`` reads.

    ``identical``; ``within-two-se`` (no clear preference); ``small-difference`` (beyond two
    standard errors but under ``SMALL``: no clear preference); ``clear``.
    """
    if gap == 0 and se == 0:
        return "identical"
    z = gap / se if se > 0 else np.inf
    if z <= CLEAR:
        return "within-two-se"
    if gap < SMALL:
        return "small-difference"
    return "clear"


def _reading(best: str, other: str, gap: float, se: float) -> str:
    kind = preference(gap, se)
    z = gap / se if se > 0 else np.inf
    if kind == "identical":
        return f"{best} and {other} predict held-out groups identically."
    if kind == "within-two-se":
        return (
            f"{best} and {other} are within two standard errors ({gap:.1f} ± {se:.1f},"
            f" {z:.1f} standard errors): no clear preference."
        )
    if kind == "small-difference":
        return (
            f"{best} and {other} differ by only {gap:.1f} ± {se:.1f} ({z:.1f} standard errors,"
            f" but under {SMALL:g}, where the standard error is unreliable): no clear preference."
        )
    return (
        f"{best} predicts held-out groups better than {other} by {gap:.1f} ± {se:.1f}"
        f" ({z:.1f} standard errors)."
    )


__all__ = ["COLUMNS", "Comparison", "check_same_data", "compare_posteriors", "preference"]
