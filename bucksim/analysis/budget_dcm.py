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
(each drop at the mean current of its ramp), the diode drops in full.

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

from bucksim.analysis.edges import snubbed_turn_off
from bucksim.model.parts import Mosfet
from bucksim.model.stage import node_capacitance

_EM5 = ("Erickson & Maksimovic 3rd ed. ch. 5 (DCM from the duty) and app. A "
        "(RMS of triangular pulses)")
_CP = "common practice"


def transfer(cn: float, v_path: float, v_a: float, v_b: float) -> float:
    """Energy [J] a switch from a source at ``v_path`` [V] dissipates taking a linear
    node capacitance ``cn`` [F] from ``v_a`` to ``v_b`` [V]:
    ``Cn (v_b - v_a)(v_path - (v_a + v_b) / 2)`` (derived: the source's work less the
    change of stored energy, Erickson & Maksimovic ch. 4)."""
    return cn * (v_b - v_a) * (v_path - 0.5 * (v_a + v_b))


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


def lc_swing(L: float, cn: float, vo: float, v0: float, i0: float, t: float):
    """Node voltage [V] and inductor current [A] after ``t`` [s] of the lossless L-Cn
    swing about ``vo`` from ``(v0, i0)``; ``L`` [H], ``cn`` [F] > 0.

    Notes
    -----
    ``L diL/dt = vn - vo``, ``Cn dvn/dt = -iL`` (drops neglected; derived):
    with ``u = vn - vo``, ``w = 1/sqrt(L Cn)``, ``Z = sqrt(L/Cn)``,
    ``u = u0 cos wt - Z i0 sin wt`` and ``iL = i0 cos wt + (u0 / Z) sin wt``.
    """
    w, z = 1.0 / math.sqrt(L * cn), math.sqrt(L / cn)
    c, s = math.cos(w * t), math.sin(w * t)
    u0 = v0 - vo
    return vo + u0 * c - z * i0 * s, i0 * c + u0 / z * s


def lc_time_to(L: float, cn: float, vo: float, v0: float, i0: float, v: float) -> float:
    """First time [s] the swing of :func:`lc_swing` from ``(v0, i0)`` reaches ``v`` [V],
    or ``inf`` when it stays short of it (its crest or trough ``vo -+ sqrt((v0 -
    vo)^2 + (Z i0)^2)`` does not get there)."""
    w, z = 1.0 / math.sqrt(L * cn), math.sqrt(L / cn)
    u0, uc = v0 - vo, v - vo
    r = math.hypot(u0, z * i0)
    if abs(uc) > r:
        return math.inf
    # u = r cos(wt + th): the first wt >= 0 with wt + th = -+ acos(uc / r) (mod 2 pi)
    th, ph = math.atan2(z * i0, u0), math.acos(uc / r)
    return min((sg * ph - th) % (2.0 * math.pi) for sg in (1.0, -1.0)) / w


def lc_dead_time_integral(L: float, cn: float, vo: float, v0: float, i0: float,
                          clamp: float, td: float) -> float:
    """``int vn dt`` [V s] over a dead time ``td`` [s] whose node swings up from ``(v0,
    i0)`` (:func:`lc_swing`, ``i0 < 0``) until a diode clamps it at ``clamp`` [V].

    Notes
    -----
    ``int_0^t u = (u0 sin wt + Z i0 (cos wt - 1)) / w`` for the lossless swing
    (derived), then ``clamp`` for the rest of the dead time.
    """
    t1 = min(lc_time_to(L, cn, vo, v0, i0, clamp), td)
    w, z = 1.0 / math.sqrt(L * cn), math.sqrt(L / cn)
    u0 = v0 - vo
    swing = vo * t1 + (u0 * math.sin(w * t1) + z * i0 * (math.cos(w * t1) - 1.0)) / w
    return swing + clamp * (td - t1)


def _parts(scenario) -> dict:
    """The constants of the DCM period [SI]."""
    sw, hs, ls = scenario.switching, scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    d = ls.body_diode if sync else ls
    ind = scenario.inductor
    load = scenario.load
    return {"sync": sync, "T": sw.period, "vin": scenario.supply.voltage,
            "L": ind.inductance, "dcr": ind.dcr,
            "r_on": scenario.supply.resistance + hs.rds_on + ind.dcr,
            "vf": d.vf, "rd": d.r, "rls": ls.rds_on if sync else 0.0,
            "tf": sw.dead_time[0] if sync else 0.0, "cn": node_capacitance(scenario),
            "g": 0.0 if load.resistance in (None, math.inf) else 1.0 / load.resistance,
            "icc": load.current, "ring": True,
            "vc": scenario.supply.voltage + hs.body_diode.vf}


