"""The open switch node's events: its two clamps and the edges of its capacitance band.

While nothing conducts, the node voltage ``vn`` is a state
(:mod:`bucksim.model.stage`). A segment of the open node ends at the first of:

* the low-side clamp ``vn = -Vf_ls - r_ls iL`` (the low-side diode starts);
* the high-side clamp ``vn = Vin + Vf_hs - (Rs + r_hs) iL``;
* an edge of the node capacitance's band (a capacitance table,
  :mod:`bucksim.model.capacitance`): ``vn`` falls to the band's lower edge or
  rises to its upper edge, and the next band's linear system takes over with
  the state continuous.

Each search is skipped when a bound proves the segment free of that crossing
(:mod:`bucksim.engine.bounds`); a clamp reached on a slew is located by
:func:`~bucksim.engine.loop_parts.newton_crossing`, anything else by
:func:`~bucksim.engine.kernels.locate_zero`. The clamps' searches are
:func:`bucksim.engine.segment_events.open_node_event`, inlined into the cycle
loop; the band edges, present only with a capacitance table, are searched
here.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.bounds import growth, open_node_clear, reach
from bucksim.engine.kernels import locate_zero
from bucksim.engine.loop_parts import _dot, _needs_search, newton_crossing
from bucksim.engine.propagation import plain_args

#: Event kinds besides the clamps' conduction states: the band's edges.
BAND_DOWN, BAND_UP = -1, -2


@njit(cache=True, inline="always")
def band_of(edges, level, v, il):
    """The band of ``edges[level]`` (``-inf .. +inf``) holding ``v``, bands
    ``[e_b, e_{b+1})``; a node exactly on an edge and falling (``iL > 0``) is in the
    band below it (zero-width bands skipped). (The 2-D table and its row index, not
    a row view: a view made in the cycle loop costs more than the search.)"""
    nb = edges.shape[1] - 1
    b = 0
    while b + 1 < nb and edges[level, b + 1] <= v:
        b += 1
    if il > 0.0:
        while b > 0 and edges[level, b] == v:
            b -= 1
    return b


@njit(cache=True, inline="always")
def step_band(edges, level, band, kind):
    """The band entered through an edge event (zero-width bands passed through)."""
    nb = edges.shape[1] - 1
    if kind == BAND_DOWN:
        band -= 1
        while band > 0 and edges[level, band] == edges[level, band + 1]:
            band -= 1
    else:
        band += 1
        while band + 1 < nb and edges[level, band] == edges[level, band + 1]:
            band += 1
    return band


@njit(cache=True, _nrt=False)
def band_edge_event(Ms, E, h, s, zs, z, zs2, zs3, t, t_stop, tz, kind, gs, edges, level, band,
                    e_vn, kvn, k3vn, taylor_gap, tmp, trial, work, poly, bnd, erow):
    """The earlier of the event so far (``tz``, ``kind``; ``zs`` its state) and the
    open node reaching its band's lower edge (falling) or upper edge (rising), from
    the segment's start ``zs3`` (at ``t``). Returns ``(tz, kind)``; ``erow``: work
    space for the edge's row."""
    lo, hi = edges[level, band], edges[level, band + 1]
    m = zs.shape[0]
    for sign, v, this in ((1.0, lo, BAND_DOWN), (-1.0, hi, BAND_UP)):
        if not abs(v) < np.inf:
            continue
        # sign (vn - v) as a row over z (its last entry is the constant 1): positive
        # in the band, falling to zero at the edge
        for i in range(m):
            erow[i] = sign * e_vn[i]
        erow[m - 1] -= sign * v
        tz, kind = _earlier(Ms, E, h, s, zs, z, zs2, zs3, t, t_stop, tz, kind, gs, erow, kvn,
                            k3vn, this, taylor_gap, tmp, trial, work, poly, bnd)
    return tz, kind


@plain_args
@njit(cache=True, _nrt=False)
def _earlier(Ms, E, h, s, zs, z, zs2, zs3, t, t_stop, tz, kind, gs, row, krow, k3, this,
             taylor_gap, tmp, trial, work, poly, bnd):
    """Search ``row . z = 0`` (positive at the start) from the segment's start ``zs3``
    up to the earliest event found so far, by proven Newton steps (a slew crosses
    on a nearly straight line) or else the general search; keep it (state into
    ``zs``) when it comes first."""
    m = zs.shape[0]
    zb = zs if tz >= 0.0 else z
    t_lim = tz if tz >= 0.0 else t_stop
    d = t_lim - t
    if _leaving(Ms, s, row, krow, zs3, d, bnd):
        return tz, kind
    # the curvature bound over the whole stretch, beyond the search guard too: it
    # stays valid (only looser)
    if not _needs_search(Ms, s, row, krow, zs3, zb, t_lim, d, np.inf, 1.0, 0.0, 0.0, t, bnd):
        return tz, kind
    u = newton_crossing(Ms, E, h, s, zs3, t, d, row, krow, bnd, tmp, work)
    if u > 0.0:
        t2 = t + u
        for i in range(m):
            zs2[i] = work[i]
    else:
        for i in range(m):
            zs2[i] = zs3[i]
        t2 = locate_zero(Ms, E, h, s, zs2, zb, t, t_lim, 1.0, gs, tmp, trial, work, row, 0.0,
                         0.0, t, False, taylor_gap, poly, bnd, k3)
    if t2 >= 0.0 and (tz < 0.0 or t2 < tz):
        for i in range(m):
            zs[i] = zs2[i]
        return t2, this
    return tz, kind


@njit(cache=True, _nrt=False)
def _leaving(Ms, s, row, krow, z0, d, bnd):
    """True when ``f = row . z``, at or above zero at the start and rising, provably
    stays above zero over ``(0, d]`` (the node just crossed this edge and moves away):
    ``f >= f0 + s0 u - B u^2 / 2`` with the curvature bound ``B``."""
    m = z0.shape[0]
    f0 = _dot(row, z0)
    if f0 < 0.0:
        return False
    s0 = 0.0
    vel = 0.0
    for i in range(m - 1):
        acc = 0.0
        for j in range(m):
            acc += Ms[s, i, j] * z0[j]
        s0 += row[i] * acc
        vel = max(vel, abs(acc) * bnd[s, i])
    if not s0 > 0.0:
        return False
    B = krow * vel * growth(bnd[s, m - 1] * d) * (1.0 + 1e-12)
    return reach(f0, s0, B) > d


@njit(cache=True, _nrt=False)
def open_stretch(coef, z, i_vn, d, low, high, search_ls, search_hs):
    """``(length, low_clear, high_clear)`` for an open segment of ``d`` [s] from
    state ``z``: the ring-energy bound (:func:`~bucksim.engine.bounds.open_node_clear`)
    over ``d``; where it does not clear a clamp that is searched (``search_ls``,
    ``search_hs``) and ``d`` is longer than a ring period, over half a ring
    period instead, the length to propagate. The bound does not decay with the
    ring (it drops the damping); taken again from half a period on, a damped
    ring's smaller energy clears the rest of a long idle interval at once, where
    a search would march through it in steps of a fraction of the ring period."""
    lo_ok, hi_ok = open_node_clear(coef, z, i_vn, d, low, high)
    half = np.pi * np.sqrt(coef[0] * coef[1])
    if ((lo_ok or not search_ls) and (hi_ok or not search_hs)) or d <= 2.0 * half:
        return d, lo_ok, hi_ok
    lo_h, hi_h = open_node_clear(coef, z, i_vn, half, low, high)
    return half, lo_h, hi_h
