"""Summary metrics from stored waveforms, by exact per-segment integration.

Every metric is a linear or quadratic functional of the augmented state
``z = [iL, vC, 1]`` (``[iL, vC, vn, 1]`` with node capacitance), so it is a
sum over segments of the exact moments ``int z dt`` and ``int z z^T dt``
(:mod:`bucksim.analysis.moments`, taken about each segment's start state; their matrix
integrals, which Van Loan [1]_ writes as blocks of one exponential, by scaling and
squaring in :mod:`bucksim.analysis.drift_integrals`). RMS values, losses,
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

from bucksim.analysis.edges import node_transfers, node_voltage_at
from bucksim.analysis.edges_input import network_state_before
from bucksim.analysis.extrema import extrema
from bucksim.analysis.gate_drive import gate_drive_energy, gate_drive_record
from bucksim.analysis.moments import SegmentMoments
from bucksim.analysis.summary import (
    Device,
    FluxDensity,
    InductorCurrent,
    InputVoltage,
    OutputVoltage,
    Power,
    SourceCurrent,
    Summary,
    SwitchNode,
    Transient,
    Window,
)
from bucksim.analysis.switching import switching_energy
from bucksim.analysis.transients import transients as event_metrics
from bucksim.analysis.windows import window_pieces
from bucksim.model.capacitance import charge, energy
from bucksim.model.stage import HIGH, IDLE, LOW, OPEN, current_reverses, zero_current_states


def summarize(run, cycles: int | None = None) -> Summary:
    """Summary of ``run`` over its last ``cycles`` switching periods.

    Parameters
    ----------
    run : bucksim.Run
    cycles : int, optional
        Window width in periods; default ``scenario.run.summary_cycles``.
        Clipped to the simulated time.
    """
    t_start, t_stop, n_cyc = _window(run, cycles)
    width = t_stop - t_start
    idx, tau_a, tau_b, z_a = window_pieces(run, t_start)
    ig = WindowIntegrals(run, idx, tau_b - tau_a, z_a, width)
    devices, loss = _conduction(run.stage, ig, width)
    e_sw, e_ramps, node, drive, pulses = _switching(run, ig, devices, t_start, t_stop)
    loss += e_sw + e_ramps + node["high_side"] + node["low_side"]
    e_core = _core(run, devices, idx, tau_a, tau_b, width)
    loss += e_core
    # the gate drive beyond the MOSFETs' own share (in e_sw), and the controller
    loss += drive["driver"] + drive["resistors"] + drive["regulator"] + drive["quiescent"]
    # formula energies (overlap without ramps, recovery, core, what the gate drive
    # draws from the input) are added to both sides; the node's charge transfers and
    # the channels' ramps are circuit: their source energy is the supply's own
    e_formula = (float(np.sum(node["supply"])) + e_sw - drive["internal"] + e_core
                 + drive["input"])
    e_bias = drive["bias"]
    e_out = ig.integral("vo", "io")
    side = _input_side(run, ig, devices, (idx, tau_a, tau_b))
    if side is None:
        e_in = e_source = ig.integral("vin", "iin") + e_formula
        e_source_loss = 0.0
    else:
        loss += side["loss"]
        e_source_loss = side["source_loss"]
        e_source = ig.integral("vs", "isrc") + e_formula
        e_in = ig.integral("vterm", "isrc") + e_formula
    balance = _balance_error(run, t_start, e_source + e_bias, e_out, loss + e_source_loss)
    il_min, il_max = extrema(run, "iL", idx, tau_a, tau_b)
    vo_min, vo_max = extrema(run, "vo", idx, tau_a, tau_b)
    mode, dead_zero = _mode(run, idx, tau_b - tau_a)
    p_in, p_out, p_bias = e_in / width, e_out / width, e_bias / width
    bias = run.scenario.controller.driver_supply == "bias"
    return Summary(
        window=Window(start=t_start, stop=t_stop, cycles=n_cyc),
        conduction_mode=mode,
        zero_current_in_dead_time=dead_zero,
        reverse_current=current_reverses(il_min, il_max),
        output_voltage=OutputVoltage(mean=ig.mean("vo"), min=vo_min, max=vo_max,
                                     ripple=vo_max - vo_min),
        inductor_current=InductorCurrent(mean=ig.mean("iL"), rms=ig.rms("iL"), min=il_min,
                                         max=il_max, ripple=il_max - il_min),
        devices={name: _device(d) for name, d in devices.items()},
        power=Power(input=p_in, output=p_out, loss=loss / width,
                    source_loss=None if side is None else e_source_loss / width,
                    bias=p_bias if bias else None),
        efficiency=p_out / (p_in + p_bias) if p_in + p_bias > 0 else 0.0,
        energy_balance_error=float(balance),
        transients=tuple(Transient(**e) for e in event_metrics(run)),
        switch_node=_switch_node(run, t_stop, node),
        input_voltage=None if side is None else side["voltage"],
        source_current=None if side is None else side["current"],
        gate_drive=gate_drive_record(run.scenario, drive, width),
        pulse_rate=pulses / width,
        strategy=run.scenario.switching.strategy,
    )


def _switch_node(run, t: float, node: dict) -> SwitchNode | None:
    """Qoss and Eoss of each device at the input voltage in force at ``t``, and the
    node voltage each channel closed on at its turn-ons (``node``: the window's
    :func:`~bucksim.analysis.edges.node_transfers`)."""
    stage = run.stage
    if not stage.node:
        return None
    curve = stage.curves[stage.level_at(t)]
    v = curve.vin
    return SwitchNode(input_voltage=v, capacitance=curve.equivalent(),
                      high_side_qoss=float(charge(curve.high, v)),
                      high_side_eoss=float(energy(curve.high, v)),
                      low_side_qoss=float(charge(curve.low, v)),
                      low_side_eoss=float(energy(curve.low, v)),
                      high_side_turn_on=_turn_on_node(run, node, HIGH),
                      low_side_turn_on=_turn_on_node(run, node, LOW))


def _turn_on_node(run, node: dict, channel: int) -> tuple[float, float, float] | None:
    """``(min, mean, max)`` [V] of the node just before each turn-on of ``channel``
    (a piece of it that starts a segment after one in another state), or None."""
    seg = run.segments
    idx = node["index"]
    starts = (node["conduction"] == channel) & (idx > 0) & (node["t"] == seg.t0[idx])
    starts &= seg.conduction[np.maximum(idx - 1, 0)] != channel
    v = node["v_from"][starts]
    if v.size == 0:
        return None
    return float(v.min()), float(v.mean()), float(v.max())


def _mode(run, idx, lengths):
    """``(mode, zero current in a dead time)`` over the window's pieces.

    ``"dcm"`` only where the stage blocks the current's reversal and idles
    (diode emulation, asynchronous): a piece that starts at exactly zero
    current after a zero-current event (the engine sets ``iL = 0`` there), in
    ``IDLE`` or, with node capacitance, ``OPEN``. In forced PWM the same
    happens only inside a dead time (a body diode stops conducting); that is
    the flag, and the mode stays ``"ccm"``.
    """
    seg = run.segments
    cond = seg.conduction[idx]
    prev = seg.conduction[np.maximum(idx - 1, 0)]
    stopped = np.isin(prev, sorted(zero_current_states(run.scenario.switching.strategy)))
    idles = np.isin(cond, (IDLE, OPEN)) & (seg.x0[idx, 0] == 0.0) & (lengths > 0)
    idles &= (cond == IDLE) | stopped
    if run.scenario.switching.strategy == "forced-pwm":
        return "ccm", bool(np.any(idles))
    return ("dcm" if bool(np.any(idles)) else "ccm"), False


def _window(run, cycles):
    """``(t_start, t_stop, cycles)`` of the window; refuses a diverged run."""
    sc = run.scenario
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
    n_cyc = (t_stop - t_start) / T
    if abs(n_cyc - round(n_cyc)) < 1e-6:
        n_cyc = int(round(n_cyc))
    return t_start, t_stop, n_cyc


class WindowIntegrals:
    """Exact integrals of signals and their products over the window's pieces.

    Every power signal lives on the plant block ``[iL, vC, (vn,) 1]``, a block the controller states
    of an analog loop do not feed within a segment: that block alone is
    integrated, one second-moment matrix per system summed over its pieces.
    """

    def __init__(self, run, idx, lengths, z_a, width):
        self.run, self.width = run, width
        self.keep = keep = run.stage.plant_index
        mom = SegmentMoments(run.table.matrices[:, keep][:, :, keep])
        systems = run.segments.system[idx]
        self.S = mom.second_sums(systems, z_a[:, keep], lengths, run.table.matrices.shape[0],
                                 time_scale=float(run.segments.t0[idx[-1]]) if idx.size else 0.0)
        self.used = np.unique(systems)

    def integral(self, a: str, b: str | None = None) -> float:
        """int a(t) b(t) dt over the window (b = 1 when omitted)."""
        keep, S = self.keep, self.S
        ca = self.run.signal_table(a)[:, keep]
        if b is None:
            return float(sum(ca[s] @ S[s][:, -1] for s in self.used))
        cb = self.run.signal_table(b)[:, keep]
        return float(sum(ca[s] @ S[s] @ cb[s] for s in self.used))

    def square(self, name: str) -> float:
        """int name(t)^2 dt, clamped at 0: a rounding-level negative value of a
        current that is ~nothing must not read as a device that supplies power."""
        return max(self.integral(name, name), 0.0)

    def rms(self, name: str) -> float:
        """RMS over the window."""
        return math.sqrt(self.square(name) / self.width)

    def mean(self, name: str) -> float:
        """Mean over the window."""
        return self.integral(name) / self.width


def _conduction(stage, ig, width):
    """Per device: RMS, mean and conduction loss; and the total conduction energy [J].

    The energies are added in a fixed grouping (switches one by one, then DCR
    and ESR together, then the supply), so the total is the same float every time.
    """
    devices = {}

    def add(name, signal, energy):
        devices[name] = {"rms": ig.rms(signal), "mean": ig.mean(signal),
                         "conduction_loss": energy / width, "switching_loss": 0.0}
        return energy

    total = 0.0
    for name, r, vf in stage.device_models():
        total += add(name, name, r * ig.square(name) + vf * ig.integral(name))
    e_dcr = add("inductor", "iL", stage.dcr * ig.square("iL"))
    e_esr = add("output_capacitor", "ic", stage.esr * ig.square("ic"))
    total += e_dcr + e_esr
    if stage.rs > 0 and stage.net is None:
        total += add("supply", "iin", stage.rs * ig.square("iin"))
    return devices, total


def _input_side(run, ig, devices, pieces):
    """The input network's devices (added to ``devices``), their loss [J], the
    source resistance's loss [J], and the cell voltage (its extrema over the
    window's ``pieces``) and source current records; None without an input capacitor."""
    net, width = run.stage.net, ig.width
    if net is None:
        return None
    total = 0.0
    for name, signal, r in net.losses:
        energy = r * ig.square(signal)
        total += energy
        if name in devices:         # the filter's parallel resistor joins its inductor
            devices[name]["conduction_loss"] += energy / width
            continue
        devices[name] = {"rms": ig.rms(signal), "mean": ig.mean(signal),
                         "conduction_loss": energy / width, "switching_loss": 0.0}
    lo, hi = extrema(run, "vin", *pieces)
    return {"loss": total, "source_loss": net.source_resistance * ig.square("isrc"),
            "voltage": InputVoltage(mean=ig.mean("vin"), min=lo, max=hi, ripple=hi - lo),
            "current": SourceCurrent(mean=ig.mean("isrc"), rms=ig.rms("isrc"))}



