"""The closed-form budget in discontinuous conduction, from the duty.

Diode emulation and the asynchronous stage enter DCM where the CCM ripple
formula's valley falls below zero (:func:`bucksim.analysis.budget.estimate`
decides). bucksim works from a given duty, so the operating point is found
from the duty as in [1]_ (ch. 5): the current rises from zero to ``Ipk``
over ``D T``, falls to zero over ``D2 T`` and rests for ``D3 T = (1 - D -
D2) T``, and ``Vo`` is the voltage at which the mean of that triangle equals
the load current (charge balance on the capacitor). Without losses this is
the textbook conversion ratio ``M = 2 / (1 + sqrt(1 + 4 K / D^2))``,
``K = 2 L / (R T)`` [1]_; the series resistances enter to first order
(each drop at the mean current of its ramp), the diode drops in full. The
core loss is the iGSE of the piecewise-linear flux [2]_.

The item builders here return plain tuples ``(key, device, kind, value,
formula, source, neglects)``: :mod:`bucksim.analysis.budget` wraps them
(this module does not import it, so the import graph stays acyclic).

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020: ch. 5 (the discontinuous conduction mode: ``M``,
   ``K``, ``D2``), app. A (RMS values of triangular and trapezoidal pulses:
   ``I^2 = D (Ia^2 + Ia Ib + Ib^2) / 3``; cited from memory), ch. 4 (the
   diode's stored charge; charge control, cited from memory).
.. [2] K. Venkatachalam, C. R. Sullivan, T. Abdallah, H. Tacca, "Accurate
   prediction of ferrite core loss with nonsinusoidal waveforms using only
   Steinmetz parameters", IEEE COMPEL 2002 (iGSE of a piecewise-linear flux).
"""

from __future__ import annotations

import math

from bucksim.analysis.budget_input import input_items
from bucksim.analysis.budget_ramps import (
    fall_ramp,
    ramped_charge_time,
    ramped_square,
    ramped_time,
    ramps_in_circuit,
    rise_delay,
)
from bucksim.analysis.budget_ring import (
    idle_ring,
    node_parts,
    ramp_mean_square,
    rlc_square,
    rlc_swing,
    rlc_time_to,
    transfer,
)
from bucksim.analysis.edges import snubbed_turn_off
from bucksim.analysis.gate_drive import closed_form as gate_drive_closed_form
from bucksim.analysis.recovery import recovery_parameters
from bucksim.model.parts import Mosfet

_EM5 = ("Erickson & Maksimovic 3rd ed. ch. 5 (DCM from the duty) and app. A "
        "(RMS of triangular pulses)")
_CP = "common practice"


def stored_charge(q0: float, i_a: float, i_b: float, t: float, tau: float) -> float:
    """Charge [C] of ``dq/dt = i - q / tau`` after a linear current ramp.

    Parameters
    ----------
    q0 : float
        Charge at the ramp's start [C].
    i_a, i_b : float
        Forward current at the ramp's start and end [A] (0 and 0: decay only).
    t, tau : float
        Ramp duration and lifetime [s], ``tau > 0``.

    Notes
    -----
    With ``i = i_a + m s``, ``m = (i_b - i_a) / t``, the solution is (derived,
    the charge-control equation of [1]_):

    .. math:: q(t) = \\tau i_b - m \\tau^2 + (q_0 - \\tau i_a + m \\tau^2) e^{-t/\\tau},

    ``tau I (1 - e^{-t/tau})`` from rest at constant current.
    """
    if t <= 0.0:
        return q0
    m = (i_b - i_a) / t
    return tau * i_b - m * tau * tau + (q0 - tau * i_a + m * tau * tau) * math.exp(-t / tau)


def _parts(scenario) -> dict:
    """The constants of the DCM period [SI]."""
    sw, hs, ls = scenario.switching, scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    d = ls.body_diode if sync else ls
    load = scenario.load
    rs = scenario.supply.resistance
    return {"sync": sync, "T": sw.period, "vin": scenario.supply.voltage,
            "L": scenario.inductor.inductance, "dcr": scenario.inductor.dcr,
            "r_on": rs + hs.rds_on + scenario.inductor.dcr, "r_hs": rs + hs.rds_on,
            "vf": d.vf, "rd": d.r, "rls": ls.rds_on if sync else 0.0,
            "tf": sw.dead_time[0] if sync else 0.0, "node": node_parts(scenario),
            "g": 0.0 if load.resistance in (None, math.inf) else 1.0 / load.resistance,
            "icc": load.current, "ring": True,
            "vc": scenario.supply.voltage + hs.body_diode.vf, "r_h": rs + hs.body_diode.r,
            "t_ramp": fall_ramp(scenario),
            "t_rise": rise_delay(scenario)}


