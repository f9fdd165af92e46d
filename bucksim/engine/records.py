"""The typed records the cycle loop reads and writes.

:func:`bucksim.engine.cycles.run_cycles` takes five records instead of
dozens of positional values. They are named tuples, which numba types field
by field; the loop and its inlined helpers read their fields directly (the
loop runs without reference counting, :mod:`bucksim.engine.cycles`, so that
costs nothing). :mod:`bucksim.engine.driver` and
:mod:`bucksim.engine.controlled` build them once per run:

* :class:`StageTables`: what the stage is (systems, transition tables,
  bounds); read only;
* :class:`PhaseProgram`: the period's timing (period, strategy, dead times,
  cached phase exponentials, end time); read only;
* :class:`ControllerParams`: the controller's fixed parameters (its scalars
  in one :class:`ControllerSettings`) and the norms of its event rows; read
  only;
* :class:`CompensatorState`: the digital compensator's state and delay line,
  updated in place so that a chunk continues where the last one stopped;
* :class:`SegmentBuffers`: the segment columns and the per-period logs the
  loop fills;
* :class:`Scratch`: the loop's work arrays, allocated once per call (the loop
  itself runs without reference counting and allocates nothing).

Array shapes use ``n_sys`` systems, ``m = n + 1`` augmented states, ``K``
table levels, ``n_levels`` operating levels and ``k`` compensator states.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np


class StageTables(NamedTuple):
    """The stage's systems, their exact transition tables and derivative bounds."""

    #: (n_sys, m, m) augmented system matrices ``M_s``.
    Ms: np.ndarray
    #: (n_sys, K, m, m) ``expm(M_s h_k)``.
    E: np.ndarray
    #: (K,) table steps ``h_k = T 2**-k`` [s].
    h: np.ndarray
    #: (n_sys,) longest stretch [s] searched for a crossing in one piece, per system:
    #: a quarter of its fastest time constant (a fast node ring must not slow the
    #: searches of the other systems).
    guards: np.ndarray
    #: Brackets below this [s] are finished on the Taylor series.
    taylor_gap: float
    #: (n_levels,) start time of each operating level [s].
    level_times: np.ndarray
    #: (n_sys, m) :func:`~bucksim.engine.bounds.system_bounds` of ``Ms``.
    bnd: np.ndarray
    #: (n_sys,) ``||A_s[0] W_s||_1``: the zero-current row's curvature constant.
    kil: np.ndarray
    #: (1, n_sys) the zero-current row's third-derivative constant.
    k3il: np.ndarray
    #: (m,) the event row of the inductor current, ``e_iL``.
    e_il: np.ndarray
    #: Index of the switch-node state ``vn`` in ``z`` (-1: the node has no capacitance).
    i_vn: int
    #: (n_levels * N_CONDUCTION, m) the node voltage's row per (level, conduction).
    Vsw: np.ndarray
    #: (n_levels, m) the clamp rows of the open node
    #: (:meth:`~bucksim.model.stage.Stage.clamp_rows`): low-side diode, high-side
    #: diode; with their curvature and third-derivative constants, (n_levels, n_sys).
    Cls: np.ndarray
    Chs: np.ndarray
    kls: np.ndarray
    k3ls: np.ndarray
    khs: np.ndarray
    k3hs: np.ndarray
    #: (n_levels * n_bands, 9) ``[L, Cn, C, a, b, c0, g, Icc, free]`` of the open node's
    #: energy bound (:func:`~bucksim.engine.bounds.open_node_clear`), per (level, band);
    #: ``free`` = 1: the high clamp reads the input network and is never cleared.
    open_coef: np.ndarray
    #: (n_levels, n_bands + 1) edges [V] of the node capacitance's bands in ``vn``,
    #: ``-inf`` first and ``+inf`` last (:class:`~bucksim.model.capacitance.NodeCurve`).
    band_edges: np.ndarray
    #: (m,) the node voltage's event row ``e_vn`` (zero without node capacitance), with
    #: its curvature and third-derivative constants, (1, n_sys).
    e_vn: np.ndarray
    kvn: np.ndarray
    k3vn: np.ndarray
    #: (1, m) with an input network and node capacitance, the state change per coulomb
    #: drawn at once from the switch cell (the network's column of the drawn current):
    #: the high side closing on the node takes the node's charge from there; (0, m) else.
    jumps: np.ndarray
    #: Positions of the switches' ramp currents ``ihs`` and ``ils`` in ``z`` (each
    #: followed by its slope; -1: that switch does not ramp, :mod:`bucksim.engine.ramps`).
    i_hs: int
    i_ls: int
    #: (4,) ``[rise_hs, fall_hs, rise_ls, fall_ls]`` [s]: the ramps' durations.
    ramp_times: np.ndarray
    #: (2, m) the diodes' currents while a channel ramps, ``iL - ihs`` (low-side diode)
    #: and ``ils - iL`` (high-side body diode), with their curvature and
    #: third-derivative constants, (2, n_sys).
    Zd: np.ndarray
    kzd: np.ndarray
    k3zd: np.ndarray


