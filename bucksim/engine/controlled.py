"""Closed-loop drivers: the controller's arguments for the cycle loop, and its state.

Both controllers run in :func:`bucksim.engine.cycles.run_cycles`; this module
turns a scenario's ``[control]`` table into that kernel's arguments:

* digital: the Tustin compensator (``Ad, Bd, Cd, Dd``), the sampled output
  row per system, the delay line and the duty resolution;
* analog: the compensator is part of the stage's state; the comparator row
  per operating level is ``-c_u`` (voltage mode: the ramp ``V_ramp / T``
  crosses the compensator output) or ``Ri e_iL - c_u`` (peak-current mode,
  ramp ``Se``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from bucksim.engine.cycles import CONTROL_ANALOG, CONTROL_DIGITAL
from bucksim.engine.driver import CHUNK_CYCLES, LoopArgs, nominal_phases, run_chunks, run_span
from bucksim.engine.tables import build_table, phase_exponentials


@dataclass
class ControllerState:
    """Compensator state ``w`` and the queue of delayed duties (digital voltage mode)."""

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
                          chunk_cycles=CHUNK_CYCLES, progress=None, phase_cache=None):
    """Simulate ``stage.scenario`` under its closed-loop controller.

    Returns ``(EngineResult, ControllerState at the end, duty per cycle,
    compensator output per cycle)``. With an analog controller
    (``stage.analog``) the compensator is part of the state, ``compensator``
    and ``state`` are not used, ``x0`` may be ``[iL, vC]`` (controller at
    rest) or the full state, and the ControllerState returned is empty.
    ``phase_cache`` (a dict) keeps the dead-time exponentials between calls
    on one stage.
    """
    sc = stage.scenario
    ctl = sc.control
    T = sc.period
    n_cycles, t_end, x0 = run_span(sc, n_cycles, t_end, x0)
    if table is None:
        table = build_table(stage.matrices, T)
    nominal = nominal_phases(sc, None)
    if phase_cache is not None and "closed" in phase_cache:
        P = phase_cache["closed"]
    else:
        P = phase_exponentials(table.matrices, nominal)
        if phase_cache is not None:
            phase_cache["closed"] = P
    peak = ctl.mode == "peak-current"
    common = dict(peak=peak, ramp_v=float(ctl.ramp), se=float(ctl.slope_compensation),
                  i_limit=np.inf if ctl.current_limit is None else float(ctl.current_limit),
                  max_duty=float(ctl.max_duty), min_on=float(ctl.min_on_time),
                  skip=bool(ctl.pulse_skipping), pfm_peak=float(ctl.pfm_peak_current))
    if stage.analog:
        Cu = np.array([stage.control_output(lv) for lv in range(len(stage.levels))])
        Cthr = -Cu
        if peak:
            Cthr[:, 0] += ctl.current_sense
        w_lo, w_hi = stage.integrator_limits()
        Ce = np.array([stage.error_row(lv) for lv in range(len(stage.levels))])
        args = LoopArgs(CONTROL_ANALOG, Cu=Cu, Cthr=np.ascontiguousarray(Cthr),
                        thr_ramp=float(ctl.slope_compensation) if peak else float(ctl.ramp) / T,
                        ri=float(ctl.current_sense), n_modes=stage.n_modes,
                        i_w=stage.integrator_index, w_lo=w_lo, w_hi=w_hi, Ce=Ce, **common)
        res, duty, u = run_chunks(stage, table, P, nominal, x0, args, n_cycles, t_end, sink,
                                  chunk_cycles, progress)
        return res, ControllerState(np.zeros(0), np.zeros(0)), duty, u
    state = initial_controller(compensator, ctl.delay) if state is None else state.copy()
    n_sys = table.matrices.shape[0]
    args = LoopArgs(CONTROL_DIGITAL, reference=float(ctl.reference),
                    soft_start=float(ctl.soft_start), sense_gain=float(ctl.sense_gain),
                    Ad=compensator.Ad, Bd=compensator.Bd, Cd=compensator.Cd, Dd=compensator.Dd,
                    w=state.w, queue=state.queue, duty_bits=int(ctl.duty_bits),
                    Cvo=np.array([stage.signal("vo", s) for s in range(n_sys)]),
                    ri=float(ctl.current_sense) if ctl.current_sense > 0 else 1.0, **common)
    res, duty, u = run_chunks(stage, table, P, nominal, x0, args, n_cycles, t_end, sink,
                              chunk_cycles, progress)
    return res, state, duty, u
