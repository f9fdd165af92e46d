"""The cycle-by-cycle engine: exact piecewise-linear propagation with events.

:func:`integrate` prepares the transition tables for a :class:`~bucksim.model.stage.Stage`
and runs the numba cycle loop in chunks, so memory per call stays bounded and
a caller can stream segments to disk as they come.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from bucksim.engine.bounds import current_row_norms, row_norms, system_bounds, third_norms
from bucksim.engine.cycles import CONTROL_OPEN, N_PHASES, run_cycles
from bucksim.engine.records import (
    CompensatorState,
    ControllerParams,
    ControllerSettings,
    PhaseProgram,
    StageTables,
    segment_buffers,
)
from bucksim.engine.status import STATUS_FULL, STATUS_OK, run_message
from bucksim.engine.tables import (
    TransitionTable,
    build_table,
    phase_exponentials,
    system_guards,
)
from bucksim.model.pulse_limits import open_loop_on_time

__all__ = ["EngineResult", "integrate", "build_table", "TransitionTable", "duty_schedule"]

#: Cycles per kernel call: bounds the segment buffer to ~8 segments per cycle.
CHUNK_CYCLES = 1 << 15
#: Periods of the duty and control logs a streamed closed loop keeps (its end).
STREAM_LOG_TAIL = 1024
#: Segment rows reserved per period and integrator mode before a chunk runs:
#: two high-side pieces (blanked, live) and each off phase split at most once
#: by a zero-current event (asynchronous: 4). A chunk that needs more is run
#: again with twice the rows, up to the memory budget (see :func:`run_chunks`).
ROWS_PER_PERIOD = {"synchronous": 8, "asynchronous": 4}
#: With node capacitance each open interval may add a swing and a ring before
#: and after its diode conducts.
ROWS_PER_PERIOD_NODE = {"synchronous": 14, "asynchronous": 8}


@dataclass
class EngineResult:
    """What the engine returns; mirrors ``scipy.integrate.OdeResult`` manners.

    Attributes
    ----------
    t0, dt : ndarray
        Start time and duration of each segment [s].
    conduction : ndarray of int8
        Conduction state of each segment (codes in :mod:`bucksim.model.stage`).
    system : ndarray of int32
        System id (level and conduction) of each segment.
    x0 : ndarray, shape (n_seg, n)
        State at the start of each segment.
    x_end : ndarray, shape (n,)
        State at ``t_end``.
    t_end : float
        Time reached [s].
    status : int
        A run code of :mod:`bucksim.engine.status`: 0 completed, 1 diverged.
    message : str
        The code's message from that table.
    success : bool
        ``status == 0``.
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
    ``soft_start``, evaluated at the start of each cycle. An on-time below
    ``control.min_on_time`` is raised to it, or skipped with
    ``control.pulse_skipping`` (:func:`~bucksim.model.pulse_limits.open_loop_on_time`).
    """
    T = scenario.period
    ctl = scenario.control
    duty = ctl.duty
    ss = ctl.soft_start
    if ss <= 0:
        return np.atleast_1d(open_loop_on_time(ctl, duty * T))
    start = np.arange(n_cycles) * T
    return open_loop_on_time(ctl, duty * T * np.minimum(1.0, start / ss))


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
    stage : bucksim.model.stage.Stage
    x0 : array_like, shape (2,), optional
        ``[iL [A], vC [V]]`` at t = 0; default from ``scenario.run``.
        The stage runs in open loop (a closed-loop scenario's controller is
        not applied here: see :mod:`bucksim.engine.controlled`).
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
    sc = stage.scenario
    T = sc.period
    n_cycles, t_end, x0 = run_span(sc, n_cycles, t_end, x0)
    if on_times is None:
        on_times = duty_schedule(sc, n_cycles)
    on_times = np.ascontiguousarray(on_times, dtype=float)
    if table is None:
        table = build_table(stage.matrices, T)
    nominal = nominal_phases(sc, float(on_times[-1]))
    key = tuple(nominal)
    if phase_cache is not None and key in phase_cache:
        P = phase_cache[key]
    else:
        P = phase_exponentials(table.matrices, nominal)
        if phase_cache is not None:
            phase_cache[key] = P
    controller = LoopArgs(control=CONTROL_OPEN, on_times=on_times)
    result, _, _ = run_chunks(stage, table, P, nominal, x0, controller, n_cycles, t_end,
                              sink, chunk_cycles, progress)
    return result


def nominal_phases(scenario, on_time: float | None) -> np.ndarray:
    """Nominal duration [s] of each phase of :mod:`~bucksim.engine.cycles`' program.

    ``on_time=None`` (closed loop): only the dead times are fixed. A phase
    whose nominal duration is not positive is never taken from the cache.
    """
    out = np.full(N_PHASES, -1.0)
    T = scenario.period
    if scenario.switching.strategy == "asynchronous":
        if on_time is not None:
            out[0], out[2] = on_time, T - on_time
        return out
    tf, tr = scenario.switching.dead_time
    out[2], out[4] = tf, tr
    if on_time is not None:
        out[0], out[3] = on_time, max(0.0, T - on_time - tf - tr)
    return out


@dataclass
class LoopArgs:
    """A run's controller as the Python side describes it (fields: see
    :class:`~bucksim.engine.records.ControllerParams`); :meth:`records` turns it
    into the cycle loop's records. ``w`` and ``queue`` are updated in place."""

    control: int
    peak: bool = False
    on_times: np.ndarray = field(default_factory=lambda: np.zeros(1))
    Cvo: np.ndarray | None = None
    reference: float = 0.0
    soft_start: float = 0.0
    sense_gain: float = 1.0
    Ad: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    Bd: np.ndarray = field(default_factory=lambda: np.zeros(0))
    Cd: np.ndarray = field(default_factory=lambda: np.zeros(0))
    Dd: float = 0.0
    w: np.ndarray = field(default_factory=lambda: np.zeros(0))
    queue: np.ndarray = field(default_factory=lambda: np.zeros(0))
    duty_bits: int = 0
    Cu: np.ndarray | None = None
    Cthr: np.ndarray | None = None
    thr_ramp: float = 0.0
    ramp_v: float = 1.0
    ri: float = 1.0
    se: float = 0.0
    i_limit: float = np.inf
    max_duty: float = 1.0
    min_on: float = 0.0
    skip: bool = False
    pfm_peak: float = 0.0
    n_modes: int = 1
    i_w: int = -1
    w_lo: float = -np.inf
    w_hi: float = np.inf
    Ce: np.ndarray | None = None

    def records(self, tables: StageTables) -> tuple[ControllerParams, CompensatorState]:
        """The cycle loop's controller records; absent rows become a zero row of
        width ``m``, and the norms of each event row are taken once here."""
        Ms, bnd = tables.Ms, tables.bnd
        m = Ms.shape[1]

        def rows(a):
            return np.zeros((1, m)) if a is None else a

        e_w = np.zeros(m)
        if self.i_w >= 0:
            e_w[self.i_w] = 1.0
        Cthr, Ce = rows(self.Cthr), rows(self.Ce)
        # a hold ends where the error has crossed zero by e_band [V]: far below any
        # physical error, yet enough that the integrator always leaves the limit
        # after a release, so rounding at the crossing cannot bring the hold back
        e_band = 1e-12 * max(abs(float(self.reference)) * float(self.sense_gain), 1.0)
        settings = ControllerSettings(
            int(self.control), bool(self.peak), float(self.reference), float(self.soft_start),
            float(self.sense_gain), float(self.Dd), int(self.duty_bits), float(self.thr_ramp),
            float(self.ramp_v), float(self.ri), float(self.se), float(self.i_limit),
            float(self.max_duty), float(self.min_on), bool(self.skip), float(self.pfm_peak),
            int(self.n_modes),
            int(self.i_w), float(self.w_lo), float(self.w_hi), e_band)
        e_w1 = e_w.reshape(1, m)
        params = ControllerParams(
            settings, self.on_times, rows(self.Cvo), self.Ad, self.Bd, self.Cd, rows(self.Cu),
            Cthr, Ce, e_w, row_norms(Ms, bnd, Cthr), third_norms(Ms, bnd, Cthr),
            row_norms(Ms, bnd, Ce), third_norms(Ms, bnd, Ce), row_norms(Ms, bnd, e_w1),
            third_norms(Ms, bnd, e_w1))
        return params, CompensatorState(self.w, self.queue)


