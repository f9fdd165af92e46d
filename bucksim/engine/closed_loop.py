"""numba cycle loop with the controller inside: voltage mode and peak-current mode.

Once per period, at high-side turn-on ``t_k = k T``, the controller samples
the exact output voltage, updates a discrete compensator (state space
``w+ = Ad w + Bd e``, ``u = Cd w + Dd e``) and sets the on-time:

* voltage mode: ``d = u / V_ramp`` (PWM comparator against a ramp of
  ``V_ramp`` peak to peak), delayed by ``delay`` periods, quantised to
  ``duty_bits``, clamped to ``[0, max_duty]``;
* peak-current mode: the high side turns off where
  ``Ri iL(t) + Se (t - t_k)`` reaches ``u`` (located on the analytic
  solution), after a blanking time ``min_on_time`` and no later than
  ``max_duty T``.

A cycle-by-cycle current limit ends the on-time where ``iL`` reaches it.
With ``pulse_skipping`` a cycle whose demand is below the minimum on-time
has no high-side pulse. Anti-windup: the compensator state is not advanced
while the output is saturated and the error pushes it further out.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .kernels import (ASYNC, GATE_HIGH, GATE_LOW, GATE_OFF, N_CONDUCTION, STATUS_OK,
                      run_phase)

VOLTAGE_MODE, PEAK_CURRENT = 0, 1


@njit(cache=True)
def _vo(Cvo, s, z):
    acc = 0.0
    for j in range(z.shape[0]):
        acc += Cvo[s, j] * z[j]
    return acc


@njit(cache=True)
def _compensate(Ad, Bd, Cd, Dd, w, e, lo, hi, wnew):
    """One compensator step with conditional integration; returns the output."""
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
def run_closed_loop(Ms, E, h, P, Cvo, T, strategy, mode, c_start, c_stop, level_times,
                    level, z, t_end, guard, td_fall, td_rise,
                    reference, soft_start, sense_gain, Ad, Bd, Cd, Dd, w, queue,
                    ramp_v, ri, se, i_limit, max_duty, min_on, skip, duty_bits,
                    seg_t0, seg_dt, seg_cond, seg_sys, seg_x0, log_duty, log_u,
                    taylor_gap=0.0):
    """Simulate cycles ``c_start .. c_stop-1`` under closed-loop control.

    ``w`` (compensator state) and ``queue`` (delayed duties, voltage mode)
    are updated in place so a caller can continue in the next chunk.
    ``log_duty[c - c_start]`` and ``log_u[...]`` receive the applied duty
    and the compensator output of each cycle. Returns
    ``(n_segments, level, status, t)``.
    """
    m = z.shape[0]
    tmp = np.empty(m)
    trial = np.empty(m)
    work = np.empty(m)
    zs = np.empty(m)
    zs2 = np.empty(m)
    e_il = np.zeros(m)
    e_il[0] = 1.0
    wnew = np.empty(w.shape[0])
    nseg = 0
    t = c_start * T
    status = STATUS_OK
    n_delay = queue.shape[0]
    for c in range(c_start, c_stop):
        tc = c * T
        while level + 1 < level_times.shape[0] and level_times[level + 1] <= tc:
            level += 1
        s = level * N_CONDUCTION
        vref = reference
        if soft_start > 0.0 and tc < soft_start:
            vref = reference * tc / soft_start
        e = sense_gain * (vref - _vo(Cvo, s, z))
        if mode == VOLTAGE_MODE:
            u = _compensate(Ad, Bd, Cd, Dd, w, e, 0.0, max_duty * ramp_v, wnew)
            d = min(max(u / ramp_v, 0.0), max_duty)
            if duty_bits > 0:
                q = 2.0 ** duty_bits
                d = np.floor(d * q + 0.5) / q
            if n_delay > 0:
                d_now = queue[0]
                for i in range(n_delay - 1):
                    queue[i] = queue[i + 1]
                queue[n_delay - 1] = d
                d = d_now
            if d * T < min_on:
                d = 0.0 if skip else min_on / T
            t_on_max = d * T
            level_pk = np.inf
        else:
            u = _compensate(Ad, Bd, Cd, Dd, w, e, 0.0, np.inf, wnew)
            t_on_max = max_duty * T
            level_pk = u / ri
            if skip and level_pk <= z[0]:
                t_on_max = 0.0
        log_u[c - c_start] = u
        # high side: blanking, then the comparator and/or the current limit
        t_off = tc
        if t_on_max > 0.0:
            t_blank_end = tc + min(min_on, t_on_max) if mode == PEAK_CURRENT else tc
            t_hi_end = tc + t_on_max
            if t_blank_end > tc:
                nseg, level, t, status, _ = run_phase(
                    Ms, E, h, P, 0, False, GATE_HIGH, strategy, tc, t_blank_end, level,
                    level_times, z, t_end, guard, e_il, np.inf, 0.0, tc, seg_t0, seg_dt, seg_cond,
                    seg_sys, seg_x0, nseg, tmp, trial, work, zs, zs2, e_il, taylor_gap)
                if status != STATUS_OK or t >= t_end:
                    return nseg, level, status, t
            # the tighter of the two thresholds; they swap where the falling
            # comparator level meets the current limit
            t_a = t_blank_end
            first_level, first_ramp = i_limit, 0.0
            t_swap = t_hi_end
            if np.isfinite(level_pk):
                ramp_pk = se / ri
                if level_pk - ramp_pk * (t_a - tc) <= i_limit:
                    first_level, first_ramp = level_pk, ramp_pk
                elif ramp_pk > 0.0:
                    t_swap = min(t_hi_end, tc + (level_pk - i_limit) / ramp_pk)
            tripped = False
            t = t_a
            if t_swap > t_a:
                nseg, level, t, status, tripped = run_phase(
                    Ms, E, h, P, 0, False, GATE_HIGH, strategy, t_a, t_swap, level,
                    level_times, z, t_end, guard, e_il, first_level, first_ramp, tc, seg_t0,
                    seg_dt, seg_cond, seg_sys, seg_x0, nseg, tmp, trial, work, zs, zs2, e_il, taylor_gap)
                if status != STATUS_OK or t >= t_end:
                    return nseg, level, status, t
            if not tripped and t_swap < t_hi_end:
                nseg, level, t, status, tripped = run_phase(
                    Ms, E, h, P, 0, False, GATE_HIGH, strategy, t_swap, t_hi_end, level,
                    level_times, z, t_end, guard, e_il, level_pk, se / ri, tc, seg_t0, seg_dt,
                    seg_cond, seg_sys, seg_x0, nseg, tmp, trial, work, zs, zs2, e_il, taylor_gap)
                if status != STATUS_OK or t >= t_end:
                    return nseg, level, status, t
            t_off = t
        log_duty[c - c_start] = (t_off - tc) / T
        # the rest of the period: dead times and the low side, or the diode
        t_next = (c + 1) * T
        if strategy == ASYNC:
            ends = (t_next, t_next, t_next)
            gates = (GATE_OFF, GATE_OFF, GATE_OFF)
        else:
            t_ls = min(t_off + td_fall, t_next)
            t_ls_end = max(t_ls, t_next - td_rise)
            ends = (t_ls, t_ls_end, t_next)
            gates = (GATE_OFF, GATE_LOW, GATE_OFF)
        t_start = t_off
        for p in range(3):
            if ends[p] > t_start:
                nseg, level, t, status, _ = run_phase(
                    Ms, E, h, P, 0, False, gates[p], strategy, t_start, ends[p], level,
                    level_times, z, t_end, guard, e_il, np.inf, 0.0, tc, seg_t0, seg_dt, seg_cond,
                    seg_sys, seg_x0, nseg, tmp, trial, work, zs, zs2, e_il, taylor_gap)
                if status != STATUS_OK or t >= t_end:
                    return nseg, level, status, t
                t_start = ends[p]
    return nseg, level, status, t
