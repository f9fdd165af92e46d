"""Switching-event losses on top of ideal-switch waveforms.

The engine's switches are ideal; the energy of each commutation is added at
the instant it happens, with the exact inductor current there [1]_. Rules
(common practice [2]_), per transition between consecutive segments (``i`` =
iL at the instant, ``V`` = the voltage the switch node must swing):

============================  =========================================================
transition                    energy [J]
============================  =========================================================
high side turns on            gate ``Qg_hs Vg_hs`` (always);
  from low diode/low/idle     overlap ``0.5 Vin max(i, 0) t_rise_hs``;
  (hard)                      output capacitance ``0.5 (Coss_hs + Coss_ls) V^2``,
                              ``V = Vin`` (``Vin - vo`` from idle);
  from low diode              reverse recovery ``Qrr_ls Vin`` (diode forced off)
  from high body diode        none beyond gate (node already at Vin: soft)
high side turns off, i > 0    overlap ``0.5 Vin i t_fall_hs``
low side turns on             gate ``Qg_ls Vg_ls`` (always);
  from high body diode, or    overlap ``0.5 Vin |i| t_rise_ls``, output capacitance
  from high with i < 0        ``0.5 (Coss_hs + Coss_ls) Vin^2``, recovery ``Qrr_hs Vin``
  from idle                   output capacitance ``0.5 (Coss_hs + Coss_ls) vo^2``
low side turns off            none (the inductor current moves the node: soft)
============================  =========================================================

Energies are booked to the MOSFET that turns on or off, where they are
dissipated (reverse-recovery energy included: the recovering diode's charge
flows through the switch while it still holds the voltage). The energy is
drawn from the supply, so ``power.input`` and ``power.loss`` both include it
and the energy balance still closes.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 4 (switching loss, diode recovery, device
   capacitances).
.. [2] Overlap energy ``0.5 V I t`` per edge, ``0.5 C V^2`` per hard charge of a
   node capacitance, ``Qrr V`` per forced recovery, ``Qg Vg`` per gate charge:
   common practice.
"""

from __future__ import annotations

import numpy as np

from bucksim.model.parts import Mosfet
from bucksim.model.stage import HIGH, HIGH_DIODE, IDLE, LOW, LOW_DIODE

KINDS = ("overlap", "coss", "recovery", "gate")


def _zeros():
    return {k: 0.0 for k in KINDS}


def _conduction_before_start(scenario, il: float) -> int:
    """Conduction state just before t = 0, as if the run had been switching before.

    A run starts at a high-side turn-on; the state before it is the end of
    the previous period: the rising dead time (diode chosen by the sign of
    iL), the low-side channel in forced PWM without dead time, or idle.
    """
    sw = scenario.switching
    if sw.strategy == "forced-pwm" and sw.dead_time[1] == 0.0:
        return LOW
    if sw.strategy == "diode-emulation" and sw.dead_time[1] == 0.0 and il > 0:
        return LOW
    if il > 0:
        return LOW_DIODE
    if il < 0:
        return HIGH_DIODE
    return IDLE


def switching_energy(run, t_start: float, t_stop: float) -> dict:
    """Switching energy per device and kind over ``[t_start, t_stop)``.

    Returns
    -------
    dict
        ``{"high_side": {"overlap", "coss", "recovery", "gate"}, "low_side": {...},
        "events": {name: count}}``, energies in [J].
    """
    sc = run.scenario
    seg = run.segments
    hs, ls = sc.high_side, sc.low_side
    ls_fet = isinstance(ls, Mosfet)
    c_node = hs.coss + (ls.coss if ls_fet else 0.0)
    qrr_ls = ls.body_diode.qrr if ls_fet else ls.qrr
    qrr_hs = hs.body_diode.qrr

    k = np.nonzero((seg.t0 >= t_start) & (seg.t0 < t_stop))[0]
    prev = seg.conduction[np.maximum(k - 1, 0)].copy()
    if k.shape[0] and k[0] == 0:
        prev[0] = _conduction_before_start(sc, seg.x0[0, 0])
    cur = seg.conduction[k]
    changed = prev != cur
    k, prev, cur = k[changed], prev[changed], cur[changed]
    i = seg.x0[k, 0]
    z = np.column_stack([seg.x0[k], np.ones(k.shape[0])])
    systems = seg.system[k]
    vin = np.einsum("ij,ij->i", run.signal_table("vin")[systems], z)
    vo = np.einsum("ij,ij->i", run.signal_table("vo")[systems], z)

    out = {"high_side": _zeros(), "low_side": _zeros(), "events": {}}
    h, lo = out["high_side"], out["low_side"]

    hs_on = cur == HIGH
    hard_on = hs_on & np.isin(prev, (LOW_DIODE, LOW, IDLE))
    h["gate"] += hs.qg * hs.gate_voltage * np.count_nonzero(hs_on)
    h["overlap"] += np.sum(0.5 * vin[hard_on] * np.maximum(i[hard_on], 0.0)) * hs.rise_time
    swing = np.where(prev == IDLE, vin - vo, vin)
    h["coss"] += 0.5 * c_node * np.sum(swing[hard_on] ** 2)
    recover = hs_on & (prev == LOW_DIODE)
    h["recovery"] += qrr_ls * np.sum(vin[recover])

    hs_off = (prev == HIGH) & (cur != HIGH) & (i > 0)
    h["overlap"] += np.sum(0.5 * vin[hs_off] * i[hs_off]) * hs.fall_time

    n_ls_on = 0
    if ls_fet:
        ls_on = cur == LOW
        n_ls_on = np.count_nonzero(ls_on)
        lo["gate"] += ls.qg * ls.gate_voltage * n_ls_on
        hard = ls_on & ((prev == HIGH_DIODE) | ((prev == HIGH) & (i < 0)))
        lo["overlap"] += np.sum(0.5 * vin[hard] * np.abs(i[hard])) * ls.rise_time
        lo["coss"] += 0.5 * c_node * np.sum(vin[hard] ** 2)
        lo["recovery"] += qrr_hs * np.sum(vin[hard & (prev == HIGH_DIODE)])
        from_idle = ls_on & (prev == IDLE)
        lo["coss"] += 0.5 * c_node * np.sum(vo[from_idle] ** 2)
        out["events"]["low_side_hard_on"] = int(np.count_nonzero(hard))
    out["events"].update({
        "high_side_on": int(np.count_nonzero(hs_on)),
        "high_side_hard_on": int(np.count_nonzero(hard_on)),
        "high_side_hard_off": int(np.count_nonzero(hs_off)),
        "diode_recoveries": int(np.count_nonzero(recover)),
        "low_side_on": int(n_ls_on),
    })
    for dev in ("high_side", "low_side"):
        out[dev] = {kind: float(v) for kind, v in out[dev].items()}
    return out
