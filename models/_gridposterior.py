"""The exact engine's grid posterior: its space, its stated tolerance, and the posterior on it.

Lowest layer of the exact engine: ``_quadrature`` (what is computed from a grid and how
exactly) and ``_grid`` (laying and refining the grid) build on it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import special

from ._mixture import BetaMixturePosteriors

#: Bounds of the transformed space: logit mu and log kappa (kappa capped at 1e8).
U_BOUNDS = (-30.0, 30.0)
Z_BOUNDS = (-60.0, 60.0)  # across the ridge, in conditional sds of logit mu
V_BOUNDS = (np.log(1e-6), np.log(1e8))
EDGE_TOLERANCE = 1e-10  # largest density allowed on the grid's edge, relative to the mode
REFINE_TOLERANCE = 1e-6  # largest change of any posterior mean when the grid is refined

#: The engine's stated tolerance (README, "How exact is exact"): every printed rate (mean,
#: median, interval end, population quantity) within RATE_TOLERANCE_SD of its posterior sd,
#: every printed probability and shrinkage within PROBABILITY_TOLERANCE, kappa within
#: KAPPA_RELATIVE_TOLERANCE; held against an independent quadrature in
#: tests/models/test_exact_tolerance.py.
RATE_TOLERANCE_SD = 0.01
PROBABILITY_TOLERANCE = 2e-4
KAPPA_RELATIVE_TOLERANCE = 0.01
EXACT_TOLERANCE = {"rate_sd": RATE_TOLERANCE_SD, "probability": PROBABILITY_TOLERANCE,
                   "kappa_relative": KAPPA_RELATIVE_TOLERANCE}
#: The refinement test asks the same of the change between the last two grids: that change
#: bounds the error of the finer one, as long as the error falls at least twofold per halving
#: of the spacing (it falls fourfold or faster here; the independent test checks the result).
REFINE_RATE_SD = RATE_TOLERANCE_SD
REFINE_PROBABILITY = PROBABILITY_TOLERANCE
MAX_REFINEMENTS = 5
#: Posterior probabilities at which each group's CDF is compared under refinement (covers
#: every central interval up to 99% and any target inside the bulk).
PROBE_PROBABILITIES = (0.005, 0.1, 0.5, 0.9, 0.995)
#: Most distinct (successes, trials) pairs whose CDFs are compared (spread over the range of
#: posterior means and of trials); means and sds are compared for every pair.
PROBE_PAIRS = 64
#: Sub-nodes along logit mu per unit of (cell width / theta's conditional width in logit mu),
#: and at most this many per cell (see GridPosterior.cdf_points).
#: Share of the posterior mass whose points enter CDFs and densities: what is left out moves a
#: probability by at most 1e-9, far inside the stated tolerance.
CDF_MASS = 1 - 1e-9
SUBNODE_SHARPNESS = 1.0
MAX_SUBNODES = 8


def distinct_pairs(successes, trials) -> tuple[np.ndarray, np.ndarray]:
    """The distinct (successes, trials) pairs, sorted, and each group's row among them.

    One int64 key per pair and a 1-D unique (about 40 times faster than ``axis=0`` at a
    million groups); the 2-D unique where the key would overflow int64 (trials near 1e15).
    """
    y = np.asarray(successes, dtype=np.int64).ravel()
    n = np.asarray(trials, dtype=np.int64).ravel()
    base = int(y.max(initial=0)) + 1
    if n.size and float(n.max()) * base + base < 2.0**62:
        keys, index = np.unique(n * base + y, return_inverse=True)
        return np.stack([keys % base, keys // base], axis=1), index.ravel()
    pairs, index = np.unique(np.stack([y, n], axis=1), axis=0, return_inverse=True)
    return pairs, index.ravel()


def mean_shrinkage(kappa: np.ndarray, weights: np.ndarray, trials) -> np.ndarray:
    """The weighted mean of kappa / (kappa + n) over ``kappa`` for each n in ``trials``
    (once per distinct n): a grid's points and weights, or draws with equal weights."""
    uniq, inv = np.unique(np.asarray(trials, dtype=float), return_inverse=True)
    return ((kappa[None, :] / (kappa[None, :] + uniq[:, None])) @ weights)[inv.ravel()]


