"""The closed-form (textbook) loss budget of a buck power stage.

:func:`estimate` solves the averaged DC operating point in continuous
conduction, then evaluates each loss item with the formula a designer would
write by hand: conduction and switching as in [1]_, core loss by the iGSE for
a triangular flux [2]_, the edge items as common practice [3]_.
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

from bucksim.model.parts import Mosfet


@dataclass(frozen=True)
class BudgetItem:
    """One line of the loss budget: ``value`` [W] from ``formula``."""

    key: str
    device: str
    kind: str
    value: float
    formula: str
    source: str


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
                                   "formula": it.formula, "source": it.source}
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
    or by the high-side body diode (``+Vin + Vf``) when negative. The ripple
    uses the on-time slope ``dI = (Vin - (Rs + Rhs + DCR) Io - Vo) D / (L fs)``.
    Solved by fixed-point iteration (the edge currents depend on ``Vo``).
    In closed loop the duty is the one that puts ``Vo`` on ``control.reference``
    (bisection: ``Vo`` rises monotonically with ``D``).
    """
    if scenario.control.duty is not None:
        return _operating_point(scenario, scenario.control.duty)
    target = scenario.control.reference
    lo, hi = 0.0, scenario.control.max_duty
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if _operating_point(scenario, mid)["vo"] < target:
            lo = mid
        else:
            hi = mid
    return _operating_point(scenario, 0.5 * (lo + hi))


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

    vo, io, ripple = D * vin, D * vin * g + icc, 0.0
    for _ in range(50):
        peak, valley = io + ripple / 2, io - ripple / 2
        # averaged switch-node voltage, linear in io except through the edge signs
        a0 = D * vin  # constant part
        a1 = D * (rs + hs.rds_on) + d_ls * (ls.rds_on if sync else 0.0) + d_diode * r_l + dcr
        a0 -= d_diode * vf_l
        for td, i_edge in ((tf, peak), (tr, valley)):
            de = td * fs
            if i_edge >= 0:
                a0 -= de * vf_l
                a1 += de * r_l
            else:
                a0 += de * (vin + vf_h)
                a1 += de * (rs + r_h)
        vo_new = (a0 - a1 * icc) / (1.0 + a1 * g)
        io = g * vo_new + icc
        ripple = (vin - (rs + hs.rds_on + dcr) * io - vo_new) * D / (L * fs)
        if abs(vo_new - vo) <= 1e-13 * max(1.0, abs(vo)):
            vo = vo_new
            break
        vo = vo_new
    return {"duty": D, "vin": vin, "vo": vo, "io": io, "ripple": ripple,
            "peak": io + ripple / 2, "valley": io - ripple / 2,
            "dead_time_share": (tf + tr) * fs, "frequency": fs}


def estimate(scenario) -> LossBudget:
    """Closed-form loss budget at the scenario's CCM operating point.

    Parameters
    ----------
    scenario : Scenario
        Open-loop scenario (``control.duty``).

    Returns
    -------
    LossBudget
        Items (``key``: formula), all in [W]:

        - ``high_side.conduction``: ``Rhs D (Io^2 + dI^2/12)``
        - ``low_side.conduction``: ``Rls (1 - D - Dd)(Io^2 + dI^2/12)``
          (synchronous) or ``Vf Io (1-D) + r (1-D)(Io^2 + dI^2/12)`` (diode)
        - ``low_side_body_diode.conduction``: ``sum_e (Vf I_e + r I_e^2) t_e fs``
          over dead-time edges with positive current (``2 Vf Io td fs`` for
          equal edges at ``I_e = Io``: common practice)
        - ``high_side_body_diode.conduction``: the same for negative edges
        - ``inductor.conduction``: ``DCR (Io^2 + dI^2/12)``
        - ``output_capacitor.conduction``: ``ESR dI^2/12``
        - ``supply.conduction``: ``Rs D (Io^2 + dI^2/12)``
        - ``switching.overlap``: ``0.5 Vin (I_valley tr + I_peak tf) fs``
        - ``switching.coss``: ``0.5 (Coss_hs + Coss_ls) Vin^2 fs`` (hard turn-on)
        - ``switching.recovery``: ``Qrr Vin fs`` when a diode carries current
          at high-side turn-on
        - ``switching.gate``: ``(Qg_hs Vg_hs + Qg_ls Vg_ls) fs``
        - ``inductor.core``: iGSE for triangular flux,
          ``V k_i dB^beta f^alpha (D^(1-alpha) + (1-D)^(1-alpha))``

    Notes
    -----
    Every item assumes continuous conduction with a triangular inductor
    current; :func:`bucksim.crosscheck` says where a simulation departs
    from that (DCM, reverse current, large ripple).
    """
    from bucksim.model.scenario import require_scenario
    require_scenario(scenario, "estimate")
    op = operating_point(scenario)
    items = _conduction_items(scenario, op) + _switching_items(scenario, op)
    core = _core_item(scenario, op)
    if core is not None:
        items.append(core)
    return LossBudget(op, items)


_EM = "Erickson & Maksimovic 3rd ed. ch. 3 (conduction with ripple)"
_CP = "common practice"


