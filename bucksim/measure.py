"""Summary metrics from stored waveforms, by exact per-segment integration.

Every metric is a linear or quadratic functional of the augmented state
``z = [iL, vC, 1]``. Over one segment of system ``M`` and length ``d``

.. math::

    \\int_0^d z z^T\\,dt = \\mathrm{unvec}\\Big(\\int_0^d e^{(M \\oplus M)t}\\,dt
    \\;(z_0 \\otimes z_0)\\Big),

and the integral of the matrix exponential of the Kronecker sum is the
upper-right block of ``expm([[M+M, I], [0, 0]] d)`` (Van Loan [1]_). Mean
values come from the last column of the same matrix (``z`` ends in 1), so
RMS values, losses, powers and the energy balance are exact to rounding.
Extrema are located on the analytic solution (zeros of the derivative).

References
----------
.. [1] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Automatic Control 23(3), 395-404, 1978.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.linalg import expm

from .engine.kernels import evaluate
from .losses import switching_energy
from .stage import HIGH_DIODE, IDLE, LOW, LOW_DIODE
from .summary import Summary

_SAMPLES_PER_PIECE = 9
#: Cap on samples per piece: pieces ringing more than ~10 times within one
#: segment (filter resonance far above the switching frequency) can still
#: hide turning points between samples.
_MAX_SAMPLES_PER_PIECE = 257


class SecondMoments:
    """Memoised ``Q(s, d) = int_0^d expm((M_s (+) M_s) t) dt`` per system and length."""

    def __init__(self, matrices: np.ndarray):
        self.matrices = matrices
        self.m = matrices.shape[1]
        self._cache: dict[tuple[int, float], np.ndarray] = {}

    def q(self, s: int, d: float) -> np.ndarray:
        key = (int(s), float(d))
        hit = self._cache.get(key)
        if hit is None:
            m = self.m
            M = self.matrices[s]
            eye = np.eye(m)
            ksum = np.kron(M, eye) + np.kron(eye, M)
            big = np.zeros((2 * m * m, 2 * m * m))
            big[: m * m, : m * m] = ksum
            big[: m * m, m * m:] = np.eye(m * m)
            hit = expm(big * d)[: m * m, m * m:]
            self._cache[key] = hit
        return hit

    def moments(self, s: int, z0: np.ndarray, d: float) -> np.ndarray:
        """``int z z^T dt`` over a segment of length ``d`` starting at ``z0``."""
        return (self.q(s, d) @ np.kron(z0, z0)).reshape(self.m, self.m)


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

    Per piece ``int z dt = G(d) z_a`` with ``G(d) = int_0^d expm(M t) dt``,
    the upper-right block of ``expm([[M, I], [0, 0]] d)`` (Van Loan).
    """
    seg = run.segments
    t_start = float(seg.t0[0]) if t_start is None else float(t_start)
    t_stop = run.t_end if t_stop is None else float(t_stop)
    idx, tau_a, tau_b, z_a = window_pieces(run, t_start)
    end = seg.t0[idx] + tau_b
    tau_b = np.where(end > t_stop, t_stop - seg.t0[idx], tau_b)
    sig = run.signal_table(name)
    m = run.stage.n + 1
    total, cache = 0.0, {}
    for k, a, b, za in zip(idx, tau_a, tau_b, z_a):
        if b <= a:
            continue
        s = int(seg.system[k])
        key = (s, float(b - a))
        if key not in cache:
            big = np.zeros((2 * m, 2 * m))
            big[:m, :m] = run.table.matrices[s]
            big[:m, m:] = np.eye(m)
            cache[key] = expm(big * (b - a))[:m, m:]
        total += float(sig[s] @ (cache[key] @ za))
    return total / (t_stop - t_start)


def _extrema(run, name, idx, tau_a, tau_b):
    """Exact min and max of a signal over the window pieces."""
    lo, hi = piece_extrema(run, name, idx, tau_a, tau_b)
    return float(lo.min()), float(hi.max())


