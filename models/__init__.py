"""The model layer: validated counts in, one posterior format out.

Never imports ``workbench``.
"""

from __future__ import annotations

from ._closed import closed_form
from ._data import CaseMix, GroupCounts
from ._grid import EXACT_TOLERANCE, HyperPrior
from ._model import (
    MODELS,
    SUMMARY_COLUMNS,
    BetaBinomial,
    CompletePooling,
    LogitNormal,
    Nested,
    NoPooling,
    make_model,
)
from ._posterior import (
    add_log_likelihood,
    attr,
    counts_of,
    draw_quantiles,
    draw_share_above,
    log_likelihood_arrays,
    theta_draws,
    versions,
)
from .exceptions import (
    ConvergenceWarning,
    DataError,
    NotFittedError,
    ParameterError,
    SamplingError,
    WorkbenchError,
)

__all__ = [
    "BetaBinomial",
    "CaseMix",
    "CompletePooling",
    "ConvergenceWarning",
    "DataError",
    "EXACT_TOLERANCE",
    "GroupCounts",
    "HyperPrior",
    "LogitNormal",
    "Nested",
    "MODELS",
    "NoPooling",
    "NotFittedError",
    "ParameterError",
    "SUMMARY_COLUMNS",
    "SamplingError",
    "WorkbenchError",
    "add_log_likelihood",
    "attr",
    "closed_form",
    "counts_of",
    "log_likelihood_arrays",
    "make_model",
    "theta_draws",
    "draw_quantiles",
    "draw_share_above",
    "versions",
]