def stage_tables(stage, table: TransitionTable) -> StageTables:
    """The cycle loop's record of a stage's tables and bounds, built once per
    (stage, table): a shooting integrates the same stage hundreds of times, and
    the record took 2 ms to build (its bounds and rows), as long as the run."""
    cached = getattr(table, "_loop_record", None)
    if cached is not None and cached[0] is stage:
        return cached[1]
    record = _stage_tables(stage, table)
    object.__setattr__(table, "_loop_record", (stage, record))   # (a frozen dataclass)
    return record


def _stage_tables(stage, table: TransitionTable) -> StageTables:
    Ms = table.matrices
    m = Ms.shape[1]
    bnd = system_bounds(Ms)
    e_il = np.zeros(m)
    e_il[0] = 1.0
    e_vn = np.zeros(m)
    n_levels = len(stage.levels)
    if stage.node:
        from bucksim.model.stage import N_CONDUCTION

        Vsw = np.array([stage.signal("vsw", stage.system_id(lv, k)) for lv in range(n_levels)
                        for k in range(N_CONDUCTION)])
        clamps = [stage.clamp_rows(lv) for lv in range(n_levels)]
        Cls = np.array([c[0] for c in clamps])
        Chs = np.array([c[1] for c in clamps])
        coef = []
        for lev, curve in zip(stage.levels, stage.curves, strict=True):
            a = 1.0 / (1.0 + stage.esr * lev.conductance)
            coef += [[stage.L, cn, stage.C, a, stage.esr * a, -stage.esr * lev.current * a,
                      lev.conductance, lev.current] for cn in curve.caps]
        # the high clamp reads the cell's voltage with an input network, a state the
        # energy bound of bounds.open_node_clear does not follow: flag it
        free = 0.0 if stage.net is None else 1.0
        open_coef = np.array([c + [free] for c in coef])
        edges = np.array([curve.edges for curve in stage.curves])
        e_vn[stage.i_node] = 1.0
    else:
        Vsw = Cls = Chs = np.zeros((1, m))
        open_coef = np.ones((n_levels, 9))
        edges = np.tile([-np.inf, np.inf], (n_levels, 1))
    return StageTables(Ms, table.exponentials, table.steps, system_guards(table),
                       float(table.taylor_gap),
                       np.array([lev.time for lev in stage.levels], dtype=float), bnd,
                       current_row_norms(Ms, bnd), third_norms(Ms, bnd, e_il.reshape(1, m)),
                       e_il, int(stage.i_node), np.ascontiguousarray(Vsw),
                       np.ascontiguousarray(Cls), np.ascontiguousarray(Chs),
                       row_norms(Ms, bnd, Cls), third_norms(Ms, bnd, Cls),
                       row_norms(Ms, bnd, Chs), third_norms(Ms, bnd, Chs), open_coef,
                       np.ascontiguousarray(edges, dtype=float), e_vn,
                       row_norms(Ms, bnd, e_vn.reshape(1, m)),
                       third_norms(Ms, bnd, e_vn.reshape(1, m)), _jumps(stage, m),
                       *_ramp_fields(stage, Ms, bnd, e_il))


