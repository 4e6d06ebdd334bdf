"""The posterior as the per-group tables need it: draws of theta, and exact forms where known.

Every table that reads draws of the group rates reads them through :class:`GroupDraws`, built
once from an InferenceData by :func:`group_draws`; draws are (samples, groups), chains
stacked, by :func:`workbench.models.theta_draws` (their one home). Where the engine is exact,
its closed forms are preferred to the draws.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..models import closed_form, draw_share_above, theta_draws

#: largest draws x groups block worked on at once
CHUNK_CELLS = 2_000_000


@dataclass
class GroupDraws:
    """Group rates as draws (samples, groups), with closed forms where the engine is exact."""

    names: np.ndarray
    successes: np.ndarray
    trials: np.ndarray
    theta: np.ndarray  # (samples, groups), a view of the stored draws
    posterior_mean: np.ndarray
    closed: object | None  # closed-form posteriors (exact engine) or None
    known_prob_above: dict[float, np.ndarray] = field(default_factory=dict)

    @property
    def n_groups(self) -> int:
        return len(self.names)

    @property
    def n_draws(self) -> int:
        return self.theta.shape[0]

    def prob_above(self, value: float) -> np.ndarray:
        """P(theta_j > value): the model summary's value if known, else closed form, else draws."""
        if value in self.known_prob_above:
            return self.known_prob_above[value]
        if self.closed is not None:
            out = np.clip(self.closed.sf(value), 0.0, 1.0)
        else:
            out = draw_share_above(self.theta, value)
        self.known_prob_above[value] = out
        return out

    def moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean and variance of each theta_j (exact where the engine is exact)."""
        if self.closed is not None:
            if hasattr(self.closed, "moments"):
                return self.closed.moments()
            a, b = self.closed.alpha, self.closed.beta
            s = a + b
            return a / s, a * b / (s * s * (s + 1))
        return draw_moments(self.theta)


def group_draws(idata, estimates, *, target: float | None = None, closed=None) -> GroupDraws:
    """From a posterior and its estimates table (rows in any order, matched by group).

    ``closed`` is the estimator's closed form where the caller holds it; otherwise it is
    rebuilt from the posterior's counts (exact engines) or None.
    """
    names = idata.posterior["group"].values.astype(str)
    est = estimates.set_index(estimates["group"].astype(str))
    known = {}
    if target is not None and "prob_above_target" in est:
        known[float(target)] = est.loc[names, "prob_above_target"].to_numpy(dtype=float)
    return GroupDraws(
        names=names,
        successes=idata.observed_data["successes"].values,
        trials=idata.constant_data["trials"].values,
        theta=theta_draws(idata),
        posterior_mean=est.loc[names, "posterior_mean"].to_numpy(dtype=float),
        closed=closed if closed is not None else closed_form(idata),
        known_prob_above=known,
    )


def tied_runs(ordered: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and last position of the run of equal values each entry of a row belongs to.

    ``ordered`` is (rows, n), each row sorted; positions are 0-based within the row.
    """
    rows, n = ordered.shape
    pos = np.broadcast_to(np.arange(n, dtype=np.int64), (rows, n))
    change = ordered[:, 1:] != ordered[:, :-1]
    starts = np.ones((rows, n), dtype=bool)
    starts[:, 1:] = change
    ends = np.ones((rows, n), dtype=bool)
    ends[:, :-1] = change
    first = np.maximum.accumulate(np.where(starts, pos, 0), axis=1)
    last = np.minimum.accumulate(np.where(ends, pos, n - 1)[:, ::-1], axis=1)[:, ::-1]
    return first, last


def chunks(n_draws: int, n_groups: int, cells: int = CHUNK_CELLS):
    step = max(1, cells // max(n_groups, 1))
    for start in range(0, n_draws, step):
        yield slice(start, min(start + step, n_draws))


def draw_moments(theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    s1 = np.zeros(theta.shape[1])
    s2 = np.zeros(theta.shape[1])
    shift = theta[0]  # shifted sums keep the variance accurate
    for sl in chunks(*theta.shape):
        d = theta[sl] - shift
        s1 += d.sum(axis=0)
        s2 += (d * d).sum(axis=0)
    s = theta.shape[0]
    mean = s1 / s
    var = np.maximum(s2 / s - mean**2, 0.0) * s / max(s - 1, 1)
    return mean + shift, var
