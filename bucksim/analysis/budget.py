"""The closed-form (textbook) loss budget of a buck power stage.

:func:`estimate` solves the averaged DC operating point in continuous
conduction (in DCM: :mod:`bucksim.analysis.budget_dcm`), then evaluates each
item with the formula a designer would write by hand: conduction and switching
as in [1]_, core loss by the iGSE [2]_, the edge items as common practice [3]_.
:func:`bucksim.crosscheck` compares these items with the waveform integrals.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020: ch. 2 (ripple, volt-second balance), ch. 3 (DC
   equivalent circuit with conduction losses), ch. 4 (switching loss).
.. [2] K. Venkatachalam, C. R. Sullivan, T. Abdallah, H. Tacca, "Accurate
   prediction of ferrite core loss with nonsinusoidal waveforms using only
   Steinmetz parameters", IEEE COMPEL 2002 (iGSE, triangular flux).
.. [3] Dead-time loss ``Vf I t_dead fs`` per edge, overlap ``0.5 Vin I t fs``,
   ``0.5 Coss Vin^2 fs``, ``Qrr Vin fs``, ``Qg Vg fs``: common practice.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from bucksim.analysis.budget_dcm import dcm_conduction, dcm_core, dcm_point, dcm_switching
from bucksim.analysis.budget_edges import async_edges, dead_times, node_charge, recovered_ccm
from bucksim.analysis.budget_input import input_items
from bucksim.analysis.budget_ramps import (
    fall_diode_times,
    fall_excess,
    ramps_in_circuit,
    rise_delay,
    rise_share,
)
from bucksim.analysis.budget_ring import lc_dead_time_integral, node_parts, slew_excess
from bucksim.analysis.edges import snubbed_turn_off
from bucksim.analysis.gate_drive import closed_form as gate_drive_closed_form
from bucksim.model.parts import Mosfet
from bucksim.model.pulse_limits import open_loop_on_time
from bucksim.model.stage import node_capacitance
from bucksim.threads import single_blas_thread


@dataclass(frozen=True)
class BudgetItem:
    """One line of the loss budget: ``value`` [W] from ``formula``, its ``source``,
    and what the formula ``neglects`` (the known reason it differs from the waveforms)."""

    key: str
    device: str
    kind: str
    value: float
    formula: str
    source: str
    neglects: str = ""


@dataclass(frozen=True)
class LossBudget:
    """Closed-form operating point and loss items.

    Attributes
    ----------
    operating_point : dict
        ``duty``, ``vin`` [V], ``vo`` [V], ``io`` [A], ``ripple`` [A] (dI
        peak-to-peak), ``peak`` and ``valley`` [A], ``dead_time_share``.
    items : list of BudgetItem
    """

    operating_point: dict
    items: list = field(default_factory=list)

    @property
    def total_loss(self) -> float:
        """Sum of all items [W]."""
        return sum(it.value for it in self.items)

    @property
    def output_power(self) -> float:
        return self.operating_point["vo"] * self.operating_point["io"]

    @property
    def efficiency(self) -> float:
        p = self.output_power
        return p / (p + self.total_loss) if p > 0 else 0.0

    def item(self, key: str) -> BudgetItem:
        for it in self.items:
            if it.key == key:
                return it
        raise KeyError(key)

    def to_dict(self) -> dict:
        return {"operating_point": dict(self.operating_point),
                "items": {it.key: {"device": it.device, "kind": it.kind, "value": it.value,
                                   "formula": it.formula, "source": it.source,
                                   "neglects": it.neglects}
                          for it in self.items},
                "total_loss": self.total_loss, "efficiency": self.efficiency}


def operating_point(scenario) -> dict:
    """Averaged CCM operating point with conduction drops (Erickson ch. 3).

    Notes
    -----
    Volt-second balance on the inductor with the switch-node voltage averaged
    over the period:

    .. math::

        V_o = D (V_{in} - (R_s + R_{hs}) I_o) - D_{ls} R_{ls} I_o
              - \\sum_{edges} d_e (V_{f} + r I_e) - R_{dcr} I_o,
        \\quad I_o = V_o / R + I_{cc}

    with ``D_ls = 1 - D - D_dead`` and each dead-time edge ``d_e = t_e fs``
    carried by the low-side body diode when its edge current ``I_e`` is
    positive (peak current at the falling edge, valley at the rising edge)
    or by the high-side body diode (``+Vin + Vf``) when negative; with node
    capacitance a negative valley's rising dead time averages the node of the
    series RLC swing up to that clamp
    (:func:`~bucksim.analysis.budget_ring.lc_dead_time_integral`). The ripple
    uses the on-time slope ``dI = (Vin - (Rs + Rhs + DCR) Io - Vo) D / (L fs)``.
    Solved by fixed-point iteration (the edge currents depend on ``Vo``).
    In closed loop the duty is the one that puts ``Vo`` on ``control.reference``
    (bisection: ``Vo`` rises monotonically with ``D``).
    """
    return _at_duty(scenario, _operating_point)


def _at_duty(scenario, point) -> dict:
    """``point(scenario, D)`` at the open-loop duty, or in closed loop at the duty that
    puts ``Vo`` on ``control.reference`` (bisection: ``Vo`` rises with ``D``)."""
    if scenario.control.duty is not None:
        ctl, T = scenario.control, scenario.period
        return point(scenario, float(open_loop_on_time(ctl, ctl.duty * T)) / T)
    target = scenario.control.reference
    lo, hi = 0.0, scenario.control.max_duty
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if point(scenario, mid)["vo"] < target:
            lo = mid
        else:
            hi = mid
    return point(scenario, 0.5 * (lo + hi))


def _operating_point(scenario, D: float) -> dict:
    sw = scenario.switching
    fs = sw.frequency
    vin = scenario.supply.voltage
    rs = scenario.supply.resistance
    hs, ls = scenario.high_side, scenario.low_side
    L, dcr = scenario.inductor.inductance, scenario.inductor.dcr
    g = 0.0 if scenario.load.resistance in (None, math.inf) else 1.0 / scenario.load.resistance
    icc = scenario.load.current
    sync = isinstance(ls, Mosfet)
    tf, tr = sw.dead_time if sync else (0.0, 0.0)
    vf_l, r_l = (ls.body_diode.vf, ls.body_diode.r) if sync else (ls.vf, ls.r)
    vf_h, r_h = hs.body_diode.vf, hs.body_diode.r
    d_ls = 1.0 - D - (tf + tr) * fs if sync else 0.0
    d_diode = 0.0 if sync else 1.0 - D
    node = node_parts(scenario)
    cn = node.cn
    ramp_off = ramps_in_circuit(scenario)[0] and hs.fall_time > 0.0

    vo, io, ripple = D * vin, D * vin * g + icc, 0.0
    for _ in range(50):
        peak, valley = io + ripple / 2, io - ripple / 2
        # averaged switch-node voltage, linear in io except through the edge signs
        a0 = D * vin  # constant part
        a1 = D * (rs + hs.rds_on) + d_ls * (ls.rds_on if sync else 0.0) + d_diode * r_l + dcr
        a0 -= d_diode * vf_l
        t_rise = rise_share(scenario, valley)
        if t_rise > 0.0:
            # the high side's current ramps for t_rise while the low-side diode holds the
            # node at -Vf - r (I - i_hs) (budget_ramps, derived)
            a0 -= t_rise * fs * (vin + vf_l)
            a1 += t_rise * fs * (0.5 * r_l - rs - hs.rds_on)
        for td, i_edge, rising in ((tf, peak, False), (tr, valley, True)):
            de = td * fs
            if i_edge >= 0:
                a0 -= de * vf_l
                a1 += de * r_l
            elif cn > 0 and rising and sync and td > 0:
                # the node swings up resonantly and may reach the high-side clamp (derived)
                a0 += fs * lc_dead_time_integral(node, vo, -ls.rds_on * i_edge, i_edge,
                                                 vin + vf_h, node.rn - rs - r_h, td)
            else:
                a0 += de * (vin + vf_h)
                a1 += de * (rs + r_h)
        v_a, v_c = vin - (rs + hs.rds_on) * peak, -vf_l + (node.rn - r_l) * peak
        if peak > 0 and cn > 0 and v_a > v_c:
            # the node's swing at the peak current after the high side opens, from
            # v_a to the diode's clamp v_c (in vn: the terminal is vn - Rn I): it
            # takes Q / I and holds the node above v_c by int (v - v_c) Cn dv / I
            # (derived; Cn (Vin + Vf)^2 / 2I linear without drops); slower behind a ramp
            a0 += fs * (fall_excess(cn, v_a - v_c, peak, hs.fall_time) if ramp_off
                        else slew_excess(node, v_a, v_c, peak))
        vo_new = (a0 - a1 * icc) / (1.0 + a1 * g)
        io = g * vo_new + icc
        ripple = (vin - (rs + hs.rds_on + dcr) * io - vo_new) * (D - t_rise * fs) / (L * fs)
        if abs(vo_new - vo) <= 1e-13 * max(1.0, abs(vo)):
            vo = vo_new
            break
        vo = vo_new
    return {"duty": D, "vin": vin, "vo": vo, "io": io, "ripple": ripple,
            "peak": io + ripple / 2, "valley": io - ripple / 2,
            "dead_time_share": (tf + tr) * fs, "frequency": fs, "conduction_mode": "ccm",
            "rise_ramp": t_rise}


@single_blas_thread
def estimate(scenario, mode: str | None = None) -> LossBudget:
    """Closed-form loss budget at the scenario's operating point, CCM or DCM.

    Parameters
    ----------
    scenario : Scenario
    mode : {None, "ccm"}
        None: DCM closed forms where the stage blocks reversal and the CCM
        ripple formula's valley is below zero (:func:`budget_point`), else CCM.
        ``"ccm"``: the CCM closed forms whatever the mode (to see what they say).

    Returns
    -------
    LossBudget
        Items (``key``: formula; each item names its formula, source and what
        it neglects), all in [W]. In CCM (``Io``, ripple ``dI``, ``Dd`` the
        dead-time share; ``I_e`` the edge current, ``t_e`` the dead time less
        the node's swing):

        - ``high_side.conduction``: ``Rhs D (Io^2 + dI^2/12)``; ``supply``: ``Rs`` the same
        - ``low_side.conduction``: ``Rls (1 - D - Dd)(Io^2 + dI^2/12)``
          (synchronous) or ``Vf Io (1-D) + r (1-D)(Io^2 + dI^2/12)`` (diode)
        - ``low_side_body_diode`` / ``high_side_body_diode.conduction``:
          ``sum_e (Vf |I_e| + r I_e^2) t_e fs`` over positive / negative edges
          (:func:`bucksim.analysis.budget_edges.dead_times`)
        - ``inductor.conduction``: ``DCR (Io^2 + dI^2/12)``; ``output_capacitor``: ``ESR dI^2/12``
        - ``switching.overlap``: ``0.5 Vin I_valley t_rise fs`` plus the turn-off
          energy at ``I_peak`` (:func:`bucksim.analysis.edges.snubbed_turn_off`)
        - ``switching.coss``: the node's charge moved by closing switches
          (:func:`bucksim.analysis.budget_edges.node_charge`; ``Cn`` from
          :func:`bucksim.model.stage.node_capacitance`, a table's own charge and energy)
        - ``switching.recovery``: ``Qrr Vin fs``, or charge control
          (:func:`bucksim.analysis.budget_edges.recovered_ccm`)
        - ``gate_drive``: ``(Qg_hs Vg_hs + Qg_ls Vg_ls) fs + Iq Vin`` (ideal rail), ``(Qg_hs +
          Qg_ls) V fs + Iq V`` from a regulator (``V = Vin``) or a bias rail (``Vbias``)
        - ``inductor.core``: iGSE for triangular flux,
          ``V k_i dB^beta f^alpha (D^(1-alpha) + (1-D)^(1-alpha))``

        In DCM the same keys from the triangular pulses of
        :mod:`bucksim.analysis.budget_dcm` (``dcm_conduction``, ``dcm_switching``,
        ``dcm_core``).

    Notes
    -----
    The edge items use the edge currents of the closed-form operating point
    (ripple formulas), never the simulated ones; :func:`bucksim.crosscheck`
    compares them with the waveforms.
    """
    from bucksim.model.scenario import require_scenario
    require_scenario(scenario, "estimate")
    if mode not in (None, "ccm"):
        raise ValueError(f"estimate: mode must be None or 'ccm', got {mode!r}")
    op = budget_point(scenario) if mode is None else operating_point(scenario)
    if op["conduction_mode"] == "dcm":
        rows = dcm_conduction(scenario, op) + dcm_switching(scenario, op)
        core = dcm_core(scenario, op)
        return LossBudget(op, [BudgetItem(*row) for row in rows + ([core] if core else [])])
    items = _conduction_items(scenario, op) + _switching_items(scenario, op)
    core = _core_item(scenario, op)
    if core is not None:
        items.append(core)
    return LossBudget(op, items)


def budget_point(scenario) -> dict:
    """The operating point the budget is evaluated at: CCM (:func:`operating_point`),
    or DCM (:func:`bucksim.analysis.budget_dcm.dcm_point`) where the stage blocks
    reversal and the CCM ripple formula's valley is below zero; ``mode`` says which.
    In closed loop, the duty that puts ``Vo`` on the reference (bisection)."""
    return _at_duty(scenario, _point)


def _point(scenario, D: float) -> dict:
    op = _operating_point(scenario, D)
    if scenario.switching.strategy != "forced-pwm" and op["valley"] < 0:
        dcm = dcm_point(scenario, D)
        if dcm is not None:
            return dcm
    return op


_EM = "Erickson & Maksimovic 3rd ed. ch. 3 (conduction with ripple)"
_CP = "common practice"
_RAMP = "straight ramps with first-order drops, centred on Io"


def _conduction_items(scenario, op) -> list[BudgetItem]:
    """Conduction losses [W] of the switches, diodes, inductor, capacitor and supply."""
    D, fs, io, dI = op["duty"], op["frequency"], op["io"], op["ripple"]
    hs, ls = scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    tf, tr = scenario.switching.dead_time if sync else (0.0, 0.0)
    ms = io * io + dI * dI / 12.0  # mean square of the triangle around Io
    EM, CP = _EM, _CP
    # the high side is fully on for D T less its turn-on ramp, where circuit (budget_ramps)
    d_on = D - rise_delay(scenario) * fs
    items = [BudgetItem("high_side.conduction", "high_side", "conduction",
                        hs.rds_on * d_on * ms, "Rds_hs (D - t_rise fs)(Io^2 + dI^2/12)"
                        if d_on < D else "Rds_hs D (Io^2 + dI^2/12)", EM, _RAMP)]
    if sync:
        d_ls = 1.0 - D - (tf + tr) * fs
        items.append(BudgetItem("low_side.conduction", "low_side", "conduction",
                                ls.rds_on * d_ls * ms, "Rds_ls (1 - D - Dd)(Io^2 + dI^2/12)", EM,
                                _RAMP))
        bd_l, bd_h = ls.body_diode, hs.body_diode
        e = dead_times(scenario, op)
        p_l = sum((bd_l.vf * i + bd_l.r * i * i) * t * fs
                  for t, i in (e["falling"] or (0.0, 0.0), e["rising"] or (0.0, 0.0)))
        if e["falling"] and ramps_in_circuit(scenario)[0] and hs.fall_time > 0.0:
            # behind the turn-off ramp the diode takes the current as the channel lets go
            t_e, i_e = e["falling"]
            pk = op["peak"]
            delta = (scenario.supply.voltage - (scenario.supply.resistance + hs.rds_on) * pk
                     + bd_l.vf - (node_parts(scenario).rn - bd_l.r) * pk)
            t1, t2 = fall_diode_times(node_parts(scenario).cn, delta, pk, hs.fall_time, tf)
            p_l += ((bd_l.vf * i_e * t1 + bd_l.r * i_e * i_e * t2)
                    - (bd_l.vf * i_e + bd_l.r * i_e * i_e) * t_e) * fs
        # and the triangle it carries while the high side's current ramps up (derived)
        i_v, t_r = op["valley"], op.get("rise_ramp", 0.0)
        p_l += (bd_l.vf * i_v / 2.0 + bd_l.r * i_v * i_v / 3.0) * t_r * fs
        t_h, i_h = e["high_side"] or (0.0, 0.0)
        p_h = (bd_h.vf * -i_h + bd_h.r * i_h * i_h) * t_h * fs
        items.append(BudgetItem("low_side_body_diode.conduction", "low_side_body_diode",
                                "conduction", p_l,
                                "sum over edges with I_e > 0 of (Vf I_e + r I_e^2) t_e fs, "
                                "t_e = t_dead - Q_e / I_e (the node's charge to its clamp "
                                "first)", CP,
                                "the swing as a slew at the constant edge current"))
        items.append(BudgetItem("high_side_body_diode.conduction", "high_side_body_diode",
                                "conduction", p_h,
                                "sum over edges with I_e < 0 of (Vf |I_e| + r I_e^2) t_e fs, "
                                "t_e = t_dead - the series RLC swing's time to Vin + Vf",
                                CP, "the swing about a constant Vo"))
    else:
        e = async_edges(scenario, op)
        items.append(BudgetItem("low_side.conduction", "low_side", "conduction",
                                ls.vf * io * (1 - D) + ls.r * (1 - D) * ms,
                                "Vf Io (1-D) + r (1-D)(Io^2 + dI^2/12)", CP, _RAMP))
    rn = node_parts(scenario).rn
    if rn > 0:
        items.append(BudgetItem("switch_node.resistance", "switch_node", "conduction",
                                rn * e["open_square"] * fs,
                                "Rn int i^2 fs over the open node: I_e^2 Q_e / I_e per edge "
                                "swing (the RLC swing's energy balance for a negative valley)",
                                "derived (budget_edges.dead_times)",
                                "each swing at the constant edge current of the ripple formula"))
    items.append(BudgetItem("inductor.conduction", "inductor", "conduction",
                            scenario.inductor.dcr * ms, "DCR (Io^2 + dI^2/12)", EM, _RAMP))
    items.append(BudgetItem("output_capacitor.conduction", "output_capacitor", "conduction",
                            scenario.output_capacitor.esr * dI * dI / 12.0, "ESR dI^2/12",
                            "Erickson & Maksimovic 3rd ed. ch. 2 (triangular ripple)",
                            "the ripple current's share in the load (all of it taken into C)"))
    if scenario.supply.resistance > 0 and scenario.input_capacitor is None:
        items.append(BudgetItem("supply.conduction", "supply", "conduction",
                                scenario.supply.resistance * (d_on * ms + (D - d_on)
                                                              * max(op["valley"], 0.0) ** 2
                                                              / 3.0),
                                "Rs D (Io^2 + dI^2/12)", EM, _RAMP))
    items += [BudgetItem(*row) for row in input_items(scenario, op["valley"], op["peak"], D, fs)]
    return items


def _switching_items(scenario, op) -> list[BudgetItem]:
    """Switching-edge losses [W]: overlap, Coss, reverse recovery, gate drive."""
    fs, vin, pk, vl = op["frequency"], op["vin"], op["peak"], op["valley"]
    hs, ls = scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    tr = scenario.switching.dead_time[1] if sync else 0.0
    CP = _CP
    # the node is at ground when the high side turns on unless a negative
    # current has already carried it to Vin during the rising dead time
    hard_on = vl > 0 or (sync and tr == 0)
    d_ls = ls.body_diode if sync else ls
    # in the circuit the ramp's node swings on to the diode's clamp, -Vf (budget_ramps)
    swing = vin + d_ls.vf if ramps_in_circuit(scenario)[0] else vin
    e_off = float(snubbed_turn_off(swing, pk, hs.fall_time, node_capacitance(scenario),
                                   node_parts(scenario).rn))
    e_on = 0.5 * vin * max(vl, 0.0) * hs.rise_time
    t_r = op.get("rise_ramp", 0.0)
    if t_r > 0.0:
        # the ramp against the low-side diode's clamp, with its drops (budget_ramps, derived)
        vf_l, r_l = ((ls.body_diode.vf, ls.body_diode.r) if sync else (ls.vf, ls.r))
        rs = scenario.supply.resistance
        e_on = (0.5 * (vin + vf_l) * vl + (r_l / 6.0 - rs / 3.0) * vl * vl) * t_r
    if vl < 0 and ramps_in_circuit(scenario)[1] and ls.fall_time > 0.0:
        # forced PWM: the low side's negative current ramps down against the node as
        # the high side's positive one does (the same derived closed form)
        e_off += float(snubbed_turn_off(vin + scenario.high_side.body_diode.vf, -vl,
                                        ls.fall_time, node_capacitance(scenario)))
    overlap = (e_on + e_off) * fs
    items = [BudgetItem("switching.overlap", "high_side", "switching", overlap,
                        "(0.5 Vin I_valley t_rise + E_off(I_peak)) fs, E_off = 0.5 Vin I t_fall "
                        "snubbed by Cn at low current (edges.snubbed_turn_off, derived)", CP,
                        "the ripple formula's edge currents")]
    coss, formula = node_charge(scenario, op, hard_on)
    items.append(BudgetItem("switching.coss", "high_side", "switching", coss * fs, formula,
                            "derived (charge moved through a closing switch, Erickson & "
                            "Maksimovic 3rd ed. ch. 4)",
                            "the clamp voltages at the ripple formula's edge currents"))
    items.append(BudgetItem("switching.recovery", "high_side", "switching",
                            recovered_ccm(scenario, op) * vin * fs,
                            "Qrr Vin fs (fixed qrr, diode conducting at high-side turn-on), or "
                            "k q Vin fs, q from dq/dt = i - q/tau at the dead-time currents",
                            "Erickson & Maksimovic 3rd ed. ch. 4 (charge control; from "
                            "memory); common practice (fixed Qrr)",
                            "the diode's current taken constant in each dead time"))
    gate, formula = gate_drive_closed_form(scenario, fs)
    items.append(BudgetItem("gate_drive", "gate drive", "switching", gate, formula, CP,
                            "nothing: the same charge per turn-on on both sides (checks the "
                            "count and the rail)"))
    return items


def _core_item(scenario, op) -> BudgetItem | None:
    """iGSE core loss [W] for the triangular flux, or None without a core model."""
    core = scenario.inductor.core
    if core is None:
        return None
    from bucksim.analysis.coreloss import igse_coefficient
    D, fs, dI = op["duty"], op["frequency"], op["ripple"]
    # the flux rises while the node is high: D less the turn-on ramp (budget_ramps)
    D -= op.get("rise_ramp", 0.0) * fs
    ki = igse_coefficient(core.k, core.alpha, core.beta)
    dB = scenario.inductor.inductance * dI / (core.turns * core.area)
    pv = ki * dB ** core.beta * fs ** core.alpha * (D ** (1 - core.alpha)
                                                     + (1 - D) ** (1 - core.alpha))
    return BudgetItem("inductor.core", "inductor", "core", pv * core.volume,
                      "V k_i dB^beta f^alpha (D^(1-alpha) + (1-D)^(1-alpha))",
                      "Venkatachalam et al., IEEE COMPEL 2002 (iGSE)",
                      "the flux ramps taken straight (the drops bend them)")
