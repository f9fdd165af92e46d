r"""Closed forms of the switches' current ramps, for the CCM loss budget.

With node capacitance a MOSFET's ``rise_time`` and ``fall_time`` are current
ramps in the circuit (:mod:`bucksim.model.stage_ramps`): the channel is a
current source that changes linearly, and the node capacitance takes the rest.
The budget (:mod:`bucksim.analysis.budget`) then needs three first-order facts
about a CCM period, each derived here for a current ``I`` held constant over
the edge and a linear capacitance ``Cn`` (a table's charge-equivalent value):

* the high side's turn-on against the conducting low-side diode: for ``t_r`` the
  diode holds the node at ``-Vf - r (I - i_hs)`` while ``i_hs = I t / t_r``, so
  the channel is fully on for ``D T - t_r`` only, the diode conducts a triangle
  (mean ``I / 2``, mean square ``I^2 / 3``) for ``t_r`` more, and the channel
  dissipates ``0.5 (Vin + Vf) I t_r`` (with ``r I / 6`` more);
* the high side's turn-off: ``i_hs = I (1 - t / t_f)``, so ``Cn dv/dt = -I t / t_f``
  and the node falls as ``Delta - I t^2 / (2 Cn t_f)`` from ``Delta`` above the
  clamp: :func:`fall_excess` is the volt-seconds it spends above the clamp.
"""

from __future__ import annotations

import math

from bucksim.model.stage import node_capacitance
from bucksim.model.stage_ramps import ramp_switches


def ramps_in_circuit(scenario) -> tuple[bool, bool]:
    """``(high side ramps, low side ramps)`` as the engine runs them."""
    return ramp_switches(scenario, node_capacitance(scenario) > 0.0)


def fall_excess(cn: float, delta: float, i: float, t_f: float) -> float:
    r"""``int (v - v_c) dt`` [V s] of the node above its clamp after a turn-off ramp.

    Parameters
    ----------
    cn : float
        Node capacitance [F] (> 0).
    delta : float
        The node's height above the clamp when the ramp starts [V] (> 0).
    i : float
        The inductor current, constant over the edge [A] (> 0).
    t_f : float
        The channel current's fall time [s] (> 0).

    Notes
    -----
    The node falls as ``Delta - I t^2 / (2 Cn t_f)`` while the ramp runs and at
    ``I / Cn`` after it (derived). It reaches the clamp at
    ``t_v = sqrt(2 Cn Delta t_f / I)``; if ``t_v <= t_f`` the excess is
    ``(2/3) Delta t_v``, else

    .. math::

        \Delta t_f - \frac{I t_f^2}{6 C_n}
        + \frac{C_n}{2 I}\left(\Delta - \frac{I t_f}{2 C_n}\right)^2 .

    Without a ramp (``t_f -> 0``) this is ``Cn Delta^2 / (2 I)``, the slew at
    constant current.
    """
    t_v = math.sqrt(2.0 * cn * delta * t_f / i)
    if t_v <= t_f:
        return 2.0 / 3.0 * delta * t_v
    left = delta - i * t_f / (2.0 * cn)
    return delta * t_f - i * t_f * t_f / (6.0 * cn) + 0.5 * cn * left * left / i


def rise_share(scenario, valley: float) -> float:
    """The high side's turn-on ramp [s] where it is circuit and carries current: node
    capacitance, a ``rise_time`` and a positive current at turn-on; else 0."""
    if valley <= 0.0:
        return 0.0
    return rise_delay(scenario)


def rise_delay(scenario) -> float:
    """How long the high side takes to close fully after its gate edge [s]: its
    ``rise_time`` where the ramps are circuit, whatever the current (at ``iL <= 0`` the
    ramp carries nothing: the node goes on swinging meanwhile), else 0."""
    return float(scenario.high_side.rise_time) if ramps_in_circuit(scenario)[0] else 0.0


def fall_diode_times(cn: float, delta: float, i: float, t_f: float, t_d: float
                     ) -> tuple[float, float]:
    r"""The low-side diode's conduction in a falling dead time behind a turn-off ramp.

    Returns ``(t_1, t_2)`` [s] with ``int i_D dt = I t_1`` and ``int i_D^2 dt = I^2 t_2``
    (the diode's loss is ``Vf I t_1 + r I^2 t_2``), for the dead time ``t_d`` [s] and
    the quantities of :func:`fall_excess`.

    Notes
    -----
    The diode conducts once the node reaches its clamp, at ``t_v`` (derived, as in
    :func:`fall_excess`), and carries ``I - i_hs = I t / t_f`` until the ramp ends,
    ``I`` after it: for ``t_v <= t_f``,
    ``t_1 = (t_d - t_f) + (t_f^2 - t_v^2) / (2 t_f)`` and
    ``t_2 = (t_d - t_f) + (t_f^3 - t_v^3) / (3 t_f^2)``; else both ``t_d - t_v``.
    """
    t_v = math.sqrt(2.0 * cn * delta * t_f / i)
    if t_v > t_f:
        t_v = t_f + (delta - i * t_f / (2.0 * cn)) * cn / i
        left = max(t_d - t_v, 0.0)
        return left, left
    if t_v >= t_d:
        return 0.0, 0.0
    rest = t_d - t_f
    return (rest + (t_f * t_f - t_v * t_v) / (2.0 * t_f),
            rest + (t_f ** 3 - t_v ** 3) / (3.0 * t_f * t_f))


def ramped_time(t_const: float, t_f: float) -> float:
    """The time [s] a charge takes to leave the node behind a turn-off ramp of ``t_f``
    [s], from the time ``t_const`` it takes at the constant current (derived: the
    ramp delivers ``I t^2 / (2 t_f)`` by ``t <= t_f`` and ``I (t - t_f / 2)`` after):
    ``sqrt(2 t_const t_f)`` within the ramp, ``t_const + t_f / 2`` after it."""
    if t_f <= 0.0:
        return t_const
    if t_const <= 0.5 * t_f:
        return math.sqrt(2.0 * t_const * t_f)
    return t_const + 0.5 * t_f


def ramped_charge_time(t: float, t_f: float) -> float:
    """The inverse of :func:`ramped_time`: the constant-current time [s] whose charge
    has left the node ``t`` [s] after a turn-off ramp of ``t_f`` [s] began."""
    if t_f <= 0.0:
        return t
    if t <= t_f:
        return t * t / (2.0 * t_f)
    return t - 0.5 * t_f


def ramped_square(i: float, t: float, t_f: float) -> float:
    """``int i_C^2 dt`` [A^2 s] of the node's current ``I t / t_f`` (then ``I``) over
    the first ``t`` [s] behind a turn-off ramp (derived)."""
    if t_f <= 0.0:
        return i * i * t
    if t <= t_f:
        return i * i * t ** 3 / (3.0 * t_f * t_f)
    return i * i * (t - 2.0 * t_f / 3.0)


def fall_ramp(scenario) -> float:
    """The high side's turn-off ramp [s] where it is circuit, else 0."""
    return float(scenario.high_side.fall_time) if ramps_in_circuit(scenario)[0] else 0.0