class PhaseProgram(NamedTuple):
    """Timing of the period's five phases (:mod:`bucksim.engine.cycles`)."""

    #: Switching period [s].
    T: float
    #: Strategy code (``ASYNC``, ``FORCED``, ``EMULATION``).
    strategy: int
    #: Falling and rising dead times [s] (zero for asynchronous).
    td_fall: float
    td_rise: float
    #: (N_PHASES,) nominal duration of each phase [s] (not positive: never cached).
    nominal: np.ndarray
    #: (n_sys, N_PHASES, m, m) ``expm(M_s nominal_p)``.
    P: np.ndarray
    #: Time at which the run stops [s].
    t_end: float


class ControllerSettings(NamedTuple):
    """A controller's scalar parameters (no arrays: free to hand to any helper)."""

    control: int            #: CONTROL_OPEN, CONTROL_DIGITAL or CONTROL_ANALOG
    peak: bool              #: peak-current mode (else voltage mode)
    reference: float        #: digital: reference [V]
    soft_start: float       #: digital: reference ramp time [s]
    sense_gain: float       #: digital: output sense gain [-]
    Dd: float               #: digital compensator's feedthrough
    duty_bits: int          #: digital: duty resolution (0: none)
    thr_ramp: float         #: analog: comparator ramp [V/s]
    ramp_v: float           #: PWM ramp amplitude [V]
    ri: float               #: current-sense gain [V/A]
    se: float               #: digital peak-current slope compensation [V/s]
    i_limit: float          #: cycle-by-cycle current limit [A] (inf: none)
    max_duty: float
    min_on: float           #: minimum on-time, also the blanking time [s]
    skip: bool              #: pulse skipping
    pfm_peak: float         #: digital peak-current mode: no pulse below this demand [A]
    n_modes: int            #: 2 with an analog integrator's anti-windup, else 1
    i_w: int                #: index of the analog integrator state (-1: none)
    w_lo: float             #: integrator limits [V]
    w_hi: float
    e_band: float           #: a hold ends this far [V] past the error's zero


class ControllerParams(NamedTuple):
    """A controller's parameters (:class:`bucksim.engine.driver.LoopArgs`): its
    scalars, and its arrays with the norms of its event rows."""

    settings: ControllerSettings
    on_times: np.ndarray    #: open loop: on-time per period [s] (or one for all)
    Cvo: np.ndarray         #: digital: output-voltage row per system
    Ad: np.ndarray          #: digital compensator (Tustin) matrices
    Bd: np.ndarray
    Cd: np.ndarray
    Cu: np.ndarray          #: analog: control-output row per level
    Cthr: np.ndarray        #: analog: comparator row per level
    Ce: np.ndarray          #: analog: error row per level
    e_w: np.ndarray         #: (m,) the integrator's event row
    kthr: np.ndarray        #: curvature constants of Cthr, (n_levels, n_sys)
    k3thr: np.ndarray       #: third-derivative constants of Cthr
    kce: np.ndarray         #: ... of Ce
    k3ce: np.ndarray
    kw: np.ndarray          #: ... of e_w, (1, n_sys)
    k3w: np.ndarray


class CompensatorState(NamedTuple):
    """Digital compensator state ``w`` (k,) and the delayed duties ``queue``; in place."""

    w: np.ndarray
    queue: np.ndarray


class SegmentBuffers(NamedTuple):
    """Segment columns written from row 0, and the per-period logs."""

    t0: np.ndarray          #: (cap,) segment start [s]
    dt: np.ndarray          #: (cap,) segment length [s]
    cond: np.ndarray        #: (cap,) int8 conduction state
    sys: np.ndarray         #: (cap,) int32 system id
    x0: np.ndarray          #: (cap, n) start state
    duty: np.ndarray        #: (periods,) on-time / T
    u: np.ndarray           #: (periods,) control value (nan in open loop)


def segment_buffers(cap: int, n: int, periods: int) -> SegmentBuffers:
    """Empty segment columns for ``cap`` rows of ``n`` states, logs of ``periods``."""
    return SegmentBuffers(np.empty(cap), np.empty(cap), np.empty(cap, np.int8),
                          np.empty(cap, np.int32), np.empty((cap, n)),
                          np.full(periods, np.nan), np.full(periods, np.nan))


class Scratch(NamedTuple):
    """Work arrays of the cycle loop and its event searches (``m`` states each)."""

    tmp: np.ndarray         #: (2 m,) propagation scratch
    trial: np.ndarray       #: event search: trial state
    work: np.ndarray        #: event search: state at the located event
    zs: np.ndarray          #: a segment's start state, then the state at its event
    zs2: np.ndarray         #: a second search's start state
    zs3: np.ndarray         #: the band-edge search's start state
    zst: np.ndarray         #: the segment's start state, kept for the hold events
    zh: np.ndarray          #: the state at a band-edge or hold event
    erow: np.ndarray        #: a band edge's event row
    zw: np.ndarray          #: band-edge search scratch
    poly: np.ndarray        #: (TAYLOR_ORDER + 1, m + 1) Taylor coefficients
    wnew: np.ndarray        #: (k,) the digital compensator's next state
