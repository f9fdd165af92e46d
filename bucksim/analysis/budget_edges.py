"""The CCM closed form's switching edges: the node's swings, the diodes' dead-time
conduction, the node charge closing switches move, and recovered charge.

At each edge the node opens at the edge current ``I`` and swings at about that
current: from ``v_a`` to where its diode clamps, ``vn - (Rn - r) I = -Vf`` (the
terminal voltage ``vn - Rn I`` at the diode's ``-Vf - r I``), which takes the
node's charge over ``I`` (:func:`~bucksim.analysis.budget_ring.slew_charge`; a
capacitance table's own charge). Then the capacitance steps to the diode's node
voltage (``Rn I`` below; nothing without ``Rn``), which the diode's path pays
(:func:`~bucksim.analysis.budget_ring.transfer`; the energy of charging a
capacitance from a source [1]_), and the diode conducts for the rest of the dead
time; the diodes' stored charge follows charge control [1]_. A negative valley
swings the node up on the series RLC (:func:`~bucksim.analysis.budget_ring.rlc_swing`)
toward the high-side clamp. The module returns numbers;
:mod:`bucksim.analysis.budget` builds the items.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 4 (switching loss; the diode's stored charge,
   charge control); cited from memory.
"""

from __future__ import annotations

from bucksim.analysis.budget_dcm import stored_charge
from bucksim.analysis.budget_ramps import (
    fall_ramp,
    ramped_charge_time,
    ramped_square,
    ramped_time,
    rise_delay,
)
from bucksim.analysis.budget_ring import (
    node_parts,
    rlc_square,
    rlc_swing,
    rlc_time_to,
    slew_charge,
    slew_to,
    transfer,
)
from bucksim.analysis.recovery import recovery_parameters
from bucksim.model.parts import Mosfet


def _slew(node, v_a: float, v_c: float, i: float, td: float, t_ramp: float = 0.0) -> dict:
    """A swing down at the current ``i > 0`` [A] from ``v_a`` toward the clamp ``v_c``
    [V] within ``td`` [s]: its time, ``int i^2``, and the node where it stops; behind
    a turn-off ramp of ``t_ramp`` [s] the node takes ``I t / t_ramp`` first
    (:mod:`bucksim.analysis.budget_ramps`)."""
    t = slew_charge(node, v_c, v_a) / i if v_a > v_c and node.cn > 0 else 0.0
    t = ramped_time(t, t_ramp)
    if t <= td:
        return {"t": t, "square": ramped_square(i, t, t_ramp), "v": min(v_c, v_a),
                "clamped": True}
    return {"t": td, "square": ramped_square(i, td, t_ramp),
            "v": slew_to(node, v_a, i * ramped_charge_time(td, t_ramp)), "clamped": False}


def _falling(scenario, node, pk: float, tf: float) -> dict:
    hs, ls = scenario.high_side, scenario.low_side
    d = ls.body_diode if isinstance(ls, Mosfet) else ls
    v_a = scenario.supply.voltage - (scenario.supply.resistance + hs.rds_on) * pk
    s = _slew(node, v_a, -d.vf + (node.rn - d.r) * pk, pk, tf, fall_ramp(scenario))
    s["v_diode"] = -(d.vf + d.r * pk)
    return s


