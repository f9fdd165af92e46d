"""numba kernels: exact propagation, zero-current events, the open-loop cycle loop.

Kernels are plain typed loops over arrays (no small-matrix ``@``: it compiles
slowly and runs slower for 3 x 3). Everything a kernel needs is passed in as
arrays prepared by :mod:`bucksim.engine.tables`.

Propagation over an arbitrary interval ``d`` uses a table of exact
transition matrices ``E[s, k] = expm(M_s h_k)`` with ``h_k = T 2**-k``:
``d`` is decomposed into its binary digits and the matching matrices are
applied to the state vector, so a new interval length costs ``O(K m^2)``
multiply-adds and no new matrix exponential. Every product is of exact
transition matrices, so the result is exact to rounding whatever the
eigenstructure of ``M`` (repeated, zero or complex eigenvalues alike).
"""

from __future__ import annotations

import numpy as np
from numba import njit

# conduction codes (mirrors bucksim.stage; numba needs plain module constants)
HIGH, LOW, LOW_DIODE, HIGH_DIODE, IDLE = 0, 1, 2, 3, 4
N_CONDUCTION = 5
GATE_HIGH, GATE_OFF, GATE_LOW = 0, 1, 2
ASYNC, FORCED, EMULATION = 0, 1, 2

STATUS_OK, STATUS_DIVERGED, STATUS_FULL = 0, 1, 2

#: Order of the Taylor series for remainders below the table's last step
#: (mirrors tables.TAYLOR_ORDER; the table is built so it is exact to rounding).
TAYLOR_ORDER = 8


@njit(cache=True)
def apply(E, s, k, z, tmp):
    """z <- E[s, k] @ z (in place, via tmp)."""
    m = z.shape[0]
    if m == 3:  # the two-state stage: unrolled, ~3x faster than the loop
        z0, z1, z2 = z[0], z[1], z[2]
        z[0] = E[s, k, 0, 0] * z0 + E[s, k, 0, 1] * z1 + E[s, k, 0, 2] * z2
        z[1] = E[s, k, 1, 0] * z0 + E[s, k, 1, 1] * z1 + E[s, k, 1, 2] * z2
        z[2] = E[s, k, 2, 0] * z0 + E[s, k, 2, 1] * z1 + E[s, k, 2, 2] * z2
        return
    for i in range(m):
        acc = 0.0
        for j in range(m):
            acc += E[s, k, i, j] * z[j]
        tmp[i] = acc
    for i in range(m):
        z[i] = tmp[i]


@njit(cache=True)
def derivative(Ms, s, z, row):
    """Component ``row`` of M_s @ z."""
    acc = 0.0
    for j in range(z.shape[0]):
        acc += Ms[s, row, j] * z[j]
    return acc


@njit(cache=True)
def taylor_step(Ms, s, z, u, tmp, acc):
    """z <- sum_j (M_s u)^j / j! z over j <= TAYLOR_ORDER (Horner), for short ``u``."""
    m = z.shape[0]
    for i in range(m):
        acc[i] = z[i]
    for j in range(TAYLOR_ORDER, 0, -1):
        c = u / j
        for i in range(m):
            v = 0.0
            for q in range(m):
                v += Ms[s, i, q] * acc[q]
            tmp[i] = z[i] + c * v
        for i in range(m):
            acc[i] = tmp[i]
    for i in range(m):
        z[i] = acc[i]


@njit(cache=True)
def taylor_step3(Ms, s, z, u):
    """:func:`taylor_step` for the two-state stage (``m = 3``), in registers."""
    z0, z1, z2 = z[0], z[1], z[2]
    a0, a1, a2 = z0, z1, z2
    m00, m01, m02 = Ms[s, 0, 0], Ms[s, 0, 1], Ms[s, 0, 2]
    m10, m11, m12 = Ms[s, 1, 0], Ms[s, 1, 1], Ms[s, 1, 2]
    m20, m21, m22 = Ms[s, 2, 0], Ms[s, 2, 1], Ms[s, 2, 2]
    for j in range(TAYLOR_ORDER, 0, -1):
        c = u / j
        b0 = z0 + c * (m00 * a0 + m01 * a1 + m02 * a2)
        b1 = z1 + c * (m10 * a0 + m11 * a1 + m12 * a2)
        b2 = z2 + c * (m20 * a0 + m21 * a1 + m22 * a2)
        a0, a1, a2 = b0, b1, b2
    z[0], z[1], z[2] = a0, a1, a2


