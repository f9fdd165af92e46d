"""Gate drive and controller supply: what each gate charge draws, and where it is lost.

Each turn-on of a MOSFET charges its gate with ``Qg`` from the driver's rail at
``Vg`` (``gate_voltage``); the turn-off returns that charge to ground through
the driver. Over the cycle the gate loop dissipates ``Qg Vg`` whatever the gate's
nonlinear charge curve (the rail delivers ``Qg Vg``, the gate ends where it
started), shared by the loop's series resistances in proportion (common
practice [1]_):

.. math::

    E_{loop} = Q_g V_g, \\qquad
    E_k = Q_g V_g \\frac{R_k}{R_{drv} + R_{g,int} + R_{g,ext}}

``R_drv`` the driver's output resistance (``controller.driver_resistance``),
``R_g,int`` the MOSFET's internal and ``R_g,ext`` the board's gate resistance
(``gate_resistance = {internal, external}``). The internal share heats the
MOSFET (its switching kind ``gate``); without any resistance given the whole
loop is booked to the driver.

The rail itself comes from (``controller.driver_supply``):

=============  ======================  ===============================
supply         drawn per gate charge   lost in the rail
=============  ======================  ===============================
``ideal-rail`` ``Qg Vg`` (input)       nothing
``input``      ``Qg Vin`` (input)      regulator ``Qg (Vin - Vg)``
``bias``       ``Qg Vbias`` (bias)     regulator ``Qg (Vbias - Vg)``
=============  ======================  ===============================

so the gate drive costs ``Qg Vin fs`` with a regulator from the input and
``Qg Vbias fs`` from a bias rail, exactly. ``Vin`` is the supply's voltage at
each turn-on (its operating level; the regulator's small current is not
carried through the source resistance or the input network). The controller's
quiescent current ``Iq`` is drawn from the same source, ``Iq Vin`` or ``Iq
Vbias``, all of it lost in the controller. A skipped pulse charges no gate:
the energies count the turn-ons in the window.

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 4 (gate-drive loss ``Qg Vg fs``; from memory).
   The split over the loop's resistances: common practice.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from bucksim.model.parts import Mosfet

#: The gate-drive energies of a window, by where they go [J].
SHARES = ("driver", "resistors", "internal", "regulator", "quiescent")


@dataclass(frozen=True)
class GateDrive:
    """The gate drive and the controller over the window: mean powers [W].

    Attributes
    ----------
    supply : str
        ``controller.driver_supply``.
    driver, resistors, internal, regulator, quiescent : float
        Lost in the driver's output resistance (the whole gate loop when no
        resistance is given), in the external gate resistors, in the MOSFETs'
        internal gate resistance (also in their switching kind ``gate``), in the
        rail's regulator, and the controller's quiescent draw.
    input : float
        Drawn from the converter's input for all of these (in ``power.input``).
    bias : float
        Drawn from the external bias rail (``power.bias``; 0 unless
        ``driver_supply = "bias"``).
    """

    supply: str
    driver: float
    resistors: float
    internal: float
    regulator: float
    quiescent: float
    input: float
    bias: float

    @property
    def total(self) -> float:
        """All of it [W]: what the gate drive and the controller cost."""
        return self.driver + self.resistors + self.internal + self.regulator + self.quiescent


def loop_shares(m: Mosfet, driver_resistance: float) -> tuple[float, float, float]:
    """The shares ``(driver, external, internal)`` of a gate loop's ``Qg Vg``."""
    r = (driver_resistance, m.gate_resistance.external, m.gate_resistance.internal)
    total = sum(r)
    if total == 0:
        return 1.0, 0.0, 0.0
    return r[0] / total, r[1] / total, r[2] / total


def _mosfets(scenario):
    out = [("high_side", scenario.high_side)]
    if isinstance(scenario.low_side, Mosfet):
        out.append(("low_side", scenario.low_side))
    return out


