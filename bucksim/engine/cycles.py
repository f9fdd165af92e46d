"""The engine's one cycle loop: gate phases, events, and each period's control decision.

Every period runs the same five phases (docs: architecture, Control): ``p = 0``
high side with the comparator and current limit blanked, ``1`` high side with
both live (the phase ends where either trips; a current already past the limit
when the blanking ends trips at once), ``2`` off (the falling dead time, or the
rest of an asynchronous period), ``3`` low side, ``4`` off (the rising dead
time). The limit is blanked with the comparator in every controller (both watch
the turn-on spike; common practice); foldback and hiccup are not modelled.
Only the decision at a period's start differs between controllers
(``control``): open loop takes the on-time from a schedule (no comparator, no
limit); digital samples the exact output at ``t_k`` and steps a discrete
compensator (voltage mode: a duty with delay and quantisation; peak-current
mode: a comparator level ``iL + (Se/Ri)(t - t_k) = u/Ri``); analog carries the
compensator in the state, its comparator the event ``Cthr[level] . z + ramp
(t - t_k) = 0`` (:mod:`bucksim.model.stage`).

The phase logic is written once, inline: a per-phase function with its dozen
array arguments cost more than the propagation (benchmarks/bench_engine.py). A
whole nominal phase applies the cached ``P[s, p] = expm(M_s d_p)``, any other
interval :func:`~bucksim.engine.kernels.advance`; events are located by
:func:`~bucksim.engine.kernels.find_zero` after a cheap test proves most
segments free of a crossing (:mod:`bucksim.engine.bounds`: the curvature bound,
and for the open node's clamps the ring-energy bound). With node capacitance
the node opens into ``OPEN`` (a state), its diodes conduct at the clamp events,
a capacitance table's band edges are events too (:mod:`bucksim.engine.open_node`),
and ``z[i_vn]`` holds the node voltage at every segment's end
(:mod:`bucksim.analysis.edges`).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.bounds import clear_between, growth
from bucksim.engine.kernels import (
    ASYNC,
    CONTROL_ANALOG,
    CONTROL_DIGITAL,
    CONTROL_OPEN,
    EMULATION,
    GATE_HIGH,
    GATE_LOW,
    GATE_OFF,
    HIGH_DIODE,
    IDLE,
    LOW,
    LOW_DIODE,
    N_CONDUCTION,
    OPEN,
    TAYLOR_ORDER,
    advance,
    apply,
    conduction_for,
    crossing_value,
    find_zero,
)
from bucksim.engine.loop_parts import _compensate, _dot, _needs_search, newton_crossing
from bucksim.engine.open_node import BAND_DOWN, BAND_UP, band_edge_event, band_of
from bucksim.engine.open_node import open_stretch as _stretch
from bucksim.engine.open_node import step_band as _step_band
from bucksim.engine.status import STATUS_DIVERGED, STATUS_FULL, STATUS_OK

__all__ = ["CONTROL_OPEN", "CONTROL_DIGITAL", "CONTROL_ANALOG", "N_PHASES", "run_cycles"]

N_PHASES = 5

#: Cached phases match their nominal duration to this many ulps of absolute time.
_NOMINAL_ULPS = 8.0

#: A state beyond sqrt(max float) has diverged (mirrors simulation.STATE_RANGE).
_STATE_RANGE = 1.3407807929942596e154


@njit(cache=True)
def run_cycles(tab, prog, ctl, cst, z, level, c_start, c_stop, buf):
    """Simulate periods ``c_start .. c_stop-1`` from state ``z`` (updated in place).

    ``tab``, ``prog``, ``ctl``, ``cst``, ``buf``: the records of
    :mod:`bucksim.engine.records` (``cst`` updated in place so that a caller
    continues in the next chunk; ``buf``: segments from row 0, each period's
    on-time / T and control value). ``z``: the augmented state at ``c_start
    * T``; ``level``: the operating level there. Returns ``(n_segments,
    level, status, t)`` (:mod:`bucksim.engine.status`). Analog anti-windup
    (``n_modes = 2``): ``z[i_w]`` holds at ``w_lo``/``w_hi`` while the error
    ``Ce[level] . z`` pushes it further (the stage's held copy of each
    system); reaching a limit and the error's sign change are events.
    """
    # the records opened once: the loop then works on plain arrays (module notes)
    Ms, E, h, guards, taylor_gap = tab.Ms, tab.E, tab.h, tab.guards, tab.taylor_gap
    level_times, bnd, kil, k3il, e_il = tab.level_times, tab.bnd, tab.kil, tab.k3il, tab.e_il
    i_vn, Vsw, Cls, Chs = tab.i_vn, tab.Vsw, tab.Cls, tab.Chs
    kls, k3ls, khs, k3hs, open_coef = tab.kls, tab.k3ls, tab.khs, tab.k3hs, tab.open_coef
    edges, e_vn, kvn, k3vn = tab.band_edges, tab.e_vn, tab.kvn, tab.k3vn
    n_bands = edges.shape[1] - 1
    band, band_known = 0, False
    node = i_vn >= 0
    T, strategy, td_fall, td_rise = prog.T, prog.strategy, prog.td_fall, prog.td_rise
    nominal, P, t_end = prog.nominal, prog.P, prog.t_end
    cs = ctl.settings
    control, peak, reference, soft_start = cs.control, cs.peak, cs.reference, cs.soft_start
    sense_gain, Dd, duty_bits, thr_ramp = cs.sense_gain, cs.Dd, cs.duty_bits, cs.thr_ramp
    ramp_v, ri, se, i_limit, max_duty = cs.ramp_v, cs.ri, cs.se, cs.i_limit, cs.max_duty
    min_on, skip, n_modes, i_w = cs.min_on, cs.skip, cs.n_modes, cs.i_w
    w_lo, w_hi, e_band = cs.w_lo, cs.w_hi, cs.e_band
    on_times, Cvo, Ad, Bd, Cd, Cu = ctl.on_times, ctl.Cvo, ctl.Ad, ctl.Bd, ctl.Cd, ctl.Cu
    Cthr, Ce, e_w, kthr, k3thr = ctl.Cthr, ctl.Ce, ctl.e_w, ctl.kthr, ctl.k3thr
    kce, k3ce, kw, k3w = ctl.kce, ctl.k3ce, ctl.kw, ctl.k3w
    w, queue = cst.w, cst.queue
    seg_t0, seg_dt, seg_cond, seg_sys, seg_x0 = buf.t0, buf.dt, buf.cond, buf.sys, buf.x0
    log_duty, log_u = buf.duty, buf.u
    n = seg_x0.shape[1]
    m = z.shape[0]
    tmp, trial, work, zs, zs2 = np.empty(2 * m), np.empty(m), np.empty(m), np.empty(m), np.empty(m)
    zs3, zst, zh, erow, zw = np.empty(m), np.empty(m), np.empty(m), np.empty(m), np.empty(m)
    poly = np.empty((TAYLOR_ORDER + 1, m + 1))
    wnew = np.empty(w.shape[0])
    n_levels, n_delay, cap = level_times.shape[0], queue.shape[0], seg_t0.shape[0]
    sync = strategy != ASYNC
    e2 = e3 = 0.0
    held = nseg = 0
    t = c_start * T
    for c in range(c_start, c_stop):
        tc = c * T
        t_next = (c + 1) * T
        tol = _NOMINAL_ULPS * 2.220446049250313e-16 * t_next
        while level + 1 < n_levels and level_times[level + 1] <= tc:
            level += 1
        # -- the period's decision: on-time bound, blanking, comparator, limit
        cmp_on, cmp_level, cmp_ramp = False, 0.0, 0.0
        lim_live = i_limit
        u = np.nan
        if control == CONTROL_OPEN:
            t_on_max = on_times[c] if on_times.shape[0] > 1 else on_times[0]
            blank = t_on_max
            lim_live = np.inf
        elif control == CONTROL_DIGITAL:
            vref = reference
            if soft_start > 0.0 and tc < soft_start:
                vref = reference * tc / soft_start
            e = sense_gain * (vref - _dot(Cvo[level * N_CONDUCTION], z))
            if not peak:
                u = _compensate(Ad, Bd, Cd, Dd, w, e, 0.0, max_duty * ramp_v, wnew)
                dty = min(max(u / ramp_v, 0.0), max_duty)
                if duty_bits > 0:
                    q = 2.0 ** duty_bits
                    dty = np.floor(dty * q + 0.5) / q
                if n_delay > 0:
                    d_now = queue[0]
                    for i in range(n_delay - 1):
                        queue[i] = queue[i + 1]
                    queue[n_delay - 1] = dty
                    dty = d_now
                if dty * T < min_on:
                    dty = 0.0 if skip else min_on / T
                t_on_max = dty * T
                blank = 0.0
            else:
                u = _compensate(Ad, Bd, Cd, Dd, w, e, 0.0, np.inf, wnew)
                t_on_max = max_duty * T
                if skip and u / ri <= z[0]:
                    t_on_max = 0.0
                blank = min(min_on, t_on_max)
                cmp_on = True
                cmp_level = u / ri
                cmp_ramp = se / ri
        else:
            u = _dot(Cu[level], z)
            t_on_max = max_duty * T
            if skip:
                low = u <= ri * z[0] if peak else u <= ramp_v * min_on / T
                if low:
                    t_on_max = 0.0
            blank = min(min_on, t_on_max)
            cmp_on = True
            cmp_ramp = thr_ramp
        log_u[c - c_start] = u
        # -- the phase program
        t_off, tripped, p = tc, False, 0
        while p < N_PHASES:
            # span, gate and rules of phase p
            ph_cmp, ph_lim = False, np.inf
            if p == 0:
                # blanking: neither the comparator nor the limit acts (module notes)
                gate, t_ph, t_ph_end = GATE_HIGH, tc, tc + min(blank, t_on_max)
            elif p == 1:
                gate, t_ph, t_ph_end = GATE_HIGH, tc + blank, tc + t_on_max
                ph_cmp, ph_lim = cmp_on, lim_live
            elif p == 2:
                if not tripped:
                    t_off = tc + t_on_max
                e2 = min(t_off + td_fall, t_next) if sync else t_next
                e3 = max(e2, t_next - td_rise) if sync else t_next
                gate, t_ph, t_ph_end = GATE_OFF, t_off, e2
            elif p == 3:
                gate, t_ph, t_ph_end = GATE_LOW, e2, e3
            else:
                gate, t_ph, t_ph_end = GATE_OFF, e3, t_next
            if t_ph_end <= t_ph:
                p += 1
                continue
            t = t_ph
            cond = conduction_for(gate, strategy, z[0], node)
            ph_dur = t_ph_end - t_ph
            whole_ok = nominal[p] > 0.0 and abs(ph_dur - nominal[p]) <= tol
            while t < t_ph_end:
                while level + 1 < n_levels and level_times[level + 1] <= t:
                    level += 1
                t_stop = t_ph_end
                if level + 1 < n_levels and level_times[level + 1] < t_stop:
                    t_stop = level_times[level + 1]
                if t_end < t_stop:
                    t_stop = t_end
                search_ls = search_hs = False
                if cond == OPEN:
                    # at a clamp: its diode conducts now, or (current away) is not searched
                    f_ls = _dot(Cls[level], z)
                    f_hs = _dot(Chs[level], z)
                    clamp_tol = 1e-12 * (abs(Cls[level, m - 1]) + abs(Chs[level, m - 1]) + 1.0)
                    if f_ls <= clamp_tol and z[0] > 0.0:
                        cond = LOW_DIODE
                    elif f_hs <= clamp_tol and z[0] < 0.0:
                        cond = HIGH_DIODE
                    else:
                        search_ls = f_ls > clamp_tol
                        search_hs = f_hs > clamp_tol
                if n_modes == 2:
                    # the hold rule, with the release band: a hold goes on until
                    # the error is e_band past zero (e.g. after a load step)
                    e_now = _dot(Ce[level], z)
                    release = e_band if held == 1 else 0.0
                    held = 1 if ((z[i_w] >= w_hi and e_now > -release)
                                 or (z[i_w] <= w_lo and e_now < release)) else 0
                if cond == OPEN and not band_known:
                    band = band_of(edges, level, z[i_vn], z[0])
                band_known = False
                s = ((level * n_modes + held) * n_bands + (band if cond == OPEN else 0)
                     ) * N_CONDUCTION + cond
                gs = guards[s]    # this system's longest search step
                if nseg >= cap:
                    return nseg, level, STATUS_FULL, t
                for i in range(m):
                    # past sqrt(max float) the event searches' squares overflow
                    if not abs(z[i]) < _STATE_RANGE:
                        return nseg, level, STATUS_DIVERGED, t
                # the analog comparator's row follows the level: a load step moves vo
                row = Cthr[level] if ph_cmp and control == CONTROL_ANALOG else e_il
                if ph_cmp and crossing_value(row, z, t, cmp_level, cmp_ramp, tc) >= 0.0:
                    tripped = True
                    break
                if z[0] >= ph_lim:
                    tripped = True
                    break
                seg_t0[nseg] = t
                seg_cond[nseg] = cond
                seg_sys[nseg] = s
                for i in range(n):
                    seg_x0[nseg, i] = z[i]
                for i in range(m):
                    zs[i] = z[i]
                if n_modes == 2:
                    for i in range(m):
                        zst[i] = z[i]
                d = t_stop - t
                if cond == OPEN and d > gs and (search_ls or search_hs):
                    # a ring of many lobes: the energy bound clears it at once; a long
                    # stretch it cannot clear is cut at half a ring (engine/open_node)
                    dn, lo_ok, hi_ok = _stretch(open_coef[level * n_bands + band], zs, i_vn,
                                                d, Cls[level], Chs[level], search_ls, search_hs)
                    search_ls = search_ls and not lo_ok
                    search_hs = search_hs and not hi_ok
                    if dn < d:
                        t_stop, d = t + dn, dn
                if whole_ok and t == t_ph and t_stop == t_ph_end:
                    apply(P, s, p, z, tmp)
                else:
                    advance(Ms, E, h, s, z, d, tmp)
                tz = -1.0
                clamp = OPEN
                evented = cond == LOW_DIODE or cond == HIGH_DIODE or (
                    cond == LOW and strategy == EMULATION)
                if evented:
                    sign0 = -1.0 if cond == HIGH_DIODE else 1.0
                    # the zero-current test written out (module notes): bounds.current_clear
                    search = d > gs or sign0 * z[0] <= 0.0
                    if not search:
                        s0 = 0.0
                        vel = 0.0
                        for i in range(m - 1):
                            acc = 0.0
                            for j in range(m):
                                acc += Ms[s, i, j] * zs[j]
                            if i == 0:
                                s0 = sign0 * acc
                            vel = max(vel, abs(acc) * bnd[s, i])
                        B = kil[s] * vel * growth(bnd[s, m - 1] * d) * (1.0 + 1e-12)
                        if sign0 * zs[0] + min(s0, 0.0) * d - 0.5 * B * d * d <= 0.0:
                            s1 = 0.0
                            for j in range(m):
                                s1 += Ms[s, 0, j] * z[j]
                            search = not clear_between(sign0 * zs[0], s0, sign0 * z[0],
                                                       sign0 * s1, d, B)
                    if search:
                        tz = find_zero(Ms, E, h, s, zs, z, t, t_stop, sign0, gs, tmp,
                                       trial, work, e_il, 0.0, 0.0, 0.0, True, taylor_gap, poly,
                                       bnd, k3il[0, s])
                elif cond == OPEN:
                    # the open node: a band's edge (a capacitance table, engine/open_node)
                    # first, then its clamps up to there
                    for i in range(m):
                        zs2[i] = zs[i]
                        zs3[i] = zs[i]
                    tb, kb = -1.0, OPEN
                    if n_bands > 1:
                        tb, kb = band_edge_event(Ms, E, h, s, zh, z, work, zs3, t, t_stop, tb,
                                                 kb, gs, edges, level, band, e_vn, kvn[0, s],
                                                 k3vn[0, s], taylor_gap, tmp, trial, zw,
                                                 poly, bnd, erow)
                    zl, tl, dl = (zh, tb, tb - t) if tb >= 0.0 else (z, t_stop, d)
                    if search_ls and _needs_search(Ms, s, Cls[level], kls[level, s], zs, zl,
                                                   tl, dl, gs, 1.0, 0.0, 0.0, t, bnd):
                        # a slew at high current: Newton, proven; else the general search
                        u = newton_crossing(Ms, E, h, s, zs, t, dl, Cls[level], kls[level, s],
                                            bnd, tmp, work)
                        if u > 0.0:
                            tz = t + u
                            for i in range(m):
                                zs[i] = work[i]
                        else:
                            tz = find_zero(Ms, E, h, s, zs, zl, t, tl, 1.0, gs, tmp,
                                           trial, work, Cls[level], 0.0, 0.0, t, False,
                                           taylor_gap, poly, bnd, k3ls[level, s])
                    clamp = LOW_DIODE if tz >= 0.0 else OPEN
                    if search_hs:
                        zb = zs if tz >= 0.0 else zl
                        t_lim = tz if tz >= 0.0 else tl
                        if _needs_search(Ms, s, Chs[level], khs[level, s], zs2, zb, t_lim,
                                         t_lim - t, gs, 1.0, 0.0, 0.0, t, bnd):
                            t2 = find_zero(Ms, E, h, s, zs2, zb, t, t_lim, 1.0, gs, tmp,
                                           trial, work, Chs[level], 0.0, 0.0, t, False,
                                           taylor_gap, poly, bnd, k3hs[level, s])
                            if t2 >= 0.0 and (tz < 0.0 or t2 < tz):
                                tz = t2
                                clamp = HIGH_DIODE
                                for i in range(m):
                                    zs[i] = zs2[i]
                    if tz < 0.0 and tb >= 0.0:
                        tz, clamp = tb, kb
                        for i in range(m):
                            zs[i] = zh[i]
                elif ph_cmp or np.isfinite(ph_lim):
                    for i in range(m):
                        zs2[i] = zs[i]
                    krow = kthr[level, s] if control == CONTROL_ANALOG else kil[s]
                    if ph_cmp and _needs_search(Ms, s, row, krow, zs, z, t_stop, d, gs,
                                                -1.0, cmp_level, cmp_ramp, tc, bnd):
                        tz = find_zero(Ms, E, h, s, zs, z, t, t_stop, -1.0, gs, tmp,
                                       trial, work, row, cmp_level, cmp_ramp, tc, False,
                                       taylor_gap, poly, bnd,
                                       k3thr[level, s] if control == CONTROL_ANALOG
                                       else k3il[0, s])
                    if np.isfinite(ph_lim):
                        # the limit counts only before the comparator's instant (zs there)
                        zb = zs if tz >= 0.0 else z
                        t_lim = tz if tz >= 0.0 else t_stop
                        if _needs_search(Ms, s, e_il, kil[s], zs2, zb, t_lim, t_lim - t, gs,
                                         -1.0, ph_lim, 0.0, tc, bnd):
                            t2 = find_zero(Ms, E, h, s, zs2, zb, t, t_lim, -1.0, gs, tmp,
                                           trial, work, e_il, ph_lim, 0.0, tc, False,
                                           taylor_gap, poly, bnd, k3il[0, s])
                            if t2 >= 0.0 and (tz < 0.0 or t2 < tz):
                                tz = t2
                                for i in range(m):
                                    zs[i] = zs2[i]
                hold_event = 0
                if n_modes == 2:
                    # the integrator's limits and the error's sign: up to the earliest event
                    t_h = tz if tz >= 0.0 else t_stop
                    zb = zs if tz >= 0.0 else z
                    th = -1.0
                    wv = zst[i_w]
                    for kind in range(1, 4):
                        if held == 0 and kind == 1 and np.isfinite(w_hi) and wv <= w_hi:
                            hrow, hlev, hsign = e_w, w_hi, -1.0
                        elif held == 0 and kind == 2 and np.isfinite(w_lo) and wv >= w_lo:
                            hrow, hlev, hsign = e_w, w_lo, 1.0
                        elif held == 1 and kind == 3:
                            hrow, hsign = Ce[level], 1.0 if wv >= w_hi else -1.0
                            hlev = -hsign * e_band
                        else:
                            continue
                        if t_h <= t:
                            continue
                        dh = t_h - t
                        if kind < 3:
                            # the integrator's own row: the cheap test written out
                            f0h = hsign * (zst[i_w] - hlev)
                            f1h = hsign * (zb[i_w] - hlev)
                            if dh <= gs and f0h > 0.0 and f1h > 0.0:
                                s0h = 0.0
                                vel = 0.0
                                for i in range(m - 1):
                                    acc = 0.0
                                    for j in range(m):
                                        acc += Ms[s, i, j] * zst[j]
                                    if i == i_w:
                                        s0h = hsign * acc
                                    vel = max(vel, abs(acc) * bnd[s, i])
                                B = kw[0, s] * vel * growth(bnd[s, m - 1] * dh) * (1.0 + 1e-12)
                                if f0h + min(s0h, 0.0) * dh - 0.5 * B * dh * dh > 0.0:
                                    continue
                                s1h = 0.0
                                for j in range(m):
                                    s1h += Ms[s, i_w, j] * zb[j]
                                if clear_between(f0h, s0h, f1h, hsign * s1h, dh, B):
                                    continue
                        elif not _needs_search(Ms, s, hrow, kce[level, s], zst, zb, t_h, dh,
                                               gs, hsign, hlev, 0.0, t, bnd):
                            continue
                        for i in range(m):
                            zs2[i] = zst[i]
                        t3 = find_zero(Ms, E, h, s, zs2, zb, t, t_h, hsign, gs, tmp, trial,
                                       work, hrow, hlev, 0.0, t, False, taylor_gap, poly, bnd,
                                       k3w[0, s] if kind < 3 else k3ce[level, s])
                        if t3 >= 0.0 and (th < 0.0 or t3 < th):
                            th = t3
                            hold_event = kind
                            for i in range(m):
                                zh[i] = zs2[i]
                    if th >= 0.0 and (tz < 0.0 or th < tz):
                        tz = th
                        for i in range(m):
                            zs[i] = zh[i]
                    else:
                        hold_event = 0
                if hold_event > 0:
                    # the integrator starts or stops holding; the gate phase goes on
                    for i in range(m):
                        z[i] = zs[i]
                    if hold_event == 1:
                        z[i_w] = w_hi
                    elif hold_event == 2:
                        z[i_w] = w_lo
                    held = 1 if hold_event < 3 else 0
                    if node and cond != OPEN:
                        z[i_vn] = _dot(Vsw[level * N_CONDUCTION + cond], z)
                    if tz > t:          # (a hold starting at t itself leaves no segment)
                        seg_dt[nseg] = tz - t
                        nseg += 1
                    t = tz
                    continue
                if tz >= 0.0:
                    # the segment ends at the event; zs holds the state there
                    for i in range(m):
                        z[i] = zs[i]
                    seg_dt[nseg] = tz - t
                    nseg += 1
                    t = tz
                    if cond == OPEN:
                        if clamp == BAND_DOWN or clamp == BAND_UP:
                            # the next band's system from here, the node on the edge
                            z[i_vn] = edges[level, band if clamp == BAND_DOWN else band + 1]
                            band = _step_band(edges, level, band, clamp)
                            band_known = True
                            continue
                        # a clamp: its diode conducts (unless the node only touched it)
                        if (clamp == LOW_DIODE and z[0] > 0.0) or (
                                clamp == HIGH_DIODE and z[0] < 0.0):
                            cond = clamp
                        continue
                    if node:
                        # the node opens at its clamped voltage (the invariant below)
                        z[i_vn] = _dot(Vsw[level * N_CONDUCTION + cond], z)
                    if evented:        # zero current: idle (the node opens) for the phase
                        cond = OPEN if node else IDLE
                        continue
                    tripped = True     # comparator or limit: the on-time ends
                    break
                seg_dt[nseg] = d
                nseg += 1
                t = t_stop
                if node and cond != OPEN:
                    # invariant: z[i_vn] holds the node voltage at every segment's end
                    # (an opening node starts there; analysis.edges reads the jumps)
                    z[i_vn] = _dot(Vsw[level * N_CONDUCTION + cond], z)
                for i in range(m):
                    if not np.isfinite(z[i]):
                        return nseg, level, STATUS_DIVERGED, t
                if t >= t_end:
                    log_duty[c - c_start] = ((t if p <= 1 else t_off) - tc) / T
                    return nseg, level, STATUS_OK, t
            if tripped and p <= 1:
                t_off = t
                p = 2
                continue
            p += 1
        log_duty[c - c_start] = (t_off - tc) / T
    return nseg, level, STATUS_OK, t
