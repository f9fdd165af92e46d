"""The scenario file's input-side tables, read and written::

    [supply]            ... inductance = 0
    [input_capacitor]   capacitance, esr = 0, banks = [{capacitance, esr}, ...]
    [input_filter]      inductance, dcr = 0, damping = {resistance, capacitance},
                        parallel_resistance

(:mod:`bucksim.model.input_parts` checks the values, :mod:`bucksim.model.input_network`
builds the circuit.)
"""

from __future__ import annotations

from bucksim.model.input_parts import CapacitorBank, InputCapacitor, InputFilter

INPUT_CAPACITOR_KEYS = ("capacitance", "esr", "banks")
BANK_KEYS = ("capacitance", "esr")
INPUT_FILTER_KEYS = ("inductance", "dcr", "damping", "parallel_resistance")
DAMPING_KEYS = ("resistance", "capacitance")


def read_input_capacitor(t) -> InputCapacitor | None:
    """The ``[input_capacitor]`` table (a :class:`~bucksim.model.toml_table.Table` or None)."""
    if t is None:
        return None
    first = CapacitorBank(t.quantity("capacitance", "F"), t.quantity("esr", "ohm", 0.0),
                          key=t.key)
    more = tuple(CapacitorBank(b.quantity("capacitance", "F"), b.quantity("esr", "ohm", 0.0),
                               key=b.key)
                 for b in t.tables("banks", BANK_KEYS))
    return InputCapacitor((first,) + more)


def read_input_filter(t) -> InputFilter | None:
    """The ``[input_filter]`` table, or None."""
    if t is None:
        return None
    damp = t.table("damping", DAMPING_KEYS)
    return InputFilter(
        inductance=t.quantity("inductance", "H"), dcr=t.quantity("dcr", "ohm", 0.0),
        damping_resistance=None if damp is None else damp.quantity("resistance", "ohm"),
        damping_capacitance=None if damp is None else damp.quantity("capacitance", "F"),
        parallel_resistance=t.quantity("parallel_resistance", "ohm", None))


def input_side_dict(scenario) -> dict:
    """The input-side tables of ``scenario`` as TOML-ready dicts (none when absent)."""
    out = {}
    cap = scenario.input_capacitor
    if cap is not None:
        first, *more = cap.banks
        out["input_capacitor"] = {"capacitance": first.capacitance, "esr": first.esr}
        if more:
            out["input_capacitor"]["banks"] = [{"capacitance": b.capacitance, "esr": b.esr}
                                               for b in more]
    f = scenario.input_filter
    if f is not None:
        d = {"inductance": f.inductance, "dcr": f.dcr}
        if f.damped_leg:
            d["damping"] = {"resistance": f.damping_resistance,
                            "capacitance": f.damping_capacitance}
        if f.parallel_resistance is not None:
            d["parallel_resistance"] = f.parallel_resistance
        out["input_filter"] = d
    return out