def dead_times(scenario, op) -> dict:
    """Body-diode conduction ``(t_e [s], I_e [A])`` in each dead time (None where none),
    and the node at high-side turn-on ``v_on`` [V] (None: a diode holds it).

    Also ``open_square`` [A^2 s] (``int i^2`` while the node is open, the node
    resistance's share of the period), ``v_ls`` and ``v_hs`` [V] (the node the low
    and the high side close on, None where a diode clamps it), and ``steps``: the
    energy [J] of the capacitance's steps to a clamping diode, per switch.

    Notes
    -----
    A body diode conducts once the node capacitance has swung to its clamp: at
    constant current ``I`` that takes ``Q / I``, ``Q = Cn dV`` (derived). A negative
    valley swings the node up resonantly (the series RLC of
    :func:`~bucksim.analysis.budget_ring.rlc_swing`): the high-side body diode
    conducts only when the crest reaches ``Vin + Vf``.
    """
    hs, ls = scenario.high_side, scenario.low_side
    bd_l, bd_h = ls.body_diode, hs.body_diode
    tf, tr = scenario.switching.dead_time
    node = node_parts(scenario)
    vin, vo, pk, vl = op["vin"], op["vo"], op["peak"], op["valley"]
    out = {"falling": None, "rising": None, "high_side": None, "v_on": None,
           "open_square": 0.0, "v_ls": None, "v_hs": None,
           "steps": {"high_side": 0.0, "low_side": 0.0}}
    if pk > 0:
        s = _falling(scenario, node, pk, tf)
        out["falling"] = (tf - s["t"], pk)
        out["open_square"] += s["square"]
        if s["clamped"]:
            out["steps"]["low_side"] += transfer(node, 0.0, s["v"], s["v_diode"])
        else:
            out["v_ls"] = s["v"]
    if vl > 0:
        s = _slew(node, -ls.rds_on * vl, -bd_l.vf + (node.rn - bd_l.r) * vl, vl, tr)
        out["rising"] = (tr - s["t"], vl)
        out["open_square"] += s["square"]
        if s["clamped"]:
            out["steps"]["low_side"] += transfer(node, 0.0, s["v"], -(bd_l.vf + bd_l.r * vl))
        else:
            out["v_hs"] = s["v"]
    elif vl < 0 and tr > 0:
        v0, clamp = -ls.rds_on * vl, vin + bd_h.vf
        r_h = scenario.supply.resistance + bd_h.r
        if node.cn <= 0:
            out["high_side"] = (tr, vl)
            return out
        L, R, cn = node.L, node.R, node.cn
        # the high side closes its rise time after its edge where the ramps are circuit
        # (budget_ramps.rise_delay): the swing goes on meanwhile
        tr = tr + rise_delay(scenario)
        t_c = rlc_time_to(L, R, cn, vo, v0, vl, clamp, node.rn - r_h, tr)
        t_open = min(t_c, tr)
        v1, i1 = rlc_swing(L, R, cn, vo, v0, vl, t_open)
        out["open_square"] += rlc_square(L, R, cn, vo, v0, vl, t_open)
        if t_c < tr:
            out["high_side"] = (tr - t_c, i1)
            out["steps"]["high_side"] += transfer(node, vin, v1, clamp - r_h * i1)
        else:
            out["v_on"] = v1
    return out


def async_edges(scenario, op) -> dict:
    """The asynchronous stage's one open interval: the node's swing to the freewheel
    diode after the high side opens at the peak (:func:`dead_times`' keys
    ``open_square`` and ``steps``)."""
    node = node_parts(scenario)
    out = {"open_square": 0.0, "steps": {"high_side": 0.0, "low_side": 0.0}}
    if op["peak"] > 0 and node.cn > 0:
        s = _falling(scenario, node, op["peak"], float("inf"))
        out["open_square"] = s["square"]
        out["steps"]["low_side"] = transfer(node, 0.0, s["v"], s["v_diode"])
    return out


