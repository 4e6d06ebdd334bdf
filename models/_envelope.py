"""Tangent-envelope rejection for a log-concave density in one variable (numba kernels).

The envelope is the minimum of the tangents of the log density at ``k`` points; between the
cuts where neighbouring tangents meet it is an exponential piece, drawn by inverting its CDF.
Both collapsed engines (:mod:`._collapsed` for group-level rates, :mod:`._casemix` for a group's
product of cells) draw each group's standardised log-odds with it; they differ only in the log
density. The kernels share numba's one generator, so a caller's stream stays as it was.
"""

from __future__ import annotations

import numpy as np


def envelope_kernels(njit):
    """``build`` (the envelope from tangents), ``propose`` (one draw from it) and ``height``
    (the envelope at a point), compiled with ``njit``."""

    @njit
    def build(tp, gv, gs, lo, hi, anchor, log_mass, cum):  # pragma: no cover - compiled
        """Fill cuts, anchors and the cumulative piece masses from the tangents at ``tp``
        (values ``gv``, slopes ``gs``); returns the total mass (relative to the largest)."""
        k = tp.size
        lo[0] = -np.inf
        hi[k - 1] = np.inf
        for j in range(k - 1):
            cut = (gv[j + 1] - gv[j] + gs[j] * tp[j] - gs[j + 1] * tp[j + 1]) / (gs[j] - gs[j + 1])
            hi[j] = cut
            lo[j + 1] = cut
        top = -np.inf
        for j in range(k):
            anchor[j] = hi[j] if gs[j] > 0 else lo[j]
            a = abs(gs[j])
            w = hi[j] - lo[j]
            lq = np.log(w) if a * w < 1e-12 else np.log(-np.expm1(-a * w)) - np.log(a)
            log_mass[j] = gv[j] + gs[j] * (anchor[j] - tp[j]) + lq
            top = max(top, log_mass[j])
        total = 0.0
        for j in range(k):
            total += np.exp(log_mass[j] - top)
            cum[j] = total
        return total

    @njit
    def propose(gs, lo, hi, anchor, cum, total):  # pragma: no cover - compiled
        """One draw from the envelope: a piece by its mass, then its exponential by inversion."""
        k = gs.size
        u = np.random.random() * total  # noqa: NPY002 - numba's compiled generator
        j = 0
        while j < k - 1 and u > cum[j]:
            j += 1
        a = abs(gs[j])
        w = hi[j] - lo[j]
        v = np.random.random()  # noqa: NPY002
        d = v * w if a * w < 1e-12 else -np.log1p(v * np.expm1(-a * w)) / a
        return anchor[j] - d if gs[j] > 0 else anchor[j] + d

    @njit
    def height(z, tp, gv, gs):  # pragma: no cover - compiled
        """The envelope's log height at ``z``: the lowest tangent."""
        env = np.inf
        for j in range(tp.size):
            env = min(env, gv[j] + gs[j] * (z - tp[j]))
        return env

    return build, propose, height
