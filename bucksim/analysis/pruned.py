"""Exact extrema of a signal over many pieces, evaluated only where they can be.

A transient's window can hold millions of segments (a start-up run for
seconds), nearly all of them far from the window's extremes or well inside the
settling band. Each piece's end values and a rigorous curvature bound give an
interval the signal cannot leave on that piece; the exact extrema
(:func:`bucksim.analysis.extrema.piece_extrema`) are then taken only on the
pieces whose interval reaches past the best exact value found so far, or past
a band the caller names.

The bound: on a piece of length ``d`` with ``|f''| <= K`` the signal lies below
its chord plus ``K tau (d - tau) / 2``, so within ``[min(f_a, f_b) - K d^2/8,
max(f_a, f_b) + K d^2/8]`` (derived: Taylor with remainder about the chord).
With ``f = c z`` and ``z' = M z``, ``f'' = c_x A x'`` and, for the balancing ``W``
and logarithmic norm ``mu`` of :mod:`bucksim.engine.bounds` (the engine's own
event bound), ``K <= ||c_x A W||_1 e^{mu d} ||W^-1 x'(0)||_inf``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from bucksim.analysis.extrema import piece_extrema
from bucksim.engine.bounds import growth, row_norms, system_bounds

#: Candidate pieces a first pass keeps room for (grown when more are needed).
_CAPACITY = 200_000
#: Pieces refined exactly per pass while searching for the window's extremes.
_BATCH = 4096


def _system_constants(run, name):
    """Per system: the signal's row ``c``, the curvature constant ``||c_x A W||_1`` and
    the balancing ``[1/W, mu]`` (:func:`bucksim.engine.bounds.system_bounds`)."""
    Ms = np.ascontiguousarray(run.table.matrices)
    c = np.ascontiguousarray(run.signal_table(name))
    bnd = system_bounds(Ms)
    kw = np.ascontiguousarray(np.diagonal(row_norms(Ms, bnd, c)))
    return Ms, c, kw, bnd


def _reads_jumping_states(run, c) -> bool:
    """True when the row reads a state that is set, not integrated, at segment starts
    (the held node voltage, an input network moved by the node's charge)."""
    stage = run.stage
    cols = [stage.i_node] if stage.node else []
    if stage.net is not None and stage.node:
        cols += list(range(stage.i_in, stage.i_in + stage.n_in))
    return bool(cols) and bool(np.any(c[:, cols] != 0.0))


@njit(cache=True)
def _reach(Ms, bnd, kw, s, z, d):
    """``B d^2 / 8`` with ``B`` the curvature bound of :mod:`bucksim.engine.bounds` from
    the augmented state ``z`` at a piece's start, over its length ``d``."""
    m = z.shape[0]
    worst = 0.0
    for i in range(m - 1):          # ||W^-1 x'||_inf, x' = (M z)[:n]
        acc = 0.0
        for j in range(m):
            acc += Ms[s, i, j] * z[j]
        worst = max(worst, abs(acc) * bnd[s, i])
    return kw[s] * growth(bnd[s, m - 1] * d) * worst * d * d / 8.0


@njit(cache=True)
def _candidates(x0, x_end, dt, system, idx, tau_a, tau_b, c, kw, Ms, bnd, lo_b, hi_b,
                seeds, out_pos, out_lo, out_hi):
    """One pass over the whole pieces: the signal's end values (their max and min,
    exact values the window reaches, update ``seeds = [lo, hi]``) and each piece's
    rigorous range; a piece is kept in ``out_*`` when its range reaches past the
    seeds so far or outside ``[lo_b, hi_b]``. Returns the number kept (more than
    ``out_pos`` holds: the rest were dropped, the caller starts again). A clipped
    piece (the window's ends) is always kept, with an infinite range."""
    n, n_seg, n_x = idx.shape[0], x0.shape[0], x0.shape[1]
    cap = out_pos.shape[0]
    z = np.ones(n_x + 1)
    kept = 0
    for i in range(n):
        k = idx[i]
        lo, hi = -np.inf, np.inf
        if tau_a[i] == 0.0 and tau_b[i] >= dt[k]:
            s = system[k]
            fa = c[s, n_x]
            fb = c[s, n_x]
            for j in range(n_x):
                z[j] = x0[k, j]
                fa += c[s, j] * z[j]
                fb += c[s, j] * (x0[k + 1, j] if k + 1 < n_seg else x_end[j])
            seeds[0] = min(seeds[0], fa, fb)
            seeds[1] = max(seeds[1], fa, fb)
            reach = _reach(Ms, bnd, kw, s, z, tau_b[i] - tau_a[i])
            reach = reach * (1.0 + 1e-12) + 1e-15 * (abs(fa) + abs(fb))
            lo = min(fa, fb) - reach
            hi = max(fa, fb) + reach
            if lo >= seeds[0] and hi <= seeds[1] and lo >= lo_b and hi <= hi_b:
                continue
        if kept < cap:
            out_pos[kept], out_lo[kept], out_hi[kept] = i, lo, hi
        kept += 1
    return kept


def window_extrema(run, name, idx, tau_a, tau_b, band=None):
    """Exact ``(min, max)`` of signal ``name`` over the pieces ``idx`` (segments) from
    ``tau_a`` to ``tau_b`` [s], and the pieces that may leave ``band = (lo_b, hi_b)``:
    ``(min, max, sel, lo, hi)`` with ``sel`` positions in ``idx`` and their exact
    ranges; every piece not in ``sel`` provably stays inside the band."""
    Ms, c, kw, bnd = _system_constants(run, name)
    lo_b, hi_b = (-np.inf, np.inf) if band is None else band
    if _reads_jumping_states(run, c):
        sel = np.arange(idx.shape[0])
        lo, hi = piece_extrema(run, name, idx, tau_a, tau_b)
        return float(lo.min()), float(hi.max()), sel, lo, hi
    seg = run.segments
    cap = min(idx.shape[0], _CAPACITY)
    while True:
        seeds = np.array([np.inf, -np.inf])
        pos, lo, hi = np.empty(cap, np.int64), np.empty(cap), np.empty(cap)
        kept = _candidates(seg.x0, run.x_end, seg.dt, seg.system, idx, tau_a, tau_b, c, kw,
                           Ms, bnd, lo_b, hi_b, seeds, pos, lo, hi)
        if kept <= cap:
            break
        cap = min(idx.shape[0], 2 * kept)   # the seeds rose late: all again, room for all
    pos, lo, hi = pos[:kept], lo[:kept], hi[:kept]
    # with the final seeds, drop what they now rule out (the band's pieces stay)
    keep = (lo < seeds[0]) | (hi > seeds[1]) | (lo < lo_b) | (hi > hi_b)
    pos, lo, hi = pos[keep], lo[keep], hi[keep]
    exact = np.zeros(pos.shape[0], bool)

    def refine(sel):
        sel = sel[~exact[sel]]
        if sel.shape[0]:
            k = pos[sel]
            lo[sel], hi[sel] = piece_extrema(run, name, idx[k], tau_a[k], tau_b[k])
            exact[sel] = True

    refine(np.nonzero((lo < lo_b) | (hi > hi_b))[0])
    v_lo, v_hi = seeds
    while True:     # the maximum: refine the highest ranges until none passes the best
        if exact.any():
            v_hi = max(v_hi, hi[exact].max())
        open_ = np.nonzero(~exact & (hi > v_hi))[0]
        if open_.shape[0] == 0:
            break
        refine(_top(open_, -hi[open_]))
    while True:     # the minimum, alike
        if exact.any():
            v_lo = min(v_lo, lo[exact].min())
        open_ = np.nonzero(~exact & (lo < v_lo))[0]
        if open_.shape[0] == 0:
            break
        refine(_top(open_, lo[open_]))
    inside = np.nonzero(exact)[0]
    return float(v_lo), float(v_hi), pos[inside], lo[inside], hi[inside]


def _top(candidates, key):
    """The ``_BATCH`` candidates of smallest ``key`` (all when fewer)."""
    if candidates.shape[0] <= _BATCH:
        return candidates
    return candidates[np.argpartition(key, _BATCH)[:_BATCH]]
