"""workbench: rank success rates across many small groups, honestly.

The public API lives in :mod:`workbench.api`; the command line in :mod:`workbench.cli`.
"""

from __future__ import annotations

from ._layer import load_model_layer

load_model_layer()  # the repository's models/ folder, importable only as workbench.models

from .api import fit, load_groups, open_run, write_run  # noqa: E402
from .models import (  # noqa: E402
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
from .results import Run, RunFolder  # noqa: E402

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