def node_charge(scenario, op, hard_on: bool) -> tuple[float, str]:
    """Energy [J] per period that closing switches (and clamping diodes) dissipate
    moving the node's charge.

    A switch closing on the node at ``v_a`` that then holds it at ``v_b`` from a
    source ``V_p`` dissipates ``integral_{v_a}^{v_b} (V_p - v) Cn(v) dv``
    (``Cn (v_b - v_a)(V_p - (v_a + v_b) / 2)`` when linear; :mod:`bucksim.analysis.edges`).
    In CCM with dead times the high side closes on the node clamped at ``-Vf`` by
    the low-side diode: ``0.5 Cn (Vin + Vf)^2`` (``Qoss (Vin + Vf) - Eoss`` with a
    table); the low side closes on ``-Vf`` too: ``0.5 Cn Vf^2``. With no rising
    (falling) dead time that switch closes on the other channel's node voltage,
    ``0 (Vin)``: ``0.5 Cn Vin^2``; a swing that does not finish within its dead time
    leaves the node where the charge ``I t_dead`` took it. A negative valley current
    swings the node up during the rising dead time (:func:`dead_times`): the high
    side then closes on the node the swing has reached, or on the node clamped at
    ``Vin + Vf`` by its body diode (full ZVS, ~``0.5 Cn Vf^2``). With a node
    resistance each clamping diode also takes the capacitance's step of ``Rn I``.
    """
    node = node_parts(scenario)
    vin, vl = op["vin"], op["valley"]
    ls = scenario.low_side
    sync = isinstance(ls, Mosfet)
    vf, r_d = (ls.body_diode.vf, ls.body_diode.r) if sync else (ls.vf, ls.r)
    tf, tr = scenario.switching.dead_time if sync else (0.0, 0.0)
    r_hs = scenario.supply.resistance + scenario.high_side.rds_on
    v_on = vin - r_hs * vl                      # the node once the high side conducts
    e = dead_times(scenario, op) if sync else async_edges(scenario, op)
    if not hard_on and sync and vl < 0:
        # the resonant swing's node at turn-on, or the high-side body diode's clamp
        hb = scenario.high_side.body_diode
        v_before = e["v_on"] if e["high_side"] is None else \
            vin + hb.vf - (scenario.supply.resistance + hb.r) * e["high_side"][1]
        formula = ("integral (V_p - v) Cn(v) dv fs per closing switch: the high side "
                   "from the RLC swing's node after the rising dead time (partial "
                   "ZVS) or the body diode's clamp, the low side ~0.5 Cn Vf^2")
    elif not hard_on:
        v_before, formula = v_on, "none: the node swings to Vin before the high side closes"
    else:
        # before it: the low-side channel's node (no rising dead time), the diode's
        # clamp, or where an unfinished swing left it
        v_before = -ls.rds_on * vl if (sync and tr == 0) else -(vf + r_d * vl)
        if sync and e["v_hs"] is not None:
            v_before = e["v_hs"]
        if op.get("rise_ramp", 0.0) > 0.0 and v_before == -(vf + r_d * vl):
            # the channel's ramp has taken the diode's current by the time it closes
            # (analysis.budget_ramps): the clamp at -Vf
            v_before = -vf
        formula = ("integral (V_p - v) Cn(v) dv fs per closing switch (Cn (v_b - v_a)"
                   "(V_p - (v_a + v_b)/2) linear): ~0.5 Cn (Vin + Vf)^2 at high-side "
                   "turn-on from the diode (~Vin^2 without rising dead time), ~0.5 Cn "
                   "Vf^2 at the low side's (~Vin^2 without falling dead time)")
    e_on = transfer(node, vin, v_before, v_on)
    e_ls = 0.0
    if sync:
        pk = op["peak"]
        v_from = vin - r_hs * pk if tf == 0 else -(vf + r_d * pk)
        if e["v_ls"] is not None:
            v_from = e["v_ls"]
        e_ls = transfer(node, 0.0, v_from, -ls.rds_on * pk)
    return e_on + e_ls + sum(e["steps"].values()), formula


def recovered_ccm(scenario, op) -> float:
    """Charge [C] swept out per period when the opposite channels close.

    Fixed ``qrr``: once per period when the low-side diode conducts at
    high-side turn-on. Charge control (:func:`bucksim.analysis.recovery.recovery_parameters`):
    ``k q``, ``q`` from ``dq/dt = i - q / tau`` at the dead-time currents
    (:func:`~bucksim.analysis.budget_dcm.stored_charge`), decaying in between; the
    high-side body diode's charge (reverse current) decays over ``D T + t_fall``.
    """
    ls, hs = scenario.low_side, scenario.high_side
    sync = isinstance(ls, Mosfet)
    diode = ls.body_diode if sync else ls
    tau, k = recovery_parameters(diode)
    T, D, pk, vl = 1.0 / op["frequency"], op["duty"], op["peak"], op["valley"]
    tf, tr = scenario.switching.dead_time if sync else (0.0, 0.0)
    if tau <= 0.0:
        return diode.qrr if vl > 0 and (not sync or tr > 0) else 0.0
    if not sync:
        return k * stored_charge(0.0, pk, max(vl, 0.0), (1.0 - D) * T, tau)
    e = dead_times(scenario, op)
    t_f, i_f = e["falling"] or (0.0, 0.0)
    t_r, i_r = e["rising"] or (0.0, 0.0)
    q = stored_charge(0.0, i_f, i_f, t_f, tau)
    q = stored_charge(q, 0.0, 0.0, (1.0 - D) * T - tf - t_r, tau)
    q = k * stored_charge(q, i_r, i_r, t_r, tau)
    tau_h, k_h = recovery_parameters(hs.body_diode)
    if e["high_side"] and tau_h > 0:
        q_h = stored_charge(0.0, -e["high_side"][1], -e["high_side"][1], e["high_side"][0],
                            tau_h)
        q += k_h * stored_charge(q_h, 0.0, 0.0, D * T + tf, tau_h)
    return q