@njit(cache=True)
def advance(Ms, E, h, s, z, d, tmp):
    """z <- expm(M_s d) @ z for any d >= 0: binary digits of d over the table,
    then the Taylor series for the remainder below its last step."""
    K = h.shape[0]
    r = d
    while r >= h[0]:
        apply(E, s, 0, z, tmp)
        r -= h[0]
    for k in range(1, K):
        if r >= h[k]:
            apply(E, s, k, z, tmp)
            r -= h[k]
    if r > 0.0:
        if z.shape[0] == 3:
            taylor_step3(Ms, s, z, r)
        else:
            acc = np.empty(z.shape[0])
            taylor_step(Ms, s, z, r, tmp, acc)


@njit(cache=True)
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


@njit(cache=True)
def crossing_slope(Ms, s, c, z, ramp):
    """Time derivative of the event function: ``c . (M_s z) + ramp``."""
    acc = ramp
    for i in range(z.shape[0]):
        if c[i] != 0.0:
            acc += c[i] * derivative(Ms, s, z, i)
    return acc


@njit(cache=True)
def refine_zero(Ms, E, h, s, z, t, width, sign0, tmp, trial, c, level, ramp, t_ref, snap,
                taylor_gap=0.0):
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
    return taylor_zero(Ms, s, z, t, gap, c, level, ramp, t_ref, snap, tmp)


@njit(cache=True)
def taylor_zero(Ms, s, z, t, gap, c, level, ramp, t_ref, snap, tmp):
    """Zero of the event function in (t, t + gap] from its Taylor series.

    Used once the bracket is below the table's last step, where the series
    ``z(t + u) = sum_j M^j z u^j / j!`` truncated after :data:`TAYLOR_ORDER`
    is exact to rounding: the event function is then a polynomial in ``u``,
    solved by Newton steps kept inside the bracket (bisection when a step
    leaves it).
    """
    m = z.shape[0]
    n = TAYLOR_ORDER
    v = np.empty((n + 1, m))
    for i in range(m):
        v[0, i] = z[i]
    fact = 1.0
    for j in range(1, n + 1):
        fact *= j
        for i in range(m):
            acc = 0.0
            for q in range(m):
                acc += Ms[s, i, q] * v[j - 1, q]
            v[j, i] = acc
    # polynomial coefficients of g(t + u) and of the state (v[j] / j!)
    g = np.zeros(n + 1)
    fact = 1.0
    for j in range(1, n + 1):
        fact *= j
        for i in range(m):
            v[j, i] /= fact
            g[j] += c[i] * v[j, i]
    g[0] = crossing_value(c, z, t, level, ramp, t_ref)
    g[1] += ramp
    lo, hi = 0.0, gap          # g keeps sign0's sign at lo, the other at hi
    sign_lo = 1.0 if g[0] > 0.0 else -1.0
    u = 0.5 * gap
    if g[1] != 0.0:
        u = min(max(-g[0] / g[1], 0.0), gap)
    for _ in range(80):
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
            if abs(step) <= 1e-16 * gap:
                u -= step      # converged: the step is at rounding level
                break
            un = u - step
            if lo < un < hi:
                u = un
                continue
        if hi - lo <= 1e-16 * gap:
            break
        u = 0.5 * (lo + hi)    # Newton left the bracket: bisect
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


