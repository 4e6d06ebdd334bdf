"""Every option of every command, declared once.

One :class:`Option` per setting holds its name, default, constraint and help. From these
declarations follow, with nothing written out twice:

- the API keywords of :func:`workbench.api.fit` (its signature and numpydoc docstring),
- the command-line flags and their help (``--name-with-dashes``, see :mod:`workbench.cli`),
- the validation, with one error format that speaks the caller's language (``--level`` on
  the command line, ``level=`` in Python; see :func:`spelling`),
- the ``settings`` of run.json and the report's reproduce command.

Constraints follow scikit-learn's parameter constraints in spirit: a value is checked when it
enters (text from the command line or a Python value), normalised (``"0.2"`` becomes 0.2) and
either accepted or refused with what is allowed. An unknown key is refused with the list of
known ones, never dropped.
"""

from __future__ import annotations

import contextlib
import contextvars
import math
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field

from .models.exceptions import ParameterError

#: How option names are spelled in messages: "api" (``level=``) or "cli" (``--level``).
_SPELLING: contextvars.ContextVar[str] = contextvars.ContextVar("spelling", default="api")

#: Largest seed accepted: numpy's generators take any non-negative integer, but run.json,
#: posterior.nc attributes and PyMC's per-chain seeds need it to fit an unsigned 32-bit int.
MAX_SEED = 2**32 - 1


@contextlib.contextmanager
def spelling(style: str) -> Iterator[None]:
    """Within the block, messages name options as the command line does (``"cli"``)."""
    token = _SPELLING.set(style)
    try:
        yield
    finally:
        _SPELLING.reset(token)


#: The command line being run (set by the CLI), recorded in run.json; None from Python.
_COMMAND: contextvars.ContextVar[str | None] = contextvars.ContextVar("command", default=None)


@contextlib.contextmanager
def invoked_as(command: str) -> Iterator[None]:
    """Within the block, run folders record ``command`` as the step that made them."""
    token = _COMMAND.set(command)
    try:
        yield
    finally:
        _COMMAND.reset(token)


def current_command() -> str | None:
    return _COMMAND.get()


#: Flags a command spells differently (``workbench predict --trials`` is ``predict_trials``).
_ALIASES: contextvars.ContextVar[dict] = contextvars.ContextVar("aliases", default={})


@contextlib.contextmanager
def aliases(**flags: str) -> Iterator[None]:
    """Within the block, messages name option ``name`` by the flag ``flags[name]``."""
    token = _ALIASES.set({**_ALIASES.get(), **flags})
    try:
        yield
    finally:
        _ALIASES.reset(token)


def flag_of(name: str) -> str:
    """``target_accept`` -> ``--target-accept`` (or the flag the current command uses)."""
    return _ALIASES.get().get(name) or "--" + name.replace("_", "-")


def label(name: str) -> str:
    """An option's name as the current caller writes it."""
    return flag_of(name) if _SPELLING.get() == "cli" else f"{name}="


# -- constraints --------------------------------------------------------------------------------


def _fail(name: str, value: object, why: str) -> ParameterError:
    shown = value if isinstance(value, str) else repr(value)
    if _SPELLING.get() == "cli":
        return ParameterError(f"{flag_of(name)} {shown}: {why}.")
    return ParameterError(f"{name}={value!r}: {why}.")


@dataclass(frozen=True)
class Number:
    """A real or whole number within bounds; text is parsed strictly (no ``1_0``, no NaN)."""

    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    whole: bool = False
    example: str = ""

    def describe(self) -> str:
        kind = "a whole number" if self.whole else "a number"
        if self.low is not None and self.high is not None:
            left = "(" if self.low_open else "["
            right = ")" if self.high_open else "]"
            return f"{kind} in {left}{self.low:g}, {self.high:g}{right}"
        if self.low is not None:
            return f"{kind} {'>' if self.low_open else '>='} {self.low:g}"
        if self.high is not None:
            return f"{kind} {'<' if self.high_open else '<='} {self.high:g}"
        return kind

    def __call__(self, name: str, value: object) -> float | int:
        allowed = self.describe() + (f", e.g. {self.example}" if self.example else "")
        number = _parse_number(value, whole=self.whole)
        if number is None:
            raise _fail(name, value, f"must be {allowed}")
        if self.low is not None and (number < self.low or (self.low_open and number == self.low)):
            raise _fail(name, value, f"must be {allowed}")
        if self.high is not None and (
            number > self.high or (self.high_open and number == self.high)
        ):
            raise _fail(name, value, f"must be {allowed}")
        return number


