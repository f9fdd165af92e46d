"""Transient metrics per event: start-up, load steps, supply steps.

For each event the window runs from the event to the next one (or the end
of the run). A run that starts on the periodic steady state has no start-up
event: its first window describes no transient. Extremes are exact (zeros of
the analytic derivative); the time to re-enter the settling band is the last
instant the output voltage leaves ``reference (1 +- band)``: the exact
extrema of ever shorter sub-intervals of the last piece that leaves the band
close in on it (an excursion between two samples included), and brentq on
the exact solution finishes it once a crossing is bracketed with vo inside
the band after it.
"""

from __future__ import annotations

import numpy as np

from bucksim.analysis.extrema import piece_extrema
from bucksim.analysis.pruned import window_extrema
from bucksim.analysis.windows import signal_mean

DEFAULT_BAND = 0.01


def _pieces(run, ta, tb):
    """Pieces of the segments in ``[ta, tb]`` (segment index, start and end in it).
    The segments are in time order: the window is one index range."""
    seg = run.segments
    k_a = max(int(np.searchsorted(seg.t0, ta, side="right")) - 1, 0)
    k_b = int(np.searchsorted(seg.t0, tb, side="left"))
    idx = np.arange(k_a, k_b)
    t0 = seg.t0[k_a:k_b]
    tau_a = np.maximum(ta - t0, 0.0)
    tau_b = np.minimum(tb - t0, seg.dt[k_a:k_b])
    keep = tau_b > tau_a
    if keep.all():
        return idx, tau_a, tau_b
    return idx[keep], tau_a[keep], tau_b[keep]


def started_settled(run) -> bool:
    """True when the run starts on its periodic steady state (``run.start =
    "steady-state"``, or :func:`bucksim.simulation.simulate_settled`)."""
    return run.starts_settled


def _events(run):
    sc = run.scenario
    out = [] if started_settled(run) else [(0.0, "start-up")]
    for st in sc.load.steps:
        out.append((st.time, "load step"))
    for st in sc.supply.steps:
        out.append((st.time, "supply step"))
    return sorted((t, k) for t, k in out if t < run.t_end)


def _target(run, ta, tb):
    """Settled value: the reference in closed loop, else the last period's exact mean."""
    sc = run.scenario
    if sc.control.mode != "open-loop":
        return sc.control.reference
    return signal_mean(run, "vo", max(ta, tb - sc.period), tb)


#: Sub-intervals per refinement step of the band exit (one batched call of
#: the exact extrema each; 64**8 ~ 3e14, so eight steps reach rounding).
_SPLIT = 64
_MAX_STEPS = 64


def _outside(run, k, a, b, lo_b, hi_b):
    """Per sub-interval ``[a_i, b_i]`` of segment ``k``: does vo leave the band?"""
    lo, hi = piece_extrema(run, "vo", np.full(a.shape[0], k), a, b)
    return (lo < lo_b) | (hi > hi_b)