def _swing(p: dict, vo: float, ipk: float) -> dict:
    """The node's swing after the high side opens at ``ipk`` [A]: from ``Vin - (Rs +
    Rds_hs) Ipk`` on the series RLC (:func:`~bucksim.analysis.budget_ring.rlc_swing`)
    until the diode clamps the terminal, ``vn - (Rn - r) i = -Vf`` (within the falling
    dead time in a synchronous stage); then the capacitance steps to ``-Vf - r i``."""
    node, vf = p["node"], p["vf"]
    L, R, cn = node.L, node.R, node.cn
    v0 = p["vin"] - p["r_hs"] * ipk
    out = {"t_swing": 0.0, "v_swing": -vf, "i_swing": ipk, "swing_square": 0.0,
           "swing_charge": 0.0, "swing_step": 0.0, "clamped": True}
    if cn <= 0:
        return out
    # behind the channel's turn-off ramp the swing runs late by t_f / 2, on the
    # constant-current clock of budget_ramps (first order in the ramp)
    t_r = p.get("t_ramp", 0.0)
    t_max = ramped_charge_time(p["tf"], t_r) if p["sync"] else math.inf
    t_s = rlc_time_to(L, R, cn, vo, v0, ipk, -vf, node.rn - p["rd"], t_max)
    if not math.isfinite(t_s):
        if not p["sync"]:   # a current too small to reach the clamp: left as a jump (rare)
            return out
        t_s, out["clamped"] = t_max, False
    v_s, i_s = rlc_swing(L, R, cn, vo, v0, ipk, t_s)
    t_real = ramped_time(t_s, t_r)
    # int i_C^2: the ramp's share replaces the constant current's over the same charge
    square = rlc_square(L, R, cn, vo, v0, ipk, t_s) + (
        ramped_square(ipk, t_real, t_r) - ipk * ipk * t_s)
    # the ramp holds the node near v0 for the delay: the current rises on meanwhile
    i_s += (v0 - vo) * (t_real - t_s) / L
    out.update(t_swing=t_real, v_swing=v_s, i_swing=i_s, swing_charge=cn * (v0 - v_s),
               swing_square=square)
    if out["clamped"]:
        out["swing_step"] = transfer(node, 0.0, v_s, -vf - p["rd"] * i_s)
    return out


def _period(p: dict, D: float, vo: float, i0: float = 0.0) -> dict | None:
    """The DCM period at output ``vo`` [V] from the current ``i0`` [A] at turn-on.

    First order in the series resistances (each drop at its ramp's mean
    current). After the high side opens at ``Ipk`` the node swings
    (:func:`_swing`), the diode carries the current (to zero in the
    asynchronous stage, to the end of the dead time otherwise), then the
    low-side channel to zero. The idle ring is
    :func:`~bucksim.analysis.budget_ring.idle_ring`'s.
    """
    T, L, vin, vf = p["T"], p["L"], p["vin"], p["vf"]
    # the channel closes fully its rise time after the clock where the ramps are circuit
    # (budget_ramps.rise_delay): the ring goes on meanwhile (first order)
    t_on = D * T - p["t_rise"]
    h = 0.5 * p["r_on"] * t_on
    ipk = (i0 * (L - h) + (vin - vo) * t_on) / (L + h)
    if ipk <= 0.0 or vo <= 0.0:
        return None
    out = _swing(p, vo, ipk)
    t_s, i_s = out["t_swing"], out["i_swing"]
    rd = p["rd"] + p["dcr"]
    if p["sync"]:
        t_d = p["tf"] - t_s
        a = rd * t_d / (2.0 * L)
        i_c = (i_s * (1.0 - a) - (vo + vf) * t_d / L) / (1.0 + a)
    else:
        i_c = -1.0
    if i_c <= 0.0:   # the diode carries the current to zero
        t_d, i_c = L * i_s / (vo + vf + 0.5 * rd * i_s), 0.0
    t_c = L * i_c / (vo + 0.5 * (p["rls"] + p["dcr"]) * i_c) if i_c > 0 else 0.0
    t_idle = T - t_on - t_s - t_d - t_c
    charge = (0.5 * (i0 + ipk) * t_on + out["swing_charge"] + 0.5 * (i_s + i_c) * t_d
              + 0.5 * i_c * t_c)
    out.update(t_on=t_on, i_on=i0, peak=ipk, t_diode=t_d, i_channel=i_c, t_channel=t_c,
               t_idle=t_idle)
    if p["ring"]:
        out.update(idle_ring(p["node"], vo, 0.0 if i_c > 0 else -vf, t_idle, vin, p["vc"],
                             p["r_h"]))
    else:
        out.update(idle_ring(p["node"], vo, 0.0, 0.0, vin, p["vc"], p["r_h"]))
    out["io"] = (charge + out["ring_charge"]) / T
    return out


