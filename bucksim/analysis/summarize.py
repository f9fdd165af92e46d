"""Summary metrics from stored waveforms, by exact per-segment integration.

Every metric is a linear or quadratic functional of the augmented state
``z = [iL, vC, 1]``, so it is a sum over segments of the exact moments
``int z dt`` and ``int z z^T dt`` (:mod:`bucksim.analysis.moments`: block
exponentials after Van Loan [1]_, taken about each system's equilibrium so
that rounding is relative to each moment's own size). RMS values, losses,
powers and the energy balance are therefore exact to rounding. Extrema are
located on the analytic solution (zeros of the derivative).

References
----------
.. [1] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Automatic Control 23(3), 395-404, 1978.
"""

from __future__ import annotations

import math

import numpy as np

from bucksim.analysis.extrema import extrema
from bucksim.analysis.moments import SegmentMoments
from bucksim.analysis.summary import Summary
from bucksim.analysis.switching import switching_energy
from bucksim.analysis.transients import transients as event_metrics
from bucksim.analysis.windows import window_pieces
from bucksim.model.stage import IDLE, current_reverses


def summarize(run, cycles: int | None = None) -> Summary:
    """Summary of ``run`` over its last ``cycles`` switching periods.

    Parameters
    ----------
    run : bucksim.Run
    cycles : int, optional
        Window width in periods; default ``scenario.run.summary_cycles``.
        Clipped to the simulated time.
    """
    sc = run.scenario
    stage = run.stage
    T = sc.period
    if run.status == 1 or not np.all(np.isfinite(run.segments.x0)):
        from bucksim.errors import SimulationError
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
    mom = SegmentMoments(run.table.matrices[:, keep][:, :, keep])
    m = keep.shape[0]
    n_sys = run.table.matrices.shape[0]
    S = np.zeros((n_sys, m, m))
    systems = run.segments.system[idx]
    for s, z0, d in zip(systems, z_a[:, keep], tau_b - tau_a):
        S[s] += mom.second(s, z0, d)
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

    il_min, il_max = extrema(run, "iL", idx, tau_a, tau_b)
    vo_min, vo_max = extrema(run, "vo", idx, tau_a, tau_b)
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
    # squares integrate to >= 0: clamp rounding of a current that is ~nothing
    e_dcr = stage.dcr * max(integral("iL", "iL"), 0.0)
    devices["inductor"] = {"rms": rms("iL"), "mean": mean("iL"),
                           "conduction_loss": e_dcr / width, "switching_loss": 0.0}
    e_esr = stage.esr * max(integral("ic", "ic"), 0.0)
    devices["output_capacitor"] = {"rms": rms("ic"), "mean": mean("ic"),
                                   "conduction_loss": e_esr / width, "switching_loss": 0.0}
    loss_total += e_dcr + e_esr
    if stage.rs > 0:
        e_rs = stage.rs * max(integral("iin", "iin"), 0.0)
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
        from bucksim.analysis.coreloss import core_loss
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
        "reverse_current": current_reverses(il_min, il_max),
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
