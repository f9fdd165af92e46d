"""Switching-event energies that are still formulas, at the exact currents.

With node capacitance (``coss``/``cj`` > 0) the switch node is part of the
circuit (:mod:`bucksim.model.stage`): its swings, ZVS or partial ZVS, the
DCM ring and the charge each closing channel moves are in the waveforms, and
:mod:`bucksim.analysis.edges` books that charge's energy (the ``coss`` kind)
from the integrals. What remains a formula is added here at the instant of
each commutation, with the exact inductor current there [1]_ (common
practice [2]_; ``i`` = iL at the instant):

============================  =========================================================
transition                    energy [J]
============================  =========================================================
high side turns on            gate ``Qg_hs Vg_hs`` (always; the MOSFET's share);
  from low diode/low/open     overlap ``0.5 Vin max(i, 0) t_rise_hs``;
  (hard)                      reverse recovery ``Q Vin`` of the low-side diode's charge
high side turns off, i > 0    overlap: the channel's current ramp against the node
                              capacitance, ``I^2 t_f^2 / (24 Cn)`` at low current,
                              ``-> 0.5 Vin i t_fall_hs`` at high current
                              (:func:`~bucksim.analysis.edges.snubbed_turn_off`)
low side turns on             gate ``Qg_ls Vg_ls`` (always; the MOSFET's share);
  from high body diode, or    overlap ``0.5 Vin |i| t_rise_ls``, recovery ``Q Vin`` of
  from high with i < 0        the high-side body diode's charge
============================  =========================================================

The recovered charge ``Q`` is a fixed ``qrr`` per forced recovery, or with a
lifetime ``tau`` the charge-control model's stored charge at that instant
(:mod:`bucksim.analysis.recovery`). The ``coss`` kind is never a formula: it
is the node's charge from the circuit (:mod:`bucksim.analysis.summarize` fills
it from :func:`~bucksim.analysis.edges.node_transfers`), zero without node
capacitance.

Energies are booked to the MOSFET that turns on or off, where they are
dissipated (reverse-recovery energy included: the recovering diode's charge
flows through the switch while it still holds the voltage). The formula
energies are drawn from the supply, so ``power.input`` and ``power.loss``
both include them; the energy balance cannot see them (it certifies the
circuit's energies only, the node's charge included).

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

from bucksim.analysis.edges import snubbed_turn_off
from bucksim.analysis.gate_drive import loop_shares
from bucksim.analysis.recovery import conduction_before_start, recovered_charges
from bucksim.model.parts import Mosfet
from bucksim.model.stage import HIGH, HIGH_DIODE, IDLE, LOW, LOW_DIODE, OPEN

KINDS = ("overlap", "coss", "recovery", "gate")


def _zeros():
    return {k: 0.0 for k in KINDS}


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

    k = np.nonzero((seg.t0 >= t_start) & (seg.t0 < t_stop))[0]
    prev = seg.conduction[np.maximum(k - 1, 0)].copy()
    if k.shape[0] and k[0] == 0:
        prev[0] = conduction_before_start(sc, seg.x0[0, 0])
    cur = seg.conduction[k]
    changed = prev != cur
    k, prev, cur = k[changed], prev[changed], cur[changed]
    i = seg.x0[k, 0]
    z = np.column_stack([seg.x0[k], np.ones(k.shape[0])])
    systems = seg.system[k]
    vin = np.einsum("ij,ij->i", run.signal_table("vin")[systems], z)

    out = {"high_side": _zeros(), "low_side": _zeros(), "events": {}}
    h, lo = out["high_side"], out["low_side"]

    hs_on = cur == HIGH
    hard_on = hs_on & np.isin(prev, (LOW_DIODE, LOW, IDLE, OPEN))
    # the gate loop's share in the MOSFET's own gate resistance (analysis.gate_drive)
    r_drv = sc.controller.driver_resistance
    h["gate"] += hs.qg * hs.gate_voltage * np.count_nonzero(hs_on) * loop_shares(hs, r_drv)[2]
    # a switch whose ramps are circuit states (model.stage_ramps) has its overlap from
    # the waveforms (analysis.summarize), not from these formulas
    hs_formula = run.stage.i_hs < 0
    ls_formula = run.stage.i_ls < 0
    if hs_formula:
        h["overlap"] += np.sum(0.5 * vin[hard_on] * np.maximum(i[hard_on], 0.0)) * hs.rise_time
    recover = hs_on & (prev == LOW_DIODE)
    rec = recovered_charges(run, t_start, t_stop)
    h["recovery"] += float(np.sum(rec["low_side"]["charges"] * rec["low_side"]["vin"]))

    hs_off = (prev == HIGH) & (cur != HIGH) & (i > 0)
    # the node capacitance snubs a turn-off at low current (edges.snubbed_turn_off)
    if hs_formula:
        h["overlap"] += float(np.sum(snubbed_turn_off(vin[hs_off], i[hs_off], hs.fall_time,
                                                      run.stage.cn)))

    n_ls_on = 0
    t_on = seg.t0[k]
    out["turn_ons"] = {"high_side": t_on[hs_on], "low_side": t_on[:0]}
    if ls_fet:
        ls_on = cur == LOW
        out["turn_ons"]["low_side"] = t_on[ls_on]
        n_ls_on = np.count_nonzero(ls_on)
        lo["gate"] += ls.qg * ls.gate_voltage * n_ls_on * loop_shares(ls, r_drv)[2]
        hard = ls_on & ((prev == HIGH_DIODE) | ((prev == HIGH) & (i < 0)))
        if ls_formula:
            lo["overlap"] += np.sum(0.5 * vin[hard] * np.abs(i[hard])) * ls.rise_time
        lo["recovery"] += float(np.sum(rec["high_side"]["charges"] * rec["high_side"]["vin"]))
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
