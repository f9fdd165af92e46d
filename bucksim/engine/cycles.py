"""The engine's one cycle loop: gate phases, events, and each period's control decision.

Every period runs the same five phases (docs: architecture, Control;
:func:`~bucksim.engine.period.phase_span`): ``p = 0`` high side with the
comparator and current limit blanked, ``1`` high side with both live (the phase
ends where either trips; a current already past the limit when the blanking
ends trips at once), ``2`` off (the falling dead time, or the rest of an
asynchronous period), ``3`` low side, ``4`` off (the rising dead time). The
limit is blanked with the comparator in every controller (both watch the
turn-on spike; common practice); foldback and hiccup are not modelled. Only
the decision at a period's start differs between controllers
(:func:`~bucksim.engine.period.decide_period`): open loop takes the on-time
from a schedule (no comparator, no limit); digital samples the exact output at
``t_k`` and steps a discrete compensator (voltage mode: a duty with delay and
quantisation; peak-current mode: a comparator level ``iL + (Se/Ri)(t - t_k) =
u/Ri``); analog carries the compensator in the state, its comparator the event
``Cthr[level] . z + ramp (t - t_k) = 0`` (:mod:`bucksim.model.stage`).

Each phase is cut into segments at operating-level changes and events. A whole
nominal phase applies the cached ``P[s, p] = expm(M_s d_p)``, any other
interval :func:`~bucksim.engine.kernels.advance`; the segment's events are
searched by the helpers of :mod:`bucksim.engine.segment_events` (zero current,
the open node's clamps and band edges, comparator and limit, the analog
integrator's hold), each after a cheap test proves most segments free of a
crossing (:mod:`bucksim.engine.bounds`). With node capacitance the node opens
into ``OPEN`` (a state), its diodes conduct at the clamp events, a capacitance
table's band edges are events too (:mod:`bucksim.engine.open_node`), and
``z[i_vn]`` holds the node voltage at every segment's end
(:mod:`bucksim.analysis.edges`).

The loop, :func:`run_periods`, is compiled without numba's reference counting
(``_nrt=False``): it allocates nothing (:func:`run_cycles` hands it the
:class:`~bucksim.engine.records.Scratch` arrays) and every array it touches
belongs to its caller. Its helpers are inlined, so they cost no call and no
reference count (with counting, an array handed to an inlined helper, or a
view taken in the loop, costs an atomic count each time: forced PWM ran at half
the speed with the same code; benchmarks/bench_engine.py).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.kernels import (
    CONTROL_ANALOG,
    CONTROL_DIGITAL,
    CONTROL_OPEN,
    GATE_OFF,
    HIGH,
    IDLE,
    OPEN,
    TAYLOR_ORDER,
    advance,
    apply,
    conduction_for,
    crossing_value,
)
from bucksim.engine.open_node import BAND_DOWN, BAND_UP, band_of, open_stretch, step_band
from bucksim.engine.period import (
    all_finite,
    decide_period,
    ends_at_zero_current,
    hold_rule,
    in_range,
    level_at,
    node_held,
    node_jump,
    open_clamps,
    open_segment,
    phase_span,
    segment_stop,
    skipped_low_gate,
    start_or_end_hold,
    system_index,
)
from bucksim.engine.ramps import (
    HS_RAMP,
    NO_RAMP,
    clamp_reached,
    is_diode,
    ramp_clear,
    ramp_done,
    ramp_edge,
    ramp_takeover,
    ramp_trip,
    ramp_zero_event,
    trip_came_first,
    trip_ends_ramp_segment,
)
from bucksim.engine.records import Scratch
from bucksim.engine.segment_events import (
    hold_event,
    open_node_event,
    trip_event,
    zero_current_event,
)
from bucksim.engine.status import STATUS_DIVERGED, STATUS_FULL, STATUS_OK

__all__ = ["CONTROL_OPEN", "CONTROL_DIGITAL", "CONTROL_ANALOG", "N_PHASES", "run_cycles",
           "run_periods"]

N_PHASES = 5

#: Cached phases match their nominal duration to this many ulps of absolute time.
_NOMINAL_ULPS = 8.0


@njit(cache=True)
def run_cycles(tab, prog, ctl, cst, z, level, c_start, c_stop, buf):
    """Simulate periods ``c_start .. c_stop-1`` from state ``z`` (updated in place).

    ``tab``, ``prog``, ``ctl``, ``cst``, ``buf``: the records of
    :mod:`bucksim.engine.records` (``cst`` updated in place so that a caller
    continues in the next chunk; ``buf``: segments from row 0, each period's
    on-time / T and control value). ``z``: the augmented state at ``c_start
    * T``; ``level``: the operating level there. Returns ``(n_segments,
    level, status, t)`` (:mod:`bucksim.engine.status`).
    """
    m = z.shape[0]
    sc = Scratch(np.empty(2 * m), np.empty(m), np.empty(m), np.empty(m), np.empty(m),
                 np.empty(m), np.empty(m), np.empty(m), np.empty(m), np.empty(m),
                 np.empty((TAYLOR_ORDER + 1, m + 1)), np.empty(cst.w.shape[0]))
    return run_periods(tab, prog, ctl, cst, z, level, c_start, c_stop, buf, sc)


@njit(cache=True, _nrt=False)
def run_periods(tab, prog, ctl, cst, z, level, c_start, c_stop, buf, sc):
    """The cycle loop of :func:`run_cycles`, with its work arrays ``sc``
    (:class:`~bucksim.engine.records.Scratch`)."""
    T, strategy, nominal, t_end, i_vn = prog.T, prog.strategy, prog.nominal, prog.t_end, tab.i_vn
    level_times, edges, n_bands = tab.level_times, tab.band_edges, tab.band_edges.shape[1] - 1
    control, n_modes = ctl.settings.control, ctl.settings.n_modes
    zs, zst, cap, node = sc.zs, sc.zst, buf.t0.shape[0], i_vn >= 0
    band, band_known, e2, e3, held, nseg, t = 0, False, 0.0, 0.0, 0, 0, c_start * T
    # the switches' current ramps (engine/ramps): its end [s], which switch, a turn-on?
    ramps, cond, gate_prev = tab.i_hs >= 0 or tab.i_ls >= 0, IDLE, GATE_OFF
    r_end, r_dev, r_on = -1.0, NO_RAMP, False
    for c in range(c_start, c_stop):
        tc, t_next = c * T, (c + 1) * T
        tol = _NOMINAL_ULPS * 2.220446049250313e-16 * t_next
        level = level_at(level_times, level, tc)
        t_on_max, blank, cmp_on, cmp_level, cmp_ramp, lim_live, u = decide_period(
            ctl, cst, c, tc, T, z, level, sc.wnew)
        buf.u[c - c_start] = u
        t_off, tripped, p = tc, False, 0
        while p < N_PHASES:
            gate, t_ph, t_ph_end, ph_cmp, ph_lim, t_off, e2, e3 = phase_span(
                p, tc, t_next, blank, t_on_max, tripped, t_off, prog, e2, e3, cmp_on, lim_live)
            if t_ph_end <= t_ph:
                p += 1
                continue
            t = t_ph
            gate = skipped_low_gate(gate, p, t_on_max, strategy, tab.Cls[level], z, node)
            cond_prev, cond = cond, conduction_for(gate, strategy, z[0], node)
            if ramps:
                cond, r_end, r_dev, r_on = ramp_edge(tab, gate, gate_prev, cond_prev, cond, z,
                                                     t, r_end, r_dev, r_on)
            gate_prev = gate
            whole_ok = nominal[p] > 0.0 and abs(t_ph_end - t_ph - nominal[p]) <= tol
            while t < t_ph_end:
                if r_dev != NO_RAMP and t >= r_end:
                    cond, r_dev = ramp_done(tab, z, cond, r_dev, r_on), NO_RAMP
                level = level_at(level_times, level, t)
                t_stop = segment_stop(level_times, level, t_ph_end, t_end)
                search_ls = search_hs = False
                if cond == OPEN:
                    cond, search_ls, search_hs, at_ls, at_hs = open_clamps(
                        tab, tab.Cls[level], tab.Chs[level], z)
                    cond, r_dev = ramp_takeover(tab, z, at_ls, at_hs, cond, r_dev, r_on)
                if r_dev != NO_RAMP and r_end < t_stop:     # (not after a takeover)
                    t_stop = r_end
                if n_modes == 2:
                    held = hold_rule(ctl.settings, ctl.Ce[level], z, held)
                if cond == OPEN and not band_known:
                    band = band_of(edges, level, z[i_vn], z[0])
                band_known = False
                s = system_index(level, held, band, cond, n_modes, n_bands)
                gs = tab.guards[s]    # this system's longest search step
                if nseg >= cap:
                    return nseg, level, STATUS_FULL, t
                if not in_range(z):
                    return nseg, level, STATUS_DIVERGED, t
                # the analog comparator's row follows the level: a load step moves vo
                row = ctl.Cthr[level] if ph_cmp and control == CONTROL_ANALOG else tab.e_il
                if (ph_cmp and crossing_value(row, z, t, cmp_level, cmp_ramp, tc) >= 0.0
                        or z[0] >= ph_lim):
                    tripped = True
                    break
                if cond == HIGH and tab.jumps.shape[0] > 0:
                    node_jump(tab, level, z)    # the node's charge from the input network
                open_segment(buf, nseg, t, cond, s, z, zs, zst)
                d = t_stop - t
                if cond == OPEN and d > gs and (search_ls or search_hs) and r_dev == NO_RAMP:
                    # a ring of many lobes: the energy bound clears it at once; a long
                    # stretch it cannot clear is cut at half a ring (engine/open_node)
                    dn, lo_ok, hi_ok = open_stretch(tab.open_coef[level * n_bands + band], zs,
                                                    i_vn, d, tab.Cls[level], tab.Chs[level],
                                                    search_ls, search_hs)
                    search_ls, search_hs = search_ls and not lo_ok, search_hs and not hi_ok
                    if dn < d:
                        t_stop, d = t + dn, dn
                if whole_ok and t == t_ph and t_stop == t_ph_end:
                    apply(prog.P, s, p, z, sc.tmp)
                else:
                    advance(tab.Ms, tab.E, tab.h, s, z, d, sc.tmp)
                tz, kind, hold, trip_at = -1.0, OPEN, 0, -1.0
                t_stop, d, trip_at = ramp_trip(tab, ctl, s, level, row, zs, zst, z, t, t_stop,
                                               d, tc, gs, ph_cmp, ph_lim, cmp_level,
                                               cmp_ramp, sc, r_dev)
                evented = ends_at_zero_current(cond, strategy)
                if evented and r_dev != NO_RAMP and is_diode(cond):
                    tz = ramp_zero_event(tab, s, cond, zs, z, t, t_stop, d, gs, sc)
                elif evented:
                    tz = zero_current_event(tab, s, cond, zs, z, t, t_stop, d, gs, sc)
                elif cond == OPEN:
                    tz, kind = open_node_event(tab, s, level, band, zs, z, t, t_stop, d, gs,
                                               search_ls, search_hs, sc)
                elif (ph_cmp or np.isfinite(ph_lim)) and r_dev != HS_RAMP:
                    tz = trip_event(tab, ctl, s, level, row, zs, z, t, t_stop, d, tc, gs,
                                    ph_cmp, ph_lim, cmp_level, cmp_ramp, sc)
                tz = trip_came_first(z, zs, tz, trip_at)
                if n_modes == 2:
                    tz, hold = hold_event(tab, ctl, s, level, held, tz, zs, z, t, t_stop, gs, sc)
                if tz >= 0.0:
                    # the segment ends at the event; zs holds the state there
                    for i in range(zs.shape[0]):
                        z[i] = zs[i]
                    if tz > t or hold == 0:     # (a hold starting at t leaves no segment)
                        buf.dt[nseg] = tz - t
                        nseg += 1
                    t = tz
                    if tz == trip_at and hold == 0:     # during the ramp: the on-time ends
                        tripped = trip_ends_ramp_segment(tab, level, cond, z, node)
                        break
                    if hold > 0:
                        # the integrator starts or stops holding; the gate phase goes on
                        held = start_or_end_hold(ctl.settings, z, hold)
                        if node and cond != OPEN:
                            node_held(tab, level, cond, z)
                    elif cond == OPEN and (kind == BAND_DOWN or kind == BAND_UP):
                        # the next band's system from here, the node on the edge
                        z[i_vn] = edges[level, band if kind == BAND_DOWN else band + 1]
                        band, band_known = step_band(edges, level, band, kind), True
                    elif cond == OPEN:
                        # a clamp: its diode conducts (unless the node only touched it),
                        # or a turning-on channel's own clamp closes it (engine/ramps)
                        cond, r_dev = clamp_reached(tab, z, kind, cond, r_dev, r_on)
                    else:
                        if node:        # the node opens at its clamped voltage
                            node_held(tab, level, cond, z)
                        if not evented:
                            tripped = True     # comparator or limit: the on-time ends
                            break
                        cond = OPEN if node else IDLE   # zero current: idle for the phase
                    continue
                buf.dt[nseg] = d
                nseg += 1
                t = t_stop
                if node and cond != OPEN:
                    # invariant: z[i_vn] holds the node voltage at every segment's end
                    # (an opening node starts there; analysis.edges reads the jumps)
                    node_held(tab, level, cond, z)
                if not all_finite(z):
                    return nseg, level, STATUS_DIVERGED, t
                if t >= t_end:
                    buf.duty[c - c_start] = ((t if p <= 1 else t_off) - tc) / T
                    return nseg, level, STATUS_OK, t
            if tripped and p <= 1:
                t_off, p = t, 2
                continue
            p += 1
        if r_dev != NO_RAMP:
            ramp_clear(tab, z)      # a ramp never outlives its period (engine/ramps)
            r_dev = NO_RAMP
        buf.duty[c - c_start] = (t_off - tc) / T
    return nseg, level, STATUS_OK, t
