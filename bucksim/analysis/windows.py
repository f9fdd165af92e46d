"""Windows of a run: its segments clipped to a time span, and exact means over them."""

from __future__ import annotations

import numpy as np

from bucksim.analysis.moments import SegmentMoments


def window_pieces(run, t_start: float):
    """Segments clipped to ``[t_start, t_end]``: (segment index, tau_a, tau_b, z_a)."""
    seg = run.segments
    first = int(np.searchsorted(seg.t0, t_start, side="right") - 1)
    first = max(first, 0)
    idx = np.arange(first, len(seg))
    tau_a = np.zeros(idx.shape[0])
    tau_a[0] = max(0.0, t_start - seg.t0[first])
    tau_b = seg.dt[idx].copy()
    keep = tau_b - tau_a > 0
    idx, tau_a, tau_b = idx[keep], tau_a[keep], tau_b[keep]
    z_a = np.empty((idx.shape[0], run.stage.n + 1))
    z_a[:, : run.stage.n] = seg.x0[idx]
    z_a[:, -1] = 1.0
    if idx.shape[0] and tau_a[0] > 0:
        z_a[0] = run.augmented_at([seg.t0[idx[0]] + tau_a[0]])[0][0]
    return idx, tau_a, tau_b, z_a


def signal_mean(run, name: str, t_start: float | None = None,
                t_stop: float | None = None) -> float:
    """Exact mean of a signal over ``[t_start, t_stop]`` [the signal's unit].

    Per piece ``int z dt`` exactly (:meth:`bucksim.analysis.moments.SegmentMoments.first`).
    """
    seg = run.segments
    t_start = float(seg.t0[0]) if t_start is None else float(t_start)
    t_stop = run.t_end if t_stop is None else float(t_stop)
    idx, tau_a, tau_b, z_a = window_pieces(run, t_start)
    end = seg.t0[idx] + tau_b
    tau_b = np.where(end > t_stop, t_stop - seg.t0[idx], tau_b)
    sig = run.signal_table(name)
    mom = SegmentMoments(run.table.matrices)
    total = 0.0
    for k, a, b, za in zip(idx, tau_a, tau_b, z_a, strict=True):
        if b <= a:
            continue
        s = int(seg.system[k])
        total += float(sig[s] @ mom.first(s, za, b - a))
    return total / (t_stop - t_start)