def _ramp_fields(stage, Ms, bnd, e_il):
    """The ramps' positions, durations and diode-current rows (:mod:`bucksim.engine.ramps`)."""
    times = stage.ramp_times
    Zd = np.array([e_il, -e_il])
    if stage.i_hs >= 0:
        Zd[0, stage.i_hs] = -1.0
    if stage.i_ls >= 0:
        Zd[1, stage.i_ls] = 1.0
    return (int(stage.i_hs), int(stage.i_ls), times, Zd, row_norms(Ms, bnd, Zd),
            third_norms(Ms, bnd, Zd))


def _jumps(stage, m):
    """The state change per coulomb drawn at once from the cell ((1, m); (0, m)
    without an input network or node capacitance): the network's ``b_d`` column,
    the same at every level (the levels change sources, not the network)."""
    if stage.net is None or not stage.node:
        return np.zeros((0, m))
    col = np.zeros((1, m))
    col[0, stage.i_in:stage.i_in + stage.n_in] = stage.net.b_d
    return col


def phase_program(scenario, P, nominal, t_end: float) -> PhaseProgram:
    """The cycle loop's record of the period's timing."""
    from bucksim.model.stage import STRATEGY_CODES

    strategy = STRATEGY_CODES[scenario.switching.strategy]
    tf, tr = scenario.switching.dead_time if strategy != 0 else (0.0, 0.0)
    return PhaseProgram(float(scenario.period), int(strategy), float(tf), float(tr),
                        np.ascontiguousarray(nominal, dtype=float), P, float(t_end))