def _period(p: dict, D: float, vo: float, i0: float = 0.0) -> dict | None:
    """The DCM period at output ``vo`` [V] from the current ``i0`` [A] at turn-on.

    First order in the series resistances (each drop at its ramp's mean
    current). After the high side opens at ``Ipk`` the node swings on the
    lossless L-Cn arc (:func:`lc_swing`) from ``Vin`` to the diode's clamp
    ``-Vf`` (within the falling dead time in a synchronous stage), the diode
    carries the current (to zero in the asynchronous stage, to the end of the
    dead time otherwise), then the
    low-side channel to zero. The idle ring is :func:`_ring`'s.
    """
    T, L, vin, vf, cn = p["T"], p["L"], p["vin"], p["vf"], p["cn"]
    t_on = D * T
    h = 0.5 * p["r_on"] * t_on
    ipk = (i0 * (L - h) + (vin - vo) * t_on) / (L + h)
    if ipk <= 0.0 or vo <= 0.0:
        return None
    i_s, t_s, v_s = ipk, 0.0, -vf
    if cn > 0:
        # the node swings from Vin on the lossless L-Cn arc to the diode's clamp
        t_s = lc_time_to(L, cn, vo, vin, ipk, -vf)
        if p["sync"]:
            t_s = min(t_s, p["tf"])
        if math.isfinite(t_s):
            v_s, i_s = lc_swing(L, cn, vo, vin, ipk, t_s)
        else:   # a current too small to reach the clamp: left as a jump (rare)
            t_s = 0.0
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
    charge = 0.5 * ((i0 + ipk) * t_on + (ipk + i_s) * t_s + (i_s + i_c) * t_d + i_c * t_c)
    out = {"t_on": t_on, "i_on": i0, "peak": ipk, "t_swing": t_s, "v_swing": v_s,
           "i_swing": i_s, "t_diode": t_d, "i_channel": i_c, "t_channel": t_c,
           "t_idle": t_idle}
    out.update(_ring(p, vo, 0.0 if i_c > 0 else -vf, t_idle))
    out["io"] = (charge + out["ring_charge"]) / T
    return out


def _arc(z: float, w: float, u0: float, i0: float, t: float) -> tuple:
    """One lossless L-Cn arc (:func:`lc_swing`) over ``t`` [s]: the end ``u`` [V] and
    ``i`` [A], and ``int i dt`` [C] and ``int i^2 dt`` [A^2 s] over it (derived)."""
    c, s, q = math.cos(w * t), math.sin(w * t), u0 / z
    charge = (i0 * s + q * (1.0 - c)) / w
    s2 = math.sin(2.0 * w * t) / (4.0 * w)
    square = i0 * i0 * (0.5 * t + s2) + q * q * (0.5 * t - s2) + i0 * q * s * s / w
    return u0 * c - z * i0 * s, i0 * c + q * s, charge, square


def _ring(p: dict, vo: float, v_open: float, t_idle: float) -> dict:
    """The lossless idle ring about ``vo`` from ``(iL, vn) = (0, v_open)`` over ``t_idle``.

    Notes
    -----
    Once the current stops the node is open: ``L diL/dt = vn - vo``,
    ``Cn dvn/dt = -iL`` (the drops neglected), so with ``A = vo - v_open``,
    ``w = 1 / sqrt(L Cn)``, ``Z = sqrt(L / Cn)`` (derived, undamped L-C):

    .. math:: i_L = -\\frac{A}{Z} \\sin w t, \\qquad v_n = v_o - A \\cos w t .

    A crest ``vo + A`` above the high-side body diode's clamp ``Vc = Vin + Vf``
    is cut there: the diode returns the current ``i1`` it meets to the supply,
    ramping it to zero over ``L |i1| / (Vc - vo)``, and the ring goes on from
    ``(0, Vc)`` with the amplitude ``Vc - vo``. ``clamp_charge`` and
    ``clamp_square`` are that diode's ``int |i| dt`` and ``int i^2 dt``.
    """
    out = {"ring_amplitude": 0.0, "ring_current": 0.0, "ring_charge": 0.0,
           "ring_square": 0.0, "v_on": vo, "i_turn_on": 0.0, "ring_phase": 0.0,
           "clamp_charge": 0.0, "clamp_square": 0.0}
    if p["cn"] <= 0.0 or t_idle <= 0.0 or not p["ring"]:
        return out
    L, a, vc = p["L"], vo - v_open, p["vc"]
    w, z = 1.0 / math.sqrt(L * p["cn"]), math.sqrt(L / p["cn"])
    t1 = math.acos(-(vc - vo) / a) / w if vo + a > vc else math.inf
    u, i, q, sq = _arc(z, w, -a, 0.0, min(t_idle, t1))
    out.update(ring_amplitude=a, ring_current=a / z, ring_phase=w * t_idle)
    rest = t_idle - t1
    if rest > 0.0:
        t2 = min(L * -i / (vc - vo), rest)
        i2 = i + (vc - vo) * t2 / L
        out.update(clamp_charge=-0.5 * (i + i2) * t2, clamp_square=_ms(i, i2) * t2)
        q, sq, u, i = q + 0.5 * (i + i2) * t2, sq + _ms(i, i2) * t2, vc - vo, i2
        if rest > t2:
            u, i, q2, sq2 = _arc(z, w, vc - vo, 0.0, rest - t2)
            q, sq = q + q2, sq + sq2
    out.update(ring_charge=q, ring_square=sq, v_on=vo + u, i_turn_on=i)
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
    for _ in range(60):
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
        [A^2 s], ``clamp_charge`` [C] and ``clamp_square`` [A^2 s] (the high-side
        body diode's, where the crest meets ``Vin + Vf``: :func:`_ring`), and
        ``vo_no_ring`` [V] (the same point with the ring left out).

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
    (:func:`_ring`, :func:`_periodic`). Lossless (``R = 0``, ``Vf = 0``,
    ``Cn = 0``: no ring, ``i0 = 0``) this gives ``D_2 = D (1 - M) / M`` and
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
    roots = _roots(excess, lo, hi, 200) if p["cn"] > 0 else free
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
            "ring_square", "clamp_charge", "clamp_square")
    return {"duty": D, "vin": vin, "vo": vo, "io": p["g"] * vo + p["icc"],
            "ripple": per["peak"] - min(per["i_on"], -per["ring_current"]),
            "peak": per["peak"], "valley": per["i_on"],
            "dead_time_share": (tf + tr) / T, "frequency": 1.0 / T, "mode": "dcm",
            "d2": (per["t_swing"] + per["t_diode"] + per["t_channel"]) / T,
            "d3": per["t_idle"] / T, "vo_no_ring": free[0], **{k: per[k] for k in keys}}