def _periodic(p: dict, D: float, vo: float) -> dict | None:
    """The period whose ring ends where its on-ramp starts: ``i0 = i_turn_on(i0)``.

    ``h(i0) = i0 - i_turn_on(i0)`` is negative at ``-A/Z`` and positive at
    ``A/Z`` (the ring's current stays within ``A/Z``); without the clamp it
    rises in between (a larger ``i0`` lengthens the falling ramp by
    ``L di0 / vo`` and shifts the ring's phase by ``w L di0 / vo``, which moves
    its end current by at most ``di0``), so bisection finds the one root.
    """
    per = _period(p, D, vo)
    if per is None or per["ring_current"] == 0.0:
        return per
    lo, hi = -per["ring_current"], per["ring_current"]
    for _ in range(44):     # 2^-44 of the bracket: 1e-13 of A / Z
        mid = 0.5 * (lo + hi)
        m = _period(p, D, vo, mid)
        if m is None or mid - m["i_turn_on"] > 0.0:
            hi = mid
        else:
            lo = mid
    return _period(p, D, vo, 0.5 * (lo + hi))


def _roots(excess, lo: float, hi: float, n: int) -> list[float]:
    """Zeros of ``excess`` on ``[lo, hi]`` where it falls through zero (a scan of ``n``
    steps, then bisection)."""
    grid = [lo + (hi - lo) * k / n for k in range(n + 1)]
    vals = [excess(v) for v in grid]
    out = []
    for a, b, fa, fb in zip(grid, grid[1:], vals, vals[1:], strict=False):
        if fa > 0.0 >= fb:
            for _ in range(100):
                mid = 0.5 * (a + b)
                if excess(mid) > 0.0:
                    a = mid
                else:
                    b = mid
                if b - a <= 1e-15 * hi:
                    break
            out.append(0.5 * (a + b))
    return out