@njit(cache=True)
def find_zero(Ms, E, h, s, za, zb, a, b, sign0, guard, tmp, trial, work, c,
              level=0.0, ramp=0.0, t_ref=0.0, snap=True, taylor_gap=0.0):
    """Locate the first zero of the event function in (a, b] given the states at both ends.

    Returns the zero's time (``za`` then holds the state there) or -1.0 when
    the function keeps the sign ``sign0`` over the whole interval. Intervals
    longer than ``guard`` (a quarter of the fastest natural time constant)
    are marched in sub-steps so that each sub-step holds at most one
    extremum; inside a sub-step an extremum that turns toward zero is
    checked, so a touch-and-return crossing is not stepped over.
    """
    m = za.shape[0]
    n_sub = 1
    if b - a > guard:
        n_sub = int(np.ceil((b - a) / guard))
    t0 = a
    for q in range(n_sub):
        t1 = b if q == n_sub - 1 else a + (b - a) * (q + 1) / n_sub
        for i in range(m):
            work[i] = za[i]
        if n_sub == 1:
            for i in range(m):
                work[i] = zb[i]
        else:
            advance(Ms, E, h, s, work, t1 - t0, tmp)
        if sign0 * crossing_value(c, work, t1, level, ramp, t_ref) <= 0.0:
            return refine_zero(Ms, E, h, s, za, t0, t1 - t0, sign0, tmp, trial,
                               c, level, ramp, t_ref, snap, taylor_gap)
        da = sign0 * crossing_slope(Ms, s, c, za, ramp)
        db = sign0 * crossing_slope(Ms, s, c, work, ramp)
        if da < 0.0 and db > 0.0:
            te = t0 + (t1 - t0) * da / (da - db)
            for i in range(m):
                trial[i] = za[i]
            advance(Ms, E, h, s, trial, te - t0, tmp)
            if sign0 * crossing_value(c, trial, te, level, ramp, t_ref) <= 0.0:
                return refine_zero(Ms, E, h, s, za, t0, te - t0, sign0, tmp, trial,
                                   c, level, ramp, t_ref, snap, taylor_gap)
        for i in range(m):
            za[i] = work[i]
        t0 = t1
    return -1.0


@njit(cache=True)
def conduction_for(gate, strategy, il):
    """Conduction state entered under ``gate`` with inductor current ``il``."""
    if gate == GATE_HIGH:
        return HIGH
    if gate == GATE_LOW:
        if strategy == FORCED:
            return LOW
        if il > 0.0:
            return LOW
    if il > 0.0:
        return LOW_DIODE
    if il < 0.0:
        return HIGH_DIODE
    return IDLE