def gate_drive_energy(scenario, stage, turn_ons: dict, t_start: float, t_stop: float) -> dict:
    """The window's gate-drive and controller energies [J].

    Parameters
    ----------
    scenario : Scenario
    stage : Stage
        Its operating levels give the supply voltage at each instant.
    turn_ons : dict
        ``{"high_side": times, "low_side": times}``: each MOSFET's turn-on
        instants [s] in the window.
    t_start, t_stop : float
        The window [s].

    Returns
    -------
    dict
        The :data:`SHARES` [J], ``"high_side"`` and ``"low_side"`` (each MOSFET's
        internal share), ``"input"`` and ``"bias"`` (drawn from each source).
    """
    ctl = scenario.controller
    supply = ctl.driver_supply
    out = dict.fromkeys(SHARES + ("high_side", "low_side", "input", "bias"), 0.0)
    for name, m in _mosfets(scenario):
        times = np.asarray(turn_ons.get(name, ()), dtype=float)
        if m.qg == 0 or times.shape[0] == 0:
            continue
        loop = m.qg * m.gate_voltage * times.shape[0]
        drv, ext, internal = loop_shares(m, ctl.driver_resistance)
        out["driver"] += drv * loop
        out["resistors"] += ext * loop
        out["internal"] += internal * loop
        out[name] = internal * loop
        if supply == "ideal-rail":
            out["input"] += loop
        elif supply == "input":
            drawn = m.qg * float(np.sum(_supply_voltage(stage, times)))
            out["input"] += drawn
            out["regulator"] += drawn - loop
        else:
            drawn = m.qg * ctl.bias_voltage * times.shape[0]
            out["bias"] += drawn
            out["regulator"] += drawn - loop
    if ctl.quiescent_current > 0:
        e_q = ctl.quiescent_current * (ctl.bias_voltage * (t_stop - t_start) if supply == "bias"
                                       else _supply_volt_seconds(stage, t_start, t_stop))
        out["quiescent"] = e_q
        out["bias" if supply == "bias" else "input"] += e_q
    return out


def _supply_voltage(stage, times: np.ndarray) -> np.ndarray:
    """The supply's voltage [V] at each of ``times`` [s] (its operating levels)."""
    starts = np.array([lev.time for lev in stage.levels])
    volts = np.array([lev.vin for lev in stage.levels])
    return volts[np.maximum(np.searchsorted(starts, times, side="right") - 1, 0)]


def _supply_volt_seconds(stage, t_start: float, t_stop: float) -> float:
    """``integral Vin dt`` [V s] over the window, the supply's voltage by level."""
    times = [lev.time for lev in stage.levels] + [np.inf]
    total = 0.0
    for k, lev in enumerate(stage.levels):
        a, b = max(times[k], t_start), min(times[k + 1], t_stop)
        if b > a:
            total += lev.vin * (b - a)
    return total


def gate_drive_record(scenario, energies: dict, width: float) -> GateDrive | None:
    """The :class:`GateDrive` of a window of ``width`` [s], or None when the stage has no
    gate charge, no quiescent draw and the default rail."""
    ctl = scenario.controller
    if ctl.is_default and all(m.qg == 0 for _, m in _mosfets(scenario)):
        return None
    return GateDrive(supply=ctl.driver_supply,
                     **{k: energies[k] / width for k in SHARES + ("input", "bias")})


def closed_form(scenario, fs: float) -> tuple[float, str]:
    """The gate drive and the controller in the closed-form budget: ``(power [W],
    formula)`` at switching frequency ``fs`` [Hz], every turn-on charging its gate.

    ``sum Qg V fs + Iq V`` with ``V`` the rail's source: ``Vg`` per gate (ideal
    rail; the controller then draws from the input), ``Vin`` (input regulator) or
    ``Vbias`` (bias rail).
    """
    ctl = scenario.controller
    vin = scenario.supply.voltage
    gates = _mosfets(scenario)
    if ctl.driver_supply == "ideal-rail":
        p = sum(m.qg * m.gate_voltage for _, m in gates) * fs + ctl.quiescent_current * vin
        return p, "(Qg_hs Vg_hs + Qg_ls Vg_ls) fs + Iq Vin"
    v = vin if ctl.driver_supply == "input" else ctl.bias_voltage
    name = "Vin" if ctl.driver_supply == "input" else "Vbias"
    p = (sum(m.qg for _, m in gates) * fs + ctl.quiescent_current) * v
    return p, f"(Qg_hs + Qg_ls) {name} fs + Iq {name}"