def _ms(i_a: float, i_b: float) -> float:
    """Mean square [A^2] of a linear ramp from ``i_a`` to ``i_b`` (app. A of [1]_)."""
    return (i_a * i_a + i_a * i_b + i_b * i_b) / 3.0


def inductor_mean_square(op: dict) -> float:
    """Mean square of iL [A^2] over the DCM period: the ramps (app. A of [1]_) and
    the idle ring (:func:`_ring`)."""
    T, pk, i_s, i_c = 1.0 / op["frequency"], op["peak"], op["i_swing"], op["i_channel"]
    return (op["duty"] * T * _ms(op["i_on"], pk) + op["t_swing"] * _ms(pk, i_s)
            + op["t_diode"] * _ms(i_s, i_c) + op["t_channel"] * i_c * i_c / 3.0
            + op["ring_square"]) / T


def dcm_conduction(scenario, op: dict) -> list[tuple]:
    """Conduction items [W] in DCM: the triangular pulses of each path."""
    fs, D, pk = op["frequency"], op["duty"], op["peak"]
    i_s, i_c = op["i_swing"], op["i_channel"]
    hs, ls = scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    d = ls.body_diode if sync else ls
    ms_on = D * _ms(op["i_on"], pk)
    ms_l = inductor_mean_square(op)
    ramp = "straight ramps with first-order drops"
    diode = ((d.vf * 0.5 * (i_s + i_c) + d.r * _ms(i_s, i_c)) * op["t_diode"] * fs,
             "(Vf (I_s + I_c)/2 + r (I_s^2 + I_s I_c + I_c^2)/3) t_diode fs")
    bd = hs.body_diode
    hs_diode = ("high_side_body_diode.conduction", "high_side_body_diode", "conduction",
                (bd.vf * op["clamp_charge"] + bd.r * op["clamp_square"]) * fs,
                "(Vf int|i| + r int i^2) fs where the idle ring's crest meets Vin + Vf, "
                "0 below", "derived (the lossless ring cut at the clamp)",
                "the ring's damping before the clamp")
    items = [("high_side.conduction", "high_side", "conduction", hs.rds_on * ms_on,
              "Rds_hs D (i0^2 + i0 Ipk + Ipk^2) / 3", _EM5, ramp)]
    if sync:
        items += [("low_side.conduction", "low_side", "conduction",
                   ls.rds_on * op["t_channel"] * fs * i_c * i_c / 3.0,
                   "Rds_ls (t_channel fs) I_c^2 / 3", _EM5, ramp),
                  ("low_side_body_diode.conduction", "low_side_body_diode", "conduction",
                   *diode, _EM5, ramp + "; the node's swing undamped"),
                  hs_diode]
    else:
        items += [("low_side.conduction", "low_side", "conduction", *diode, _EM5,
                   ramp + "; the node's swing undamped"), hs_diode]
    items += [("inductor.conduction", "inductor", "conduction", scenario.inductor.dcr * ms_l,
               "DCR <iL^2>, the ramps and the idle ring (A/Z)^2 (1/2 - sin(2wt)/(4wt)) D3",
               _EM5, ramp + "; the ring's damping"),
              ("output_capacitor.conduction", "output_capacitor", "conduction",
               scenario.output_capacitor.esr * max(ms_l - op["io"] ** 2, 0.0),
               "ESR (<iL^2> - Io^2)", _EM5,
               "the ripple current's share in the load (all of it taken into C)")]
    if scenario.supply.resistance > 0:
        items.append(("supply.conduction", "supply", "conduction",
                      scenario.supply.resistance * ms_on, "Rs D (i0^2 + i0 Ipk + Ipk^2) / 3",
                      _EM5, ramp))
    return items