def piece_extrema(run, name, idx, tau_a, tau_b):
    """Exact min and max of a signal on each piece (arrays, one entry per piece).

    Samples each piece no coarser than the engine's guard (a quarter of the
    fastest time constant, so two turning points cannot hide between
    samples) up to :data:`_MAX_SAMPLES_PER_PIECE` samples, then
    refines every sign change of the analytic derivative by bisection on the
    exact solution (60 halvings: to the resolution of double precision).
    """
    dur = tau_b - tau_a
    guard = run.table.guard
    need = np.clip(np.ceil(dur / guard), _SAMPLES_PER_PIECE - 1, _MAX_SAMPLES_PER_PIECE - 1)
    need = need.astype(np.int64)
    bins = (2 ** np.ceil(np.log2(np.maximum(need, 1))).astype(np.int64)) + 1
    lo = np.empty(idx.shape[0])
    hi = np.empty(idx.shape[0])
    for ns in np.unique(bins):
        sel = np.nonzero(bins == ns)[0]
        per_call = max(1, int(2_000_000 // ns))   # bounds the sample arrays' memory
        for start in range(0, sel.shape[0], per_call):
            part = sel[start:start + per_call]
            lo[part], hi[part] = _extrema_sampled(run, name, idx[part], tau_a[part],
                                                  tau_b[part], int(ns))
    return lo, hi


def _extrema_sampled(run, name, idx, tau_a, tau_b, ns):
    seg = run.segments
    table = run.table
    sig = run.signal_table(name)
    frac = np.linspace(0.0, 1.0, ns)
    taus = tau_a[:, None] + (tau_b - tau_a)[:, None] * frac[None, :]
    rep = np.repeat(idx, ns)
    z = np.empty((rep.shape[0], run.stage.n + 1))
    evaluate(table.matrices, table.exponentials, table.steps, seg.system, seg.x0,
             rep.astype(np.int64), taus.ravel(), z)
    systems = seg.system[rep]
    c = sig[systems]
    val = np.einsum("ij,ij->i", c, z)
    if name == "iL":
        # event-terminated segments end at iL = 0 exactly; the stored end time
        # is rounded to the spacing of absolute time, which can put the
        # evaluated end a few 1e-12 A past zero: the conduction state fixes
        # the sign, so clamp to it
        cond = seg.conduction[rep]
        val = np.where(cond == LOW_DIODE, np.maximum(val, 0.0), val)
        val = np.where(cond == HIGH_DIODE, np.minimum(val, 0.0), val)
        if run.scenario.switching.strategy == "diode-emulation":
            val = np.where(cond == LOW, np.maximum(val, 0.0), val)
    val = val.reshape(-1, ns)
    cm = np.einsum("ij,ijk->ik", c, table.matrices[systems])  # c^T M per sample
    der = np.einsum("ij,ij->i", cm, z).reshape(-1, ns)
    lo, hi = val.min(axis=1), val.max(axis=1)
    flips = np.argwhere(der[:, :-1] * der[:, 1:] < 0)
    if flips.shape[0]:
        # bisection on the sign of the analytic derivative, all flips at once
        p, q = flips[:, 0], flips[:, 1]
        k = idx[p].astype(np.int64)
        cM_k = cm.reshape(-1, ns, cm.shape[1])[p, q]
        a, b = taus[p, q].copy(), taus[p, q + 1].copy()
        sa = der[p, q]
        zt = np.empty((k.shape[0], run.stage.n + 1))
        for _ in range(60):
            mid = 0.5 * (a + b)
            evaluate(table.matrices, table.exponentials, table.steps, seg.system, seg.x0,
                     k, mid, zt)
            dm = np.einsum("ij,ij->i", cM_k, zt)
            same = np.sign(dm) == np.sign(sa)
            a = np.where(same, mid, a)
            b = np.where(same, b, mid)
        evaluate(table.matrices, table.exponentials, table.steps, seg.system, seg.x0,
                 k, 0.5 * (a + b), zt)
        v = np.einsum("ij,ij->i", sig[seg.system[k]], zt)
        np.minimum.at(lo, p, v)
        np.maximum.at(hi, p, v)
    return lo, hi


def summarize(run, cycles: int | None = None) -> Summary:
    """Summary of ``run`` over its last ``cycles`` switching periods.

    Parameters
    ----------
    run : bucksim.Run
    cycles : int, optional
        Window width in periods; default ``scenario.run.summary_cycles``.
        Clipped to the simulated time.
    """
    from .transients import transients as event_metrics  # it builds on this module

    sc = run.scenario
    stage = run.stage
    T = sc.period
    if run.status == 1 or not np.all(np.isfinite(run.segments.x0)):
        from .errors import SimulationError
        raise SimulationError(f"{sc.source or sc.title}: {run.message}; no summary of a "
                              f"diverged run (its segments are kept in run.segments)")
    cycles = sc.run.summary_cycles if cycles is None else int(cycles)
    if cycles < 1:
        raise ValueError(f"cycles must be >= 1, got {cycles}")
    t_stop = run.t_end
    t_start = max(float(run.segments.t0[0]), t_stop - cycles * T)
    width = t_stop - t_start
    n_cyc = width / T
    if abs(n_cyc - round(n_cyc)) < 1e-6:
        n_cyc = int(round(n_cyc))
    idx, tau_a, tau_b, z_a = window_pieces(run, t_start)

    # every power signal lives on [iL, vC, 1], a block the controller states of an
    # analog loop do not feed within a segment: integrate that block alone
    keep = stage.plant_index
    mom = SecondMoments(run.table.matrices[:, keep][:, :, keep])
    m = keep.shape[0]
    n_sys = run.table.matrices.shape[0]
    S = np.zeros((n_sys, m, m))
    systems = run.segments.system[idx]
    for s, z0, d in zip(systems, z_a[:, keep], tau_b - tau_a):
        S[s] += mom.moments(s, z0, d)
    used = np.unique(systems)

    def integral(a: str, b: str | None = None) -> float:
        """int a(t) b(t) dt over the window (b = 1 when omitted)."""
        ca = run.signal_table(a)[:, keep]
        if b is None:
            return float(sum(ca[s] @ S[s][:, -1] for s in used))
        cb = run.signal_table(b)[:, keep]
        return float(sum(ca[s] @ S[s] @ cb[s] for s in used))

    def rms(name):
        return math.sqrt(max(integral(name, name), 0.0) / width)

    def mean(name):
        return integral(name) / width

    il_min, il_max = _extrema(run, "iL", idx, tau_a, tau_b)
    vo_min, vo_max = _extrema(run, "vo", idx, tau_a, tau_b)
    scale = max(abs(il_min), abs(il_max), 1e-300)
    idle = run.segments.conduction[idx] == IDLE

    devices = {}
    loss_total = 0.0
    for name, r, vf in stage.device_models():
        # the integral of a square is >= 0; a rounding-level negative value of a
        # device that carries ~nothing must not read as a device that supplies power
        e = r * max(integral(name, name), 0.0) + vf * integral(name)
        devices[name] = {"rms": rms(name), "mean": mean(name),
                         "conduction_loss": e / width, "switching_loss": 0.0}
        loss_total += e
    e_dcr = stage.dcr * integral("iL", "iL")
    devices["inductor"] = {"rms": rms("iL"), "mean": mean("iL"),
                           "conduction_loss": e_dcr / width, "switching_loss": 0.0}
    e_esr = stage.esr * integral("ic", "ic")
    devices["output_capacitor"] = {"rms": rms("ic"), "mean": mean("ic"),
                                   "conduction_loss": e_esr / width, "switching_loss": 0.0}
    loss_total += e_dcr + e_esr
    if stage.rs > 0:
        e_rs = stage.rs * integral("iin", "iin")
        devices["supply"] = {"rms": rms("iin"), "mean": mean("iin"),
                             "conduction_loss": e_rs / width, "switching_loss": 0.0}
        loss_total += e_rs

    # switching events: energy drawn from the supply and dissipated in the switch
    sw = switching_energy(run, t_start, t_stop)
    e_sw = 0.0
    for name in ("high_side", "low_side"):
        parts = sw[name]
        total = sum(parts.values())
        devices[name]["switching_loss"] = total / width
        devices[name]["switching"] = {kind: e / width for kind, e in parts.items()}
        e_sw += total
    loss_total += e_sw

    # core loss (iGSE) is, like switching energy, drawn from the supply on top
    # of the ideal-inductor waveforms
    e_core = 0.0
    if sc.inductor.core is not None:
        from .coreloss import core_loss
        core = core_loss(run, idx, tau_a, tau_b)
        devices["inductor"]["core_loss"] = core["power"]
        devices["inductor"]["flux_density"] = {"peak": core["peak_b"], "ripple": core["delta_b"]}
        e_core = core["power"] * width
    loss_total += e_core

    e_in = integral("vin", "iin") + e_sw + e_core
    e_out = integral("vo", "io")
    x_a = run.at([t_start])[0]
    x_b = run.x_end
    d_stored = stage.stored_energy(x_b) - stage.stored_energy(x_a)
    residual = e_in - e_out - loss_total - d_stored
    # the stored energy sets the rounding floor: an idle, unloaded stage moves
    # almost no energy, and its residual is rounding of the stored energy
    ref = max(abs(e_in), abs(e_out) + abs(loss_total) + abs(d_stored),
              stage.stored_energy(x_a), stage.stored_energy(x_b))
    balance = abs(residual) / ref if ref > 0 else 0.0
    p_in, p_out = e_in / width, e_out / width
    return Summary({
        "window": {"start": t_start, "stop": t_stop, "cycles": n_cyc},
        "mode": "dcm" if bool(np.any(idle & (tau_b - tau_a > 0))) else "ccm",
        "reverse_current": bool(il_min < -1e-12 * scale),
        "output_voltage": {"mean": mean("vo"), "min": vo_min, "max": vo_max,
                           "ripple": vo_max - vo_min},
        "inductor_current": {"mean": mean("iL"), "rms": rms("iL"), "min": il_min,
                             "max": il_max, "ripple": il_max - il_min},
        "devices": devices,
        "power": {"input": p_in, "output": p_out, "loss": loss_total / width},
        "efficiency": p_out / p_in if p_in > 0 else 0.0,
        "energy_balance_error": float(balance),
        "transients": event_metrics(run),
    })
