"""The period's decisions and rules, as the cycle loop reads them.

:func:`bucksim.engine.cycles.run_cycles` runs each period as five gate phases
(docs: architecture, Control). What differs between controllers is only the
decision at the period's start (:func:`decide_period`: open loop, digital,
analog); what each phase does is :func:`phase_span`; the rules a segment obeys
before it is propagated (the open node's clamps, the analog integrator's hold,
the system it runs) are the small helpers below. All are inlined
(``inline="always"``) into the loop, which is compiled without reference
counting (:mod:`bucksim.engine.cycles`), so a helper costs nothing to call.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.kernels import (
    ASYNC,
    CONTROL_DIGITAL,
    CONTROL_OPEN,
    EMULATION,
    GATE_HIGH,
    GATE_LOW,
    GATE_OFF,
    HIGH,
    HIGH_DIODE,
    LOW,
    LOW_DIODE,
    N_CONDUCTION,
    OPEN,
)
from bucksim.engine.loop_parts import _compensate, _dot
from bucksim.engine.ramps import diode_currents

#: A state beyond sqrt(max float) has diverged (mirrors simulation.STATE_RANGE).
STATE_RANGE = 1.3407807929942596e154


@njit(inline="always")
def _digital_decision(cs, ctl, cst, tc, T, z, level, wnew):
    """Sample the output at ``tc``, step the compensator: voltage mode gives the
    on-time (delay line, quantisation, minimum on-time or a skip), peak-current
    mode a comparator level ``u / Ri`` with the slope ``Se / Ri``."""
    vref = cs.reference
    if cs.soft_start > 0.0 and tc < cs.soft_start:
        vref = cs.reference * tc / cs.soft_start
    e = cs.sense_gain * (vref - _dot(ctl.Cvo[level * N_CONDUCTION], z))
    if not cs.peak:
        u = _compensate(ctl.Ad, ctl.Bd, ctl.Cd, cs.Dd, cst.w, e, 0.0,
                        cs.max_duty * cs.ramp_v, wnew)
        dty = min(max(u / cs.ramp_v, 0.0), cs.max_duty)
        if cs.duty_bits > 0:
            q = 2.0 ** cs.duty_bits
            dty = np.floor(dty * q + 0.5) / q
        queue = cst.queue
        n_delay = queue.shape[0]
        if n_delay > 0:
            d_now = queue[0]
            for i in range(n_delay - 1):
                queue[i] = queue[i + 1]
            queue[n_delay - 1] = dty
            dty = d_now
        if dty * T < cs.min_on:
            dty = 0.0 if cs.skip else cs.min_on / T
        return dty * T, 0.0, False, 0.0, 0.0, u
    u = _compensate(ctl.Ad, ctl.Bd, ctl.Cd, cs.Dd, cst.w, e, 0.0, np.inf, wnew)
    t_on_max = cs.max_duty * T
    # pulse skipping: no pulse the current would not need; PFM at the clock: none
    # while the loop asks for a smaller peak than the PFM pulse's
    if (cs.skip and u / cs.ri <= z[0]) or u / cs.ri < cs.pfm_peak:
        t_on_max = 0.0
    return t_on_max, min(cs.min_on, t_on_max), True, u / cs.ri, cs.se / cs.ri, u


@njit(inline="always")
def _analog_decision(cs, ctl, T, z, level):
    """The compensator is in the state: read its output; the comparator is an event."""
    u = _dot(ctl.Cu[level], z)
    t_on_max = cs.max_duty * T
    if cs.skip:
        low = u <= cs.ri * z[0] if cs.peak else u <= cs.ramp_v * cs.min_on / T
        if low:
            t_on_max = 0.0
    return t_on_max, min(cs.min_on, t_on_max), True, 0.0, cs.thr_ramp, u


@njit(inline="always")
def decide_period(ctl, cst, c, tc, T, z, level, wnew):
    """The decision at the start of period ``c`` (at ``tc`` [s], state ``z``).

    Returns ``(t_on_max, blank, cmp_on, cmp_level, cmp_ramp, lim_live, u)``: the
    longest on-time and the blanking time [s], whether the comparator acts and
    its level and ramp, the current limit in force [A] and the control value
    (nan in open loop). Open loop: the on-time from the schedule, no
    comparator, no limit. ``wnew``: scratch for the compensator's next state.
    """
    cs = ctl.settings
    if cs.control == CONTROL_OPEN:
        on = ctl.on_times
        t_on = on[c] if on.shape[0] > 1 else on[0]
        return t_on, t_on, False, 0.0, 0.0, np.inf, np.nan
    if cs.control == CONTROL_DIGITAL:
        t_on, blank, cmp_on, lvl, ramp, u = _digital_decision(cs, ctl, cst, tc, T, z, level,
                                                              wnew)
    else:
        t_on, blank, cmp_on, lvl, ramp, u = _analog_decision(cs, ctl, T, z, level)
    return t_on, blank, cmp_on, lvl, ramp, cs.i_limit, u


@njit(inline="always")
def phase_span(p, tc, t_next, blank, t_on_max, tripped, t_off, prog, e2, e3, cmp_on,
               lim_live):
    """Gate, span and rules of phase ``p`` of the period from ``tc`` to ``t_next``.

    ``0``: high side, comparator and limit blanked (both watch the turn-on spike;
    common practice); ``1``: high side, both live; ``2``: off (the falling dead
    time, or the rest of an asynchronous period); ``3``: low side; ``4``: off
    (the rising dead time). Returns ``(gate, t_ph, t_ph_end, ph_cmp, ph_lim,
    t_off, e2, e3)``; ``t_off`` (the high side's turn-off) and ``e2``, ``e3``
    (the low side's span) are fixed when phase 2 starts.
    """
    if p == 0:
        return GATE_HIGH, tc, tc + min(blank, t_on_max), False, np.inf, t_off, e2, e3
    if p == 1:
        return GATE_HIGH, tc + blank, tc + t_on_max, cmp_on, lim_live, t_off, e2, e3
    if p == 2:
        if not tripped:
            t_off = tc + t_on_max
        sync = prog.strategy != ASYNC
        e2 = min(t_off + prog.td_fall, t_next) if sync else t_next
        e3 = max(e2, t_next - prog.td_rise) if sync else t_next
        return GATE_OFF, t_off, e2, False, np.inf, t_off, e2, e3
    if p == 3:
        return GATE_LOW, e2, e3, False, np.inf, t_off, e2, e3
    return GATE_OFF, e3, t_next, False, np.inf, t_off, e2, e3


@njit(inline="always")
def skipped_low_gate(gate, p, t_on_max, strategy, cls, z, node):
    """The gate of phase ``p`` in a period without a pulse (``t_on_max`` 0: skipped).

    In diode emulation the low side only carries on a freewheeling current: after
    a skipped clock edge it turns on again where its diode conducts (``iL > 0``,
    and with node capacitance the node at the diode's clamp, row ``cls``), never
    onto an idle or ringing node, where a controller that fired no high-side pulse
    fires no low-side one (common practice). Read from the state, not from the
    previous segment, so that a run cut into chunks decides alike. Forced PWM
    keeps its low side on whenever the high side is off.
    """
    if p != 3 or t_on_max > 0.0 or strategy != EMULATION:
        return gate
    freewheeling = z[0] > 0.0
    if node:
        m = z.shape[0]
        freewheeling = freewheeling and _dot(cls, z) <= 1e-12 * (abs(cls[m - 1]) + 1.0)
    return gate if freewheeling else GATE_OFF


@njit(inline="always")
def level_at(level_times, level, t):
    """The operating level in force at ``t`` [s] (levels only move forward)."""
    while level + 1 < level_times.shape[0] and level_times[level + 1] <= t:
        level += 1
    return level


@njit(inline="always")
def segment_stop(level_times, level, t_ph_end, t_end):
    """Where the segment must stop at the latest: the phase's end, the next
    level's start or the run's end [s]."""
    t_stop = t_ph_end
    if level + 1 < level_times.shape[0] and level_times[level + 1] < t_stop:
        t_stop = level_times[level + 1]
    return min(t_stop, t_end)


@njit(inline="always")
def open_clamps(tab, cls, chs, z):
    """The open node at a clamp: its diode conducts now (current toward it: ``iL``
    less a ramping channel's, :func:`~bucksim.engine.ramps.diode_currents`), or the
    clamp is left unsearched (current away). Returns ``(cond, search_ls, search_hs,
    at_ls, at_hs)``; ``at_ls``, ``at_hs``: the node sits on that clamp (a turning-on
    channel's ramp ends at its own, :func:`~bucksim.engine.ramps.ramp_takeover`)."""
    m = z.shape[0]
    f_ls = _dot(cls, z)
    f_hs = _dot(chs, z)
    clamp_tol = 1e-12 * (abs(cls[m - 1]) + abs(chs[m - 1]) + 1.0)
    d_ls, d_hs = diode_currents(tab, z)
    at_ls, at_hs = f_ls <= clamp_tol, f_hs <= clamp_tol
    if at_ls and d_ls > 0.0:
        return LOW_DIODE, False, False, at_ls, at_hs
    if at_hs and d_hs > 0.0:
        return HIGH_DIODE, False, False, at_ls, at_hs
    return OPEN, not at_ls, not at_hs, at_ls, at_hs


@njit(inline="always")
def hold_rule(cs, ce, z, held):
    """The analog integrator's anti-windup hold: at a limit while the error pushes
    further; a hold goes on until the error is ``e_band`` past zero (e.g. after a
    load step). Returns 1 while held."""
    e_now = _dot(ce, z)
    release = cs.e_band if held == 1 else 0.0
    w = z[cs.i_w]
    if (w >= cs.w_hi and e_now > -release) or (w <= cs.w_lo and e_now < release):
        return 1
    return 0


@njit(inline="always")
def start_or_end_hold(cs, z, kind):
    """Apply a hold event (:func:`~bucksim.engine.segment_events.hold_event`) to the
    state: 1 and 2 pin the integrator at ``w_hi`` and ``w_lo`` (held), 3 releases
    it. Returns the new hold mode."""
    if kind == 1:
        z[cs.i_w] = cs.w_hi
    elif kind == 2:
        z[cs.i_w] = cs.w_lo
    return 1 if kind < 3 else 0


@njit(inline="always")
def open_segment(buf, nseg, t, cond, s, z, zs, zst):
    """Start segment ``nseg`` at ``t`` [s] in ``cond`` with system ``s`` from ``z``;
    ``zs`` and ``zst`` keep the start state for the event searches."""
    buf.t0[nseg], buf.cond[nseg], buf.sys[nseg] = t, cond, s
    x0 = buf.x0
    for i in range(z.shape[0]):
        if i < x0.shape[1]:
            x0[nseg, i] = z[i]
        zs[i] = z[i]
        zst[i] = z[i]


@njit(inline="always")
def system_index(level, held, band, cond, n_modes, n_bands):
    """The stage's system for (level, hold mode, capacitance band, conduction)."""
    return ((level * n_modes + held) * n_bands + (band if cond == OPEN else 0)
            ) * N_CONDUCTION + cond


@njit(inline="always")
def in_range(z):
    """False past sqrt(max float), where the event searches' squares overflow."""
    for i in range(z.shape[0]):
        if not abs(z[i]) < STATE_RANGE:
            return False
    return True


@njit(inline="always")
def all_finite(z):
    """False when a state is nan or infinite."""
    for i in range(z.shape[0]):
        if not np.isfinite(z[i]):
            return False
    return True


@njit(inline="always")
def ends_at_zero_current(cond, strategy):
    """Conduction states that end where the inductor current reaches zero: the
    diodes, and the low-side channel under diode emulation."""
    return cond == LOW_DIODE or cond == HIGH_DIODE or (cond == LOW and strategy == EMULATION)


@njit(inline="always")
def node_held(tab, level, cond, z):
    """Set the node state to the voltage its conducting path holds (the invariant:
    ``z[i_vn]`` is the node voltage at every segment's end)."""
    z[tab.i_vn] = _dot(tab.Vsw[level * N_CONDUCTION + cond], z)


@njit(inline="always")
def band_charge(edges, coef, level, n_bands, v_a, v_b):
    """``integral_{v_a}^{v_b} Cn(v) dv`` [C]: the node capacitance piecewise constant in
    its bands (``coef[level * n_bands + band, 1]``, edges ``edges[level]``)."""
    lo, hi, sign = v_a, v_b, 1.0
    if v_b < v_a:
        lo, hi, sign = v_b, v_a, -1.0
    q = 0.0
    for b in range(n_bands):
        a = max(lo, edges[level, b])
        c = min(hi, edges[level, b + 1])
        if c > a:
            q += coef[level * n_bands + b, 1] * (c - a)
    return sign * q


@njit(inline="always")
def node_jump(tab, level, z):
    """The high side closes on the node: the node's charge ``Q`` moves from the
    switch cell at once, and the input network's state changes by ``jumps[0] Q``.
    ``Q`` takes the node from its held ``z[i_vn]`` to the channel's voltage, which the
    change itself moves by ``Cn / Cin`` of it: a fixed point, a contraction by that ratio."""
    row = tab.Vsw[level * N_CONDUCTION + HIGH]
    jump = tab.jumps[0]
    edges, n_bands = tab.band_edges, tab.band_edges.shape[1] - 1
    v_a = z[tab.i_vn]
    v0 = _dot(row, z)
    k = _dot(row, jump)
    q = 0.0
    for _ in range(8):
        q_new = band_charge(edges, tab.open_coef, level, n_bands, v_a, v0 + k * q)
        if q_new == q:
            break
        q = q_new
    for i in range(z.shape[0]):
        z[i] += jump[i] * q
