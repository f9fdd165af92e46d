"""The switch node's closed forms: the series L, R, Cn swing and ring, and node charge.

While nothing conducts the node is open (:mod:`bucksim.model.stage`): the
inductor ``L``, the series resistance ``R = Rn + DCR`` (``Rn``:
``switching.node_resistance``) and the node capacitance ``Cn`` form a series
RLC circuit driven by the output voltage ``vo`` (held constant over a swing),

.. math:: L \\frac{di}{dt} = u - R i, \\qquad C_n \\frac{du}{dt} = -i, \\qquad u = v_n - v_o,

whose natural response is the damped sinusoid of [1]_ (decay ``sigma = R / 2L``,
damped frequency ``wd = sqrt(1 / (L Cn) - sigma^2)``). The node's terminal voltage
is ``vn - Rn i`` (the capacitance's voltage less its resistance's drop), so a diode
starts to conduct where ``vn - (Rn - r) i`` reaches its clamp.

A switch or diode that closes on the node moves its charge at once: from a source at
``V_p`` taking the node from ``v_a`` to ``v_b`` it dissipates
``integral_{v_a}^{v_b} (V_p - v) Cn(v) dv`` [2]_, which a capacitance table
(:class:`~bucksim.model.capacitance.NodeCurve`, the part's own description) gives
exactly: ``Qoss Vin - Eoss`` for a hard turn-on from 0 V. A swing at constant current
takes the table's charge over the current. The resonant swing and ring keep a
linear ``Cn``, the charge-equivalent one of a table
(:func:`bucksim.model.stage.node_capacitance`).

References
----------
.. [1] J. W. Nilsson and S. A. Riedel, *Electric Circuits*, Pearson: the natural
   response of a series RLC circuit (underdamped: ``e^{-sigma t}`` times a sinusoid
   at ``wd``; overdamped: two real exponentials); cited from memory.
.. [2] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 4 (the energy a switch dissipates charging a
   capacitance from a voltage source); cited from memory.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from bucksim.model.capacitance import NodeCurve
from bucksim.model.stage import node_capacitance, node_curve

#: Below this ``R t / L`` the ring is taken lossless for ``int i^2 dt`` (the energy
#: balance would divide a rounding error by ``R``).
_LOSSLESS = 1e-8


@dataclass(frozen=True)
class Node:
    """The switch node as the closed forms see it.

    Attributes
    ----------
    cn : float
        Charge-equivalent capacitance [F] (0: no node state).
    curve : NodeCurve or None
        The capacitance table's node curve at ``Vin``, None when linear.
    rn, dcr, L : float
        ``switching.node_resistance`` [ohm], the inductor's DCR [ohm] and
        inductance [H]; the ring's ``R = rn + dcr``.
    """

    cn: float
    curve: NodeCurve | None
    rn: float
    dcr: float
    L: float

    @property
    def R(self) -> float:
        return self.rn + self.dcr


def node_parts(scenario) -> Node:
    """The :class:`Node` of ``scenario``."""
    curve = node_curve(scenario, scenario.supply.voltage)
    cn = node_capacitance(scenario)
    return Node(cn, None if curve.linear else curve,
                scenario.switching.node_resistance if cn > 0 else 0.0,
                scenario.inductor.dcr, scenario.inductor.inductance)


def transfer(node, v_path: float, v_a: float, v_b: float) -> float:
    """Energy [J] a switch from a source at ``v_path`` [V] dissipates taking the
    node from ``v_a`` to ``v_b`` [V] at once.

    ``node``: a :class:`Node`, or a linear capacitance [F]. Linear:
    ``Cn (v_b - v_a)(v_path - (v_a + v_b) / 2)``; a table: ``integral (v_path - v)
    Cn(v) dv`` (derived: the source's work less the change of stored energy [2]_).
    """
    if isinstance(node, Node):
        if node.curve is not None:
            return float(node.curve.transfer_loss(v_a, v_b, v_path))
        node = node.cn
    return node * (v_b - v_a) * (v_path - 0.5 * (v_a + v_b))


def slew_charge(node: Node, v_a: float, v_b: float) -> float:
    """Charge [C] the node gives up (or takes) between ``v_a`` and ``v_b`` [V]:
    ``|integral Cn dv|`` (the table's, else ``Cn |v_b - v_a|``)."""
    if node.curve is not None:
        return abs(float(node.curve.charge(v_a, v_b)))
    return node.cn * abs(v_b - v_a)


def slew_excess(node: Node, v_a: float, v_c: float, i: float) -> float:
    """``integral (v - v_c) dt`` [V s] over a swing at constant current ``i`` [A]
    from ``v_a`` to ``v_c`` [V]: ``dt = Cn(v) dv / i``, so (derived)
    ``integral_{v_c}^{v_a} (v - v_c) Cn(v) dv / i`` (``Cn (v_a - v_c)^2 / 2i`` linear)."""
    if node.curve is not None:
        c = node.curve
        return abs(float(c.moment(v_c, v_a) - v_c * c.charge(v_c, v_a))) / i
    return node.cn * (v_a - v_c) ** 2 / (2.0 * i)


def slew_to(node: Node, v_a: float, q: float) -> float:
    """The node voltage [V] after a charge ``q`` [C] leaves it from ``v_a`` (a swing
    down at a positive current; the table's charge inverted by bisection)."""
    if node.curve is None:
        return v_a - q / node.cn
    lo, hi = v_a - 2.0 * q / node.cn - 1.0, v_a
    while slew_charge(node, lo, v_a) < q:
        lo = v_a - 2.0 * (v_a - lo)
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if slew_charge(node, mid, v_a) < q:
            hi = mid
        else:
            lo = mid
    return 0.5 * (lo + hi)


def _basis(L: float, R: float, cn: float, t: float) -> tuple[float, float, float]:
    """``(e^{-sigma t}, cos(wd t), sin(wd t) / wd)`` of the series RLC (overdamped:
    ``cosh`` and ``sinh(g t) / g`` with ``g = sqrt(sigma^2 - w0^2)``; critical: 1, t)."""
    sigma = R / (2.0 * L)
    d2 = 1.0 / (L * cn) - sigma * sigma
    if d2 > 0.0:
        wd = math.sqrt(d2)
        return math.exp(-sigma * t), math.cos(wd * t), math.sin(wd * t) / wd
    if d2 < 0.0:
        g = math.sqrt(-d2)
        return math.exp(-sigma * t), math.cosh(g * t), math.sinh(g * t) / g
    return math.exp(-sigma * t), 1.0, t


def rlc_swing(L: float, R: float, cn: float, vo: float, v0: float, i0: float,
              t: float) -> tuple[float, float]:
    """Node voltage [V] (the capacitance's) and current [A] after ``t`` [s] of the open
    node from ``(v0, i0)``; ``L`` [H], ``R`` [ohm] ``>= 0``, ``cn`` [F] ``> 0``.

    Notes
    -----
    The natural response of the series RLC [1]_, with ``u = vn - vo``,
    ``sigma = R / 2L``, ``wd^2 = 1/(L Cn) - sigma^2`` (derived from the initial
    values ``u(0) = u0``, ``i(0) = i0``, ``u'(0) = -i0 / Cn``,
    ``i'(0) = (u0 - R i0) / L``):

    .. math::

        u = e^{-\\sigma t}\\left(u_0 \\cos w_d t + (\\sigma u_0 - i_0 / C_n)
            \\frac{\\sin w_d t}{w_d}\\right), \\qquad
        i = e^{-\\sigma t}\\left(i_0 \\cos w_d t + (u_0 / L - \\sigma i_0)
            \\frac{\\sin w_d t}{w_d}\\right).

    ``R = 0`` is the lossless L-Cn swing ``u = u0 cos wt - Z i0 sin wt``,
    ``i = i0 cos wt + (u0 / Z) sin wt``, ``Z = sqrt(L / Cn)``.
    """
    e, c, s = _basis(L, R, cn, t)
    sigma, u0 = R / (2.0 * L), v0 - vo
    return (vo + e * (u0 * c + (sigma * u0 - i0 / cn) * s),
            e * (i0 * c + (u0 / L - sigma * i0) * s))


def ring_energy(L: float, cn: float, vo: float, v: float, i: float) -> float:
    """Energy [J] of the ring about ``vo``: ``L i^2 / 2 + Cn (v - vo)^2 / 2``."""
    return 0.5 * L * i * i + 0.5 * cn * (v - vo) ** 2


def rlc_square(L: float, R: float, cn: float, vo: float, v0: float, i0: float,
               t: float) -> float:
    """``int_0^t i^2 dt`` [A^2 s] of the open node's swing (:func:`rlc_swing`).

    Notes
    -----
    The energy balance of the series RLC, ``d/dt (L i^2/2 + Cn u^2/2) = -R i^2``
    (derived), gives ``R int i^2 dt = E(0) - E(t)``: the energy dissipated in
    ``R = Rn + DCR``, shared between them as ``Rn : DCR``. Lossless (``R t / L``
    below 1e-8) the arc's own integral (derived)::

        int i^2 = i0^2 (t/2 + s2) + (u0/Z)^2 (t/2 - s2) + i0 (u0/Z) sin^2(wt) / w,

    ``s2 = sin(2 w t) / (4 w)``.
    """
    if t <= 0.0:
        return 0.0
    if R * t / L > _LOSSLESS:
        v1, i1 = rlc_swing(L, R, cn, vo, v0, i0, t)
        return (ring_energy(L, cn, vo, v0, i0) - ring_energy(L, cn, vo, v1, i1)) / R
    w, z = 1.0 / math.sqrt(L * cn), math.sqrt(L / cn)
    q, s2 = (v0 - vo) / z, math.sin(2.0 * w * t) / (4.0 * w)
    return (i0 * i0 * (0.5 * t + s2) + q * q * (0.5 * t - s2)
            + i0 * q * math.sin(w * t) ** 2 / w)


def lc_time_to(L: float, cn: float, vo: float, v0: float, i0: float, v: float) -> float:
    """First time [s] the lossless swing (:func:`rlc_swing`, ``R = 0``) from ``(v0,
    i0)`` reaches ``v`` [V], or ``inf`` when it stays short of it (its crest or trough
    ``vo -+ sqrt((v0 - vo)^2 + (Z i0)^2)`` does not get there)."""
    w, z = 1.0 / math.sqrt(L * cn), math.sqrt(L / cn)
    u0, uc = v0 - vo, v - vo
    r = math.hypot(u0, z * i0)
    if abs(uc) > r:
        return math.inf
    # u = r cos(wt + th): the first wt >= 0 with wt + th = -+ acos(uc / r) (mod 2 pi)
    th, ph = math.atan2(z * i0, u0), math.acos(uc / r)
    return min((sg * ph - th) % (2.0 * math.pi) for sg in (1.0, -1.0)) / w


def rlc_time_to(L: float, R: float, cn: float, vo: float, v0: float, i0: float, v: float,
                k: float = 0.0, t_max: float = math.inf) -> float:
    """First time [s] in ``[0, t_max]`` at which ``vn - k i`` of :func:`rlc_swing`
    reaches ``v`` [V], or ``inf``.

    ``k`` [ohm]: a diode's clamp on the terminal voltage ``vn - Rn i`` reads
    ``vn - (Rn - r) i = V_clamp``. Lossless with ``k = 0``: :func:`lc_time_to`.
    Else the first sign change on a grid of an eighth of a half period, refined
    by Newton's method kept inside the bracket; none where the ring's energy
    cannot reach it: ``|u - k i| <= sqrt(u^2 + (Z i)^2) sqrt(1 + (k/Z)^2)``, and
    ``u^2 + (Z i)^2`` does not grow
    (derived: :func:`rlc_square`'s energy balance).
    """
    if R == 0.0 and k == 0.0:
        t = lc_time_to(L, cn, vo, v0, i0, v)
        return t if t <= t_max else math.inf
    z = math.sqrt(L / cn)
    if abs(v - vo) > math.hypot(v0 - vo, z * i0) * math.hypot(1.0, k / z):
        return math.inf

    def g(t):
        vn, i = rlc_swing(L, R, cn, vo, v0, i0, t)
        return vn - k * i - v

    g0 = g(0.0)
    if g0 == 0.0:
        return 0.0
    d2 = 1.0 / (L * cn) - (R / (2.0 * L)) ** 2
    # one ring period when it rings (a first crossing comes within it), else 20 decay times
    horizon = 2.0 * math.pi / math.sqrt(d2) if d2 > 0 else 20.0 * L / R
    horizon = min(horizon, t_max)
    h = math.pi * math.sqrt(L * cn) / 8.0
    n = max(int(math.ceil(horizon / h)), 1)
    a = 0.0
    for j in range(1, n + 1):
        b = horizon * j / n
        if (g(b) > 0.0) != (g0 > 0.0):
            return _newton(L, R, cn, vo, v0, i0, v, k, a, b, g0 > 0.0)
        a = b
    return math.inf


def _newton(L, R, cn, vo, v0, i0, v, k, a, b, above) -> float:
    """The root of ``vn - k i - v`` in ``[a, b]`` (``above``: positive at ``a``):
    Newton steps on ``d/dt (vn - k i) = -i / Cn - k (u - R i) / L``, a bisection
    wherever a step leaves the bracket."""
    t = 0.5 * (a + b)
    for _ in range(100):
        vn, i = rlc_swing(L, R, cn, vo, v0, i0, t)
        f = vn - k * i - v
        if (f > 0.0) == above:
            a = t
        else:
            b = t
        df = -i / cn - k * (vn - vo - R * i) / L
        step = f / df if df != 0.0 else math.inf
        t_new = t - step
        if not a < t_new < b:
            t_new = 0.5 * (a + b)
        if abs(t_new - t) <= 1e-12 * b or b - a <= 1e-15 * b:
            return t_new
        t = t_new
    return t


def lc_dead_time_integral(node: Node, vo: float, v0: float, i0: float, clamp: float,
                          k: float, td: float) -> float:
    """``int vsw dt`` [V s] over a dead time ``td`` [s] whose node swings up from ``(v0,
    i0)`` (:func:`rlc_swing`, ``i0 < 0``) until a diode clamps it at ``clamp`` [V]
    (where ``vn - k i`` reaches it).

    Notes
    -----
    From ``L di/dt = u - R i`` and ``Cn du/dt = -i`` (derived): ``int_0^t u =
    L (i - i0) - R Cn (u - u0)``, and the terminal voltage ``vsw = vn - Rn i``
    adds ``Rn Cn (u - u0)``; then ``clamp`` for the rest of the dead time.
    """
    L, R, cn = node.L, node.R, node.cn
    t1 = min(rlc_time_to(L, R, cn, vo, v0, i0, clamp, k, td), td)
    v1, i1 = rlc_swing(L, R, cn, vo, v0, i0, t1)
    swing = vo * t1 + L * (i1 - i0) - (R - node.rn) * cn * (v1 - v0)
    return swing + clamp * (td - t1)


def ramp_mean_square(i_a: float, i_b: float) -> float:
    """Mean square [A^2] of a linear ramp from ``i_a`` to ``i_b``: ``(i_a^2 + i_a i_b +
    i_b^2) / 3`` (Erickson & Maksimovic, app. A; from memory)."""
    return (i_a * i_a + i_a * i_b + i_b * i_b) / 3.0


def idle_ring(node: Node, vo: float, v_open: float, t_idle: float, vin: float,
              vc: float, r_h: float) -> dict:
    """The DCM idle ring about ``vo`` [V] from ``(vn, iL) = (v_open, 0)`` over ``t_idle`` [s].

    Parameters
    ----------
    node : Node
    vo, v_open : float
        Output voltage and the node where the current stopped [V]: 0 after the
        low-side channel, ``-Vf`` after a diode.
    t_idle : float
        From the current's stop to the high side's turn-on [s].
    vin, vc, r_h : float
        Supply voltage [V], the high-side body diode's clamp ``Vin + Vf`` [V] and
        its path's resistance ``Rs + r`` [ohm].

    Returns
    -------
    dict
        ``ring_amplitude`` ``A = vo - v_open`` [V], ``ring_current`` ``A / Z`` [A],
        ``ring_phase`` ``wd t_idle`` [rad], ``ring_decay`` ``sigma`` [1/s],
        ``ring_charge`` [C] and ``ring_square`` [A^2 s] (``int i``, ``int i^2``),
        ``open_square`` [A^2 s] (the open node's part of it: the node resistance's),
        ``v_on`` [V] and ``i_turn_on`` [A] (at the high side's turn-on),
        ``clamp_charge`` [C], ``clamp_square`` [A^2 s] and ``clamp_step`` [J] (the
        high-side body diode's ``int |i|``, ``int i^2`` and the capacitance's step
        to it, paid from ``Vin``).

    Notes
    -----
    The series RLC's natural response from rest at ``u0 = -A`` (:func:`rlc_swing`
    with ``i0 = 0``, derived; [1]_):

    .. math::

        v_n = v_o - A e^{-\\sigma t}\\left(\\cos w_d t + \\frac{\\sigma}{w_d}\\sin w_d t
              \\right), \\qquad i_L = -\\frac{A}{L w_d} e^{-\\sigma t} \\sin w_d t,

    ``sigma = (Rn + DCR) / 2L``, ``wd = sqrt(1/(L Cn) - sigma^2)``. The node
    resistance dissipates ``Rn / (Rn + DCR)`` of the ring's energy loss
    ``A^2 Cn / 2 - E(t_idle)`` (:func:`rlc_square`). The high side closes on
    ``v_on = vn(t_idle)``. Where the terminal voltage ``vn - Rn i`` meets the
    high-side body diode's ``Vc - r_h i`` the diode takes the current ``i1``, the
    capacitance steps to ``Vc - r_h i1``, the diode ramps ``i1`` to zero over ``L
    |i1| / (Vc - vo)`` (its drops neglected) and the ring goes on from ``(Vc, 0)``.
    """
    out = {"ring_amplitude": 0.0, "ring_current": 0.0, "ring_charge": 0.0,
           "ring_square": 0.0, "open_square": 0.0, "v_on": vo, "i_turn_on": 0.0,
           "ring_phase": 0.0, "ring_decay": 0.0, "clamp_charge": 0.0,
           "clamp_square": 0.0, "clamp_step": 0.0}
    if node.cn <= 0.0 or t_idle <= 0.0:
        return out
    L, R, cn = node.L, node.R, node.cn
    a, z = vo - v_open, math.sqrt(L / cn)
    d2 = 1.0 / (L * cn) - (R / (2.0 * L)) ** 2
    out.update(ring_amplitude=a, ring_current=a / z, ring_decay=R / (2.0 * L),
               ring_phase=math.sqrt(max(d2, 0.0)) * t_idle)
    t1 = rlc_time_to(L, R, cn, vo, v_open, 0.0, vc, node.rn - r_h, t_idle)
    t_a = min(t1, t_idle)
    v, i = rlc_swing(L, R, cn, vo, v_open, 0.0, t_a)
    q, sq = cn * (v_open - v), rlc_square(L, R, cn, vo, v_open, 0.0, t_a)
    open_sq = sq
    rest = t_idle - t_a
    if rest > 0.0:
        out["clamp_step"] = transfer(node, vin, v, vc - r_h * i)
        t2 = min(L * -i / (vc - vo), rest) if i < 0 else 0.0
        i2 = i + (vc - vo) * t2 / L
        out.update(clamp_charge=-0.5 * (i + i2) * t2, clamp_square=ramp_mean_square(i, i2) * t2)
        q, sq, v, i = q + 0.5 * (i + i2) * t2, sq + ramp_mean_square(i, i2) * t2, vc - r_h * i2, i2
        if rest > t2:
            v0, i0 = v, i
            v, i = rlc_swing(L, R, cn, vo, v0, i0, rest - t2)
            s2 = rlc_square(L, R, cn, vo, v0, i0, rest - t2)
            q, sq, open_sq = q + cn * (v0 - v), sq + s2, open_sq + s2
    out.update(ring_charge=q, ring_square=sq, open_square=open_sq, v_on=v, i_turn_on=i)
    return out