def _switching(run, ig, devices, t_start, t_stop):
    """Switching energies booked to the two switches: the formula kinds (drawn from
    the supply, dissipated in the switch), the channels' current ramps (``overlap``,
    circuit: ``int v_ds i_ch dt`` over the ramps, :mod:`bucksim.model.stage_ramps`)
    and the node's charge transfers (``coss``, from
    :func:`~bucksim.analysis.edges.node_transfers`; none without node capacitance).
    Returns the formula kinds' total [J], the ramps' [J], the transfers, the gate
    drive's energies (:func:`~bucksim.analysis.gate_drive.gate_drive_energy`) and the
    high side's turn-ons."""
    width = t_stop - t_start
    sw = switching_energy(run, t_start, t_stop)
    drive = gate_drive_energy(run.scenario, run.stage, sw["turn_ons"], t_start, t_stop)
    node = node_transfers(run, t_start)
    total = ramps = 0.0
    for name, index in (("high_side", run.stage.i_hs), ("low_side", run.stage.i_ls)):
        parts = sw[name]
        energy = sum(parts.values())
        total += energy
        if index >= 0:      # (switching_energy books no overlap formula for it)
            ramp = ig.integral(f"{name}_ramp_voltage", f"{name}_ramp")
            parts["overlap"] += ramp
            energy += ramp
            ramps += ramp
        parts["coss"] = node[name]      # 0 without node capacitance
        energy += node[name]
        devices[name]["switching_loss"] = energy / width
        devices[name]["switching"] = {kind: e / width for kind, e in parts.items()}
    return total, ramps, node, drive, sw["events"]["high_side_on"]