def dcm_switching(scenario, op: dict) -> list[tuple]:
    """Edge items [W] in DCM: turn-on at the ring's current and node, turn-off at the peak."""
    fs, vin, pk, i0 = op["frequency"], op["vin"], op["peak"], op["i_on"]
    hs, ls = scenario.high_side, scenario.low_side
    sync = isinstance(ls, Mosfet)
    cn = node_capacitance(scenario)
    e_off = float(snubbed_turn_off(vin, pk, hs.fall_time, cn))
    items = [("switching.overlap", "high_side", "switching",
              (0.5 * vin * max(i0, 0.0) * hs.rise_time + e_off) * fs,
              "(0.5 Vin max(i0, 0) t_rise + E_off(Ipk)) fs, E_off = 0.5 Vin I t_fall "
              "snubbed by Cn at low current (edges.snubbed_turn_off, derived); i0 = 0 "
              "without node capacitance (turn-on at zero current)", _CP,
              "the edge currents of straight ramps and a lossless ring")]
    r_hs = scenario.supply.resistance + hs.rds_on
    e_on = transfer(cn, vin, op["v_on"], vin - r_hs * i0)
    e_ls = 0.0
    if sync and op["i_channel"] > 0:
        i_c = op["i_channel"]
        v_before = -(ls.body_diode.vf + ls.body_diode.r * i_c) if op["t_diode"] > 0 \
            else op["v_swing"]
        e_ls = transfer(cn, 0.0, v_before, -ls.rds_on * i_c)
    items.append(("switching.coss", "high_side", "switching", (e_on + e_ls) * fs,
                  "Cn (v_b - v_a)(V_p - (v_a + v_b)/2) fs per closing switch: the high side "
                  "from the ring's node v_on = Vo - A cos(wt), the low side from the diode's "
                  "clamp (~0.5 Cn Vf^2)", "derived (charge moved through a closing switch, "
                  "Erickson & Maksimovic 3rd ed. ch. 4; the L-Cn ring)",
                  "the ring's damping and the phase error of straight ramps"))
    items.append(("switching.recovery", "high_side", "switching",
                  _recovered(ls.body_diode if sync else ls, op) * vin * fs,
                  "k q Vin fs, q the charge left of the diode's ramp after the channel and "
                  "the idle interval (charge control; 0 for a fixed qrr: no diode conducts "
                  "at turn-on in DCM)", "derived (charge control, Erickson & Maksimovic "
                  "3rd ed. ch. 4)", "the straight diode ramp"))
    gate = hs.qg * hs.gate_voltage + (ls.qg * ls.gate_voltage if sync else 0.0)
    items.append(("switching.gate", "gate drive", "switching", gate * fs,
                  "(Qg_hs Vg_hs + Qg_ls Vg_ls) fs", _CP,
                  "nothing: the same charge per turn-on on both sides (checks the count)"))
    return items


def _recovered(diode, op: dict) -> float:
    """Charge [C] the low-side diode gives up at high-side turn-on in DCM."""
    from bucksim.analysis.recovery import recovery_parameters
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
    low = min(i0, -op["ring_current"]) if op["ring_phase"] > 0.5 * math.pi else min(i0, 0.0)
    d_b = L * (pk - low) / na
    ramps = ((L * (pk - i0) / na) ** a * (op["duty"] * T) ** (1 - a)
             + (L * pk / na) ** a * (op["d2"] * T) ** (1 - a)) / T
    ring = (op["ring_amplitude"] / na) ** a * cos_power_integral(a) / (2 * math.pi) * op["d3"]
    pv = ki * d_b ** (b - a) * (ramps + ring)
    return ("inductor.core", "inductor", "core", pv * core.volume,
            "V k_i dB^(beta-alpha) (dB_on^alpha (DT)^(1-alpha) + dB_off^alpha (D2 T)^(1-alpha) "
            "+ (A/NA)^alpha <|cos|^alpha> T D3) / T", "Venkatachalam et al., IEEE COMPEL "
            "2002 (iGSE, piecewise-linear flux); the ring's term derived",
            "straight ramps; the ring's flux averaged over whole lobes")
