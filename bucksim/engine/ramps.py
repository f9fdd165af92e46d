"""The switches' current ramps in the cycle loop: where a ramp starts, what it
sets, and where it ends.

A channel with a rise or fall time is a current source while it switches
(:mod:`bucksim.model.stage_ramps` gives its states and rows). At a gate edge the
loop calls :func:`ramp_edge`, which sets the ramp's current and slope, a linear
function of the state, and returns the conduction state the node enters:

* high side off, carrying ``I0 > 0`` (``iL`` if it was fully on, its ramp's
  current if it was still rising): ``ihs`` falls from ``I0`` to zero over
  ``fall_time``; the node opens;
* high side on: ``ihs`` rises from zero at ``max(iL, 0) / rise_time`` (the slope
  fixed at the edge); the low-side diode carries ``iL - ihs`` until that reaches
  zero, then the node rises; at ``rise_time``, or where the rising node reaches
  the high side's clamp, the channel closes fully (``HIGH``). A node already at
  that clamp (the body diode conducts: zero-voltage switching) closes it at once.
  At ``iL <= 0`` the ramp carries nothing and only delays the closing: the
  channel takes its rise time to enhance whatever the current, so the stage is
  continuous in ``iL`` through zero at the edge (a ramp only where ``iL > 0``
  made the on-time jump by ``rise_time`` there, and a steady state near the CCM
  boundary had no fixed point);
* the low side alike in forced PWM, mirrored (off: ``ils`` from ``iL < 0`` to
  zero; on: from zero at ``min(iL, 0) / rise_time``, closing fully at
  ``rise_time`` or at the low clamp, at once on its conducting body diode).

Any other edge has no ramp (a turn-off at a current that the channel does not
carry forward: it opens at once, the limit of a ramp of no current) and ends a
ramp still running. A ramp never
outlives its period (:func:`ramp_cut`), so every period starts with the ramp
states at zero: the steady state's shooting does not see them. All helpers are
inlined into the loop (``inline="always"``; :mod:`bucksim.engine.period`).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.kernels import (
    GATE_HIGH,
    GATE_LOW,
    HIGH,
    HIGH_DIODE,
    LOW,
    LOW_DIODE,
    N_CONDUCTION,
    OPEN,
    locate_zero,
)
from bucksim.engine.loop_parts import _dot, _needs_search
from bucksim.engine.segment_events import trip_event

#: Mirrors :data:`bucksim.model.stage_ramps.RAMP_SCALE` [s].
RAMP_SCALE = 1e-9

#: Which switch ramps: none, the high side, the low side.
NO_RAMP, HS_RAMP, LS_RAMP = -1, 0, 1


@njit(inline="always")
def ramp_clear(tab, z):
    """Zero both ramps' currents and slopes."""
    for i in (tab.i_hs, tab.i_ls):
        if i >= 0:
            z[i] = 0.0
            z[i + 1] = 0.0


@njit(inline="always")
def _start(z, i, current, slope_current, duration):
    """A ramp of current ``current`` now, reaching ``current + slope_current`` after
    ``duration``."""
    z[i] = current
    z[i + 1] = slope_current * RAMP_SCALE / duration


@njit(inline="always")
def ramp_edge(tab, gate, gate_prev, cond_prev, cond, z, t, r_end, r_dev, r_on):
    """The ramp at a phase start under ``gate`` (``gate_prev``: the previous phase's
    gate, ``cond_prev`` the conduction state it ended in, ``cond`` the one the gate
    alone would enter). Returns ``(cond, r_end, r_dev, r_on)``: the conduction state,
    the ramp's end [s], the switch ramping (:data:`NO_RAMP`, :data:`HS_RAMP`,
    :data:`LS_RAMP`) and whether it is a turn-on."""
    ih, il, rt = tab.i_hs, tab.i_ls, tab.ramp_times
    if gate == gate_prev:
        if r_dev != NO_RAMP:
            return cond_prev, r_end, r_dev, r_on     # the ramp runs on into this phase
        return cond, r_end, r_dev, r_on
    if gate_prev == GATE_HIGH and ih >= 0:
        i0 = z[0] if cond_prev == HIGH else (z[ih] if r_dev == HS_RAMP else 0.0)
        ramp_clear(tab, z)
        if rt[1] > 0.0 and i0 > 0.0:
            _start(z, ih, i0, -i0, rt[1])
            return OPEN, t + rt[1], HS_RAMP, False
        return cond, -1.0, NO_RAMP, False
    if gate_prev == GATE_LOW and il >= 0:
        i0 = z[0] if cond_prev == LOW else (z[il] if r_dev == LS_RAMP else 0.0)
        ramp_clear(tab, z)
        if rt[3] > 0.0 and i0 < 0.0:
            _start(z, il, i0, -i0, rt[3])
            return OPEN, t + rt[3], LS_RAMP, False
        return cond, -1.0, NO_RAMP, False
    ramp_clear(tab, z)
    if gate == GATE_HIGH and ih >= 0 and rt[0] > 0.0:
        _start(z, ih, 0.0, max(z[0], 0.0), rt[0])
        return OPEN, t + rt[0], HS_RAMP, True
    if gate == GATE_LOW and il >= 0 and rt[2] > 0.0 and cond == LOW:
        _start(z, il, 0.0, min(z[0], 0.0), rt[2])
        return OPEN, t + rt[2], LS_RAMP, True
    return cond, -1.0, NO_RAMP, False


