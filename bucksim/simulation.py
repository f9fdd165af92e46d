"""``simulate``: scenario in, Run out."""

from __future__ import annotations

import dataclasses
import os

import numpy as np

from bucksim.engine.controlled import integrate_closed_loop
from bucksim.engine.driver import build_table, integrate
from bucksim.engine.limits import check_run_fits
from bucksim.engine.status import STATUS_DIVERGED, STATUS_LOOP_UNSETTLED, STATUS_OK
from bucksim.errors import ScenarioError, SimulationError
from bucksim.io.hdf5 import report, streamed_run
from bucksim.model.compensator import design
from bucksim.model.scenario import locate_in, require_scenario
from bucksim.model.stage import Stage
from bucksim.steady.result import periodic_scenario
from bucksim.steady.solve import steady_state
from bucksim.threads import single_blas_thread
from bucksim.waveforms import Run


@single_blas_thread
def simulate(scenario, x0=None, *, check: bool = False, progress=None) -> Run:
    """Simulate a scenario's power stage exactly, cycle by cycle.

    Parameters
    ----------
    scenario : Scenario
        From :func:`bucksim.load_scenario` or built from :mod:`bucksim.model.parts`.
    x0 : array_like, optional
        Initial ``[iL [A], vC [V]]``; default from ``scenario.run``
        (``initial_current``, ``initial_voltage``; zero = start from rest),
        or the periodic steady state when ``run.start = "steady-state"``
        (then ``run.steady_state`` holds the :class:`~bucksim.steady.result.SteadyState`).
    check : bool
        Raise :class:`~bucksim.errors.SimulationError` if the run did not
        complete (by default the Run carries ``status``/``message``).
    progress : callable, optional
        ``progress(cycles_done, n_cycles)``, called as the engine goes.

    Returns
    -------
    Run

    Raises
    ------
    TypeError
        ``scenario`` is not a Scenario (e.g. a file name: load it first).
    ScenarioError
        The run's segment table would not fit in memory (``run.cycles`` or
        ``run.duration`` named with the figure it would need).
    SimulationError
        ``run.start = "steady-state"`` and shooting finds no periodic steady
        state; or ``check`` and the run did not complete.
    """
    require_scenario(scenario, "simulate")
    if scenario.control.mode != "open-loop":
        return _simulate_closed_loop(scenario, x0, check, progress)
    stage = Stage(scenario)
    _check_fits(scenario, stage.n)
    steady = None
    if x0 is None and scenario.run.start == "steady-state":
        steady = _steady(scenario, "run.start = 'steady-state'")
        x0 = steady.x
    table = build_table(stage.matrices, scenario.period)
    result = integrate(stage, x0, table=table, progress=progress)
    run = Run(scenario, stage, table, result)
    run.steady_state = steady
    _check_state_range(run)
    if check and not run.success:
        raise SimulationError(run.message)
    return run


def _check_fits(scenario, n_states, **where):
    """:func:`bucksim.engine.limits.check_run_fits`, its refusal placed at the key's line."""
    try:
        check_run_fits(scenario, n_states, **where)
    except ScenarioError as err:
        raise locate_in(scenario, err) from None


@single_blas_thread
def simulate_settled(scenario, cycles: int | None = None, *, guess=None) -> Run:
    """Simulate ``cycles`` periods on the periodic steady state of the t = 0 level.

    Finds the steady state by shooting (open or closed loop), then runs the
    scenario without soft-start or steps from it (controller state included),
    so every metric describes the settled operating point. The run's
    ``steady_state`` attribute holds the shooting result. ``guess``: a state to
    start the shooting from (the ``x0`` of :func:`bucksim.steady_state`), e.g. the
    periodic state of a neighbouring operating point; the result does not
    depend on it beyond the shooting's tolerance.
    """

    require_scenario(scenario, "simulate_settled")
    ss = _steady(scenario, "settled operating point", guess)
    base = periodic_scenario(scenario)
    n = int(cycles or scenario.run.summary_cycles)
    sc = dataclasses.replace(base, run=dataclasses.replace(
        base.run, cycles=n, duration=None, start="rest", summary_cycles=n,
        initial_current=float(ss.x[0]), initial_voltage=float(ss.x[1])))
    if sc.control.mode != "open-loop":
        run = _simulate_closed_loop(sc, ss.x, False, state=ss.controller)
    else:
        run = simulate(sc, x0=ss.x)     # the whole state: the node's too
    run.steady_state = ss
    return run


def _steady(scenario, context, guess=None):
    """Periodic steady state (open or closed loop), or a SimulationError saying why not.

    A closed loop's periodic state with a Floquet multiplier on or outside
    the unit circle is refused: the loop departs from it, so neither a run
    started there nor a summary of it describes an operating point. (An
    open-loop stage is passive; its multipliers are never outside.)
    """

    ss = steady_state(scenario, guess)
    where = f"{scenario.source or scenario.title}: {context}"
    if not ss.success:
        err = SimulationError(f"{where}: {ss.message}")
        err.steady_state = ss
        raise err
    if scenario.control.mode != "open-loop" and not ss.stable:
        err = SimulationError(
            f"{where}: the loop's periodic state is unstable (largest |Floquet multiplier| "
            f"{unstable_multiplier(ss):.3g} >= 1): the loop cannot hold this operating point "
            f"(check control.compensator)")
        err.steady_state = ss   # the shooting result, for callers that record it
        raise err
    return ss


