"""``simulate``: scenario in, Run out."""

from __future__ import annotations

import numpy as np

from .engine import build_table, integrate
from .errors import SimulationError
from .stage import Stage
from .waveforms import Run


def simulate(scenario, x0=None, *, check: bool = False, progress=None) -> "Run":
    """Simulate a scenario's power stage exactly, cycle by cycle.

    Parameters
    ----------
    scenario : Scenario
        From :func:`bucksim.load_scenario` or built from :mod:`bucksim.parts`.
    x0 : array_like, optional
        Initial ``[iL [A], vC [V]]``; default from ``scenario.run``
        (``initial_current``, ``initial_voltage``; zero = start from rest),
        or the periodic steady state when ``run.start = "steady-state"``
        (then ``run.steady_state`` holds the :class:`~bucksim.steady.SteadyState`).
    check : bool
        Raise :class:`~bucksim.errors.SimulationError` if the run did not
        complete (by default the Run carries ``status``/``message``).
    progress : callable, optional
        ``progress(cycles_done, n_cycles)``, called as the engine goes.

    Returns
    -------
    Run
    """
    if scenario.control.mode != "open-loop":
        return _simulate_closed_loop(scenario, x0, check, progress)
    steady = None
    if x0 is None and scenario.run.start == "steady-state":
        steady = _steady(scenario, "run.start = 'steady-state'")
        x0 = steady.x
    stage = Stage(scenario)
    table = build_table(stage.matrices, scenario.period)
    result = integrate(stage, x0, table=table, progress=progress)
    run = Run(scenario, stage, table, result)
    run.steady_state = steady
    if check and not run.success:
        raise SimulationError(run.message)
    return run


def simulate_settled(scenario, cycles: int | None = None) -> "Run":
    """Simulate ``cycles`` periods on the periodic steady state of the t = 0 level.

    Finds the steady state by shooting (open or closed loop), then runs the
    scenario without soft-start or steps from it (controller state included),
    so every metric describes the settled operating point. The run's
    ``steady_state`` attribute holds the shooting result.
    """
    import dataclasses

    from .steady import periodic_scenario

    ss = _steady(scenario, "no periodic steady state")
    base = periodic_scenario(scenario)
    n = int(cycles or scenario.run.summary_cycles)
    sc = dataclasses.replace(base, run=dataclasses.replace(
        base.run, cycles=n, duration=None, start="rest", summary_cycles=n,
        initial_current=float(ss.x[0]), initial_voltage=float(ss.x[1])))
    if sc.control.mode != "open-loop":
        run = _simulate_closed_loop(sc, ss.x, False, state=ss.controller)
    else:
        run = simulate(sc)
    run.steady_state = ss
    return run


def _steady(scenario, context):
    """Periodic steady state (open or closed loop), or a SimulationError saying why not."""
    from .steady import steady_state

    ss = steady_state(scenario)
    if not ss.success:
        raise SimulationError(f"{scenario.source or scenario.title}: {context}: {ss.message}")
    return ss


def _simulate_closed_loop(scenario, x0, check, progress=None, state=None):
    from .control import design
    from .engine.controlled import integrate_closed_loop

    stage = Stage(scenario)
    table = build_table(stage.matrices, scenario.period)
    comp = None if stage.analog else design(scenario.control.compensator, scenario.period)
    steady = None
    if x0 is None and scenario.run.start == "steady-state":
        steady = _steady(scenario, "run.start = 'steady-state'")
        x0, state = steady.x, steady.controller
    result, end_state, duty, u = integrate_closed_loop(stage, comp, x0, state, table=table,
                                                       progress=progress)
    run = Run(scenario, stage, table, result)
    run.steady_state = steady
    run.controller_state = end_state
    run.duty = duty
    run.control_output = u
    _check_loop_settles(run)
    if check and not run.success:
        raise SimulationError(run.message)
    return run


#: Status of a closed-loop run whose duty swings between its limits at the end.
STATUS_LOOP_UNSETTLED = 3


def loop_settle_verdict(control, duty, status, last: int = 200):
    """Decide whether a closed loop ended limit-cycling between its duty limits.

    A stable loop ends with the duty near its operating value; a duty that
    still hits both 0 and ``max_duty`` within the last periods means the
    loop is unstable (or the demand cannot be met).

    Parameters
    ----------
    control : Control
        ``scenario.control`` (``max_duty``, ``pulse_skipping``).
    duty : array_like
        Per-period duty [-] (NaN where a period did not start).
    status : int
        The engine's status; only a completed run (0) is judged.
    last : int
        Periods at the end that are inspected.

    Returns
    -------
    (status, message) : (int, str or None)
        :data:`STATUS_LOOP_UNSETTLED` and a message when the loop did not
        settle, else ``status`` unchanged and None.
    """
    if status != 0 or duty is None:
        return status, None
    d = np.asarray(duty, dtype=float)
    d = d[~np.isnan(d)][-last:]
    if d.shape[0] < min(last, 20):
        return status, None
    low = np.mean(d <= 1e-12)
    high = np.mean(d >= control.max_duty - 1e-9)
    if low > 0.1 and high > 0.1 and not control.pulse_skipping:
        return STATUS_LOOP_UNSETTLED, (
            f"control loop did not settle: in the last {d.shape[0]} periods the duty "
            f"sat at 0 in {100 * low:.0f} % and at max_duty ({control.max_duty:g}) in "
            f"{100 * high:.0f} % of them; the loop is likely unstable (check "
            f"control.compensator). Segments up to the end are kept.")
    return status, None


def _check_loop_settles(run, last: int = 200):
    """Flag a run whose loop ends limit-cycling (see :func:`loop_settle_verdict`).

    The run and its segments are kept; ``status`` and ``message`` say what
    happened.
    """
    status, message = loop_settle_verdict(run.scenario.control, run.duty, run.status, last)
    if message is not None:
        run.status = status
        run.message = message
