"""The summary's text table (:meth:`bucksim.analysis.summary.Summary.table`)."""

from __future__ import annotations

from bucksim.analysis.gate_drive import GateDrive
from bucksim.model.input_parts import MAX_BANKS

DEVICE_ORDER = ("high_side", "high_side_body_diode", "low_side", "low_side_body_diode",
                "switch_node", "inductor", "output_capacitor", "supply", "input_capacitor",
                *(f"input_capacitor_{k}" for k in range(2, MAX_BANKS + 1)), "input_filter",
                "input_filter_damping")

#: A mean current below this share of the same current's RMS (its natural
#: scale: RMS >= |mean|) prints as 0. The exact integrals carry rounding of
#: ~1e-15 of the scale, which a periodic state turns into "9.6 fA" of
#: capacitor current; 1e-9 is far above that and far below any real offset.
MEAN_ROUNDING = 1e-9


def summary_table(summary) -> str:
    """A readable multi-line table of ``summary`` (a
    :class:`~bucksim.analysis.summary.Summary`) with engineering units."""
    from bucksim.model.units import format_si

    w, vo, il, p = summary.window, summary.output_voltage, summary.inductor_current, summary.power
    lines = [
        f"window        {format_si(w.start, 's')} .. {format_si(w.stop, 's')} "
        f"({w.cycles:.4g} cycles)",
        f"mode          {summary.conduction_mode.upper()}"
        + ("   inductor current reverses" if summary.reverse_current else "")
        + _pulse_text(summary.pulse_rate),
        f"output        mean {format_si(vo.mean, 'V')}   ripple {format_si(vo.ripple, 'V')} p-p"
        f"   [{format_si(vo.min, 'V')}, {format_si(vo.max, 'V')}]",
        f"inductor      mean {_mean_text(il.mean, il.rms, 'A')}   "
        f"rms {format_si(il.rms, 'A')}"
        f"   ripple {format_si(il.ripple, 'A')} p-p   [{format_si(il.min, 'A')}, "
        f"{format_si(il.max, 'A')}]",
        "",
        f"{'device':<22}{'rms':>12}{'mean':>12}{'conduction':>13}{'switching':>13}",
    ]
    for name in DEVICE_ORDER:
        if name not in summary.devices:
            continue
        v = summary.devices[name]
        lines.append(f"{name:<22}{format_si(v.rms, 'A'):>12}"
                     f"{_mean_text(v.mean, v.rms, 'A'):>12}"
                     f"{format_si(v.conduction_loss, 'W'):>13}"
                     f"{format_si(v.switching_loss, 'W'):>13}")
    if summary.switch_node is not None:
        sn = summary.switch_node
        lines += [f"switch node   Cn {format_si(sn.capacitance, 'F')} (charge-equivalent,"
                  f" 0 .. {format_si(sn.input_voltage, 'V')})",
                  f"              high side Qoss {format_si(sn.high_side_qoss, 'C')}, Eoss "
                  f"{format_si(sn.high_side_eoss, 'J')}   low side Qoss "
                  f"{format_si(sn.low_side_qoss, 'C')}, Eoss "
                  f"{format_si(sn.low_side_eoss, 'J')}"]
        for side, v in (("high", sn.high_side_turn_on), ("low", sn.low_side_turn_on)):
            if v is not None:
                lines.append(f"              {side} side turns on at node "
                             f"{format_si(v[1], 'V')} (min {format_si(v[0], 'V')}, "
                             f"max {format_si(v[2], 'V')})")
    inductor = summary.devices.get("inductor")
    if inductor is not None and inductor.core_loss is not None:
        lines.append(f"{'inductor core (iGSE)':<22}{'':>24}"
                     f"{format_si(inductor.core_loss, 'W'):>13}")
    if summary.input_voltage is not None:
        v, src = summary.input_voltage, summary.source_current
        lines += [f"input         cell mean {format_si(v.mean, 'V')}   ripple "
                  f"{format_si(v.ripple, 'V')} p-p   source current mean "
                  f"{format_si(src.mean, 'A')}, rms {format_si(src.rms, 'A')}"]
    if summary.gate_drive is not None:
        lines += _drive_lines(summary.gate_drive, format_si)
    lines += [
        "",
        f"power         in {format_si(p.input, 'W')}   out {format_si(p.output, 'W')}"
        f"   loss {format_si(p.loss, 'W')}"
        + ("" if p.source_loss is None else
           f"   (source resistance {format_si(p.source_loss, 'W')}, outside)")
        + ("" if p.bias is None else f"   bias rail {format_si(p.bias, 'W')} (in)"),
        f"efficiency    {100 * summary.efficiency:.3f} %",
        f"energy balance error {summary.energy_balance_error:.2e} (relative)",
    ]
    if summary.transients:
        lines += ["", _transient_table(summary.transients)]
    return "\n".join(lines)


def _pulse_text(rate) -> str:
    """The mode line's pulse rate, flagged in the audible band (below 20 kHz: common
    practice)."""
    from bucksim.model.units import format_si
    if rate is None:
        return ""
    return f"   pulses {format_si(rate, 'Hz')}" + ("  (audible band)" if rate < 20e3 else "")


def _mean_text(mean: float, rms: float, unit: str) -> str:
    """The mean for the table: 0 when it is rounding of its natural scale."""
    from bucksim.model.units import format_si

    return format_si(0.0 if abs(mean) <= MEAN_ROUNDING * abs(rms) else mean, unit)


def _drive_lines(g: GateDrive, format_si) -> list[str]:
    w = {k: format_si(getattr(g, k), "W") for k in ("driver", "resistors", "internal",
                                                     "regulator", "quiescent", "input", "bias")}
    return [f"gate drive    driver {w['driver']}   gate resistors {w['resistors']}   MOSFET "
            f"gates {w['internal']}   regulator {w['regulator']}   controller {w['quiescent']}",
            f"              rail: {g.supply}; drawn from the input {w['input']}"
            + (f", from the bias rail {w['bias']}" if g.supply == "bias" else "")]


def _transient_table(events) -> str:
    from bucksim.model.units import format_si

    lines = [f"{'event':<13}{'at':>10}{'vo max':>11}{'vo min':>11}{'over':>8}"
             f"{'under':>8}{'settles in':>12}{'iL peak':>10}"]
    for e in events:
        st = e.settling_time
        st = "not yet" if not e.settled else ("in band" if st == 0.0 else format_si(st, "s"))
        under = "" if e.event == "start-up" else f"{e.undershoot_percent:.2f}%"
        lines.append(f"{e.event:<13}{format_si(e.time, 's'):>10}"
                     f"{format_si(e.vo_max, 'V'):>11}{format_si(e.vo_min, 'V'):>11}"
                     f"{e.overshoot_percent:>7.2f}%{under:>8}{st:>12}"
                     f"{format_si(e.il_peak, 'A'):>10}")
    return "\n".join(lines)
