"""numba kernels: exact propagation, event location on a general row, evaluation.

Kernels are plain typed loops over arrays (no small-matrix ``@``: it compiles
slowly and runs slower for 3 x 3). Everything a kernel needs is passed in as
arrays prepared by :mod:`bucksim.engine.tables`; the cycle loop that calls
them is :mod:`bucksim.engine.cycles`.

Propagation over an arbitrary interval ``d`` (:func:`advance`, in
:mod:`bucksim.engine.propagation` and named here too) uses a table
of exact transition matrices ``E[s, k] = expm(M_s h_k)`` with
``h_k = T 2**-k``: ``d`` is decomposed into its binary digits down to the
table's last step, the matching matrices are applied to the state vector,
and the remainder below the last step is taken by the Taylor series of order
:data:`TAYLOR_ORDER` (8; :func:`~bucksim.engine.propagation.taylor_step`),
which the table's depth makes exact to rounding (its first omitted term
is below 5e-18 relative). A new interval length costs ``O(K m^2)``
multiply-adds and no new matrix exponential, and the result is exact to
rounding whatever the eigenstructure of ``M`` (repeated, zero or complex
eigenvalues alike).

Events (:func:`find_zero`) are the first zero of ``g = c . z + ramp (t -
t_ref) - level`` for a general row ``c``: proven absent stretch by stretch
(:mod:`bucksim.engine.bounds`), bracketed by a descent over the same table,
and finished by safeguarded Newton steps on the Taylor polynomial
(:func:`taylor_zero`). :func:`evaluate` gives the state at any (segment,
offset). Each kernel has a plain NumPy/SciPy reference in
``tests/unit/test_kernel_references.py``.

The codes below are mirrored from :mod:`bucksim.model.stage` (conduction,
gate and strategy codes) and :mod:`bucksim.engine.tables` (the Taylor order)
because numba reads module constants only; ``tests/unit/test_engine_contract.py``
checks that the copies agree. The cycle loop's status codes live in
:mod:`bucksim.engine.status`, the one table.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.bounds import (
    event_derivatives,
    growth,
    reach3,
    system_bounds,
    third_norm,
    velocity_norm,
)

# propagation has its own module; the kernels name it too (one front door for callers)
from bucksim.engine.propagation import TAYLOR_ORDER, advance, apply, derivative, plain_args

# conduction codes (mirrors bucksim.model.stage; numba needs plain module constants)
HIGH, LOW, LOW_DIODE, HIGH_DIODE, IDLE, OPEN = 0, 1, 2, 3, 4, 5
N_CONDUCTION = 6
GATE_HIGH, GATE_OFF, GATE_LOW = 0, 1, 2
# strategy codes (mirrors bucksim.model.stage.STRATEGY_CODES)
ASYNC, FORCED, EMULATION = 0, 1, 2
#: Controllers of the cycle loop (:class:`bucksim.engine.driver.LoopArgs`).
CONTROL_OPEN, CONTROL_DIGITAL, CONTROL_ANALOG = 0, 1, 2

_INV_FACTORIAL = (1.0, 1.0, 1 / 2, 1 / 6, 1 / 24, 1 / 120, 1 / 720, 1 / 5040, 1 / 40320)


@njit(cache=True, _nrt=False)
def crossing_value(c, z, t, level, ramp, t_ref):
    """Event function ``g = c . z + ramp (t - t_ref) - level``.

    ``c = e_iL``, ``level = ramp = 0`` is the zero-current event; a digital
    peak-current comparator with slope compensation is ``c = e_iL``,
    ``level = vc / Ri``, ``ramp = Se / Ri``; an analog comparator has ``c``
    with entries on the compensator states (its output is a state
    combination) and ``level = 0``.
    """
    acc = ramp * (t - t_ref) - level
    for i in range(z.shape[0]):
        if c[i] != 0.0:
            acc += c[i] * z[i]
    return acc


@njit(cache=True, _nrt=False)
def crossing_slope(Ms, s, c, z, ramp):
    """Time derivative of the event function: ``c . (M_s z) + ramp``."""
    acc = ramp
    for i in range(z.shape[0]):
        if c[i] != 0.0:
            acc += c[i] * derivative(Ms, s, z, i)
    return acc


@njit(cache=True, inline="always")
def refine_zero(Ms, E, h, s, z, t, width, sign0, tmp, trial, c, level, ramp, t_ref, snap,
                taylor_gap, poly):
    """First zero of the event function in (t, t + width]; it has sign ``sign0`` at t.

    Binary descent over the transition table keeps the state on the
    ``sign0`` side until the bracket is below the table's last step, where
    :func:`taylor_zero` finishes on the Taylor series. Returns the zero's
    time; ``z`` holds the state there (with ``z[0] = level`` exactly when
    ``snap``).
    """
    K = h.shape[0]
    m = z.shape[0]
    gap = width
    for k in range(K):
        if gap <= taylor_gap:
            break
        if h[k] > gap:
            continue
        for i in range(m):
            trial[i] = z[i]
        apply(E, s, k, trial, tmp)
        if sign0 * crossing_value(c, trial, t + h[k], level, ramp, t_ref) > 0.0:
            for i in range(m):
                z[i] = trial[i]
            t += h[k]
            gap -= h[k]
        else:
            gap = h[k]
    return taylor_zero(Ms, s, z, t, gap, c, level, ramp, t_ref, snap, tmp, poly, sign0)


@njit(cache=True, inline="always")
def taylor_zero(Ms, s, z, t, gap, c, level, ramp, t_ref, snap, tmp, poly, sign0=0.0):
    """Zero of the event function in (t, t + gap] from its Taylor series.

    Used once the bracket is below the table's last step, where the series
    ``z(t + u) = sum_j M^j z u^j / j!`` truncated after :data:`TAYLOR_ORDER`
    is exact to rounding: the event function is then a polynomial in ``u``,
    solved by Newton steps kept inside the bracket (bisection when a step
    leaves it). ``poly`` is a work array of shape ``(TAYLOR_ORDER + 1, m + 1)``
    (this runs inside the cycle loop, which must not allocate). ``sign0`` is the
    side the function starts on (0: take the sign of its value at ``t``); a
    function already at or past zero at ``t`` has its zero at ``t``.
    """
    m = z.shape[0]
    n = TAYLOR_ORDER
    v = poly    # columns 0..m-1: the state's coefficients; column m: g's
    for i in range(m):
        v[0, i] = z[i]
    for j in range(1, n + 1):
        for i in range(m):
            acc = 0.0
            for q in range(m):
                acc += Ms[s, i, q] * v[j - 1, q]
            v[j, i] = acc
    # polynomial coefficients of g(t + u) and of the state (v[j] / j!)
    for j in range(1, n + 1):
        r = _INV_FACTORIAL[j]
        acc = 0.0
        for i in range(m):
            v[j, i] *= r
            acc += c[i] * v[j, i]
        v[j, m] = acc
    v[0, m] = crossing_value(c, z, t, level, ramp, t_ref)
    v[1, m] += ramp
    g = v[:, m]
    sign_lo = sign0 if sign0 != 0.0 else (1.0 if g[0] > 0.0 else -1.0)
    u = polynomial_zero(g, gap, sign_lo)
    for i in range(m):
        acc = v[n, i]
        for j in range(n - 1, -1, -1):
            acc = acc * u + v[j, i]
        tmp[i] = acc
    for i in range(m):
        z[i] = tmp[i]
    if snap:
        z[0] = level
    return t + u


@njit(cache=True, inline="always")
def polynomial_zero(g, gap, sign_lo):
    """First zero ``u`` in [0, gap] of the polynomial ``sum_j g[j] u^j``, which has
    the sign ``sign_lo`` at 0 (0 when it is already at or past zero there).

    Newton steps from the linear estimate, kept inside a bracket that
    always has ``sign_lo`` at its low end; a step that leaves the bracket is
    replaced by bisection. Converged once a step is at the rounding of ``u``.
    """
    n = TAYLOR_ORDER
    lo, hi = 0.0, gap          # g keeps sign_lo's sign at lo, the other at hi
    u = 0.5 * gap
    if g[1] != 0.0:
        u = min(max(-g[0] / g[1], 0.0), gap)
    steps = 80
    if sign_lo * g[0] <= 0.0 or gap <= 0.0:
        u = 0.0                # already there: the first zero is at t itself
        steps = 0
    for _ in range(steps):
        f = g[n]
        df = n * g[n]
        for j in range(n - 1, 0, -1):
            f = f * u + g[j]
            df = df * u + j * g[j]
        f = f * u + g[0]
        if f == 0.0:
            break
        if (f > 0.0) == (sign_lo > 0.0):
            lo = u
        else:
            hi = u
        if df != 0.0:
            step = f / df
            # converged once the step is at the rounding of u (f itself is then
            # rounding noise, and further steps would only wander)
            if abs(step) <= 1e-15 * (abs(u) + 1e-3 * gap):
                u -= step
                break
            un = u - step
            if lo < un < hi:
                u = un
                continue
        if hi - lo <= 1e-16 * gap:
            break
        u = 0.5 * (lo + hi)    # Newton left the bracket: bisect
    return u


# ----------------------------------------------------------------------------- first crossings
#
# The proof that no crossing is stepped over is in bucksim.engine.bounds.

#: Steps of one march before it stops and takes its last point as the crossing
#: (a touch of zero within the bound's resolution). Each step from an extremum
#: spans about 3 q / B3 and a march converges superlinearly onto a touching
#: zero, so a march needs a few dozen steps; the cap is a safety net.
MARCH_STEPS = 200


@njit(cache=True, _nrt=False)
def _march(Ms, E, h, s, za, t0, f0, s0, q0, t_clear, t_lim, B3, sign0, c, level, ramp,
           t_ref, tmp, trial):
    """March from ``t0`` to the end of each proven reach (module notes on the bound).

    Returns -1.0 once the march passes ``t_clear`` (no zero up to there), else
    the time of the first zero, with ``za`` the state there: where f is at or
    past zero, where the reach falls below the rounding of time (a zero to
    rounding) or at ``t_lim``.
    """
    m = za.shape[0]
    for i in range(m):
        trial[i] = za[i]
    x, fx, sx, qx = t0, f0, s0, q0
    for _ in range(MARCH_STEPS):
        xn = x + reach3(fx, sx, qx, B3)
        if xn >= t_clear:
            return -1.0
        xn = min(xn, t_lim)
        if not xn > x:
            break                       # proven positive up to rounding: a zero here
        advance(Ms, E, h, s, trial, xn - x, tmp)
        x = xn
        fx = sign0 * crossing_value(c, trial, x, level, ramp, t_ref)
        if fx <= 0.0 or x >= t_lim:
            break
        sx, qx = event_derivatives(Ms, s, c, trial, ramp)
        sx *= sign0
        qx *= sign0
    for i in range(m):
        za[i] = trial[i]
    return x


@njit(cache=True)
def find_zero(Ms, E, h, s, za, zb, a, b, sign0, guard, tmp, trial, work, c,
              level=0.0, ramp=0.0, t_ref=0.0, snap=True, taylor_gap=0.0, poly=None, bnd=None,
              k3=-1.0):
    """Locate the first zero of the event function in (a, b] given the states at both ends.

    Returns the zero's time (``za`` then holds the state there) or -1.0 when
    the function keeps the sign ``sign0`` over the whole interval. The
    interval is taken in sub-steps (:func:`_substep_count`). A sub-step is
    passed only when the bound on the third derivative proves it free of
    zeros (:mod:`bucksim.engine.bounds`: from the exact value, slope and
    curvature at each end); a sub-step that ends past zero with a slope that
    provably keeps its sign holds exactly one zero, found by bisection over
    the table and Newton on the Taylor series; any other sub-step is
    marched, which finds its first zero. ``bnd``: :func:`system_bounds` of
    ``Ms``; ``k3``: the row's :func:`third_norm` (both computed when omitted).
    """
    m = za.shape[0]
    bounds = system_bounds(Ms) if bnd is None else bnd
    coef = np.empty((TAYLOR_ORDER + 1, m + 1)) if poly is None else poly
    return locate_zero(Ms, E, h, s, za, zb, a, b, sign0, guard, tmp, trial, work, c, level,
                       ramp, t_ref, snap, taylor_gap, coef, bounds, k3)


@plain_args
@njit(cache=True, _nrt=False)
def locate_zero(Ms, E, h, s, za, zb, a, b, sign0, guard, tmp, trial, work, c, level, ramp,
                t_ref, snap, taylor_gap, poly, bounds, k3):
    """:func:`find_zero` with every argument given: the work array ``poly``, the
    bounds ``bounds`` and the row's constant ``k3`` (>= 0). It allocates nothing,
    so the cycle loop (compiled without reference counting) can call it."""
    m = za.shape[0]
    n = m - 1
    # the third derivative is (c_x A^2) . x', bounded through k3 = ||c_x A^2 W||_1
    if k3 < 0.0:
        k3 = third_norm(Ms, s, c, bounds)
    f0 = sign0 * crossing_value(c, za, a, level, ramp, t_ref)
    s0, q0 = event_derivatives(Ms, s, c, za, ramp)
    s0 *= sign0
    q0 *= sign0
    if _starts_past_zero(f0, s0, q0):
        # already at or past zero: the first zero is at a itself
        if snap:
            za[0] = level
        return a
    mu = bounds[s, n]
    n_sub = _substep_count(guard, mu, a, b)
    t0 = a
    width = -1.0     # set to the bracket (t0, t0 + width] once a single zero is bracketed
    for q in range(n_sub):
        t1 = b if q == n_sub - 1 else a + (b - a) * (q + 1) / n_sub
        for i in range(m):
            work[i] = za[i]
        if n_sub == 1:
            for i in range(m):
                work[i] = zb[i]
        else:
            advance(Ms, E, h, s, work, t1 - t0, tmp)
        d = t1 - t0
        # the bound on the third derivative over the sub-step ((1 + 1e-12): its rounding)
        B3 = k3 * velocity_norm(Ms, s, za, bounds) * growth(mu * d) * (1.0 + 1e-12)
        f1 = sign0 * crossing_value(c, work, t1, level, ramp, t_ref)
        if f1 <= 0.0:
            # f' <= s0 + max(q0, 0) u + B3 u^2 / 2 < 0 throughout: one zero
            if -s0 > max(q0, 0.0) * d + 0.5 * B3 * d * d:
                width = d
                break
            tz = _march(Ms, E, h, s, za, t0, f0, s0, q0, np.inf, t1, B3, sign0, c, level,
                        ramp, t_ref, tmp, trial)
            if snap:
                za[0] = level
            return tz
        s1, q1 = event_derivatives(Ms, s, c, work, ramp)
        s1 *= sign0
        q1 *= sign0
        back = reach3(f1, -s1, q1, B3)
        if reach3(f0, s0, q0, B3) + back <= d:
            tz = _march(Ms, E, h, s, za, t0, f0, s0, q0, t1 - back, t1, B3, sign0, c, level,
                        ramp, t_ref, tmp, trial)
            if tz >= 0.0:
                if snap:
                    za[0] = level
                return tz
        for i in range(m):
            za[i] = work[i]
        t0 = t1
        f0, s0, q0 = f1, s1, q1
    if width < 0.0:
        return -1.0
    return refine_zero(Ms, E, h, s, za, t0, width, sign0, tmp, trial, c, level, ramp, t_ref,
                       snap, taylor_gap, poly)


@njit(cache=True, inline="always")
def _starts_past_zero(f0, s0, q0):
    """True when the (oriented) event function is past zero at the start, or on
    zero and heading to the other side (slope, then curvature)."""
    if f0 == 0.0:
        return s0 < 0.0 or (s0 == 0.0 and q0 <= 0.0)
    return f0 < 0.0


@njit(cache=True, inline="always")
def _substep_count(guard, mu, a, b):
    """Sub-steps of (a, b]: none longer than ``guard`` nor ``1 / mu`` (``mu``: the
    logarithmic norm, so the derivative bound grows by at most e over one)."""
    step = guard
    if mu > 0.0 and 1.0 / mu < step:
        step = 1.0 / mu
    if b - a > step:
        return int(np.ceil((b - a) / step))
    return 1


@njit(cache=True, _nrt=False)
def conduction_for(gate, strategy, il, node=False):
    """Conduction state entered under ``gate`` with inductor current ``il``.

    With node capacitance (``node``) a gate that leaves the node open enters
    ``OPEN``; the caller then tests the clamps (a diode may conduct at once).
    """
    if gate == GATE_HIGH:
        return HIGH
    if gate == GATE_LOW:
        if strategy == FORCED:
            return LOW
        if il > 0.0:
            return LOW
    if node:
        return OPEN
    if il > 0.0:
        return LOW_DIODE
    if il < 0.0:
        return HIGH_DIODE
    return IDLE


@njit(cache=True)
def evaluate(Ms, E, h, seg_sys, seg_x0, index, tau, out):
    """States ``out[j] = z(t_j)`` for times given as (segment index, offset)."""
    n = seg_x0.shape[1]
    m = out.shape[1]
    z = np.empty(m)
    tmp = np.empty(2 * m)
    for j in range(index.shape[0]):
        k = index[j]
        for i in range(n):
            z[i] = seg_x0[k, i]
        z[m - 1] = 1.0
        advance(Ms, E, h, seg_sys[k], z, tau[j], tmp)
        for i in range(m):
            out[j, i] = z[i]
