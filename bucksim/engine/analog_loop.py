"""numba cycle loop for an analog controller whose states are part of the stage.

The compensator and the reference are states of the augmented system (see
:mod:`bucksim.stage`), so between switching instants they are propagated
exactly with the power stage. What remains here is the comparator:

* voltage mode: a clock at ``t_k = k T`` turns the high side on; it turns
  off where the PWM ramp ``V_ramp (t - t_k) / T`` reaches the compensator
  output ``u(t)``;
* peak-current mode: it turns off where ``Ri iL(t) + Se (t - t_k)`` reaches
  ``u(t)``.

Both are the event ``c . z + a (t - t_k) = 0`` with a row ``c`` per
operating level (``-c_u``, or ``Ri e_iL - c_u``), located on the analytic
solution by :func:`bucksim.engine.kernels.find_zero`. The comparator is
blanked for ``min_on_time``; the on-time ends at ``max_duty T`` at the
latest, or earlier where ``iL`` reaches the cycle-by-cycle current limit
(active from turn-on). With ``pulse_skipping`` a period whose demand at the
clock is below the minimum on-time (voltage mode: ``u(t_k) <= V_ramp
t_min / T``; peak-current mode: ``u(t_k) <= Ri iL(t_k)``) has no pulse.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 7 (the PWM modulator, gain 1/V_M), ch. 12
   (current-programmed control).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .kernels import ASYNC, GATE_HIGH, GATE_LOW, GATE_OFF, STATUS_OK, run_phase


@njit(cache=True)
def _dot(c, z):
    acc = 0.0
    for j in range(z.shape[0]):
        acc += c[j] * z[j]
    return acc


@njit(cache=True)
def run_analog_loop(Ms, E, h, P, Cu, Cthr, thr_ramp, T, strategy, peak_mode, c_start, c_stop,
                    level_times, level, z, t_end, guard, td_fall, td_rise, ramp_v, ri,
                    i_limit, max_duty, min_on, skip, seg_t0, seg_dt, seg_cond, seg_sys, seg_x0,
                    log_duty, log_u, taylor_gap):
    """Simulate cycles ``c_start .. c_stop-1`` under the analog controller.

    ``Cu[level]`` is the row of the compensator output, ``Cthr[level]`` the
    comparator's event row and ``thr_ramp`` its ramp [unit/s]. Returns
    ``(n_segments, level, status, t)``; ``z`` holds the state at ``t``;
    ``log_duty`` and ``log_u`` receive each period's on-time / T and
    ``u(t_k)``.
    """
    m = z.shape[0]
    tmp = np.empty(m)
    trial = np.empty(m)
    work = np.empty(m)
    zs = np.empty(m)
    zs2 = np.empty(m)
    e_il = np.zeros(m)
    e_il[0] = 1.0
    nseg = 0
    t = c_start * T
    status = STATUS_OK
    for c in range(c_start, c_stop):
        tc = c * T
        while level + 1 < level_times.shape[0] and level_times[level + 1] <= tc:
            level += 1
        u = _dot(Cu[level], z)
        log_u[c - c_start] = u
        t_on_max = max_duty * T
        if skip:
            if peak_mode:
                demand_low = u <= ri * z[0]
            else:
                demand_low = u <= ramp_v * min_on / T
            if demand_low:
                t_on_max = 0.0
        t_off = tc
        if t_on_max > 0.0:
            t_blank_end = tc + min(min_on, t_on_max)
            t = tc
            tripped = False
            if t_blank_end > tc:
                nseg, level, t, status, tripped = run_phase(
                    Ms, E, h, P, 0, False, GATE_HIGH, strategy, tc, t_blank_end, level,
                    level_times, z, t_end, guard, e_il, np.inf, 0.0, tc, seg_t0, seg_dt,
                    seg_cond, seg_sys, seg_x0, nseg, tmp, trial, work, zs, zs2, e_il,
                    taylor_gap, i_limit)
                if status != STATUS_OK or t >= t_end:
                    return nseg, level, status, t
            if not tripped and tc + t_on_max > t:
                # the row follows the level: a load step moves vo, and so u
                nseg, level, t, status, tripped = run_analog_on(
                    Ms, E, h, P, Cthr, thr_ramp, strategy, t, tc + t_on_max, tc, level,
                    level_times, z, t_end, guard, seg_t0, seg_dt, seg_cond, seg_sys, seg_x0,
                    nseg, tmp, trial, work, zs, zs2, e_il, taylor_gap, i_limit)
                if status != STATUS_OK or t >= t_end:
                    return nseg, level, status, t
            t_off = t
        log_duty[c - c_start] = (t_off - tc) / T
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
                    level_times, z, t_end, guard, e_il, np.inf, 0.0, tc, seg_t0, seg_dt,
                    seg_cond, seg_sys, seg_x0, nseg, tmp, trial, work, zs, zs2, e_il,
                    taylor_gap)
                if status != STATUS_OK or t >= t_end:
                    return nseg, level, status, t
                t_start = ends[p]
    return nseg, level, status, t


@njit(cache=True)
def run_analog_on(Ms, E, h, P, Cthr, thr_ramp, strategy, t_a, t_b, tc, level, level_times, z,
                  t_end, guard, seg_t0, seg_dt, seg_cond, seg_sys, seg_x0, nseg, tmp, trial,
                  work, zs, zs2, e_il, taylor_gap, i_limit):
    """The comparator-live part of the on-time, ``[t_a, t_b)``, one level at a time."""
    t = t_a
    status = STATUS_OK
    tripped = False
    n_levels = level_times.shape[0]
    while t < t_b and not tripped:
        while level + 1 < n_levels and level_times[level + 1] <= t:
            level += 1
        t_stop = t_b
        if level + 1 < n_levels and level_times[level + 1] < t_stop:
            t_stop = level_times[level + 1]
        nseg, level, t, status, tripped = run_phase(
            Ms, E, h, P, 0, False, GATE_HIGH, strategy, t, t_stop, level, level_times, z,
            t_end, guard, Cthr[level], 0.0, thr_ramp, tc, seg_t0, seg_dt, seg_cond, seg_sys,
            seg_x0, nseg, tmp, trial, work, zs, zs2, e_il, taylor_gap, i_limit)
        if status != STATUS_OK or t >= t_end:
            break
    return nseg, level, t, status, tripped