def _settle_time(run, idx, tau_a, tau_b, lo_b, hi_b, lo, hi):
    """Last time vo is outside [lo_b, hi_b] (None if it never is), in absolute time.

    The last piece with an exact extremum outside the band holds it. That
    piece is cut into :data:`_SPLIT` sub-intervals, the last one whose exact
    extrema leave the band is kept and cut again, so an excursion narrower
    than any sampling is followed; once the kept interval starts outside and
    ends inside, brentq on the exact solution finds a band crossing in it,
    which is the exit once the exact extrema show vo inside from there on.
    """
    outside = np.nonzero((lo < lo_b) | (hi > hi_b))[0]
    if outside.shape[0] == 0:
        return None
    p = outside[-1]
    k = idx[p]
    t0 = float(run.segments.t0[k])
    a, b = float(tau_a[p]), float(tau_b[p])
    for _ in range(_MAX_STEPS):
        v_a, v_b = run.at([t0 + a, t0 + b], "vo")
        if not lo_b <= v_b <= hi_b:
            return t0 + b                    # outside at the end of the kept interval
        if not lo_b <= v_a <= hi_b:
            # outside at a, inside at b: a band crossing lies between; it is the
            # exit if vo stays inside from just after it to b (exact extrema)
            bound = hi_b if v_a > hi_b else lo_b
            from scipy.optimize import brentq  # 0.4 s to import: only when used

            tc = float(brentq(lambda t, bound=bound: run.at([t], "vo")[0] - bound,
                              t0 + a, t0 + b, xtol=1e-300, rtol=4 * np.finfo(float).eps))
            after = min(tc - t0 + 16 * np.spacing(tc), b)
            if after >= b or not _outside(run, k, np.array([after]), np.array([b]),
                                          lo_b, hi_b)[0]:
                return tc
            a = after                        # vo leaves the band again before b
        if b - a <= 4 * np.spacing(t0 + b):
            return t0 + b                    # closed in to rounding
        cuts = np.linspace(a, b, _SPLIT + 1)
        out = np.nonzero(_outside(run, k, cuts[:-1], cuts[1:], lo_b, hi_b))[0]
        if out.shape[0] == 0:
            return t0 + b                    # (rounding: the exit is at the kept end)
        j = out[-1]
        a, b = float(cuts[j]), float(cuts[j + 1])
    return t0 + b


def transients(run, band: float = DEFAULT_BAND) -> list[dict]:
    """Per event: extremes of vo and iL, overshoot, undershoot, settling.

    Returns
    -------
    list of dict
        ``{event, time [s], reference [V], vo_max, vo_min [V], overshoot,
        undershoot [V], overshoot_percent, undershoot_percent,
        settling_time [s] (time from the event until vo stays inside the band;
        0 if it never leaves it; None if it has not re-entered it by the end
        of the window), settled (bool), band, il_peak [A]}``.
    """
    events = _events(run)
    out = []
    for i, (t_ev, kind) in enumerate(events):
        tb = events[i + 1][0] if i + 1 < len(events) else run.t_end
        idx, ta_, tb_ = _pieces(run, t_ev, tb)
        if idx.shape[0] == 0:
            continue
        ref = _target(run, t_ev, tb)
        width = band * abs(ref)
        lo_b, hi_b = ref - width, ref + width
        # exact extrema only where the pieces' bounds can reach them or the band's edges
        v_lo, v_hi, sel, lo, hi = window_extrema(run, "vo", idx, ta_, tb_, band=(lo_b, hi_b))
        il_hi = window_extrema(run, "iL", idx, ta_, tb_)[1]
        # the pieces outside sel provably stay inside the band: the exit is among sel
        t_last = _settle_time(run, idx[sel], ta_[sel], tb_[sel], lo_b, hi_b, lo, hi)
        out.append(event_record(kind, t_ev, tb, ref, v_lo, v_hi, il_hi, band, t_last))
    return out


def event_record(kind, t_ev, tb, ref, vmin, vmax, il_peak, band, t_last) -> dict:
    """One event's metrics (keys as in :func:`transients`) from its extrema and the last
    instant ``t_last`` [s] outside the band (None: never left it); ``tb`` ends its window."""
    if t_last is None:          # never left the band
        settle, settled = 0.0, True
    elif t_last >= tb - 1e-15 * max(tb, 1.0):
        settle, settled = None, False   # still outside when the window ends
    else:
        settle, settled = t_last - t_ev, True
    return {
        "event": kind, "time": float(t_ev), "reference": float(ref),
        "vo_max": vmax, "vo_min": vmin,
        "overshoot": max(vmax - ref, 0.0), "undershoot": max(ref - vmin, 0.0),
        "overshoot_percent": 100 * max(vmax - ref, 0.0) / abs(ref) if ref else 0.0,
        "undershoot_percent": 100 * max(ref - vmin, 0.0) / abs(ref) if ref else 0.0,
        "settling_time": settle, "settled": settled, "band": band,
        "il_peak": float(il_peak),
    }