def _parse_number(value: object, *, whole: bool) -> float | int | None:
    """The number a value stands for, or None. Text: ASCII digits, sign, point, exponent."""
    if isinstance(value, bool):
        return None
    if isinstance(value, str):
        text = value.strip()
        if not text or not text.isascii() or "_" in text:
            return None
        try:
            number = int(text) if whole and text.lstrip("+-").isdigit() else float(text)
        except ValueError:
            return None
    elif isinstance(value, int):
        number = value
    else:
        try:
            number = float(value)  # numpy scalars
        except (TypeError, ValueError):
            return None
    if isinstance(number, float):
        if not math.isfinite(number):
            return None
        if whole:
            if not number.is_integer():
                return None
            number = int(number)
    return number


@dataclass(frozen=True)
class Pair:
    """Two numbers, each under the same constraint (a prior's two parameters)."""

    each: Number

    def describe(self) -> str:
        return f"two numbers, each {self.each.describe()}"

    def __call__(self, name: str, value: object) -> tuple:
        items = value.split() if isinstance(value, str) else value
        try:
            items = list(items)
        except TypeError:
            items = [items]
        if len(items) != 2:
            raise _fail(name, value, f"must be {self.describe()}")
        return tuple(self.each(name, v) for v in items)


@dataclass(frozen=True)
class OneOf:
    """One of a fixed set of words."""

    choices: tuple[str, ...]

    def describe(self) -> str:
        return "one of " + ", ".join(self.choices)

    def __call__(self, name: str, value: object) -> str:
        if not isinstance(value, str) or value not in self.choices:
            raise _fail(name, value, f"must be {self.describe()}")
        return value


@dataclass(frozen=True)
class Text:
    """A non-empty text (a column name, a path)."""

    def describe(self) -> str:
        return "a non-empty text"

    def __call__(self, name: str, value: object) -> str:
        text = str(value) if not isinstance(value, str) and value is not None else value
        if not isinstance(text, str) or not text.strip():
            raise _fail(name, value, "must be a non-empty text")
        if "\x00" in text:
            raise _fail(name, value, "must not contain a NUL character")
        return text


@dataclass(frozen=True)
class Texts:
    """Zero or more texts, each non-empty and different (column or group names)."""

    comma: bool = False  # "A,B,C" is split on commas (group names), else on whitespace

    def describe(self) -> str:
        return "names separated by commas" if self.comma else "one or more names"

    def __call__(self, name: str, value: object) -> tuple[str, ...]:
        if isinstance(value, str):
            parts = value.split(",") if self.comma else value.split()
        else:
            parts = list(value)
        items = tuple(Text()(name, str(p).strip()) for p in parts if str(p).strip())
        seen = set()
        for item in items:
            if item in seen:
                raise _fail(name, value, f"names {item!r} twice; give each once")
            seen.add(item)
        return items


@dataclass(frozen=True)
class Address:
    """A Dask scheduler's address; a connected ``distributed.Client`` gives its own."""

    def describe(self) -> str:
        return "a scheduler address (tcp://HOST:8786) or, from Python, a distributed.Client"

    def __call__(self, name: str, value: object) -> str:
        scheduler = getattr(value, "scheduler", None)
        if not isinstance(value, str) and isinstance(getattr(scheduler, "address", None), str):
            value = scheduler.address  # only the address is a setting (run.json)
        return Text()(name, value)


@dataclass(frozen=True)
class Switch:
    """True or False (on the command line: a flag that takes no value)."""

    def describe(self) -> str:
        return "True or False"

    def __call__(self, name: str, value: object) -> bool:
        if isinstance(value, bool):
            return value
        if isinstance(value, int) and value in (0, 1):
            return bool(value)
        raise _fail(name, value, "must be True or False")


@dataclass(frozen=True)
class Optional:
    """None (the option is off, or takes its value from elsewhere), or a value of ``inner``."""

    inner: object

    def describe(self) -> str:
        return self.inner.describe()

    def __call__(self, name: str, value: object):
        if value is None:
            return None
        return self.inner(name, value)


