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
:func:`~bucksim.engine.kernels.find_zero`.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.engine.bounds import open_node_clear
from bucksim.engine.kernels import HIGH_DIODE, LOW_DIODE, OPEN, find_zero
from bucksim.engine.loop_parts import _needs_search, newton_crossing

#: Event kinds besides the clamps' conduction states: the band's edges.
BAND_DOWN, BAND_UP = -1, -2


@njit(cache=True)
def band_of(edges, v, il):
    """The band of ``edges`` (``-inf .. +inf``) holding ``v``, bands ``[e_b, e_{b+1})``;
    a node exactly on an edge and falling (``iL > 0``) is in the band below it
    (zero-width bands skipped)."""
    nb = edges.shape[0] - 1
    b = 0
    while b + 1 < nb and edges[b + 1] <= v:
        b += 1
    if il > 0.0:
        while b > 0 and edges[b] == v:
            b -= 1
    return b


@njit(cache=True)
def step_band(edges, band, kind):
    """The band entered through an edge event (zero-width bands passed through)."""
    nb = edges.shape[0] - 1
    if kind == BAND_DOWN:
        band -= 1
        while band > 0 and edges[band] == edges[band + 1]:
            band -= 1
    else:
        band += 1
        while band + 1 < nb and edges[band] == edges[band + 1]:
            band += 1
    return band


@njit(cache=True)
def open_node_event(Ms, E, h, s, zs, z, t, t_stop, d, gs, search_ls, search_hs, lo, hi,
                    i_vn, coef, Cls, Chs, kls, k3ls, khs, k3hs, e_vn, kvn, k3vn, bnd,
                    taylor_gap, tmp, trial, work, poly, zs2, zs3):
    """The first event of an open-node segment from ``zs`` (at ``t``) to ``z`` (at
    ``t_stop = t + d``).

    ``search_ls``/``search_hs``: whether each clamp can be reached (its row is
    positive at the start); ``lo``/``hi``: the band's edges [V] (infinite: none);
    ``coef``: the band's row of the energy bound. Returns ``(tz, kind)``:
    ``tz < 0`` and ``OPEN`` when nothing happens, else ``zs`` holds the state at
    ``tz`` and ``kind`` is ``LOW_DIODE``, ``HIGH_DIODE``, ``BAND_DOWN`` or
    ``BAND_UP``.
    """
    m = zs.shape[0]
    for i in range(m):
        zs2[i] = zs[i]
        zs3[i] = zs[i]
    if d > gs and (search_ls or search_hs):
        # a ring of many lobes: the energy bound clears it at once
        lo_ok, hi_ok = open_node_clear(coef, zs, i_vn, d, Cls, Chs)
        search_ls = search_ls and not lo_ok
        search_hs = search_hs and not hi_ok
    tz = -1.0
    kind = OPEN
    if search_ls and _needs_search(Ms, s, Cls, kls, zs, z, t_stop, d, gs, 1.0, 0.0, 0.0, t,
                                   bnd):
        # a slew at high current: Newton, proven; else the general search
        u = newton_crossing(Ms, E, h, s, zs, t, d, Cls, kls, bnd, tmp, work)
        if u > 0.0:
            tz = t + u
            for i in range(m):
                zs[i] = work[i]
        else:
            tz = find_zero(Ms, E, h, s, zs, z, t, t_stop, 1.0, gs, tmp, trial, work, Cls,
                           0.0, 0.0, t, False, taylor_gap, poly, bnd, k3ls)
        if tz >= 0.0:
            kind = LOW_DIODE
    if search_hs:
        tz, kind = _earlier(Ms, E, h, s, zs, z, zs2, zs3, t, t_stop, tz, kind, gs, Chs, 0.0,
                            1.0, khs, k3hs, HIGH_DIODE, taylor_gap, tmp, trial, work, poly, bnd)
    if lo > -np.inf:
        tz, kind = _earlier(Ms, E, h, s, zs, z, zs2, zs3, t, t_stop, tz, kind, gs, e_vn, lo,
                            1.0, kvn, k3vn, BAND_DOWN, taylor_gap, tmp, trial, work, poly, bnd)
    if hi < np.inf:
        tz, kind = _earlier(Ms, E, h, s, zs, z, zs2, zs3, t, t_stop, tz, kind, gs, e_vn, hi,
                            -1.0, kvn, k3vn, BAND_UP, taylor_gap, tmp, trial, work, poly, bnd)
    return tz, kind


@njit(cache=True)
def _earlier(Ms, E, h, s, zs, z, zs2, zs3, t, t_stop, tz, kind, gs, row, level, sign0, krow,
             k3, this, taylor_gap, tmp, trial, work, poly, bnd):
    """Search ``sign0 (row . z - level) = 0`` from the segment's start ``zs3`` up to
    the earliest event found so far; keep it (state into ``zs``) when it comes first."""
    m = zs.shape[0]
    zb = zs if tz >= 0.0 else z
    t_lim = tz if tz >= 0.0 else t_stop
    if not _needs_search(Ms, s, row, krow, zs3, zb, t_lim, t_lim - t, gs, sign0, level, 0.0,
                         t, bnd):
        return tz, kind
    for i in range(m):
        zs2[i] = zs3[i]
    t2 = find_zero(Ms, E, h, s, zs2, zb, t, t_lim, sign0, gs, tmp, trial, work, row, level,
                   0.0, t, False, taylor_gap, poly, bnd, k3)
    if t2 >= 0.0 and (tz < 0.0 or t2 < tz):
        for i in range(m):
            zs[i] = zs2[i]
        return t2, this
    return tz, kind