def dcm_point(scenario, D: float) -> dict | None:
    """DCM operating point at duty ``D``, or None when the stage does not idle.

    Returns
    -------
    dict or None
        The keys of :func:`bucksim.analysis.budget.operating_point` (``valley``:
        the current at turn-on) plus ``mode`` ``"dcm"``, ``d2`` and ``d3`` (the
        falling and idle shares of the period), ``t_swing``, ``t_diode``,
        ``t_channel`` [s], ``i_swing``, ``i_channel`` [A] (current where the node
        reaches the clamp and where the low-side channel takes over), ``v_swing``
        [V] (the node there), ``i_on`` [A] and ``v_on`` [V] (current and node at
        turn-on), the ring's ``ring_amplitude`` [V], ``ring_current`` [A]
        (``A / Z``), ``ring_phase`` [rad], ``ring_charge`` [C], ``ring_square``
        [A^2 s], ``ring_decay`` [1/s], ``open_square`` [A^2 s], ``clamp_charge``
        [C], ``clamp_square`` [A^2 s] and ``clamp_step`` [J] (the high-side body
        diode's, where the crest meets ``Vin + Vf``:
        :func:`~bucksim.analysis.budget_ring.idle_ring`), the swing's
        ``swing_square`` [A^2 s] and ``swing_step`` [J] (the capacitance's step
        to the diode's clamp: :func:`_swing`), and ``vo_no_ring`` [V] (the same
        point with the ring left out).

    Notes
    -----
    ``Vo`` solves ``Io(Vo) = Vo / R + I_cc`` (charge balance), with

    .. math::

        I_{pk} = i_0 + \frac{(V_{in} - V_o - R_{on} (i_0 + I_{pk})/2) D T}{L}, \\qquad
        D_2 T = \frac{L I_{pk}}{V_o + V_f + R I_{pk}/2} \\;(\text{one diode ramp}),
        \\qquad I_o = \tfrac12 (i_0 + I_{pk}) D + \tfrac12 I_{pk} D_2 + q_{ring} / T,

    ``R_on = Rs + Rds_hs + DCR``; a synchronous stage splits the falling ramp
    into the node's swing, the body diode in the dead time and the channel
    (:func:`_period`); ``i0`` and ``q_ring`` come from the idle ring
    (:func:`~bucksim.analysis.budget_ring.idle_ring`, :func:`_periodic`). Lossless
    (``R = 0``, ``Vf = 0``, ``Cn = 0``: no ring, ``i0 = 0``) this gives ``D_2 = D (1 - M) / M`` and
    ``M = 2 / (1 + sqrt(1 + 4 K / D^2))`` [1]_. With the ring, ``Io(Vo)``
    oscillates with the ring's phase and can cross the load line more than
    once: the point is the crossing at which ``Io - Vo / R`` falls (stable
    for the output capacitor's charge balance) nearest the ring-free one.
    """
    p = _parts(scenario)
    vin = p["vin"]
    free_p = dict(p, ring=False)

    def excess(vo, q=p):
        per = _periodic(q, D, vo)
        return (per["io"] if per else 0.0) - (p["g"] * vo + p["icc"])

    lo, hi = 1e-12 * vin, vin * (1.0 - 1e-12)
    free = _roots(lambda v: excess(v, free_p), lo, hi, 1)
    if not free:
        return None
    roots = _roots(excess, lo, hi, 200) if p["node"].cn > 0 else free
    if not roots:
        return None
    vo = min(roots, key=lambda v: abs(v - free[0]))
    per = _periodic(p, D, vo)
    if per is None or per["t_idle"] <= 0.0:
        return None
    T = p["T"]
    tf, tr = scenario.switching.dead_time if p["sync"] else (0.0, 0.0)
    keys = ("t_swing", "t_diode", "t_channel", "i_swing", "i_channel", "v_swing", "i_on",
            "v_on", "ring_amplitude", "ring_current", "ring_phase", "ring_charge",
            "ring_square", "clamp_charge", "clamp_square", "ring_decay", "swing_square",
            "swing_step", "open_square", "clamp_step")
    return {"duty": D, "vin": vin, "vo": vo, "io": p["g"] * vo + p["icc"],
            "ripple": per["peak"] - min(per["i_on"], -per["ring_current"]),
            "peak": per["peak"], "valley": per["i_on"],
            "dead_time_share": (tf + tr) / T, "frequency": 1.0 / T, "conduction_mode": "dcm",
            "d2": (per["t_swing"] + per["t_diode"] + per["t_channel"]) / T,
            "d3": per["t_idle"] / T, "vo_no_ring": free[0], **{k: per[k] for k in keys}}


def inductor_mean_square(op: dict) -> float:
    """Mean square of iL [A^2] over the DCM period: the ramps (app. A of [1]_) and
    the node's swing and the idle ring (:mod:`bucksim.analysis.budget_ring`)."""
    T, pk, i_s, i_c = 1.0 / op["frequency"], op["peak"], op["i_swing"], op["i_channel"]
    return (op["duty"] * T * ramp_mean_square(op["i_on"], pk) + op["swing_square"]
            + op["t_diode"] * ramp_mean_square(i_s, i_c) + op["t_channel"] * i_c * i_c / 3.0
            + op["ring_square"]) / T


