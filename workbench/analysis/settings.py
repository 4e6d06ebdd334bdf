"""How the checks run, and the words of their verdicts."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..models import ParameterError, attr

CONSISTENT = "consistent"
MISFIT = "misfit"
NOT_COMPUTED = "not computed"

@dataclass(frozen=True)
class CheckSettings:
    """How the checks run.

    Parameters
    ----------
    draws : int, default=1000
        Posterior draws used for replicated data sets, thinned evenly (at most this many).
    lower, upper : float, default=0.01, 0.99
        A posterior predictive p-value below ``lower`` or above ``upper`` reads ``misfit``;
        ``lower`` is also the level below which the LOO-PIT uniformity test reads
        ``miscalibrated``.
    refit_limit : int, default=50
        Most high-Pareto-k groups given their exact leave-one-group-out value (worst k first).
    chunk_cells : int, default=2_000_000
        Largest draws x groups block computed at once.
    seed : int or None, default=None
        Seed of the replicates and of the PIT randomisation; None derives it from the run's seed.
    """

    draws: int = 1000
    lower: float = 0.01
    upper: float = 0.99
    refit_limit: int = 50
    chunk_cells: int = 2_000_000
    seed: int | None = None

    def validate(self) -> CheckSettings:
        """Return self, or raise ParameterError naming the bad setting and the fix."""
        if not isinstance(self.draws, int | np.integer) or self.draws < 1:
            raise ParameterError(f"check draws={self.draws!r} must be a whole number >= 1.")
        if not (0 < self.lower < 0.5 < self.upper < 1):
            raise ParameterError(
                f"check bounds lower={self.lower!r}, upper={self.upper!r} need"
                " 0 < lower < 0.5 < upper < 1; the usual pair is 0.01 0.99."
            )
        if not isinstance(self.refit_limit, int | np.integer) or self.refit_limit < 0:
            raise ParameterError(f"refit_limit={self.refit_limit!r} must be a whole number >= 0.")
        if not isinstance(self.chunk_cells, int | np.integer) or self.chunk_cells < 1:
            raise ParameterError(f"chunk_cells={self.chunk_cells!r} must be a whole number >= 1.")
        if self.seed is not None and (not isinstance(self.seed, int | np.integer) or self.seed < 0):
            raise ParameterError(f"check seed={self.seed!r} must be an integer >= 0.")
        return self


def seed_of(idata, settings: CheckSettings) -> int:
    if settings.seed is not None:
        return int(settings.seed)
    base = attr(idata, "random_seed", 0)
    return int(np.random.SeedSequence([int(base or 0), 0x5EED]).generate_state(1)[0])


