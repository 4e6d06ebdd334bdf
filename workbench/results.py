"""Results worth holding in a notebook: a fitted run, and a run folder read back.

Both are small objects in the spirit of scipy.stats' result objects: plain attributes, a
short ``repr`` (model, engine, groups, verdict), an HTML view for notebooks (verdict,
population, top and bottom groups) and follow-up methods that take their own settings:
``summary(level=)``, ``ranks(top=)``, ``predict(trials=)``.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .analysis.draws import group_draws
from .analysis.predictions import default_seed, predict
from .analysis.ranks import informative_rank_summary, ranks_table
from .io.inputs import LoadedData
from .io.runfolder import FolderContents
from .models import attr
from .options import FIT_OPTIONS, label


def _check(name: str, value):
    return FIT_OPTIONS[name].validate(value)


def _html(kind: str, facts: dict, population: pd.DataFrame | None, estimates: pd.DataFrame,
          rows: int = 3) -> str:
    """A compact HTML block: verdict, facts, population, top and bottom groups."""
    verdict = facts.get("verdict", "?")
    colour = "#1f6aa5" if verdict == "ready" else "#a8325e"
    head = " &middot; ".join(f"{html.escape(str(k))}: {html.escape(str(v))}"
                             for k, v in facts.items() if k != "verdict")
    parts = [
        f"<div><strong>{html.escape(kind)}</strong> &mdash; verdict "
        f"<strong style='color:{colour}'>{html.escape(str(verdict).upper())}</strong>"
        f"<br><small>{head}</small>"
    ]
    if population is not None and len(population):
        cols = [c for c in ("quantity", "mean", "median", "lower", "upper") if c in population]
        parts.append(population[cols].to_html(index=False, float_format="%.4g", border=0))
    if len(estimates):
        ordered = estimates.sort_values("posterior_mean", ascending=False)
        shown = ordered if len(ordered) <= 2 * rows else pd.concat(
            [ordered.head(rows), ordered.tail(rows)])
        cols = [c for c in ("group", "successes", "trials", "posterior_mean", "lower", "upper",
                            "rank_median", "target_flag") if c in shown]
        parts.append("<small>top and bottom groups by estimate</small>")
        parts.append(shown[cols].to_html(index=False, float_format="%.4g", border=0))
    parts.append("</div>")
    return "\n".join(parts)  # to_html escapes cell text


class _Follow:
    """Follow-up methods shared by a fitted run and a run folder."""

    idata: object
    estimates: pd.DataFrame

    def _closed(self):
        return None

    def _settings(self) -> dict:
        raise NotImplementedError

    def summary(self, level: float | None = None) -> pd.DataFrame:
        """Estimates at another interval mass (default: the run's), with every column."""
        if level is None or _check("level", level) == self._settings()["level"]:
            return self.estimates.copy()
        level = _check("level", level)
        closed = self._closed()
        q = [(1 - level) / 2, 0.5, (1 + level) / 2]
        if closed is not None:
            lower, median, upper = (np.asarray(closed.ppf(p), dtype=float) for p in q)
        else:
            draws = group_draws(self.idata, self.estimates).theta
            lower, median, upper = np.quantile(draws, q, axis=0)
        names = self.idata.posterior["group"].values.astype(str)
        out = self.estimates.copy()
        pos = pd.Series(np.arange(len(names)), index=names)[out["group"].astype(str)].to_numpy()
        out["posterior_median"], out["lower"], out["upper"] = median[pos], lower[pos], upper[pos]
        return out

    def ranks(self, top: int | None = None, better: str | None = None,
              level: float | None = None) -> pd.DataFrame:
        """Ranks with P(best k) for another k (default: the run's ranks table)."""
        s = self._settings()
        top = s["top"] if top is None else _check("top", top)
        better = s["better"] if better is None else _check("better", better)
        level = s["level"] if level is None else _check("level", level)
        draws = group_draws(self.idata, self.estimates, closed=self._closed())
        summary = informative_rank_summary(draws.theta, draws.trials, better=better, top=top,
                                           level=level)
        return ranks_table(draws.names, summary)

    def predict(self, trials: int, level: float | None = None,
                seed: int | None = None) -> pd.DataFrame:
        """Successes in ``trials`` future trials per group and for a new group."""
        s = self._settings()
        trials = _check("predict_trials", trials)
        level = s["level"] if level is None else _check("level", level)
        seed = default_seed(s.get("seed")) if seed is None else _check("seed", seed)
        draws = group_draws(self.idata, self.estimates)
        return predict(self.idata, draws.posterior_mean, trials=trials, level=level,
                       seed=seed).table


@dataclass(repr=False)
class Run(_Follow):
    """A fitted run: the data, the model, and every table computed from its posterior.

    Attributes
    ----------
    loaded : LoadedData
        The counts and the reconciliation of the rows they came from.
    model : estimator
        The fitted estimator (``model.idata_`` is the posterior).
    settings : dict
        Every option of the fit, checked (run.json's "settings").
    estimates : DataFrame
        One row per group: the estimates.csv columns, rank and target columns included.
    population : DataFrame
        Population quantities (population.csv).
    diagnostics : Diagnostics
        The convergence verdict with its reasons and remedies.
    tables, documents : dict
        The other tables and documents of the run folder, by their names in
        :data:`workbench.io.runfolder.FILES`.
    record_parts : dict
        What run.json records beside the settings (ranking, verification, retry, ...).
    """

    loaded: LoadedData
    model: object
    settings: dict
    estimates: pd.DataFrame
    population: pd.DataFrame
    diagnostics: object
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    documents: dict[str, dict] = field(default_factory=dict)
    record_parts: dict[str, object] = field(default_factory=dict)
    messages: list[str] = field(default_factory=list)
    seconds: float = 0.0
    path: Path | None = None

    @property
    def idata(self):
        return self.model.idata_

    @property
    def ready(self) -> bool:
        return self.diagnostics.ready

    @property
    def verdict(self) -> str:
        return self.diagnostics.verdict

    def _settings(self) -> dict:
        return self.settings

    def _closed(self):
        return getattr(self.model, "exact_", None)

    def _facts(self) -> dict:
        return {
            "model": attr(self.idata, "model"),
            "engine": attr(self.idata, "engine"),
            "groups": len(self.estimates),
            "verdict": self.verdict,
            "written to": str(self.path) if self.path else "not written",
        }

    def __repr__(self) -> str:
        f = self._facts()
        return (f"Run(model={f['model']!r}, engine={f['engine']!r}, groups={f['groups']},"
                f" verdict={f['verdict']!r}, path={f['written to']!r})")

    def _repr_html_(self) -> str:
        return _html("workbench run", self._facts(), self.population, self.estimates)


@dataclass(repr=False)
class RunFolder(_Follow):
    """A run folder read back: its record, tables and (read on first use) its posterior."""

    contents: FolderContents

    @property
    def path(self) -> Path:
        return self.contents.path

    @property
    def record(self) -> dict:
        return self.contents.record

    @property
    def estimates(self) -> pd.DataFrame:
        return self.contents.estimates

    @property
    def population(self) -> pd.DataFrame | None:
        return self.contents.tables.get("population")

    @property
    def tables(self) -> dict[str, pd.DataFrame]:
        return self.contents.tables

    @property
    def documents(self) -> dict[str, dict]:
        return self.contents.documents

    @property
    def idata(self):
        return self.contents.idata

    @property
    def final(self) -> bool:
        return self.contents.final

    @property
    def verdict(self) -> str:
        return str(self.record.get("verdict"))

    def _settings(self) -> dict:
        return {name: self.contents.settings.get(name, o.default)
                for name, o in FIT_OPTIONS.items()}

    def _closed(self):
        from .models import closed_form

        return closed_form(self.idata)

    def _facts(self) -> dict:
        return {
            "model": self.record.get("model"),
            "engine": self.record.get("engine"),
            "groups": len(self.estimates),
            "verdict": self.verdict,
            "folder": str(self.path),
        }

    def __repr__(self) -> str:
        f = self._facts()
        return (f"RunFolder({str(self.path)!r}, model={f['model']!r}, engine={f['engine']!r},"
                f" groups={f['groups']}, verdict={f['verdict']!r})")

    def _repr_html_(self) -> str:
        return _html("workbench run folder", self._facts(), self.population, self.estimates)


__all__ = ["Run", "RunFolder", "label"]