# -- the declarations ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Option:
    """One setting: its name (API keyword, run.json key; CLI flag with dashes) and rules."""

    name: str
    default: object
    check: object
    help: str
    group: str
    metavar: str | tuple[str, ...] | None = None
    #: the value used when the option is left out, as the help says it (when not ``default``)
    default_text: str | None = None

    @property
    def flag(self) -> str:
        return flag_of(self.name)

    @property
    def takes(self) -> str:
        """How the command line takes it: "switch", "pair", "list" or "one"."""
        c = self.check.inner if isinstance(self.check, Optional) else self.check
        if isinstance(c, Switch):
            return "switch"
        if isinstance(c, Pair):
            return "pair"
        if isinstance(c, Texts) and not c.comma:
            return "list"
        return "one"

    def validate(self, value: object):
        return self.check(self.name, value)


RATE = Number(0, 1, low_open=True, high_open=True)
POSITIVE = Number(0, None, low_open=True)
#: a Beta prior's parameters: positive (proper) and at most 1e6 (beyond it the prior alone
#: fixes the rate to six digits, and numpy's Beta sampler fails near 1e308)
PRIOR_SIZE = Number(0, 1e6, low_open=True)
MODELS = ("beta-binomial", "no-pooling", "complete-pooling", "logit-normal", "nested")
ENGINES = ("auto", "exact", "mcmc", "latent")
BETTER = ("higher", "lower")


def _options(*items: Option) -> dict[str, Option]:
    return {o.name: o for o in items}


#: columns of the input table
COLUMN_OPTIONS = _options(
    Option("group", "group", Text(), "column naming the group", "columns", "COL"),
    Option("successes", "successes", Text(), "column of success counts", "columns", "COL"),
    Option("trials", "trials", Text(), "column of trial counts", "columns", "COL"),
    Option(
        "outcome", None, Optional(Text()),
        "instead of counts: column of one outcome per row (1/0, true/false, yes/no); rows are"
        " counted per group", "columns", "COL", "none: counts are given",
    ),
    Option(
        "covariates", (), Texts(),
        "covariate columns for --model logit-normal or nested: numeric, or text (a factor, coded"
        " against a reference level); one value per group, or varying within groups (trial-"
        "level case mix: rows summed by group and covariate pattern); standardised before"
        " fitting", "columns", "COL",
        "none",
    ),
    Option(
        "reference_level", (), Texts(),
        "reference level of a text covariate, as COL=LEVEL (text covariates become 0/1"
        " indicators against it; effects are odds ratios against it)", "columns", "COL=LEVEL",
        "the level with the most trials",
    ),
    Option(
        "parent", None, Optional(Text()),
        "column naming each group's parent (a region for stores; one per group) for --model"
        " nested", "columns", "COL", "none",
    ),
    Option(
        "query", None, Optional(Text()),
        "read the counts with this SQL (DuckDB), over a DuckDB database file given as the data"
        " or over the data file as the view 'data'; its result has the group and count (or"
        " outcome) columns", "columns", "SQL", "none",
    ),
)

#: the model, its priors and how its posterior is computed
MODEL_OPTIONS = _options(
    Option(
        "model", "beta-binomial", OneOf(MODELS),
        "which model to fit. beta-binomial pools partially; no-pooling treats each group"
        " alone; complete-pooling gives every group one shared rate; logit-normal and nested"
        " pool on the log-odds scale (with covariates, and parents for nested)", "model",
    ),
    Option(
        "engine", "auto", OneOf(ENGINES),
        "how the posterior is computed: exact (quadrature / closed forms), mcmc (PyMC NUTS on"
        " the population parameters, group rates integrated out) or latent (NUTS over every"
        " group's rate too, logit-normal and nested); auto picks the first the model has",
        "model",
    ),
    Option(
        "beta_prior", (1.0, 1.0), Pair(PRIOR_SIZE),
        "Beta(A, B) prior of each rate for no-pooling and complete-pooling (1 1 is uniform;"
        " 0.5 0.5 is the Jeffreys prior)", "model", ("A", "B"),
    ),
    Option(
        "mu_prior", (1.0, 1.0), Pair(PRIOR_SIZE),
        "beta-binomial: Beta(A, B) prior of the population mean rate", "model", ("A", "B"),
    ),
    Option(
        "kappa_prior", (20.0, 3.0), Pair(Number(0, 1e6, low_open=True)),
        "beta-binomial: LogNormal prior of the concentration, by its median and log-scale sd"
        " (20 3 allows both weak and strong pooling)", "model", ("MEDIAN", "LOGSD"),
    ),
    Option(
        "sigma_prior", 1.0, Number(0, 1e3, low_open=True),
        "logit-normal, nested: HalfNormal(SCALE) prior of the between-group sd of log-odds",
        "model", "SCALE",
    ),
    Option(
        "tau_prior", 1.0, Number(0, 1e3, low_open=True),
        "nested: HalfNormal(SCALE) prior of the between-parent sd of log-odds", "model", "SCALE",
    ),
)

