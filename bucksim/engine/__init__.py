"""The cycle-by-cycle engine: exact piecewise-linear propagation with events.

:func:`integrate` prepares the transition tables for a :class:`~bucksim.stage.Stage`
and runs the numba cycle loop in chunks, so memory per call stays bounded and
a caller can stream segments to disk as they come.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .kernels import STATUS_DIVERGED, STATUS_FULL, STATUS_OK, run_open_loop
from .tables import TransitionTable, build_table, phase_exponentials

__all__ = ["EngineResult", "integrate", "build_table", "TransitionTable", "duty_schedule"]

STATUS_MESSAGES = {
    STATUS_OK: "run completed",
    STATUS_DIVERGED: "state diverged (non-finite values); segments up to that point are kept",
}

#: Cycles per kernel call: bounds the segment buffer to ~8 segments per cycle.
CHUNK_CYCLES = 1 << 15


@dataclass
class EngineResult:
    """What the engine returns; mirrors ``scipy.integrate.OdeResult`` manners.

    Attributes
    ----------
    t0, dt : ndarray
        Start time and duration of each segment [s].
    conduction : ndarray of int8
        Conduction state of each segment (codes in :mod:`bucksim.stage`).
    system : ndarray of int32
        System id (level and conduction) of each segment.
    x0 : ndarray, shape (n_seg, n)
        State at the start of each segment.
    x_end : ndarray, shape (n,)
        State at ``t_end``.
    t_end : float
        Time reached [s].
    status : int
        0 completed, 1 diverged.
    message : str
    success : bool
    """

    t0: np.ndarray
    dt: np.ndarray
    conduction: np.ndarray
    system: np.ndarray
    x0: np.ndarray
    x_end: np.ndarray
    t_end: float
    status: int
    message: str

    @property
    def success(self) -> bool:
        return self.status == STATUS_OK


def duty_schedule(scenario, n_cycles: int) -> np.ndarray:
    """High-side on-time per cycle [s] for open-loop control.

    A constant duty gives a one-element array. With ``control.soft_start``
    the duty rises linearly from 0 at t = 0 to ``control.duty`` at
    ``soft_start``, evaluated at the start of each cycle.
    """
    T = scenario.period
    duty = scenario.control.duty
    ss = scenario.control.soft_start
    if ss <= 0:
        return np.array([duty * T])
    start = np.arange(n_cycles) * T
    return duty * T * np.minimum(1.0, start / ss)


def phase_durations(scenario, on_time: float) -> list[float]:
    """Nominal phase durations [s] of one cycle at high-side on-time ``on_time``."""
    T = scenario.period
    if scenario.switching.strategy == "asynchronous":
        return [on_time, T - on_time]
    tf, tr = scenario.switching.dead_time
    return [on_time, tf, max(0.0, T - on_time - tf - tr), tr]


def run_span(scenario, n_cycles=None, t_end=None, x0=None):
    """``(n_cycles, t_end [s], x0)`` of a run: the scenario's unless overridden."""
    if n_cycles is None:
        n_cycles = scenario.n_cycles
    if t_end is None:
        t_end = scenario.duration if n_cycles == scenario.n_cycles else n_cycles * scenario.period
    if x0 is None:
        x0 = [scenario.run.initial_current, scenario.run.initial_voltage]
    return n_cycles, t_end, x0


def integrate(stage, x0=None, *, on_times=None, table: TransitionTable | None = None,
              chunk_cycles: int = CHUNK_CYCLES, sink=None, n_cycles: int | None = None,
              t_end: float | None = None, phase_cache: dict | None = None,
              progress=None) -> EngineResult:
    """Simulate ``stage.scenario`` from ``x0`` for its run duration.

    Parameters
    ----------
    stage : bucksim.stage.Stage
    x0 : array_like, shape (2,), optional
        ``[iL [A], vC [V]]`` at t = 0; default from ``scenario.run``.
    on_times : ndarray, optional
        High-side on-time per cycle [s]; default :func:`duty_schedule`.
    table : TransitionTable, optional
        Reuse tables from an earlier call on the same stage.
    sink : callable, optional
        Called as ``sink(t0, dt, conduction, system, x0)`` with each chunk of
        segments instead of keeping them; the result then holds no segments.
    n_cycles, t_end : optional
        Override the scenario's run length (cycles, and the time to stop [s]).
    phase_cache : dict, optional
        Keeps the fixed-phase exponentials between calls (keyed on the
        nominal durations), for callers that integrate one stage many times.
    progress : callable, optional
        Called as ``progress(cycles_done, n_cycles)`` after each chunk.
    """
    from ..stage import STRATEGY_CODES

    sc = stage.scenario
    T = sc.period
    n_cycles, t_end, x0 = run_span(sc, n_cycles, t_end, x0)
    if on_times is None:
        on_times = duty_schedule(sc, n_cycles)
    on_times = np.ascontiguousarray(on_times, dtype=float)
    if table is None:
        table = build_table(stage.matrices, T)
    nominal = np.array(phase_durations(sc, float(on_times[-1])) + [0.0] * 4)[:4]
    key = tuple(nominal)
    if phase_cache is not None and key in phase_cache:
        P = phase_cache[key]
    else:
        P = phase_exponentials(table.matrices, nominal)
        if phase_cache is not None:
            phase_cache[key] = P
    tf, tr = sc.switching.dead_time
    strategy = STRATEGY_CODES[sc.switching.strategy]
    level_times = np.array([lev.time for lev in stage.levels])
    z = np.array([float(x0[0]), float(x0[1]), 1.0])
    n = stage.n
    n_phase = 2 if strategy == 0 else 4

    pieces = []
    level = 0
    status = STATUS_OK
    t = 0.0
    c = 0
    while c < n_cycles and status == STATUS_OK:
        c_stop = min(n_cycles, c + chunk_cycles)
        cap = (c_stop - c) * 2 * n_phase + 2 * len(level_times) + 8
        t0, dt, cond, sysid, xs = segment_buffers(cap, n)
        nseg, level, status, t = run_open_loop(
            table.matrices, table.exponentials, table.steps, P, nominal, on_times,
            float(tf), float(tr), T, strategy, c, c_stop, level_times, level, z,
            float(t_end), table.guard, t0, dt, cond, sysid, xs, table.taylor_gap)
        if status == STATUS_FULL:  # cannot happen with the bound above; keep it loud
            raise RuntimeError("segment buffer overflow in the engine (bug)")
        piece = (t0[:nseg], dt[:nseg], cond[:nseg], sysid[:nseg], xs[:nseg])
        if sink is not None:
            sink(*piece)
        else:
            pieces.append(piece)
        c = c_stop
        if progress is not None:
            progress(c, n_cycles)
        if t >= t_end:
            break
    return EngineResult(*join_segments(pieces, n), x_end=z[:n].copy(), t_end=float(t),
                        status=int(status), message=STATUS_MESSAGES[int(status)])


def segment_buffers(cap: int, n: int):
    """Empty segment columns (t0, dt, conduction, system, x0) for ``cap`` rows."""
    return (np.empty(cap), np.empty(cap), np.empty(cap, np.int8), np.empty(cap, np.int32),
            np.empty((cap, n)))


def join_segments(pieces, n: int):
    """Concatenate chunks of segment columns (empty columns when there are none)."""
    if pieces:
        return [np.concatenate(col) for col in zip(*pieces)]
    return list(segment_buffers(0, n))