def dcm_conduction(scenario, op: dict) -> list[tuple]:
    """Conduction items [W] in DCM: the triangular pulses of each path."""
    fs, D, pk = op["frequency"], op["duty"], op["peak"]
    i_s, i_c = op["i_swing"], op["i_channel"]
    hs, ls = scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    d = ls.body_diode if sync else ls
    ms_on = D * ramp_mean_square(op["i_on"], pk)
    ms_l = inductor_mean_square(op)
    ramp = "straight ramps with first-order drops"
    diode = ((d.vf * 0.5 * (i_s + i_c) + d.r * ramp_mean_square(i_s, i_c)) * op["t_diode"] * fs,
             "(Vf (I_s + I_c)/2 + r (I_s^2 + I_s I_c + I_c^2)/3) t_diode fs")
    bd = hs.body_diode
    hs_diode = ("high_side_body_diode.conduction", "high_side_body_diode", "conduction",
                (bd.vf * op["clamp_charge"] + bd.r * op["clamp_square"]) * fs,
                "(Vf int|i| + r int i^2) fs where the idle ring's crest meets Vin + Vf, "
                "0 below", "derived (the damped ring cut at the clamp, budget_ring.idle_ring)",
                "the diode's ramp with its drops neglected; the ring about a constant Vo")
    items = [("high_side.conduction", "high_side", "conduction", hs.rds_on * ms_on,
              "Rds_hs D (i0^2 + i0 Ipk + Ipk^2) / 3", _EM5, ramp)]
    if sync:
        items += [("low_side.conduction", "low_side", "conduction",
                   ls.rds_on * op["t_channel"] * fs * i_c * i_c / 3.0,
                   "Rds_ls (t_channel fs) I_c^2 / 3", _EM5, ramp),
                  ("low_side_body_diode.conduction", "low_side_body_diode", "conduction",
                   *diode, _EM5, ramp + "; the swing from the ripple formula's peak"),
                  hs_diode]
    else:
        items += [("low_side.conduction", "low_side", "conduction", *diode, _EM5,
                   ramp + "; the swing from the ripple formula's peak"), hs_diode]
    rn = scenario.switching.node_resistance
    if rn > 0 and op["ring_decay"] > 0:
        items.append(("switch_node.resistance", "switch_node", "conduction",
                      rn * (op["swing_square"] + op["open_square"]) * fs,
                      "Rn (int i^2 over the swing + over the idle ring) fs, R int i^2 = the "
                      "series RLC's energy loss, Rn's share Rn / (Rn + DCR)",
                      "derived (series RLC natural response, Nilsson & Riedel; budget_ring)",
                      "the swing's start at the closed form's peak; Vo held constant "
                      "(the output's ESR damps too)"))
    items += [("inductor.conduction", "inductor", "conduction", scenario.inductor.dcr * ms_l,
               "DCR <iL^2>, the ramps, the node's swing and the damped idle ring "
               "(int i^2 = energy loss / (Rn + DCR))",
               _EM5, ramp + "; the ring about a constant Vo"),
              ("output_capacitor.conduction", "output_capacitor", "conduction",
               scenario.output_capacitor.esr * max(ms_l - op["io"] ** 2, 0.0),
               "ESR (<iL^2> - Io^2)", _EM5,
               "the ripple current's share in the load (all of it taken into C)")]
    if scenario.supply.resistance > 0 and scenario.input_capacitor is None:
        items.append(("supply.conduction", "supply", "conduction",
                      scenario.supply.resistance * ms_on, "Rs D (i0^2 + i0 Ipk + Ipk^2) / 3",
                      _EM5, ramp))
    return items + input_items(scenario, op["i_on"], pk, D, fs)


def dcm_switching(scenario, op: dict) -> list[tuple]:
    """Edge items [W] in DCM: turn-on at the ring's current and node, turn-off at the peak."""
    fs, vin, pk, i0 = op["frequency"], op["vin"], op["peak"], op["i_on"]
    hs, ls = scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    node = node_parts(scenario)
    d_ls = ls.body_diode if sync else ls
    # in the circuit the ramp's node swings on to the diode's clamp, -Vf (budget_ramps)
    swing = vin + d_ls.vf if ramps_in_circuit(scenario)[0] else vin
    e_off = float(snubbed_turn_off(swing, pk, hs.fall_time, node.cn, node.rn))
    # a ramp in the circuit turns on against the node where the ring left it (derived)
    v_ds = vin - op["v_on"] if fall_ramp(scenario) or ramps_in_circuit(scenario)[0] else vin
    items = [("switching.overlap", "high_side", "switching",
              (0.5 * v_ds * max(i0, 0.0) * hs.rise_time + e_off) * fs,
              "(0.5 Vin max(i0, 0) t_rise + E_off(Ipk)) fs, E_off = 0.5 Vin I t_fall "
              "snubbed by Cn at low current (edges.snubbed_turn_off, derived); i0 = 0 "
              "without node capacitance (turn-on at zero current)", _CP,
              "the edge currents of straight ramps and the damped ring")]
    r_hs = scenario.supply.resistance + hs.rds_on
    e_on = transfer(node, vin, op["v_on"], vin - r_hs * i0) + op["clamp_step"]
    e_ls = 0.0
    if sync and op["i_channel"] > 0:
        i_c = op["i_channel"]
        v_before = -(ls.body_diode.vf + ls.body_diode.r * i_c) if op["t_diode"] > 0 \
            else op["v_swing"]
        e_ls = transfer(node, 0.0, v_before, -ls.rds_on * i_c)
    e_ls += op["swing_step"]
    items.append(("switching.coss", "high_side", "switching", (e_on + e_ls) * fs,
                  "integral (V_p - v) Cn(v) dv fs per closing switch (Cn (v_b - v_a)(V_p - "
                  "(v_a + v_b)/2) linear): the high side from the damped ring's node v_on = "
                  "Vo - A e^(-sigma t)(cos wd t + sigma/wd sin wd t), the low side from the "
                  "diode's clamp (~0.5 Cn Vf^2); with Rn the capacitance's step of ~Rn I at "
                  "each diode's clamp", "derived (charge moved through a closing switch, "
                  "Erickson & Maksimovic 3rd ed. ch. 4; the series RLC ring, Nilsson & Riedel)",
                  "the phase error of straight ramps (the ring's phase at turn-on)"))
    items.append(("switching.recovery", "high_side", "switching",
                  _recovered(ls.body_diode if sync else ls, op) * vin * fs,
                  "k q Vin fs, q the charge left of the diode's ramp after the channel and "
                  "the idle interval (charge control; 0 for a fixed qrr: no diode conducts "
                  "at turn-on in DCM)", "derived (charge control, Erickson & Maksimovic "
                  "3rd ed. ch. 4)", "the straight diode ramp"))
    gate, formula = gate_drive_closed_form(scenario, fs)
    items.append(("gate_drive", "gate drive", "switching", gate, formula, _CP,
                  "nothing: the same charge per turn-on on both sides (checks the count "
                  "and the rail)"))
    return items


