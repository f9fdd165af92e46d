"""Names of the loss items a summary breaks its loss into, and their labels.

Kept apart from the result objects so that the figures (:mod:`bucksim.plotting`)
can name the items without importing the results that plot themselves.
"""

from __future__ import annotations

#: Loss items, in the order they are stacked and listed. The asynchronous
#: stage's low side is the freewheel diode, kept apart from a MOSFET channel.
LOSS_ITEMS = ("high_side.conduction", "high_side.switching", "high_side_body_diode.conduction",
              "freewheel_diode.conduction", "freewheel_diode.switching", "low_side.conduction",
              "low_side.switching",
              "low_side_body_diode.conduction", "switch_node.resistance", "gate_drive.driver",
              "gate_drive.resistors", "gate_drive.regulator", "controller.quiescent",
              "inductor.dcr",
              "inductor.core",
              "output_capacitor.esr", "supply.resistance", "input_capacitor.esr",
              "input_filter.resistance", "input_filter_damping.resistance")

_ITEM_LABELS = {
    "high_side.conduction": "high side conduction", "high_side.switching": "high side switching",
    "high_side_body_diode.conduction": "high-side body diode",
    "freewheel_diode.conduction": "freewheel diode",
    "freewheel_diode.switching": "freewheel diode switching",
    "low_side.conduction": "low side conduction", "low_side.switching": "low side switching",
    "low_side_body_diode.conduction": "low-side body diode",
    "switch_node.resistance": "switch-node resistance",
    "gate_drive.driver": "gate driver", "gate_drive.resistors": "gate resistors",
    "gate_drive.regulator": "driver rail regulator", "controller.quiescent": "controller",
    "inductor.dcr": "inductor DCR", "inductor.core": "inductor core",
    "output_capacitor.esr": "output capacitor ESR", "supply.resistance": "supply resistance",
    "input_capacitor.esr": "input capacitor ESR",
    "input_filter.resistance": "input filter resistance",
    "input_filter_damping.resistance": "input filter damping"}


def item_label(item: str) -> str:
    """Readable name of a loss item of :data:`LOSS_ITEMS`."""
    return _ITEM_LABELS[item]