@njit(cache=True)
def run_phase(Ms, E, h, P, p, cached, gate, strategy, t_phase, t_phase_end, level,
              level_times, z, t_end, guard, thr_c, thr_level, thr_ramp, thr_tref,
              seg_t0, seg_dt, seg_cond, seg_sys, seg_x0, nseg, tmp, trial, work, zs, zs2,
              e_il, taylor_gap=0.0, lim_level=np.inf):
    """Propagate one gate phase ``[t_phase, t_phase_end)`` from state ``z``.

    Splits the phase at operating-level changes and at ``t_end``, ends a
    diode-like conduction at its zero-current event (then idles), and, when
    ``thr_level`` is finite in a high-side phase, ends the phase early where
    ``thr_c . z + thr_ramp (t - thr_tref)`` reaches ``thr_level`` (a
    comparator: peak current with slope compensation, or an analog PWM
    comparator). A finite ``lim_level`` adds a second threshold,
    ``iL >= lim_level`` (cycle-by-cycle current limit), and the earlier of
    the two ends the phase. ``e_il`` is the unit row selecting ``iL``;
    ``tmp`` to ``zs2`` are work buffers of the state's length. ``P[:, p]`` is used
    when ``cached`` and the phase runs whole. Returns
    ``(nseg, level, t, status, tripped)``.
    """
    n = seg_x0.shape[1]
    m = z.shape[0]
    n_levels = level_times.shape[0]
    cap = seg_t0.shape[0]
    t = t_phase
    cond = conduction_for(gate, strategy, z[0])
    threshold = gate == GATE_HIGH and np.isfinite(thr_level)
    limit = gate == GATE_HIGH and np.isfinite(lim_level)
    while t < t_phase_end:
        while level + 1 < n_levels and level_times[level + 1] <= t:
            level += 1
        t_stop = t_phase_end
        if level + 1 < n_levels and level_times[level + 1] < t_stop:
            t_stop = level_times[level + 1]
        if t_end < t_stop:
            t_stop = t_end
        s = level * N_CONDUCTION + cond
        if nseg >= cap:
            return nseg, level, t, STATUS_FULL, False
        if threshold and crossing_value(thr_c, z, t, thr_level, thr_ramp, thr_tref) >= 0.0:
            return nseg, level, t, STATUS_OK, True
        if limit and z[0] >= lim_level:
            return nseg, level, t, STATUS_OK, True
        seg_t0[nseg] = t
        seg_cond[nseg] = cond
        seg_sys[nseg] = s
        for i in range(n):
            seg_x0[nseg, i] = z[i]
        for i in range(m):
            zs[i] = z[i]
        d = t_stop - t
        if cached and t == t_phase and t_stop == t_phase_end:
            apply(P, s, p, z, tmp)
        else:
            advance(Ms, E, h, s, z, d, tmp)
        evented = cond == LOW_DIODE or cond == HIGH_DIODE or (
            cond == LOW and strategy == EMULATION)
        tz = -1.0
        if evented:
            sign0 = -1.0 if cond == HIGH_DIODE else 1.0
            tz = find_zero(Ms, E, h, s, zs, z, t, t_stop, sign0, guard, tmp, trial, work,
                           e_il, 0.0, 0.0, 0.0, True, taylor_gap)
        elif threshold or limit:
            if limit:
                for i in range(m):
                    zs2[i] = zs[i]
            if threshold:
                tz = find_zero(Ms, E, h, s, zs, z, t, t_stop, -1.0, guard, tmp, trial, work,
                               thr_c, thr_level, thr_ramp, thr_tref, False, taylor_gap)
            if limit:
                # the limit counts only if it comes first: search up to the
                # comparator's instant (zs holds the state there) or the stop
                zb = zs if tz >= 0.0 else z
                t_lim_stop = tz if tz >= 0.0 else t_stop
                t2 = find_zero(Ms, E, h, s, zs2, zb, t, t_lim_stop, -1.0, guard, tmp, trial,
                               work, e_il, lim_level, 0.0, thr_tref, False, taylor_gap)
                if t2 >= 0.0 and (tz < 0.0 or t2 < tz):
                    tz = t2
                    for i in range(m):
                        zs[i] = zs2[i]
        if tz >= 0.0:
            for i in range(m):
                z[i] = zs[i]
            seg_dt[nseg] = tz - t
            nseg += 1
            t = tz
            if threshold or limit:
                return nseg, level, t, STATUS_OK, True
            cond = IDLE
            continue
        seg_dt[nseg] = d
        nseg += 1
        t = t_stop
        for i in range(m):
            if not np.isfinite(z[i]):
                return nseg, level, t, STATUS_DIVERGED, False
        if t >= t_end:
            return nseg, level, t, STATUS_OK, False
    return nseg, level, t, STATUS_OK, False