def run_chunks(stage, table, P, nominal, x0, controller: LoopArgs, n_cycles, t_end, sink=None,
               chunk_cycles=CHUNK_CYCLES, progress=None):
    """Run :func:`~bucksim.engine.cycles.run_cycles` in chunks of ``chunk_cycles`` periods.

    Returns ``(EngineResult, duty per period, control value per period)``;
    with ``sink`` the segments go there chunk by chunk instead. The two logs
    are kept whole for a closed loop run in memory; a streamed closed loop
    keeps their last :data:`STREAM_LOG_TAIL` periods (enough to judge whether
    the loop settled); open loop keeps none.
    """
    sc = stage.scenario
    tables = stage_tables(stage, table)
    program = phase_program(sc, P, nominal, t_end)
    params, state = controller.records(tables)
    z = np.append(stage.initial_state(x0), 1.0)
    n = stage.n
    # the per-period logs serve a closed-loop Run in memory; streamed or open-loop
    # runs drop them so memory stays bounded by one chunk
    keep_logs = sink is None and controller.control != CONTROL_OPEN
    pieces, duty_log, u_log = [], [np.zeros(0)], [np.zeros(0)]
    level, status, t, c = 0, STATUS_OK, 0.0, 0
    held = 0        # bytes of segments kept so far (in memory only)
    while c < n_cycles and status == STATUS_OK:
        c_stop = min(n_cycles, c + chunk_cycles)
        k = c_stop - c
        buf, nseg, level, status, t = _run_chunk(sc, tables, program, params, state, z, level,
                                                 c, c_stop, held)
        piece = tuple(col[:nseg] for col in buf[:5])
        if sink is not None:
            sink(*piece)
        else:
            # copies, not views: a view would keep the whole reserved buffer alive
            pieces.append(tuple(col.copy() for col in piece))
            held += nseg * segment_row_bytes(n)
        if keep_logs:
            duty_log.append(buf.duty)
            u_log.append(buf.u)
            held += 2 * 8 * k
        elif controller.control != CONTROL_OPEN:  # streamed: a bounded tail only
            duty_log = [np.concatenate(duty_log + [buf.duty])[-STREAM_LOG_TAIL:]]
            u_log = [np.concatenate(u_log + [buf.u])[-STREAM_LOG_TAIL:]]
        c = c_stop
        if progress is not None:
            progress(c, n_cycles)
        if t >= t_end:
            break
    res = EngineResult(*join_segments(pieces, n), x_end=z[:n].copy(), t_end=float(t),
                       status=int(status), message=run_message(status))
    return res, np.concatenate(duty_log), np.concatenate(u_log)


def _run_chunk(scenario, tables, program, params, state, z, level, c, c_stop, held):
    """Periods ``c .. c_stop-1`` in one buffer; ``z`` and ``state`` move on in place.

    Reserves :data:`ROWS_PER_PERIOD` rows a period (times the integrator's
    modes) plus the splits at level changes; a chunk with more events than
    that (e.g. many integrator holds) is run again from its start with twice
    the rows, up to the memory budget. Returns ``(buffers, n_segments, level,
    status, t)``.
    """
    n = z.shape[0] - 1
    k = c_stop - c
    rows = (ROWS_PER_PERIOD_NODE if tables.i_vn >= 0 else ROWS_PER_PERIOD)[
        "synchronous" if program.strategy != 0 else "asynchronous"]
    rows *= params.settings.n_modes
    saved = (z.copy(), state.w.copy(), state.queue.copy())
    while True:
        cap = k * rows + 2 * len(tables.level_times) + 8
        _refuse_buffer(scenario, cap, n, k, rows, c, held)
        buf = segment_buffers(cap, n, k)
        nseg, level_out, status, t = run_cycles(tables, program, params, state, z, level, c,
                                                c_stop, buf)
        if status != STATUS_FULL:
            return buf, nseg, level_out, status, t
        z[:], state.w[:], state.queue[:] = saved
        rows *= 2


def _refuse_buffer(scenario, cap, n, k, rows, c, held):
    """Raise SimulationError when a chunk's segment buffer would not fit in memory.

    The buffer doubles each time a chunk finds more segments per period than
    it reserved (events that come ever closer, e.g. a hold that chatters);
    without a bound that grows until the operating system ends the process.
    """
    from bucksim.engine.limits import format_bytes, memory_budget
    from bucksim.errors import SimulationError

    need = held + cap * segment_row_bytes(n) + 2 * 8 * k
    budget = memory_budget()
    if need <= budget:
        return
    raise SimulationError(
        f"{scenario.source or scenario.title}: periods {c} to {c + k}: the segment buffer "
        f"({rows} rows a period) would need about {format_bytes(need)} with the "
        f"{format_bytes(held)} of segments already kept, more than the {format_bytes(budget)} "
        f"this machine allows; the run was stopped there. Either events crowd together "
        f"(more segments a period than a buck has) or the run is too long: shorten "
        f"run.cycles / run.duration, or stream it to a file")


def segment_row_bytes(n: int) -> int:
    """Bytes of one segment row in memory (t0, dt, conduction, system, ``n`` states)."""
    from bucksim.engine.limits import segment_row_bytes as row_bytes
    return row_bytes(n)


def join_segments(pieces, n: int):
    """Concatenate chunks of segment columns (empty columns when there are none)."""
    if pieces:
        return [np.concatenate(col) for col in zip(*pieces, strict=True)]
    return list(segment_buffers(0, n, 0)[:5])
