"""The event searches of one segment, by the kind of segment the cycle loop runs.

After a segment from ``zs`` (time ``t``) to ``z`` (``t_stop``, length ``d`` as
the loop rounded it) has been propagated, one of these finds its earliest
event, or none (``tz < 0``):

* :func:`zero_current_event`: a diode, or the low-side channel in diode
  emulation, stops where the inductor current reaches zero;
* :func:`open_node_event`: the open node reaches a clamp (a diode conducts) or
  a band edge of its capacitance table (:mod:`bucksim.engine.open_node`);
* :func:`trip_event`: the comparator or the current limit ends the on-time;
* :func:`hold_event`: the analog integrator reaches a limit, or its error
  changes sign while it is held.

Each first runs the cheap test of :mod:`bucksim.engine.bounds` that proves most
segments free of a crossing, then :func:`~bucksim.engine.kernels.locate_zero` on
the exact solution; ``zs`` is overwritten with the state at the event. They
take the stage's records (:mod:`bucksim.engine.records`) and the loop's
scratch arrays ``sc`` (:class:`~bucksim.engine.records.Scratch`) and are inlined
into the loop (:mod:`bucksim.engine.period` says why that is free).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.bounds import current_clear, state_clear
from bucksim.engine.kernels import CONTROL_ANALOG, HIGH_DIODE, LOW_DIODE, OPEN, locate_zero
from bucksim.engine.loop_parts import _needs_search, newton_crossing
from bucksim.engine.open_node import band_edge_event


@njit(inline="always")
def zero_current_event(tab, s, cond, zs, z, t, t_stop, d, gs, sc):
    """The zero-current instant of a diode (or emulated low-side) segment, or -1."""
    sign0 = -1.0 if cond == HIGH_DIODE else 1.0
    if d <= gs and sign0 * z[0] > 0.0 and current_clear(tab.Ms, s, zs, z, d, sign0, tab.kil,
                                                        tab.bnd):
        return -1.0
    return locate_zero(tab.Ms, tab.E, tab.h, s, zs, z, t, t_stop, sign0, gs, sc.tmp, sc.trial,
                     sc.work, tab.e_il, 0.0, 0.0, 0.0, True, tab.taylor_gap, sc.poly, tab.bnd,
                     tab.k3il[0, s])


@njit(inline="always")
def open_node_event(tab, s, level, band, zs, z, t, t_stop, d, gs, search_ls, search_hs, sc):
    """The open node's first event: a band's edge (a capacitance table) first, then
    its clamps up to there. Returns ``(tz, kind)``: ``LOW_DIODE``, ``HIGH_DIODE``,
    a band edge (:mod:`bucksim.engine.open_node`) or ``OPEN`` (none, ``tz < 0``)."""
    Ms, E, h, bnd, tg = tab.Ms, tab.E, tab.h, tab.bnd, tab.taylor_gap
    tmp, trial, work, zs2, zh, poly = sc.tmp, sc.trial, sc.work, sc.zs2, sc.zh, sc.poly
    cls, chs = tab.Cls[level], tab.Chs[level]
    m = zs.shape[0]
    for i in range(m):
        zs2[i] = zs[i]
        sc.zs3[i] = zs[i]
    tz, tb, kb = -1.0, -1.0, OPEN
    if tab.band_edges.shape[1] > 2:
        tb, kb = band_edge_event(Ms, E, h, s, zh, z, work, sc.zs3, t, t_stop, tb, kb, gs,
                                 tab.band_edges, level, band, tab.e_vn, tab.kvn[0, s],
                                 tab.k3vn[0, s], tg, tmp, trial, sc.zw, poly, bnd, sc.erow)
    zl, tl, dl = (zh, tb, tb - t) if tb >= 0.0 else (z, t_stop, d)
    if search_ls and _needs_search(Ms, s, cls, tab.kls[level, s], zs, zl, tl, dl, gs, 1.0,
                                   0.0, 0.0, t, bnd):
        # a slew at high current: Newton, proven; else the general search
        u = newton_crossing(Ms, E, h, s, zs, t, dl, cls, tab.kls[level, s], bnd, tmp, work)
        if u > 0.0:
            tz = t + u
            for i in range(m):
                zs[i] = work[i]
        else:
            tz = locate_zero(Ms, E, h, s, zs, zl, t, tl, 1.0, gs, tmp, trial, work, cls, 0.0,
                           0.0, t, False, tg, poly, bnd, tab.k3ls[level, s])
    kind = LOW_DIODE if tz >= 0.0 else OPEN
    if search_hs:
        zb = zs if tz >= 0.0 else zl
        t_lim = tz if tz >= 0.0 else tl
        if _needs_search(Ms, s, chs, tab.khs[level, s], zs2, zb, t_lim, t_lim - t, gs, 1.0,
                         0.0, 0.0, t, bnd):
            t2 = locate_zero(Ms, E, h, s, zs2, zb, t, t_lim, 1.0, gs, tmp, trial, work, chs,
                           0.0, 0.0, t, False, tg, poly, bnd, tab.k3hs[level, s])
            if t2 >= 0.0 and (tz < 0.0 or t2 < tz):
                tz, kind = t2, HIGH_DIODE
                for i in range(m):
                    zs[i] = zs2[i]
    if tz < 0.0 and tb >= 0.0:
        tz, kind = tb, kb
        for i in range(m):
            zs[i] = zh[i]
    return tz, kind


@njit(inline="always")
def trip_event(tab, ctl, s, level, row, zs, z, t, t_stop, d, tc, gs, ph_cmp, ph_lim,
               cmp_level, cmp_ramp, sc):
    """The comparator's instant (its event row ``row``), or the current limit's if
    earlier (the limit counts only before the comparator's instant), or -1."""
    Ms, E, h, bnd, tg = tab.Ms, tab.E, tab.h, tab.bnd, tab.taylor_gap
    tmp, trial, work, zs2, poly = sc.tmp, sc.trial, sc.work, sc.zs2, sc.poly
    analog = ctl.settings.control == CONTROL_ANALOG
    m = zs.shape[0]
    for i in range(m):
        zs2[i] = zs[i]
    tz = -1.0
    krow = ctl.kthr[level, s] if analog else tab.kil[s]
    if ph_cmp and _needs_search(Ms, s, row, krow, zs, z, t_stop, d, gs, -1.0, cmp_level,
                                cmp_ramp, tc, bnd):
        tz = locate_zero(Ms, E, h, s, zs, z, t, t_stop, -1.0, gs, tmp, trial, work, row,
                       cmp_level, cmp_ramp, tc, False, tg, poly, bnd,
                       ctl.k3thr[level, s] if analog else tab.k3il[0, s])
    if np.isfinite(ph_lim):
        zb = zs if tz >= 0.0 else z
        t_lim = tz if tz >= 0.0 else t_stop
        if _needs_search(Ms, s, tab.e_il, tab.kil[s], zs2, zb, t_lim, t_lim - t, gs, -1.0,
                         ph_lim, 0.0, tc, bnd):
            t2 = locate_zero(Ms, E, h, s, zs2, zb, t, t_lim, -1.0, gs, tmp, trial, work,
                           tab.e_il, ph_lim, 0.0, tc, False, tg, poly, bnd, tab.k3il[0, s])
            if t2 >= 0.0 and (tz < 0.0 or t2 < tz):
                tz = t2
                for i in range(m):
                    zs[i] = zs2[i]
    return tz


@njit(inline="always")
def hold_event(tab, ctl, s, level, held, tz, zs, z, t, t_stop, gs, sc):
    """The analog integrator's first hold event before ``tz`` (or ``t_stop``): 1 it
    reaches ``w_hi``, 2 ``w_lo`` (holds start), 3 the error's sign change ``e_band``
    past zero (a hold ends). Returns ``(tz, kind)`` with ``kind = 0`` when a gate
    event or none comes first (``zs`` then unchanged). ``sc.zst``: the state at
    the segment's start."""
    Ms, E, h, bnd, tg = tab.Ms, tab.E, tab.h, tab.bnd, tab.taylor_gap
    tmp, trial, work, zs2, zh, zst, poly = (sc.tmp, sc.trial, sc.work, sc.zs2, sc.zh, sc.zst,
                                            sc.poly)
    cs = ctl.settings
    i_w, w_lo, w_hi = cs.i_w, cs.w_lo, cs.w_hi
    m = zs.shape[0]
    t_h = tz if tz >= 0.0 else t_stop
    zb = zs if tz >= 0.0 else z
    th, found = -1.0, 0
    wv = zst[i_w]
    for kind in range(1, 4):
        if held == 0 and kind == 1 and np.isfinite(w_hi) and wv <= w_hi:
            hrow, hlev, hsign = ctl.e_w, w_hi, -1.0
        elif held == 0 and kind == 2 and np.isfinite(w_lo) and wv >= w_lo:
            hrow, hlev, hsign = ctl.e_w, w_lo, 1.0
        elif held == 1 and kind == 3:
            hrow, hsign = ctl.Ce[level], 1.0 if wv >= w_hi else -1.0
            hlev = -hsign * cs.e_band
        else:
            continue
        if t_h <= t:
            continue
        dh = t_h - t
        if kind < 3:
            # the integrator's own row: the cheap test of the state itself
            if dh <= gs and state_clear(Ms, s, i_w, hlev, zst, zb, dh, hsign, ctl.kw[0, s],
                                        bnd):
                continue
        elif not _needs_search(Ms, s, hrow, ctl.kce[level, s], zst, zb, t_h, dh, gs, hsign,
                               hlev, 0.0, t, bnd):
            continue
        for i in range(m):
            zs2[i] = zst[i]
        t3 = locate_zero(Ms, E, h, s, zs2, zb, t, t_h, hsign, gs, tmp, trial, work, hrow, hlev,
                       0.0, t, False, tg, poly, bnd,
                       ctl.k3w[0, s] if kind < 3 else ctl.k3ce[level, s])
        if t3 >= 0.0 and (th < 0.0 or t3 < th):
            th, found = t3, kind
            for i in range(m):
                zh[i] = zs2[i]
    if th >= 0.0 and (tz < 0.0 or th < tz):
        for i in range(m):
            zs[i] = zh[i]
        return th, found
    return tz, 0