@njit(inline="always")
def ramp_done(tab, z, cond, r_dev, r_on):
    """The ramp has run its time: its states go to zero and a turn-on's channel
    closes fully. Returns the conduction state."""
    ramp_clear(tab, z)
    if r_on:
        return HIGH if r_dev == HS_RAMP else LOW
    return cond


@njit(inline="always")
def ramp_takeover(tab, z, at_ls, at_hs, cond, r_dev, r_on):
    """A turning-on channel's node is at that channel's own clamp (``at_ls``,
    ``at_hs``: reached by an open-node clamp event, or found there): the channel
    closes fully. Returns ``(cond, r_dev)``."""
    if r_dev != NO_RAMP and r_on and ((r_dev == HS_RAMP and at_hs)
                                      or (r_dev == LS_RAMP and at_ls)):
        ramp_clear(tab, z)
        return (HIGH if r_dev == HS_RAMP else LOW), NO_RAMP
    return cond, r_dev


@njit(inline="always")
def clamp_reached(tab, z, kind, cond, r_dev, r_on):
    """The open node reached the clamp ``kind`` (an event): a turning-on channel's own
    clamp closes it (:func:`ramp_takeover`); else that diode conducts if its current
    (:func:`diode_currents`) flows, and the node only touched it if not. Returns
    ``(cond, r_dev)``."""
    cond2, r_dev2 = ramp_takeover(tab, z, kind == LOW_DIODE, kind == HIGH_DIODE, cond, r_dev,
                                  r_on)
    if r_dev2 != r_dev:
        return cond2, r_dev2
    d_ls, d_hs = diode_currents(tab, z)
    if (kind == LOW_DIODE and d_ls > 0.0) or (kind == HIGH_DIODE and d_hs > 0.0):
        return kind, r_dev
    return cond, r_dev


@njit(inline="always")
def diode_currents(tab, z):
    """``(low-side diode's, high-side diode's)`` current were each to conduct now:
    ``iL - ihs`` and ``ils - iL`` (``iL`` and ``-iL`` without ramps)."""
    d_ls = z[0] - (z[tab.i_hs] if tab.i_hs >= 0 else 0.0)
    d_hs = (z[tab.i_ls] if tab.i_ls >= 0 else 0.0) - z[0]
    return d_ls, d_hs


@njit(inline="always")
def ramp_zero_event(tab, s, cond, zs, z, t, t_stop, d, gs, sc):
    """Where a diode beside a ramping channel stops (its current ``Zd . z`` reaches
    zero), or -1; ``zs`` holds the state there. Not snapped to ``iL = 0``: the
    inductor current is not zero there."""
    j = 0 if cond == LOW_DIODE else 1
    row = tab.Zd[j]
    if not _needs_search(tab.Ms, s, row, tab.kzd[j, s], zs, z, t_stop, d, gs, 1.0, 0.0, 0.0,
                         t, tab.bnd):
        return -1.0
    return locate_zero(tab.Ms, tab.E, tab.h, s, zs, z, t, t_stop, 1.0, gs, sc.tmp, sc.trial,
                       sc.work, row, 0.0, 0.0, t, False, tab.taylor_gap, sc.poly, tab.bnd,
                       tab.k3zd[j, s])


@njit(inline="always")
def is_diode(cond):
    """The diode states, which a ramp's current feeds."""
    return cond == LOW_DIODE or cond == HIGH_DIODE


@njit(inline="always")
def ramp_trip(tab, ctl, s, level, row, zs, zst, z, t, t_stop, d, tc, gs, ph_cmp, ph_lim,
              cmp_level, cmp_ramp, sc, r_dev):
    """The comparator or limit while the high side's current still ramps (``r_dev``;
    a short on-time): searched first, it shortens the stretch the ramp's own events
    are searched over. Returns ``(t_stop, d, trip_at)``, ``trip_at < 0`` for none;
    ``z`` then holds the state at the trip, ``zs`` the segment's start again."""
    if r_dev != HS_RAMP or not (ph_cmp or np.isfinite(ph_lim)):
        return t_stop, d, -1.0
    tz = trip_event(tab, ctl, s, level, row, zs, z, t, t_stop, d, tc, gs, ph_cmp, ph_lim,
                    cmp_level, cmp_ramp, sc)
    if tz >= 0.0:
        for i in range(z.shape[0]):
            z[i] = zs[i]
    for i in range(z.shape[0]):
        zs[i] = zst[i]
    if tz < 0.0:
        return t_stop, d, -1.0
    return tz, tz - t, tz


@njit(inline="always")
def trip_came_first(z, zs, tz, trip_at):
    """The event of a ramp segment: its own (``tz``) or the trip found first; ``zs``
    takes the state at the event. Returns the event's time (-1: none)."""
    if trip_at >= 0.0 and tz < 0.0:
        for i in range(z.shape[0]):
            zs[i] = z[i]
        return trip_at
    return tz


@njit(inline="always")
def trip_ends_ramp_segment(tab, level, cond, z, node):
    """A trip inside a ramp segment ends the on-time: a clamped node's voltage is set
    (the loop's invariant, :func:`~bucksim.engine.period.node_held`). Returns True."""
    if node and cond != OPEN:
        z[tab.i_vn] = _dot(tab.Vsw[level * N_CONDUCTION + cond], z)
    return True
