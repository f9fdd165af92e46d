"""``simulate``: scenario in, Run out."""

from __future__ import annotations

from .engine import build_table, integrate
from .errors import SimulationError
from .stage import Stage
from .waveforms import Run


def simulate(scenario, x0=None, *, check: bool = False) -> "Run":
    """Simulate a scenario's power stage exactly, cycle by cycle.

    Parameters
    ----------
    scenario : Scenario
        From :func:`bucksim.load_scenario` or built from :mod:`bucksim.parts`.
    x0 : array_like, optional
        Initial ``[iL [A], vC [V]]``; default from ``scenario.run``
        (``initial_current``, ``initial_voltage``; zero = start from rest).
    check : bool
        Raise :class:`~bucksim.errors.SimulationError` if the run did not
        complete (by default the Run carries ``status``/``message``).

    Returns
    -------
    Run
    """
    if scenario.control.mode != "open-loop":
        raise NotImplementedError(
            f"control.mode = {scenario.control.mode!r} is not available yet; use 'open-loop'")
    stage = Stage(scenario)
    table = build_table(stage.matrices, scenario.period)
    result = integrate(stage, x0, table=table)
    run = Run(scenario, stage, table, result)
    if check and not run.success:
        raise SimulationError(run.message)
    return run