def _core(run, devices, idx, tau_a, tau_b, width):
    """Core loss (iGSE): like switching energy, drawn from the supply on top of the
    ideal-inductor waveforms. Returns its energy [J] (0 without core data)."""
    if run.scenario.inductor.core is None:
        return 0.0
    from bucksim.analysis.coreloss import core_loss
    core = core_loss(run, idx, tau_a, tau_b)
    devices["inductor"]["core_loss"] = core["power"]
    devices["inductor"]["flux_density"] = {"peak": core["peak_b"], "ripple": core["delta_b"]}
    return core["power"] * width


def _balance_error(run, t_start, e_in, e_out, loss):
    """Relative residual of ``E_in = E_out + E_loss + dE_stored`` over the window."""
    stage = run.stage
    x_a = network_state_before(run, t_start, run.at([t_start])[0])
    x_b = run.x_end
    e_a = stage.stored_energy(x_a, node_voltage_at(run, t_start), stage.level_at(t_start))
    e_b = stage.stored_energy(x_b, node_voltage_at(run, run.t_end), stage.level_at(run.t_end))
    d_stored = e_b - e_a
    residual = e_in - e_out - loss - d_stored
    # the stored energy sets the rounding floor: an idle, unloaded stage moves
    # almost no energy, and its residual is rounding of the stored energy
    ref = max(abs(e_in), abs(e_out) + abs(loss) + abs(d_stored), e_a, e_b)
    return abs(residual) / ref if ref > 0 else 0.0


def _device(d: dict) -> Device:
    flux = d.get("flux_density")
    return Device(rms=d["rms"], mean=d["mean"], conduction_loss=d["conduction_loss"],
                  switching_loss=d["switching_loss"], switching=d.get("switching"),
                  core_loss=d.get("core_loss"),
                  flux_density=None if flux is None else FluxDensity(**flux))
