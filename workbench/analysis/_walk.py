"""The compiled inner loop of the trials-needed search: the settle chance walked down m.

:func:`walk_down` steps each group from m to m - 1, m - 2, ... by the exact recurrences
described in :func:`workbench.analysis.decisions._last_short`, a few arithmetic operations a
step, and stops a group at the first of: its chance falls short (event ``SHORT``), it reaches
m = 1 (``BOTTOM``), or a step it cannot trust or ``budget`` steps (``DIRECT``: the caller
takes the next step directly). Compiled with numba (a dependency of pytensor) on first use.
"""

from __future__ import annotations

import functools

import numpy as np

DIRECT, SHORT, BOTTOM = 0, 1, 2


@functools.cache
def _kernel():
    import numba

    njit = numba.njit(cache=True, error_model="numpy")  # x / 0 is inf or nan, not an error
    row = njit(_row)
    return njit(_walk_kernel(row))


def _row(y, q, J, g, high, a, b, m, t, cut, guard, tiny):  # pragma: no cover - compiled
    """One threshold's step from m to m - 1: (y, q, J, g, window change, trusted).

    y is the threshold minus one, q = P(Y_m = y), J = I_t(a + y, b + m - 1 - y), g its
    recurrence term. Row ``high`` is dead (q = 0, always moves) at y = m; the other at y < 0.
    """
    m1 = m - 1.0
    if (high and y == m) or (not high and y < 0):
        return (y - 1.0 if high else y), 0.0, J, g, 0.0, True
    n = a + b + m1
    bm = b + m1 - y
    q = q * (m - y) * n / (m * bm)
    change = q * (a + y) / n  # the Polya-urn step's mass at y (into first, out of high)
    change = change if high else -change
    move = J < cut
    near = abs(J - cut) < guard
    d = n - 1.0
    if move:
        change += -q if high else q
        q = q * y * bm / ((m1 - y + 1.0) * (a + y - 1.0))
        J = J + g / (t * d)
        g = g * (a + y - 1.0) / (t * d)
        y = y - 1.0
    else:
        J = J - g / ((1.0 - t) * d)
        g = g * (bm - 1.0) / ((1.0 - t) * d)
    if (high and y == m1) or (not high and y < 0):
        return y, 0.0, J, g, change, not near
    fine = q > tiny and g > tiny and g < 1.0 / tiny and np.isfinite(J)
    return y, q, J, g, change, fine and not near


def _walk_kernel(row):
    def walk(a, b, m, s, W, target, chance, cut0, cut1, guard, tiny, budget):  # pragma: no cover
        events = np.empty(a.size, dtype=np.int64)
        for i in range(a.size):
            events[i] = DIRECT
            ai, bi, mi, wi = a[i], b[i], m[i], W[i]
            y0, q0, J0, g0 = s[0, 0, i], s[1, 0, i], s[2, 0, i], s[3, 0, i]
            y1, q1, J1, g1 = s[0, 1, i], s[1, 1, i], s[2, 1, i], s[3, 1, i]
            for _ in range(budget):
                n0 = row(y0, q0, J0, g0, False, ai, bi, mi, target, cut0, guard, tiny)
                n1 = row(y1, q1, J1, g1, True, ai, bi, mi, target, cut1, guard, tiny)
                w = wi + n0[4] + n1[4]
                c = 1.0 - w
                if not (n0[5] and n1[5] and abs(c - chance) >= guard and np.isfinite(w)):
                    break
                y0, q0, J0, g0 = n0[0], n0[1], n0[2], n0[3]
                y1, q1, J1, g1 = n1[0], n1[1], n1[2], n1[3]
                wi, mi = w, mi - 1.0
                if c < chance:
                    events[i] = SHORT
                    break
                if mi <= 1.0:
                    events[i] = BOTTOM
                    break
            m[i], W[i] = mi, wi
            s[0, 0, i], s[1, 0, i], s[2, 0, i], s[3, 0, i] = y0, q0, J0, g0
            s[0, 1, i], s[1, 1, i], s[2, 1, i], s[3, 1, i] = y1, q1, J1, g1
        return events

    return walk


def walk_down(a, b, m, s, W, target, chance, cuts, guard, tiny, budget) -> np.ndarray:
    """Walk every group down in place (``m``, the state ``s`` and window mass ``W``); the
    event each stopped at."""
    return _kernel()(a, b, m, s, W, float(target), float(chance), float(cuts[0]),
                     float(cuts[1]), float(guard), float(tiny), int(budget))
