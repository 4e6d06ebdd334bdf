"""The exception tree shared by the model layer and the workbench.

::

    WorkbenchError            base; the CLI catches this and exits 2
    ├── DataError             input table unusable (also a ValueError)
    ├── ParameterError        a setting out of range (also a ValueError)
    ├── NotFittedError        a fitted attribute read before fit() (also an AttributeError)
    └── SamplingError         the sampler failed (also a RuntimeError)

    ConvergenceWarning        a UserWarning: diagnostics failed; the run is not final
"""

from __future__ import annotations


class WorkbenchError(Exception):
    """Base of every error this project raises on purpose."""


class DataError(WorkbenchError, ValueError):
    """The input table cannot be used as it is."""


class ParameterError(WorkbenchError, ValueError):
    """A setting is out of range or unknown."""


class NotFittedError(WorkbenchError, AttributeError):
    """A fitted attribute was read before ``fit`` ran."""


class SamplingError(WorkbenchError, RuntimeError):
    """The sampler failed; wraps the foreign error."""


class ConvergenceWarning(UserWarning):
    """Convergence diagnostics failed; results are not final."""


def join_problems(problems: list[str], limit: int = 5) -> str:
    """Join up to ``limit`` problem sentences into one line, counting the rest."""
    shown = "; ".join(problems[:limit])
    extra = len(problems) - limit
    if extra > 0:
        shown += f"; and {extra} more problem{'s' if extra > 1 else ''}"
    return shown