def _recovered(diode, op: dict) -> float:
    """Charge [C] the low-side diode gives up at high-side turn-on in DCM."""
    tau, k = recovery_parameters(diode)
    if tau <= 0.0:
        return 0.0
    q = stored_charge(0.0, op["i_swing"], op["i_channel"], op["t_diode"], tau)
    decay = op["t_channel"] + op["d3"] / op["frequency"]
    return k * stored_charge(q, 0.0, 0.0, decay, tau)


def dcm_core(scenario, op: dict) -> tuple | None:
    """iGSE core loss [W] of the DCM flux: the two ramps and the idle ring."""
    core = scenario.inductor.core
    if core is None:
        return None
    from bucksim.analysis.coreloss import cos_power_integral, igse_coefficient
    a, b = core.alpha, core.beta
    T = 1.0 / op["frequency"]
    ki = igse_coefficient(core.k, a, b)
    na = core.turns * core.area
    L = scenario.inductor.inductance
    pk, i0 = op["peak"], op["i_on"]
    # the major loop runs from the ring's trough (reached after a quarter lobe) to the peak
    decay = op["ring_decay"]
    w = op["ring_phase"] / (op["d3"] * T) if op["d3"] > 0 else 0.0
    trough = op["ring_current"] * (math.exp(-decay * 0.5 * math.pi / w) if w > 0 else 1.0)
    low = min(i0, -trough) if op["ring_phase"] > 0.5 * math.pi else min(i0, 0.0)
    d_b = L * (pk - low) / na
    ramps = ((L * (pk - i0) / na) ** a * (op["duty"] * T) ** (1 - a)
             + (L * pk / na) ** a * (op["d2"] * T) ** (1 - a)) / T
    # the ring's flux swing decays as e^(-sigma t): int e^(-alpha sigma t) dt over D3 T
    x = a * decay * op["d3"] * T
    share = op["d3"] * (-math.expm1(-x) / x if x > 1e-12 else 1.0)
    ring = (op["ring_amplitude"] / na) ** a * cos_power_integral(a) / (2 * math.pi) * share
    pv = ki * d_b ** (b - a) * (ramps + ring)
    return ("inductor.core", "inductor", "core", pv * core.volume,
            "V k_i dB^(beta-alpha) (dB_on^alpha (DT)^(1-alpha) + dB_off^alpha (D2 T)^(1-alpha) "
            "+ (A/NA)^alpha <|cos|^alpha> (1 - e^(-alpha sigma D3 T)) / (alpha sigma)) / T",
            "Venkatachalam et al., IEEE COMPEL "
            "2002 (iGSE, piecewise-linear flux); the ring's term derived",
            "straight ramps; the ring's flux averaged over whole lobes, its decay "
            "e^(-sigma t) taken on the envelope")
