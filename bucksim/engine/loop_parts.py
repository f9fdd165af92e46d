"""Small kernels the cycle loop calls: a dot product, the digital compensator's
step, and the cheap test that proves a segment free of a crossing.

Each takes scalars and a few arrays and is a real call (the loop's own rules
are inlined helpers: :mod:`bucksim.engine.period`).
"""

from __future__ import annotations

from numba import njit

from bucksim.engine.bounds import clear_between, growth, reach
from bucksim.engine.kernels import advance, crossing_slope, crossing_value


@njit(cache=True, _nrt=False)
def _dot(c, z):
    acc = 0.0
    for j in range(z.shape[0]):
        acc += c[j] * z[j]
    return acc


@njit(cache=True, _nrt=False)
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


@njit(cache=True, _nrt=False)
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


@njit(cache=True, _nrt=False)
def newton_crossing(Ms, E, h, s, zs, t0, d, row, krow, bnd, tmp, work):
    """A proven first downward crossing of ``row . z = 0`` in ``(0, d]``, by Newton.

    From the start state ``zs`` (``row . zs > 0``, heading down) Newton steps on
    the exact solution converge on the crossing ``u``; it is accepted only when
    the curvature bound ``|f''| <= B`` (:mod:`bucksim.engine.bounds`) proves
    ``f > 0`` on ``[0, u)``: the reach forward from 0 and backward from ``u``
    must cover it. Returns ``u`` (``work`` then holds ``z(t0 + u)``) or -1.0,
    and the caller falls back to :func:`~bucksim.engine.kernels.locate_zero`. A
    switch node that slews at a nearly constant current crosses its clamp on
    a nearly straight line: two or three steps, no table descent.
    """
    m = zs.shape[0]
    f0 = _dot(row, zs)
    s0 = crossing_slope(Ms, s, row, zs, 0.0)
    if not (f0 > 0.0 and s0 < 0.0):
        return -1.0
    u = -f0 / s0
    sl = s0
    done = False
    for _ in range(8):
        if not (0.0 < u <= d):
            return -1.0
        for i in range(m):
            work[i] = zs[i]
        advance(Ms, E, h, s, work, u, tmp)
        f = _dot(row, work)
        sl = crossing_slope(Ms, s, row, work, 0.0)
        if not sl < 0.0:
            return -1.0
        du = -f / sl
        if abs(du) <= 2.220446049250313e-16 * 4.0 * (abs(t0) + u):
            done = True
            break
        u += du
    if not done or not (0.0 < u <= d):
        return -1.0
    vel = 0.0
    for i in range(m - 1):
        acc = 0.0
        for j in range(m):
            acc += Ms[s, i, j] * zs[j]
        vel = max(vel, abs(acc) * bnd[s, i])
    B = krow * vel * growth(bnd[s, m - 1] * u) * (1.0 + 1e-12)
    if reach(f0, s0, B) + reach(0.0, -sl, B) < u * (1.0 + 1e-12):
        return -1.0
    return u
