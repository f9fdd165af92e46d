"""Load levels and one-period steady-state runs, shared by the light-load tools.

A load level is a value of ``load.current`` [A] or ``load.resistance``
[ohm], whichever the scenario uses. :func:`periodic_run` simulates one
period from the scenario's periodic steady state, so every metric taken on
it describes the settled operating point.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from bucksim.analysis.segments import segment_values  # noqa: F401  (the light-load tools' import)
from bucksim.errors import ScenarioError
from bucksim.model.units import format_si, parse_quantity

#: Load keys a level can set, and their units.
KINDS = {"current": "A", "resistance": "ohm"}


@dataclass(frozen=True)
class LoadLevel:
    """One load setting: ``key`` is ``"current"`` [A] or ``"resistance"`` [ohm]."""

    key: str
    value: float

    @property
    def unit(self) -> str:
        return KINDS[self.key]

    def __str__(self):
        return format_si(self.value, self.unit)

    def to_dict(self) -> dict:
        return {"key": self.key, "value": self.value, "unit": self.unit}


def load_kind(scenario) -> str:
    """``"current"`` when the scenario's load is a current sink (no resistor), else
    ``"resistance"``."""
    r = scenario.load.resistance
    return "current" if r is None or r == math.inf else "resistance"


def parse_level(value, kind: str, key: str = "load") -> LoadLevel:
    """A :class:`LoadLevel` from a number (in ``kind``'s unit) or a string with A or ohm.

    Raises
    ------
    ScenarioError
        Naming ``key`` and the value when it is neither, or not physical
        (resistance must be > 0 ohm, a current finite).
    """
    if isinstance(value, LoadLevel):
        return value
    if isinstance(value, str):
        try:
            number = float(value)  # a bare number: the scenario's load unit
        except ValueError:
            number = None
        if number is not None:
            return _checked(LoadLevel(kind, number), key, value)
        for k, unit in KINDS.items():
            try:
                return _checked(LoadLevel(k, parse_quantity(value, unit, key)), key, value)
            except ScenarioError as err:
                if err.key != key or "quantity" not in err.expected:
                    raise  # the unit matched but the value is not physical
        raise ScenarioError(key, "must be a load current in A (e.g. '0.3 A') or a load "
                            "resistance in ohm (e.g. '3.3 ohm')", value)
    v = parse_quantity(value, KINDS[kind], key)
    return _checked(LoadLevel(kind, v), key, value)


def _checked(level, key, raw):
    if not math.isfinite(level.value):
        raise ScenarioError(key, f"must be a finite load {level.key} in {level.unit}", raw)
    if level.key == "resistance" and level.value <= 0:
        raise ScenarioError(key, "must be a load resistance > 0 ohm", raw)
    return level


def parse_levels(load, scenario, key: str = "load") -> list[LoadLevel]:
    """Load levels from a list, a single value, or ``{"current": [...]}`` /
    ``{"resistance": [...]}``."""
    kind = load_kind(scenario)
    if isinstance(load, dict):
        if len(load) != 1 or next(iter(load)) not in KINDS:
            raise ScenarioError(key, "must be a list of levels, or a dict with one key "
                                "'current' [A] or 'resistance' [ohm]", load)
        (k, values), = load.items()
        values = [values] if np.isscalar(values) or isinstance(values, str) else values
        return [parse_level(v, k, f"{key}.{k}[{i}]") for i, v in enumerate(values)]
    if np.isscalar(load) or isinstance(load, (str, LoadLevel)):
        load = [load]
    levels = [parse_level(v, kind, f"{key}[{i}]") for i, v in enumerate(load)]
    if not levels:
        raise ScenarioError(key, "must hold at least one load level", list(load))
    return levels


def with_level(scenario, level: LoadLevel):
    """The scenario at a steady load ``level`` (no steps, no soft-start)."""
    rep = dataclasses.replace
    load = scenario.load
    same = level.key == load_kind(scenario)
    if level.key == "current":
        new = rep(load, current=level.value, resistance=load.resistance if same else None,
                  steps=())
    else:
        new = rep(load, resistance=level.value, current=load.current if same else 0.0,
                  steps=())
    return rep(scenario, load=new, supply=rep(scenario.supply, steps=()),
               control=rep(scenario.control, soft_start=0.0))


def require_open_loop(scenario):
    if scenario.control.mode != "open-loop":
        raise ScenarioError("control.mode", "must be 'open-loop' here (the steady-state "
                            "solver runs the stage at a fixed duty)", scenario.control.mode)


# ----------------------------------------------------------------------------- one period

def periodic_run(scenario, guess=None):
    """The periodic steady state and one exact period of waveforms from it
    (:func:`bucksim.simulation.simulate_settled` with one cycle; ``guess``: a
    state to start the shooting from, e.g. a neighbouring point's periodic state).

    Returns
    -------
    (SteadyState, Run)
        The run covers ``[0, T]`` from the periodic state ``ss.x``.

    Raises
    ------
    SimulationError
        When the steady-state solver does not converge.
    """
    from bucksim.simulation import simulate_settled

    run = simulate_settled(scenario, cycles=1, guess=guess)
    return run.steady_state, run