def unstable_multiplier(ss) -> float:
    """Largest |Floquet multiplier| of a SteadyState (NaN when it has none)."""
    mu = np.abs(np.asarray(ss.floquet))
    return float(np.max(mu)) if mu.size else float("nan")


def _simulate_closed_loop(scenario, x0, check, progress=None, state=None):

    stage = Stage(scenario)
    _check_fits(scenario, stage.n)
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
    _check_state_range(run)
    _check_loop_settles(run)
    if check and not run.success:
        raise SimulationError(run.message)
    return run


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
        The engine's status; a completed run (0) is judged, and a diverged one
        (1: the cycle loop stops at the same range) gets the figure.
    last : int
        Periods at the end that are inspected.

    Returns
    -------
    (status, message) : (int, str or None)
        :data:`STATUS_LOOP_UNSETTLED` and a message when the loop did not
        settle, else ``status`` unchanged and None.
    """
    if status != STATUS_OK or duty is None:
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


#: Largest state magnitude whose square float64 holds: energies (``L iL^2 / 2``)
#: and the loss integrals of ``z z^T`` overflow beyond it.
STATE_RANGE = float(np.sqrt(np.finfo(float).max))


def state_range_verdict(states, status):
    """Flag states that are not finite, or too large for their squares.

    Parameters
    ----------
    states : array_like
        State values of a run (any shape: segment start states, end state).
    status : int
        The engine's status; a completed run (0) is judged, and a diverged one
        (1: the cycle loop stops at the same range) gets the figure.

    Returns
    -------
    (status, message) : (int, str or None)
        ``STATUS_DIVERGED`` (1) and a message when some state is NaN, infinite
        or above :data:`STATE_RANGE` in magnitude; else ``status`` and None.
    """
    if status not in (STATUS_OK, STATUS_DIVERGED):
        return status, None
    a = np.abs(np.asarray(states, dtype=float))
    if a.size == 0:
        return status, None
    peak = float(np.max(a))     # NaN propagates through max
    if np.isfinite(peak) and peak <= STATE_RANGE:
        return status, None
    if status == STATUS_DIVERGED and not np.isfinite(peak):
        return status, None     # the engine's own message says so already
    return STATUS_DIVERGED, (f"state diverged: a state reached {peak:.3g} (SI units), beyond "
                             f"{STATE_RANGE:.3g} where its square (energy, loss integrals) "
                             f"overflows; segments up to the end are kept")


def _check_state_range(run):
    status, message = state_range_verdict(run.segments.x0, run.status)
    if message is None:
        status, message = state_range_verdict(run.x_end, run.status)
    if message is not None:
        run.status, run.message = status, message


@single_blas_thread
def simulate_to_file(scenario, path, compression=None, *, chunk_cycles: int | None = None,
                     progress=None) -> dict:
    """Simulate ``scenario`` and stream its segments into the HDF5 file ``path``.

    Memory stays bounded by one engine chunk (``chunk_cycles`` periods,
    default the engine's) whatever the run length. The file is written
    atomically as by :func:`bucksim.io.hdf5.save_run` (``compression`` as there), and
    :func:`bucksim.open_run` reads it the same. Open or closed loop, from rest, a
    given state or (``run.start = "steady-state"``) the periodic steady
    state, found first as :func:`bucksim.simulate` does. A closed loop that
    ends limit-cycling gets the same status 3, "control loop did not
    settle", as in memory (:func:`bucksim.simulation.loop_settle_verdict`).

    Returns
    -------
    dict
        ``path``, ``n_segments``, ``t_end`` [s], ``status``, ``message``.

    Raises
    ------
    ScenarioError
        Before anything is written, when the run's segments would not fit
        on the disk that holds ``path`` (naming ``run.cycles`` or
        ``run.duration`` and the size it would need).
    SimulationError
        When ``run.start = "steady-state"`` and there is no periodic steady state.
    """

    stage = Stage(scenario)
    folder = os.path.dirname(os.path.abspath(os.fspath(path)))
    _check_fits(scenario, len(stage.state_names), stream=True,
                directory=folder if os.path.isdir(folder) else None)
    x0 = state = None
    if scenario.run.start == "steady-state":
        steady = _steady(scenario, "run.start = 'steady-state'")
        x0 = steady.x
        if scenario.control.mode != "open-loop":
            state = steady.controller
    table = build_table(stage.matrices, scenario.period)
    options = {} if chunk_cycles is None else {"chunk_cycles": int(chunk_cycles)}
    # nominal segments per cycle: 2 phases (asynchronous) or 4 (with dead times)
    rows = scenario.n_cycles * (2 if scenario.switching.strategy == "asynchronous" else 4)
    with streamed_run(path, scenario, table, compression, rows, stage.state_names) as writer:
        if scenario.control.mode == "open-loop":
            res = integrate(stage, x0, table=table, sink=writer.append, progress=progress,
                            **options)
            status, message = res.status, res.message
        else:
            comp = None if stage.analog else design(scenario.control.compensator,
                                                    scenario.period)
            res, _, duty, _ = integrate_closed_loop(stage, comp, x0, state, table=table,
                                                    sink=writer.append, progress=progress,
                                                    **options)
            status, verdict = loop_settle_verdict(scenario.control, duty, res.status)
            message = res.message if verdict is None else verdict
        writer.finish(res.t_end, res.x_end, status, message)
    return report(path, writer.n, res.t_end, status, message)


