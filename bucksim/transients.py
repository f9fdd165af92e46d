"""Transient metrics per event: start-up, load steps, supply steps.

For each event the window runs from the event to the next one (or the end
of the run). Extremes are exact (zeros of the analytic derivative); the time
to re-enter the settling band is the last instant the output voltage leaves
``reference (1 +- band)``, found with brentq on the exact solution.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import brentq

from .measure import piece_extrema, signal_mean

DEFAULT_BAND = 0.01


def _pieces(run, ta, tb):
    seg = run.segments
    end = seg.t0 + seg.dt
    idx = np.nonzero((end > ta) & (seg.t0 < tb))[0]
    tau_a = np.maximum(ta - seg.t0[idx], 0.0)
    tau_b = np.minimum(tb, end[idx]) - seg.t0[idx]
    keep = tau_b > tau_a
    return idx[keep], tau_a[keep], tau_b[keep]


def _events(run):
    sc = run.scenario
    out = [(0.0, "start-up")]
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


def _settle_time(run, idx, tau_a, tau_b, lo_b, hi_b, lo, hi):
    """Last time vo is outside [lo_b, hi_b] (None if it never is), in absolute time."""
    outside = np.nonzero((lo < lo_b) | (hi > hi_b))[0]
    if outside.shape[0] == 0:
        return None
    p = outside[-1]
    k = idx[p]
    t0 = run.segments.t0[k]
    ts = np.linspace(t0 + tau_a[p], t0 + tau_b[p], 65)
    v = run.at(ts, "vo")
    bad = np.nonzero((v < lo_b) | (v > hi_b))[0]
    if bad.shape[0] == 0:  # excursion between samples: take the piece's end
        return float(ts[-1])
    j = bad[-1]
    if j == ts.shape[0] - 1:
        return float(ts[-1])
    bound = hi_b if v[j] > hi_b else lo_b
    return float(brentq(lambda t: run.at([t], "vo")[0] - bound, ts[j], ts[j + 1],
                        xtol=1e-15, rtol=4 * np.finfo(float).eps))


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
        lo, hi = piece_extrema(run, "vo", idx, ta_, tb_)
        _, il_hi = piece_extrema(run, "iL", idx, ta_, tb_)
        width = band * abs(ref)
        lo_b, hi_b = ref - width, ref + width
        t_last = _settle_time(run, idx, ta_, tb_, lo_b, hi_b, lo, hi)
        if t_last is None:          # never left the band
            settle, settled = 0.0, True
        elif t_last >= tb - 1e-15 * max(tb, 1.0):
            settle, settled = None, False   # still outside when the window ends
        else:
            settle, settled = t_last - t_ev, True
        vmax, vmin = float(hi.max()), float(lo.min())
        out.append({
            "event": kind, "time": float(t_ev), "reference": float(ref),
            "vo_max": vmax, "vo_min": vmin,
            "overshoot": max(vmax - ref, 0.0), "undershoot": max(ref - vmin, 0.0),
            "overshoot_percent": 100 * max(vmax - ref, 0.0) / abs(ref) if ref else 0.0,
            "undershoot_percent": 100 * max(ref - vmin, 0.0) / abs(ref) if ref else 0.0,
            "settling_time": settle, "settled": settled, "band": band,
            "il_peak": float(il_hi.max()),
        })
    return out
