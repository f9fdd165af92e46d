"""Small kernels the cycle loop calls: a dot product, the digital compensator's
step, and the cheap test that proves a segment free of a crossing.

Each takes scalars and a few arrays; :mod:`bucksim.engine.cycles` explains why
the rest of the loop is written inline.
"""

from __future__ import annotations

from numba import njit

from bucksim.engine.bounds import clear_between, growth
from bucksim.engine.kernels import crossing_slope, crossing_value


@njit(cache=True)
def _dot(c, z):
    acc = 0.0
    for j in range(z.shape[0]):
        acc += c[j] * z[j]
    return acc


@njit(cache=True)
def _compensate(Ad, Bd, Cd, Dd, w, e, lo, hi, wnew):
    """One digital compensator step with conditional integration; returns the output."""
    k = w.shape[0]
    u = Dd * e
    for i in range(k):
        u += Cd[i] * w[i]
    for i in range(k):
        acc = Bd[i] * e
        for j in range(k):
            acc += Ad[i, j] * w[j]
        wnew[i] = acc
    if (u >= hi and e > 0.0) or (u <= lo and e < 0.0):
        return u  # saturated and pushing further: hold the state
    for i in range(k):
        w[i] = wnew[i]
    return u


@njit(cache=True)
def _needs_search(Ms, s, row, krow, zs, z, t_end_seg, d, guard, sign0, level, ramp, t_ref,
                  bnd):
    """False when the event function provably keeps ``sign0`` over the segment
    (the curvature bound of :mod:`bucksim.engine.bounds`; ``krow`` is the
    row's ``||c_x A_s W_s||_1``, :func:`~bucksim.engine.bounds.row_norms`)."""
    if d > guard:
        return True
    f1 = sign0 * crossing_value(row, z, t_end_seg, level, ramp, t_ref)
    if f1 <= 0.0:
        return True
    f0 = sign0 * crossing_value(row, zs, t_end_seg - d, level, ramp, t_ref)
    if f0 <= 0.0:
        return True
    m = zs.shape[0]
    s0 = ramp
    vel = 0.0
    for i in range(m - 1):
        acc = 0.0
        for j in range(m):
            acc += Ms[s, i, j] * zs[j]
        s0 += row[i] * acc
        vel = max(vel, abs(acc) * bnd[s, i])
    s0 *= sign0
    B = krow * vel * growth(bnd[s, m - 1] * d) * (1.0 + 1e-12)
    if f0 + min(s0, 0.0) * d - 0.5 * B * d * d > 0.0:
        return False     # Taylor from the start over the whole segment
    return not clear_between(f0, s0, f1, sign0 * crossing_slope(Ms, s, row, z, ramp), d, B)
