"""The stage's conduction states, their names and the rules that read them.

Kept apart from :class:`bucksim.model.stage.Stage` (which re-exports every name
here) so that the rules can be used without building a stage.
"""

from __future__ import annotations

import numpy as np

from bucksim.model.capacitance import NodeCurve
from bucksim.model.input_parts import MAX_BANKS
from bucksim.model.parts import STRATEGIES, Mosfet, Scenario

HIGH, LOW, LOW_DIODE, HIGH_DIODE, IDLE, OPEN = range(6)
N_CONDUCTION = 6
CONDUCTION_NAMES = ("high", "low", "low-diode", "high-diode", "idle", "open")

#: Gate commands of a switching phase.
GATE_HIGH, GATE_OFF, GATE_LOW = 0, 1, 2

STRATEGY_CODES = {name: code for code, name in enumerate(STRATEGIES)}

N_STATES = 2
STATE_NAMES = ("iL", "vC")
#: Name of the switch-node state (present when the node has capacitance).
NODE_STATE = "vn"
#: Units of the controller states appended in an analog loop.
CONTROLLER_UNIT = "V"

#: The inductor current "reverses" when its minimum lies below
#: ``-REVERSE_CURRENT_THRESHOLD max(|min iL|, |max iL|)`` (the one definition for the
#: summary and the light-load tools). Why 1e-9: a current held at zero is exact to
#: rounding only, and that grows past 1e-16: an event instant rounded to the spacing
#: of absolute time leaves ``|diL/dt| ulp(t)``, a shooting solve leaves ~1e-12 of the
#: scale (more in high-Q stages); one part in 1e9 of the peak returns no charge
#: anyone could measure, so the flag is robust on both sides.
REVERSE_CURRENT_THRESHOLD = 1e-9


def current_reverses(il_min: float, il_max: float) -> bool:
    """True when the inductor current goes negative by more than rounding.

    Parameters
    ----------
    il_min, il_max : float
        Exact minimum and maximum of ``iL`` [A] over the window.

    Notes
    -----
    ``il_min < -REVERSE_CURRENT_THRESHOLD max(|il_min|, |il_max|)``.
    """
    scale = max(abs(il_min), abs(il_max))
    return bool(il_min < -REVERSE_CURRENT_THRESHOLD * scale)


def zero_current_states(strategy: str) -> frozenset[int]:
    """Conduction states that end when the inductor current reaches zero: for
    ``strategy`` (``switching.strategy``), ``{LOW_DIODE, HIGH_DIODE}``, and ``LOW``
    too in diode emulation.

    Notes
    -----
    A diode conducts one way only: the low-side diode (body diode, or the
    freewheel diode of an asynchronous stage) while ``iL > 0``, the high-side
    body diode while ``iL < 0``; either stops at ``iL = 0`` and the stage
    idles. In diode emulation the low-side channel is turned off at zero
    current as well; in forced PWM it conducts both ways (common practice).
    The cycle loop (:mod:`bucksim.engine.cycles`) writes the same rule out
    inline, where a set cannot be used.
    """
    if strategy not in STRATEGY_CODES:
        raise ValueError(f"switching.strategy: expected one of {', '.join(STRATEGIES)}, "
                         f"got {strategy!r}")
    if strategy == "diode-emulation":
        return frozenset((LOW, LOW_DIODE, HIGH_DIODE))
    return frozenset((LOW_DIODE, HIGH_DIODE))


def node_curve(scenario: Scenario, vin: float) -> NodeCurve:
    """The switch node's capacitance against ``vn`` at input voltage ``vin`` [V]:
    the high side's ``coss`` plus the low-side MOSFET's ``coss`` or the freewheel
    diode's ``cj`` (:class:`~bucksim.model.capacitance.NodeCurve`)."""
    ls = scenario.low_side
    return NodeCurve(scenario.high_side.coss, ls.coss if isinstance(ls, Mosfet) else ls.cj, vin)


def node_capacitance(scenario: Scenario) -> float:
    """The switch node's capacitance [F], charge-equivalent over ``0 .. Vin``
    (:meth:`~bucksim.model.capacitance.NodeCurve.equivalent`; for linear parts
    the sum of the high side's ``coss`` and the low side's ``coss`` or ``cj``).
    Above 0 the node is a state."""
    return node_curve(scenario, scenario.supply.voltage).equivalent()


def clamp_current(il, conduction, strategy: str) -> np.ndarray:
    """``iL`` [A] with the sign its conduction state guarantees.

    A state of :func:`zero_current_states` ends at ``iL = 0`` exactly, but
    its end time is rounded to the spacing of absolute time, which can put
    the evaluated end a few 1e-12 A past zero. The state fixes the sign:
    ``iL >= 0`` in ``LOW_DIODE`` (and ``LOW`` in diode emulation), ``iL <= 0``
    in ``HIGH_DIODE``; other states are left as they are.

    ``il`` [A] and ``conduction`` (each value's state) broadcast; ``strategy``:
    ``switching.strategy``.
    """
    conduction = np.asarray(conduction)
    from_above = sorted(zero_current_states(strategy) - {HIGH_DIODE})
    il = np.where(np.isin(conduction, from_above), np.maximum(il, 0.0), il)
    return np.where(conduction == HIGH_DIODE, np.minimum(il, 0.0), il)


#: Unit of each signal and state a run can evaluate.
UNITS = {"iL": "A", "vC": "V", "vo": "V", "io": "A", "ic": "A", "iin": "A", "vsw": "V",
         "vin": "V", "high_side": "A", "low_side": "A", "high_side_body_diode": "A",
         "low_side_body_diode": "A", "switch_node": "A", "t": "s", "u": "V", "vref": "V", "vn": "V"}
# the input side (with an input capacitor; banks numbered from 1, the first
# bank's state is "vcin")
UNITS.update({"vs": "V", "vterm": "V", "isrc": "A", "icin": "A", "ilf": "A", "idamp": "A",
              "irp": "A", "vcin": "V", "vcd": "V"})
UNITS.update({f"icin{k}": "A" for k in range(1, MAX_BANKS + 1)})
# the switches' current ramps (stage_ramps): currents, slopes (times 1 ns), channel voltages
UNITS.update({"ihs": "A", "khs": "A", "ils": "A", "kls": "A", "high_side_ramp": "A",
              "low_side_ramp": "A", "high_side_ramp_voltage": "V", "low_side_ramp_voltage": "V"})
UNITS.update({f"vcin{k}": "V" for k in range(2, MAX_BANKS + 1)})