@njit(cache=True)
def run_open_loop(Ms, E, h, P, nominal, t_on, td_fall, td_rise, T, strategy,
                  c_start, c_stop, level_times, level, z, t_end, guard,
                  seg_t0, seg_dt, seg_cond, seg_sys, seg_x0, taylor_gap=0.0):
    """Simulate switching cycles ``c_start .. c_stop-1`` from state ``z``.

    Segments are written to the ``seg_*`` arrays from index 0. Returns
    ``(n_segments, level, status, t)``; ``z`` holds the state at ``t``.

    The same logic as :func:`run_phase`, written out in one loop: calling a
    phase function four times a period cost 2.5x in speed on the open-loop
    path (measured with benchmarks/bench_engine.py), which has no per-phase
    decisions to make.
    """
    n = seg_x0.shape[1]
    m = z.shape[0]
    tmp = np.empty(m)
    trial = np.empty(m)
    work = np.empty(m)
    zs = np.empty(m)
    e_il = np.zeros(m)
    e_il[0] = 1.0
    gates = np.empty(4, np.int64)
    durs = np.empty(4)
    n_levels = level_times.shape[0]
    cap = seg_t0.shape[0]
    nseg = 0
    t = c_start * T
    for c in range(c_start, c_stop):
        tc = c * T
        ton = t_on[c] if t_on.shape[0] > 1 else t_on[0]
        if strategy == ASYNC:
            nph = 2
            gates[0] = GATE_HIGH
            durs[0] = ton
            gates[1] = GATE_OFF
            durs[1] = T - ton
        else:
            nph = 4
            gates[0] = GATE_HIGH
            durs[0] = ton
            gates[1] = GATE_OFF
            durs[1] = td_fall
            gates[2] = GATE_LOW
            durs[2] = max(0.0, T - ton - td_fall - td_rise)
            gates[3] = GATE_OFF
            durs[3] = td_rise
        last = nph - 1
        while last > 0 and durs[last] <= 0.0:
            last -= 1
        offset = 0.0
        for p in range(nph):
            t_phase = tc + offset
            offset += durs[p]
            # the last phase that lasts ends exactly on the period boundary, so
            # rounding of the offsets never leaves a sliver phase behind it
            t_phase_end = (c + 1) * T if p == last else tc + offset
            if durs[p] <= 0.0 or t_phase_end <= t_phase:
                continue
            t = t_phase
            cond = conduction_for(gates[p], strategy, z[0])
            while t < t_phase_end:
                while level + 1 < n_levels and level_times[level + 1] <= t:
                    level += 1
                t_stop = t_phase_end
                if level + 1 < n_levels and level_times[level + 1] < t_stop:
                    t_stop = level_times[level + 1]
                if t_end < t_stop:
                    t_stop = t_end
                s = level * N_CONDUCTION + cond
                if nseg >= cap:
                    return nseg, level, STATUS_FULL, t
                seg_t0[nseg] = t
                seg_cond[nseg] = cond
                seg_sys[nseg] = s
                for i in range(n):
                    seg_x0[nseg, i] = z[i]
                for i in range(m):
                    zs[i] = z[i]
                d = t_stop - t
                if t == t_phase and t_stop == t_phase_end and durs[p] == nominal[p]:
                    apply(P, s, p, z, tmp)
                else:
                    advance(Ms, E, h, s, z, d, tmp)
                evented = cond == LOW_DIODE or cond == HIGH_DIODE or (
                    cond == LOW and strategy == EMULATION)
                if evented:
                    sign0 = -1.0 if cond == HIGH_DIODE else 1.0
                    # fast path: the sign holds at the end and iL has no extremum
                    # turning toward zero inside (the common dead-time case)
                    tz = -1.0
                    if (d > guard or sign0 * z[0] <= 0.0
                            or (sign0 * derivative(Ms, s, zs, 0) < 0.0
                                and sign0 * derivative(Ms, s, z, 0) > 0.0)):
                        tz = find_zero(Ms, E, h, s, zs, z, t, t_stop, sign0, guard,
                                       tmp, trial, work, e_il, 0.0, 0.0, 0.0, True, taylor_gap)
                    if tz >= 0.0:
                        for i in range(m):
                            z[i] = zs[i]
                        seg_dt[nseg] = tz - t
                        nseg += 1
                        t = tz
                        cond = IDLE
                        continue
                seg_dt[nseg] = d
                nseg += 1
                t = t_stop
                for i in range(n):
                    if not np.isfinite(z[i]):
                        return nseg, level, STATUS_DIVERGED, t
                if t >= t_end:
                    return nseg, level, STATUS_OK, t
    return nseg, level, STATUS_OK, t


@njit(cache=True)
def cycle_phases(ton, td_fall, td_rise, T, strategy, gates, durs):
    """Gate phases of one period at high-side on-time ``ton``; returns their number."""
    gates[0] = GATE_HIGH
    durs[0] = ton
    if strategy == ASYNC:
        gates[1] = GATE_OFF
        durs[1] = T - ton
        return 2
    gates[1] = GATE_OFF
    durs[1] = td_fall
    gates[2] = GATE_LOW
    durs[2] = max(0.0, T - ton - td_fall - td_rise)
    gates[3] = GATE_OFF
    durs[3] = td_rise
    return 4


@njit(cache=True)
def evaluate(Ms, E, h, seg_sys, seg_x0, index, tau, out):
    """States ``out[j] = z(t_j)`` for times given as (segment index, offset)."""
    n = seg_x0.shape[1]
    m = out.shape[1]
    z = np.empty(m)
    tmp = np.empty(m)
    for j in range(index.shape[0]):
        k = index[j]
        for i in range(n):
            z[i] = seg_x0[k, i]
        z[m - 1] = 1.0
        advance(Ms, E, h, seg_sys[k], z, tau[j], tmp)
        for i in range(m):
            out[j, i] = z[i]