#: how the posterior is sampled and cross-checked
SAMPLING_OPTIONS = _options(
    Option(
        "draws", None, Optional(Number(1, 1_000_000, whole=True)),
        "draws per chain kept", "sampling", "N",
        "1000; exact engines on more than 25,000 groups keep fewer, at most 1e8 values of"
        " theta, as their intervals come from closed forms",
    ),
    Option("tune", 1000, Number(0, 1_000_000, whole=True),
           "mcmc: warm-up steps per chain, discarded", "sampling", "N"),
    Option("chains", 4, Number(1, 64, whole=True), "number of chains", "sampling", "N"),
    Option(
        "target_accept", None, Optional(Number(0.5, 1, high_open=True)),
        "mcmc: NUTS target acceptance", "sampling", "P",
        "0.9; 0.99 for nested, whose between-parent sd often sits near zero",
    ),
    Option(
        "seed", None, Optional(Number(0, MAX_SEED, whole=True)),
        "random seed; the one used is recorded in the run record", "sampling", "N",
        "a fresh one (the demo: 1)",
    ),
    Option(
        "verify", False, Switch(),
        "also run the other engine (or a second independent run) and report per-group"
        " agreement in Monte Carlo standard errors", "sampling",
    ),
    Option(
        "retry", False, Switch(),
        "if the verdict is not-ready, apply the first remedy once and refit (the record says"
        " so)", "sampling",
    ),
)

#: the tables computed from the posterior
RESULT_OPTIONS = _options(
    Option("level", 0.95, RATE, "mass of the central intervals", "results", "L"),
    Option(
        "target", None, Optional(RATE),
        "a target rate: adds prob_above_target and the target flags", "results", "P", "none",
    ),
    Option(
        "predict_trials", None, Optional(Number(1, 10**12, whole=True)),
        "also predict successes in M future trials per group, as 'workbench predict' does",
        "results", "M", "none",
    ),
    Option(
        "checks", True, Switch(),
        "posterior predictive checks and held-out-group predictions (--no-checks skips them)",
        "results",
    ),
    Option(
        "replicates", 1000, Number(1, 100_000, whole=True),
        "posterior draws used for replicated data sets, thinned evenly", "results", "N",
    ),
    Option(
        "p_bounds", (0.01, 0.99), Pair(RATE),
        "a posterior predictive p-value below LOW or above HIGH reads misfit", "results",
        ("LOW", "HIGH"),
    ),
    Option(
        "refit_limit", 50, Number(0, 100_000, whole=True),
        "most groups with high Pareto k given their exact leave-one-group-out value instead of"
        " PSIS, worst first", "results", "N",
    ),
)

#: the ranking step (also 'workbench rank', where a left-out option keeps the recorded one)
RANKING_OPTIONS = _options(
    Option(
        "top", 5, Number(1, None, whole=True),
        "P(in best K) and P(in worst K) per group, K capped at the number of groups",
        "ranking", "K",
    ),
    Option("better", "higher", OneOf(BETTER),
           "which direction of the rate is better; rank 1 is the best", "ranking",
           "higher|lower"),
    Option(
        "fdr", 0.10, Number(0, 1, low_open=True, high_open=True),
        "target flags: largest set whose expected share of false flags is at most Q",
        "ranking", "Q",
    ),
    Option(
        "compare_groups", None, Optional(Texts(comma=True)),
        "groups for the pairwise table", "ranking", "A,B,C", "the best 10 by posterior mean",
    ),
    Option(
        "settle_chance", 0.80, RATE,
        "trials needed: chance that the comparison with the target is settled", "ranking", "C",
    ),
    Option(
        "max_trials", 100_000, Number(1, 10**12, whole=True),
        "trials needed: search up to N more trials", "ranking", "N",
    ),
)

#: where the run folder goes
OUTPUT_OPTIONS = _options(
    Option(
        "out", None, Optional(Text()),
        "run folder to write (replaced whole only if it is an earlier run folder)", "output",
        "DIR", "run-<data file name>",
    ),
    Option("report", False, Switch(),
           "also write the report (one HTML page, and its figures as PNG files) into the run folder", "output"),
)

