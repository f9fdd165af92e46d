"""The scenario file's controller and gate-loop tables, read and written::

    [controller]        quiescent_current = 0, driver_supply = "ideal-rail" | "input" | "bias",
                        bias_voltage (with "bias"), driver_resistance = 0       (optional)
    [high_side]         ... gate_resistance = {internal = 0, external = 0}     (likewise
                        [low_side] with device = "mosfet")

(:mod:`bucksim.model.drive_parts` checks the values, :mod:`bucksim.analysis.gate_drive`
books the energy.)
"""

from __future__ import annotations

from bucksim.model.drive_parts import Controller, GateResistance

CONTROLLER_KEYS = ("quiescent_current", "driver_supply", "bias_voltage", "driver_resistance")
GATE_RESISTANCE_KEYS = ("internal", "external")


def read_controller(t) -> Controller:
    """The ``[controller]`` table (a :class:`~bucksim.model.toml_table.Table`, or None:
    the defaults)."""
    if t is None:
        return Controller()
    return Controller(quiescent_current=t.quantity("quiescent_current", "A", 0.0),
                      driver_supply=t.string("driver_supply", "ideal-rail"),
                      bias_voltage=t.quantity("bias_voltage", "V", None),
                      driver_resistance=t.quantity("driver_resistance", "ohm", 0.0))


def read_gate_resistance(mosfet_table) -> GateResistance:
    """A MOSFET table's ``gate_resistance = {internal, external}`` (zeros when absent)."""
    key = f"{mosfet_table.key}.gate_resistance"
    t = mosfet_table.table("gate_resistance", GATE_RESISTANCE_KEYS)
    if t is None:
        return GateResistance(key=key)
    return GateResistance(internal=t.quantity("internal", "ohm", 0.0),
                          external=t.quantity("external", "ohm", 0.0), key=key)


def gate_resistance_dict(r: GateResistance) -> dict:
    """``{"gate_resistance": {...}}`` for a MOSFET table, or nothing when both are 0."""
    if r.internal == 0 and r.external == 0:
        return {}
    return {"gate_resistance": {"internal": r.internal, "external": r.external}}


def controller_dict(c: Controller) -> dict:
    """``{"controller": {...}}`` for the file, or nothing for the defaults."""
    if c.is_default:
        return {}
    d = {"quiescent_current": c.quiescent_current,
         "driver_supply": c.driver_supply, "driver_resistance": c.driver_resistance}
    if c.bias_voltage is not None:
        d["bias_voltage"] = c.bias_voltage
    return {"controller": d}
