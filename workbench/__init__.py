"""workbench: rank success rates across many small groups, honestly.

The public API lives in :mod:`workbench.api`; the command line in :mod:`workbench.cli`.
"""

from __future__ import annotations

from models import (
    BetaBinomial,
    CompletePooling,
    ConvergenceWarning,
    DataError,
    GroupCounts,
    NoPooling,
    NotFittedError,
    ParameterError,
    SamplingError,
    WorkbenchError,
)

from .api import Run, RunFolder, fit, load_groups, open_run, write_run

__all__ = [
    "BetaBinomial",
    "CompletePooling",
    "ConvergenceWarning",
    "DataError",
    "GroupCounts",
    "NoPooling",
    "NotFittedError",
    "ParameterError",
    "Run",
    "RunFolder",
    "SamplingError",
    "WorkbenchError",
    "fit",
    "load_groups",
    "open_run",
    "write_run",
]