def _conduction_items(scenario, op) -> list[BudgetItem]:
    """Conduction losses [W] of the switches, diodes, inductor, capacitor and supply."""
    D, fs, io, dI = op["duty"], op["frequency"], op["io"], op["ripple"]
    pk, vl = op["peak"], op["valley"]
    hs, ls = scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    tf, tr = scenario.switching.dead_time if sync else (0.0, 0.0)
    ms = io * io + dI * dI / 12.0  # mean square of the triangle around Io
    EM, CP = _EM, _CP
    items = [BudgetItem("high_side.conduction", "high_side", "conduction",
                        hs.rds_on * D * ms, "Rds_hs D (Io^2 + dI^2/12)", EM)]
    if sync:
        d_ls = 1.0 - D - (tf + tr) * fs
        items.append(BudgetItem("low_side.conduction", "low_side", "conduction",
                                ls.rds_on * d_ls * ms, "Rds_ls (1 - D - Dd)(Io^2 + dI^2/12)", EM))
        bd_l, bd_h = ls.body_diode, hs.body_diode
        p_l = p_h = 0.0
        for td, i_e in ((tf, pk), (tr, vl)):
            if i_e >= 0:
                p_l += (bd_l.vf * i_e + bd_l.r * i_e * i_e) * td * fs
            else:
                p_h += (bd_h.vf * -i_e + bd_h.r * i_e * i_e) * td * fs
        items.append(BudgetItem("low_side_body_diode.conduction", "low_side_body_diode",
                                "conduction", p_l,
                                "sum over edges with I_e > 0 of (Vf I_e + r I_e^2) t_e fs", CP))
        items.append(BudgetItem("high_side_body_diode.conduction", "high_side_body_diode",
                                "conduction", p_h,
                                "sum over edges with I_e < 0 of (Vf |I_e| + r I_e^2) t_e fs", CP))
    else:
        items.append(BudgetItem("low_side.conduction", "low_side", "conduction",
                                ls.vf * io * (1 - D) + ls.r * (1 - D) * ms,
                                "Vf Io (1-D) + r (1-D)(Io^2 + dI^2/12)", CP))
    items.append(BudgetItem("inductor.conduction", "inductor", "conduction",
                            scenario.inductor.dcr * ms, "DCR (Io^2 + dI^2/12)", EM))
    items.append(BudgetItem("output_capacitor.conduction", "output_capacitor", "conduction",
                            scenario.output_capacitor.esr * dI * dI / 12.0, "ESR dI^2/12",
                            "Erickson & Maksimovic 3rd ed. ch. 2 (triangular ripple)"))
    if scenario.supply.resistance > 0:
        items.append(BudgetItem("supply.conduction", "supply", "conduction",
                                scenario.supply.resistance * D * ms, "Rs D (Io^2 + dI^2/12)", EM))
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
    overlap = 0.5 * vin * (max(vl, 0.0) * hs.rise_time + max(pk, 0.0) * hs.fall_time) * fs
    items = [BudgetItem("switching.overlap", "high_side", "switching", overlap,
                        "0.5 Vin (I_valley t_rise + I_peak t_fall) fs", CP)]
    c_node = hs.coss + (ls.coss if sync else 0.0)
    items.append(BudgetItem("switching.coss", "high_side", "switching",
                            0.5 * c_node * vin * vin * fs if hard_on else 0.0,
                            "0.5 (Coss_hs + Coss_ls) Vin^2 fs (hard turn-on only)", CP))
    qrr = ls.body_diode.qrr if sync else ls.qrr
    diode_at_turn_on = vl > 0 and (not sync or tr > 0)
    items.append(BudgetItem("switching.recovery", "high_side", "switching",
                            qrr * vin * fs if diode_at_turn_on else 0.0,
                            "Qrr Vin fs (diode conducting at high-side turn-on)", CP))
    gate = hs.qg * hs.gate_voltage + (ls.qg * ls.gate_voltage if sync else 0.0)
    items.append(BudgetItem("switching.gate", "gate drive", "switching", gate * fs,
                            "(Qg_hs Vg_hs + Qg_ls Vg_ls) fs", CP))
    return items


def _core_item(scenario, op) -> BudgetItem | None:
    """iGSE core loss [W] for the triangular flux, or None without a core model."""
    core = scenario.inductor.core
    if core is None:
        return None
    from bucksim.analysis.coreloss import igse_coefficient
    D, fs, dI = op["duty"], op["frequency"], op["ripple"]
    ki = igse_coefficient(core.k, core.alpha, core.beta)
    dB = scenario.inductor.inductance * dI / (core.turns * core.area)
    pv = ki * dB ** core.beta * fs ** core.alpha * (D ** (1 - core.alpha)
                                                     + (1 - D) ** (1 - core.alpha))
    return BudgetItem("inductor.core", "inductor", "core", pv * core.volume,
                      "V k_i dB^beta f^alpha (D^(1-alpha) + (1-D)^(1-alpha))",
                      "Venkatachalam et al., IEEE COMPEL 2002 (iGSE)")