@dataclass
class GridPosterior:
    """The hyper-posterior on a grid that follows its ridge, and what was checked about it.

    Nodes are laid in (z, v): v = log kappa, and across the ridge u = logit mu =
    centre(v) + scale(v) z, where centre(v) is the most probable logit mu given kappa and
    scale(v) its conditional sd there (Laplace). A posterior whose mu narrows as kappa grows
    (one huge group among small ones) is then a band of nearly even width in (z, v), where a
    grid square in (u, v) would need thousands of nodes per axis to see it.
    """

    z: np.ndarray  # nodes across the ridge, in conditional sds of logit mu
    v: np.ndarray  # nodes, log kappa
    centre: np.ndarray  # (len(v),) logit mu at the ridge
    scale: np.ndarray  # (len(v),) conditional sd of logit mu there
    log_density: np.ndarray  # (len(z), len(v)) log density of (z, v): of (u, v) + log scale
    log_marginal_likelihood: float
    edge_density: float  # largest density on the grid edge, relative to the mode
    refinement_change: float  # largest change of a posterior mean under refinement
    widenings: int
    #: largest change under refinement of a rate (group CDF at its probes, population
    #: quantities), in posterior sds, and of a probability (group CDF, shrinkage)
    refinement_rate_sd: float = np.nan
    refinement_probability: float = np.nan
    refinements: int = 0
    #: results computed from the nodes alone (population summaries by level): a grid with the
    #: same nodes may share it, so the refinement's last grid hands its work to the fit's
    memo: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def u(self) -> np.ndarray:
        """(len(z), len(v)) logit mu at every node."""
        return self.centre[None, :] + self.scale[None, :] * self.z[:, None]

    @property
    def weights(self) -> np.ndarray:
        w = np.exp(self.log_density - self.log_density.max())
        return w / w.sum()

    def _nodes(self, stride: int):
        z, v = self.z[::stride], self.v[::stride]
        centre, scale = self.centre[::stride], self.scale[::stride]
        rel = self.log_density[::stride, ::stride]
        return z, v, centre, scale, rel - rel.max()

    def points(self, stride: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """mu, kappa and weight of every grid point carrying mass (flattened).

        ``stride=2`` takes every other node: the grid before its last refinement.
        """
        z, v, centre, scale, rel = self._nodes(stride)
        u = centre[None, :] + scale[None, :] * z[:, None]
        vv = np.broadcast_to(v[None, :], u.shape)
        w = np.exp(rel).ravel()
        w /= w.sum()
        keep = w > 1e-16
        return special.expit(u.ravel()[keep]), np.exp(vv.ravel()[keep]), w[keep]

    def mixture(
        self,
        successes: np.ndarray,
        trials: np.ndarray,
        *,
        mass: float = 1 - 1e-12,
        stride: int = 1,
        quantile_stride: int | None = 2,
    ) -> BetaMixturePosteriors:
        """theta_j's exact posterior: a Beta mixture over the grid points carrying ``mass``.

        Quantiles are solved on the grid before its last refinement (``quantile_stride=2``,
        a quarter of the points) and polished by Newton steps on the full grid; means always
        use the full grid.
        """
        mu, kappa, w = self.points(stride)
        order = np.argsort(w)[::-1]
        keep = order[: int(np.searchsorted(np.cumsum(w[order]), mass)) + 1]
        pairs, index = distinct_pairs(successes, trials)
        coarse = None
        if quantile_stride and len(self.z) > 2 * quantile_stride:
            coarse = self.mixture(
                successes, trials, mass=1 - 1e-10, stride=quantile_stride, quantile_stride=None
            )
        def components():
            sub_mu, sub_kappa, sub_w = self.cdf_points(stride, CDF_MASS)
            return sub_w, sub_mu * sub_kappa, (1 - sub_mu) * sub_kappa

        return BetaMixturePosteriors(
            w[keep],
            mu[keep] * kappa[keep],
            (1 - mu[keep]) * kappa[keep],
            pairs[:, 0],
            pairs[:, 1],
            index.ravel(),
            quantile_source=coarse,
            cdf_components=components,
        )

    def cdf_points(self, stride: int = 1, mass: float = 1 - 1e-12):
        """mu, kappa and weight of the points on which group CDFs are summed.

        Where kappa is large, theta given (mu, kappa) can be much narrower than a grid cell
        in logit mu, so its CDF is nearly a step in mu and a sum over the nodes a staircase.
        Each such row of the grid is split into sub-nodes across the ridge (their number
        grows with the cell's width over theta's conditional width, up to MAX_SUBNODES),
        weighted by a bicubic spline of the log density: the same posterior, finely enough
        for a CDF.
        """
        from scipy.interpolate import RectBivariateSpline

        z, v, centre, scale, rel = self._nodes(stride)
        w = np.exp(rel)
        w /= w.sum()
        flat = np.sort(w.ravel())[::-1]
        floor = flat[min(int(np.searchsorted(np.cumsum(flat), mass)), flat.size - 1)]
        kept = w >= floor
        h = z[1] - z[0] if len(z) > 1 else 0.0
        splits = np.clip(np.ceil(SUBNODE_SHARPNESS * h * scale * np.sqrt(np.exp(v) / 4.0)),
                         1, MAX_SUBNODES).astype(int)
        spline = None
        if splits.max() > 1 and min(len(z), len(v)) > 3:
            spline = RectBivariateSpline(z, v, np.maximum(rel, -80.0), kx=3, ky=3)
        else:
            splits[:] = 1
        out_u, out_v, out_w = [], [], []
        for count in np.unique(splits):
            iz, jv = np.nonzero(kept & (splits == count)[None, :])
            if count == 1:
                out_u.append(centre[jv] + scale[jv] * z[iz])
                out_v.append(v[jv])
                out_w.append(np.exp(rel[iz, jv]))
                continue
            offsets = (np.arange(count) + 0.5) / count - 0.5
            sz = (z[iz][:, None] + h * offsets[None, :]).ravel()
            jj = np.repeat(jv, count)
            out_u.append(centre[jj] + scale[jj] * sz)
            out_v.append(v[jj])
            out_w.append(np.exp(np.minimum(spline.ev(sz, v[jj]), 0.0)) / count)
        su, sv, sw = (np.concatenate(x) for x in (out_u, out_v, out_w))
        return special.expit(su), np.exp(sv), sw / sw.sum()

    def shrinkage(self, trials: np.ndarray) -> np.ndarray:
        """Posterior mean of kappa / (kappa + n) for each n in ``trials``."""
        _, kappa, w = self.points()
        return mean_shrinkage(kappa, w, trials)

    def draw(self, size: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Independent draws of (mu, kappa): a grid cell by weight, then uniform within it in
        (z, v), the ridge's centre and scale taken linearly between the nodes."""
        w = self.weights.ravel()
        cell = rng.choice(w.size, size=size, p=w)
        iz, iv = np.unravel_index(cell, self.log_density.shape)
        hz = self.z[1] - self.z[0]
        hv = self.v[1] - self.v[0]
        z = self.z[iz] + rng.uniform(-0.5, 0.5, size) * hz
        v = self.v[iv] + rng.uniform(-0.5, 0.5, size) * hv
        u = np.interp(v, self.v, self.centre) + np.interp(v, self.v, self.scale) * z
        return special.expit(np.clip(u, *U_BOUNDS)), np.exp(v)
