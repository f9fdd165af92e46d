"""Driver for the closed-loop kernel: chunks, controller state, per-cycle logs."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import (CHUNK_CYCLES, STATUS_MESSAGES, EngineResult, join_segments, run_span,
               segment_buffers)
from .closed_loop import PEAK_CURRENT, VOLTAGE_MODE, run_closed_loop
from .kernels import STATUS_FULL, STATUS_OK
from .tables import build_table


@dataclass
class ControllerState:
    """Compensator state ``w`` and the queue of delayed duties (voltage mode)."""

    w: np.ndarray
    queue: np.ndarray

    def copy(self):
        return ControllerState(self.w.copy(), self.queue.copy())

    def vector(self) -> np.ndarray:
        return np.concatenate([self.w, self.queue])


def initial_controller(compensator, delay: int) -> ControllerState:
    """Controller at rest: zero compensator state, zero duty in the delay line."""
    return ControllerState(np.zeros(compensator.order), np.zeros(delay))


def integrate_closed_loop(stage, compensator, x0=None, state: ControllerState | None = None, *,
                          table=None, n_cycles=None, t_end=None, sink=None,
                          chunk_cycles=CHUNK_CYCLES, progress=None):
    """Simulate ``stage.scenario`` under its closed-loop controller.

    Returns ``(EngineResult, ControllerState at the end, duty per cycle,
    compensator output per cycle)``. With an analog controller
    (``stage.analog``) the compensator is part of the state, ``compensator``
    and ``state`` are not used, ``x0`` may be ``[iL, vC]`` (controller at
    rest) or the full state, and the ControllerState returned is empty.
    """
    from ..stage import STRATEGY_CODES

    sc = stage.scenario
    ctl = sc.control
    T = sc.period
    n_cycles, t_end, x0 = run_span(sc, n_cycles, t_end, x0)
    if table is None:
        table = build_table(stage.matrices, T)
    if stage.analog:
        return _integrate_analog(stage, x0, table, n_cycles, t_end, sink, chunk_cycles, progress)
    state = initial_controller(compensator, ctl.delay) if state is None else state.copy()
    n_sys = table.matrices.shape[0]
    cvo = np.array([stage.signal("vo", s) for s in range(n_sys)])
    P = np.zeros((n_sys, 1, 3, 3))
    mode = PEAK_CURRENT if ctl.mode == "peak-current" else VOLTAGE_MODE
    tf, tr = sc.switching.dead_time if sc.switching.strategy != "asynchronous" else (0.0, 0.0)
    level_times = np.array([lev.time for lev in stage.levels])
    z = np.array([float(x0[0]), float(x0[1]), 1.0])
    i_limit = np.inf if ctl.current_limit is None else float(ctl.current_limit)
    ri = ctl.current_sense if ctl.current_sense > 0 else 1.0
    n = stage.n
    pieces, duty_log, u_log = [], [], []
    level, status, t, c = 0, STATUS_OK, 0.0, 0
    while c < n_cycles and status == STATUS_OK:
        c_stop = min(n_cycles, c + chunk_cycles)
        k = c_stop - c
        cap = k * 12 + 2 * len(level_times) + 8
        bufs = segment_buffers(cap, n)
        dl, ul = np.full(k, np.nan), np.full(k, np.nan)
        nseg, level, status, t = run_closed_loop(
            table.matrices, table.exponentials, table.steps, P, cvo, T,
            STRATEGY_CODES[sc.switching.strategy], mode, c, c_stop, level_times, level, z,
            float(t_end), table.guard, float(tf), float(tr), float(ctl.reference),
            float(ctl.soft_start), float(ctl.sense_gain), compensator.Ad, compensator.Bd,
            compensator.Cd, compensator.Dd, state.w, state.queue, float(ctl.ramp), float(ri),
            float(ctl.slope_compensation), i_limit, float(ctl.max_duty),
            float(ctl.min_on_time), bool(ctl.pulse_skipping), int(ctl.duty_bits), *bufs, dl, ul,
            table.taylor_gap)
        if status == STATUS_FULL:
            raise RuntimeError("segment buffer overflow in the closed-loop engine (bug)")
        piece = tuple(b[:nseg] for b in bufs)
        if sink is not None:
            sink(*piece)
        else:
            pieces.append(piece)
        duty_log.append(dl)
        u_log.append(ul)
        c = c_stop
        if progress is not None:
            progress(c, n_cycles)
        if t >= t_end:
            break
    res = EngineResult(*join_segments(pieces, n), x_end=z[:n].copy(), t_end=float(t), status=int(status),
                       message=STATUS_MESSAGES[int(status)])
    return res, state, np.concatenate(duty_log), np.concatenate(u_log)


def _integrate_analog(stage, x0, table, n_cycles, t_end, sink, chunk_cycles, progress):
    """The analog-controller loop: the comparator rows per level, then the kernel in chunks."""
    from ..stage import STRATEGY_CODES
    from .analog_loop import run_analog_loop

    sc = stage.scenario
    ctl = sc.control
    T = sc.period
    n_levels = len(stage.levels)
    m = stage.n + 1
    Cu = np.array([stage.control_output(lv) for lv in range(n_levels)])
    peak = ctl.mode == "peak-current"
    Cthr = -Cu.copy()
    if peak:
        Cthr[:, 0] += ctl.current_sense
        thr_ramp = float(ctl.slope_compensation)
    else:
        thr_ramp = float(ctl.ramp) / T
    Cthr = np.ascontiguousarray(Cthr)
    P = np.zeros((table.matrices.shape[0], 1, m, m))
    tf, tr = sc.switching.dead_time if sc.switching.strategy != "asynchronous" else (0.0, 0.0)
    level_times = np.array([lev.time for lev in stage.levels])
    z = np.append(stage.initial_state(x0), 1.0)
    i_limit = np.inf if ctl.current_limit is None else float(ctl.current_limit)
    n = stage.n
    pieces, duty_log, u_log = [], [], []
    level, status, t, c = 0, STATUS_OK, 0.0, 0
    while c < n_cycles and status == STATUS_OK:
        c_stop = min(n_cycles, c + chunk_cycles)
        k = c_stop - c
        bufs = segment_buffers(k * 12 + 2 * len(level_times) + 8, n)
        dl, ul = np.full(k, np.nan), np.full(k, np.nan)
        nseg, level, status, t = run_analog_loop(
            table.matrices, table.exponentials, table.steps, P, Cu, Cthr, thr_ramp, T,
            STRATEGY_CODES[sc.switching.strategy], peak, c, c_stop, level_times, level, z,
            float(t_end), table.guard, float(tf), float(tr), float(ctl.ramp),
            float(ctl.current_sense), i_limit, float(ctl.max_duty), float(ctl.min_on_time),
            bool(ctl.pulse_skipping), *bufs, dl, ul, table.taylor_gap)
        if status == STATUS_FULL:
            raise RuntimeError("segment buffer overflow in the analog-loop engine (bug)")
        piece = tuple(b[:nseg] for b in bufs)
        if sink is not None:
            sink(*piece)
        else:
            pieces.append(piece)
        duty_log.append(dl)
        u_log.append(ul)
        c = c_stop
        if progress is not None:
            progress(c, n_cycles)
        if t >= t_end:
            break
    res = EngineResult(*join_segments(pieces, n), x_end=z[:n].copy(), t_end=float(t),
                       status=int(status), message=STATUS_MESSAGES[int(status)])
    empty = ControllerState(np.zeros(0), np.zeros(0))
    return res, empty, np.concatenate(duty_log), np.concatenate(u_log)
