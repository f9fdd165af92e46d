"""Operating levels: the supply and load values that hold between steps.

Each level is one set of linear systems of the stage (:mod:`bucksim.model.stage`);
in an analog loop the end of the soft-start ramp is a level change too.
"""

from __future__ import annotations

from dataclasses import dataclass

from bucksim.model.parts import Scenario

__all__ = ["Level", "is_analog_loop", "operating_levels"]


@dataclass(frozen=True)
class Level:
    """Supply and load values that hold from ``time`` [s] to the next level."""

    time: float
    vin: float
    conductance: float
    current: float
    ref_slope: float = 0.0


def is_analog_loop(scenario: Scenario) -> bool:
    """True when the scenario's compensator runs as analog states of the stage."""
    ctl = scenario.control
    return ctl.mode != "open-loop" and ctl.implementation == "analog"


def operating_levels(scenario: Scenario) -> list[Level]:
    """Merge supply and load steps into one list of piecewise-constant levels.

    In an analog loop the end of the soft-start ramp is a level change too:
    before it the reference state rises at ``reference / soft_start`` [V/s].
    """
    supply = [(0.0, scenario.supply.voltage)] + [(s.time, s.voltage) for s in scenario.supply.steps]
    load = scenario.load.levels()
    times = {t for t, _ in supply} | {t for t, _, _ in load}
    ctl = scenario.control
    ramp_end = ctl.soft_start if is_analog_loop(scenario) else 0.0
    if ramp_end > 0:
        times.add(ramp_end)
    out = []
    for t in sorted(times):
        vin = [v for ts, v in supply if ts <= t][-1]
        g, i = [(g, i) for ts, g, i in load if ts <= t][-1]
        slope = ctl.reference / ramp_end if t < ramp_end else 0.0
        out.append(Level(float(t), float(vin), float(g), float(i), float(slope)))
    return out