#: where the work runs
CLUSTER_OPTIONS = _options(
    Option(
        "dask", None, Optional(Address()),
        "read the data file and score the groups on the Dask cluster whose scheduler is at"
        " ADDRESS (needs the dask extra); the model's population fit stays here",
        "cluster", "ADDRESS", "none: everything runs on this machine",
    ),
)

#: ``workbench fit`` and :func:`workbench.api.fit`; run.json "settings" has exactly these keys
FIT_OPTIONS: dict[str, Option] = {
    **COLUMN_OPTIONS,
    **MODEL_OPTIONS,
    **SAMPLING_OPTIONS,
    **RESULT_OPTIONS,
    **RANKING_OPTIONS,
    **OUTPUT_OPTIONS,
    **CLUSTER_OPTIONS,
}

#: options that shape the model's posterior (a second fit with the same ones is the same fit)
CHECK_NAMES = ("replicates", "p_bounds", "refit_limit")
RANK_NAMES = ("top", "better", "fdr", "level", "target", "compare_groups", "settle_chance",
              "max_trials")
PREDICT_NAMES = ("level", "seed")


def known(names: Iterable[str]) -> str:
    return ", ".join(sorted(names))


def refuse_unknown(given: Iterable[str], allowed: Iterable[str], what: str) -> None:
    """ParameterError naming the first unknown key and every known one."""
    allowed = set(allowed)
    unknown = [k for k in given if k not in allowed]
    if unknown:
        raise ParameterError(
            f"{what} has no option {unknown[0]!r}"
            + (f" (nor {', '.join(map(repr, unknown[1:]))})" if len(unknown) > 1 else "")
            + f"; the known ones are: {known(allowed)}."
        )


def validate(values: Mapping[str, object], declared: Mapping[str, Option] = FIT_OPTIONS,
             *, what: str = "fit") -> dict:
    """Every declared option, checked and normalised; left-out ones take their default."""
    refuse_unknown(values, declared, what)
    out = {}
    for name, option in declared.items():
        value = values.get(name, option.default)
        out[name] = option.validate(value)
    return out


@dataclass(frozen=True)
class FitSettings:
    """The settings of one fit, checked: what run.json records under "settings".

    Build with :meth:`from_options`; every key of :data:`FIT_OPTIONS` is present.
    """

    values: dict = field(default_factory=dict)

    @classmethod
    def from_options(cls, **options) -> FitSettings:
        settings = validate(options)
        _check_combination(settings)
        return cls(settings)

    def __getitem__(self, name: str):
        return self.values[name]

    def get(self, name: str, default=None):
        return self.values.get(name, default)

    def replace(self, **changes) -> FitSettings:
        return FitSettings.from_options(**{**self.values, **changes})

    def record(self) -> dict:
        """JSON-ready: tuples as lists."""
        return {k: list(v) if isinstance(v, tuple) else v for k, v in self.values.items()}

    def changed(self) -> dict:
        """The options that differ from their defaults (for the reproduce command)."""
        return {
            name: value
            for name, value in self.values.items()
            if value != FIT_OPTIONS[name].validate(FIT_OPTIONS[name].default)
        }


def _check_combination(s: Mapping[str, object]) -> None:
    """Rules that tie options together."""
    if s["outcome"] is not None and (s["successes"] != "successes" or s["trials"] != "trials"):
        raise ParameterError(
            f"give either {label('outcome')} (one row per trial) or {label('successes')}/"
            f"{label('trials')} (counts), not both."
        )
    if s["outcome"] is None and s["successes"] == s["trials"]:
        raise ParameterError(
            f"{label('successes')} and {label('trials')} both name column {s['successes']!r};"
            " give the column of successes and the column of trials."
        )
    for item in s["reference_level"]:
        column = item.partition("=")[0].strip()
        if column not in s["covariates"]:
            raise ParameterError(
                f"{label('reference_level')} {item}: {column!r} is not among the covariates"
                f" {list(s['covariates'])}; name it in {label('covariates')} too, and give the"
                " reference as COLUMN=LEVEL.")
    low, high = s["p_bounds"]
    if not low < 0.5 < high:
        raise ParameterError(
            f"{label('p_bounds')} {low:g} {high:g}: need LOW < 0.5 < HIGH; the usual pair is"
            " 0.01 0.99."
        )


__all__ = [
    "FIT_OPTIONS",
    "FitSettings",
    "Option",
    "flag_of",
    "label",
    "refuse_unknown",
    "spelling",
    "validate",
]
