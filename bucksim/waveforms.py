"""Stored waveforms: the segment table and everything derived from it.

A run is kept as segments (start time, duration, conduction state, system
id, start state). Within a segment the state is ``z(t) = expm(M_s t) z0``, so
any value at any time and any integral is recovered exactly from the table;
uniform samples are derived data for plots, never the source of metrics.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from bucksim.analysis.segments import segment_states
from bucksim.analysis.summarize import summarize
from bucksim.engine.driver import EngineResult, TransitionTable
from bucksim.engine.status import STATUS_DIVERGED
from bucksim.errors import SimulationError
from bucksim.io.hdf5 import save_run
from bucksim.io.runfile import read_run
from bucksim.model.stage import CONDUCTION_NAMES, STATE_NAMES, UNITS, Stage
from bucksim.threads import single_blas_thread

if TYPE_CHECKING:
    from bucksim.engine.controlled import ControllerState
    from bucksim.model.parts import Scenario
    from bucksim.steady.result import SteadyState

#: Signals every run can evaluate (see :meth:`bucksim.model.stage.Stage.signal`).
SIGNALS = ("iL", "vC", "vo", "io", "ic", "iin", "vsw", "vin",
           "high_side", "low_side", "high_side_body_diode", "low_side_body_diode",
           "switch_node")

#: Further signals of an analog closed loop: compensator output and reference [V].
LOOP_SIGNALS = ("u", "vref")

@dataclass(frozen=True)
class SegmentTable:
    """Columns of the segment table (one row per linear segment).

    Attributes
    ----------
    t0 : ndarray [s]   start time
    dt : ndarray [s]   duration
    conduction : ndarray of int8   conduction state code
    system : ndarray of int32      system id (operating level and conduction)
    x0 : ndarray, shape (n_seg, n)   state ``[iL [A], vC [V], ...]`` at ``t0``
        (an analog loop appends its compensator states and reference [V])
    """

    t0: np.ndarray
    dt: np.ndarray
    conduction: np.ndarray
    system: np.ndarray
    x0: np.ndarray

    def __len__(self):
        return self.t0.shape[0]

    def conduction_names(self):
        """Conduction state of each segment as a readable name."""
        return np.array(CONDUCTION_NAMES)[self.conduction]


@dataclass(init=False, eq=False, repr=False, slots=True)
class Run:
    """The result of :func:`bucksim.simulate`: segments plus what evaluates them.

    Every attribute is declared here (the class has slots: nothing else can be
    attached to a run).

    Attributes
    ----------
    scenario : Scenario
    stage : Stage
    table : TransitionTable
        Exact transition tables of the stage's systems.
    segments : SegmentTable
    t_end : float   time reached [s]
    x_end : ndarray   state at ``t_end``
    status : int    0 completed, 1 diverged, 3 closed loop did not settle
    message : str
    steady_state : SteadyState or None
        The shooting result the run started from (``run.start =
        "steady-state"``, :func:`bucksim.simulation.simulate_settled`); None
        for a run from rest or a given state, and for a run read from a file.
    controller_state : ControllerState or None
        Closed loop only: the digital compensator's state at ``t_end``.
    duty : ndarray or None
        Closed loop only: the duty of each period [-] (NaN where a period did
        not start).
    control_output : ndarray or None
        Closed loop only: the compensator output of each period.
    path : str or None
        The run file this run was read from (None: simulated in this process).
    success : bool
    """

    scenario: Scenario
    stage: Stage
    table: TransitionTable
    segments: SegmentTable
    t_end: float
    x_end: np.ndarray
    status: int
    message: str
    steady_state: SteadyState | None
    controller_state: ControllerState | None
    duty: np.ndarray | None
    control_output: np.ndarray | None
    path: str | None
    _signal_tables: dict

    def __init__(self, scenario, stage: Stage, table: TransitionTable, result: EngineResult, *,
                 steady_state=None, controller_state=None, duty=None, control_output=None,
                 path=None):
        self.scenario = scenario
        self.stage = stage
        self.table = table
        self.segments = SegmentTable(result.t0, result.dt, result.conduction, result.system,
                                     result.x0)
        self.t_end = result.t_end
        self.x_end = result.x_end
        self.status = result.status
        self.message = result.message
        self.steady_state = steady_state
        self.controller_state = controller_state
        self.duty = duty
        self.control_output = control_output
        self.path = None if path is None else str(path)
        self._signal_tables = {}

    @property
    def starts_settled(self) -> bool:
        """True when the run starts on its periodic steady state: it was started
        from a shooting result, or (a run read from a file) its scenario says
        ``run.start = "steady-state"``."""
        if self.path is None:
            return self.steady_state is not None
        return self.scenario.run.start == "steady-state"

    @property
    def success(self) -> bool:
        return self.status == 0

    @property
    def signals(self) -> tuple:
        """Names this run can evaluate: :data:`SIGNALS`, plus ``u`` and ``vref`` in an
        analog loop, and the input side's (``vs``, ``vterm``, ``isrc``, ``icin``,
        ``icin1`` .., ``ilf``, ``idamp``, ``irp``) with an input capacitor, and each
        ramping switch's ``high_side_ramp`` / ``low_side_ramp`` [A] and the voltage
        across it, ``..._ramp_voltage`` [V] (:mod:`bucksim.model.stage_ramps`)."""
        net = self.stage.net
        extra = () if net is None else (("vs", "vterm", "isrc", "icin")
                                         + tuple(k for k in net.rows if k[:4] == "icin"
                                                 and k != "icin")
                                         + ("ilf", "idamp", "irp"))
        ramps = tuple(f"{dev}_ramp{kind}" for dev, i in (("high_side", self.stage.i_hs),
                                                         ("low_side", self.stage.i_ls))
                      if i >= 0 for kind in ("", "_voltage"))
        return SIGNALS + (LOOP_SIGNALS if self.stage.analog else ()) + extra + ramps

    @property
    def period(self) -> float:
        return self.scenario.period

    def __repr__(self):
        return (f"<Run {self.scenario.title!r}: {len(self.segments)} segments, "
                f"t_end={self.t_end:.6g} s, {self.message}>")

    # -- evaluation ------------------------------------------------------------
    def signal_table(self, name: str) -> np.ndarray:
        """Row vectors ``c_s`` (n_sys, n+1) with ``signal = c_s @ z`` in system s."""
        if name not in self._signal_tables:
            known = self.signals
            if name not in known:
                raise KeyError(f"unknown signal {name!r}; known: {', '.join(known)}")
            n_sys = self.table.matrices.shape[0]
            self._signal_tables[name] = np.array([self.stage.signal(name, s) for s in range(n_sys)])
        return self._signal_tables[name]

    def locate(self, times):
        """Segment index holding each time (the later segment at a boundary).

        ``times`` [s] is flattened to one dimension. Raises ValueError for a
        time that is NaN or outside ``[segments.t0[0], t_end]``, naming it.
        """
        try:
            times = np.asarray(times, dtype=float).ravel()
        except (TypeError, ValueError):
            raise TypeError(f"times must be numbers [s] (a float or an array of them), "
                            f"got {type(times).__name__}") from None
        seg = self.segments
        if len(seg) == 0:
            raise ValueError("the run holds no segments")
        lo, hi = float(seg.t0[0]), float(self.t_end)
        bad = ~((times >= lo) & (times <= hi))      # NaN compares false: caught here too
        if np.any(bad):
            k = int(np.flatnonzero(bad)[0])
            raise ValueError(f"times must lie in [{lo:.6g}, {hi:.6g}] s (the simulated span), "
                             f"got {float(times[k])!r} at index {k}")
        idx = np.searchsorted(seg.t0, times, side="right") - 1
        return np.clip(idx, 0, len(seg) - 1), times

    def augmented_at(self, times):
        """Augmented states ``z = [iL, vC, ..., 1]`` at ``times`` and their segment indices."""
        idx, times = self.locate(times)
        return self.states_in(idx, times - self.segments.t0[idx]), idx

    def states_in(self, index, tau):
        """Augmented states ``z`` at offsets ``tau`` [s] inside segments ``index``.

        An offset equal to a segment's length gives the left limit at its end
        (evaluated in that segment), which a switch-node edge needs.
        """
        return segment_states(self, index, tau)

    def segment_values(self, signal: str, index, tau):
        """``signal`` at offsets ``tau`` [s] inside segments ``index`` (left limits at ends)."""
        index = np.asarray(index, dtype=np.int64)
        c = self.signal_table(signal)[self.segments.system[index]]
        return np.einsum("ij,ij->i", c, self.states_in(index, tau))

    def at(self, times, signal: str | None = None):
        """State ``[iL [A], vC [V], ...]`` at ``times`` [s], or one signal's values.

        The columns are ``stage.state_names``: ``iL``, ``vC``, and in an analog
        loop the compensator states ``w1 .. wk`` and the reference ``vref`` [V].

        Parameters
        ----------
        times : float or array_like [s]
            Any shape. Every time must be finite and lie in the simulated span
            ``[segments.t0[0], t_end]``; a NaN or a time outside it raises
            ValueError naming the value (no value is invented there).
        signal : str, optional
            One of :attr:`signals` (e.g. ``"vo"``, ``"vsw"``).

        Returns
        -------
        ndarray
            States: shape ``times.shape + (n,)``; one signal: ``times.shape``.
            A scalar time counts as one element (shape ``(1, n)`` or ``(1,)``).
            At a segment boundary the later segment is used (matters for
            ``vsw`` only; states are continuous).
        """
        shape = np.shape(times) if np.ndim(times) > 0 else (1,)
        z, idx = self.augmented_at(times)
        if signal is None:
            return z[:, :self.stage.n].reshape(shape + (self.stage.n,))
        c = self.signal_table(signal)[self.segments.system[idx]]
        return np.einsum("ij,ij->i", c, z).reshape(shape)

    def sample(self, n: int = 2001, start: float | None = None, stop: float | None = None,
               signals=("iL", "vo", "vsw")):
        """Uniform samples for plots: dict with ``t`` [s] and each signal [SI units].

        ``n >= 1`` points from ``start`` to ``stop`` (default the whole run);
        ``start <= stop``, both inside the simulated span, else ValueError.
        """
        start = float(self.segments.t0[0]) if start is None else float(start)
        stop = float(self.t_end) if stop is None else float(stop)
        if not start <= stop:
            raise ValueError(f"sample: start must not be after stop, got start={start!r} s, "
                             f"stop={stop!r} s")
        if isinstance(n, bool) or int(n) != n or n < 1:
            raise ValueError(f"sample: n must be a whole number >= 1, got {n!r}")
        t = np.linspace(start, stop, int(n))
        z, idx = self.augmented_at(t)
        out = {"t": t}
        for name in signals:
            c = self.signal_table(name)[self.segments.system[idx]]
            out[name] = np.einsum("ij,ij->i", c, z)
        out["conduction"] = self.segments.conduction[idx]
        return out

    def switching_times(self):
        """Instants where a new segment starts [s] (gate changes, events, steps)."""
        return self.segments.t0.copy()

    # -- post-processing ---------------------------------------------------------
    @single_blas_thread
    def summary(self, cycles: int | None = None):
        """Summary over the last ``cycles`` periods (default ``run.summary_cycles``).

        Raises :class:`~bucksim.errors.SimulationError` for a diverged run, and
        for one whose states are finite but so large that a metric is not
        (energies and loss integrals square the states): such a run is marked
        diverged (``status`` 1, ``message``) rather than summarised with NaN.
        """
        try:
            # overflow yields inf/NaN, which the check below reports in plain words
            with np.errstate(over="ignore", invalid="ignore"):
                out = summarize(self, cycles)
            where = first_non_finite(out.to_dict())
        except OverflowError as exc:    # Python floats overflow where numpy gives inf
            where = ("arithmetic", f"overflow ({exc})")
        if where is not None:
            peak = float(np.max(np.abs(self.segments.x0))) if len(self.segments) else np.nan
            self.status = STATUS_DIVERGED
            self.message = (f"state out of range: the summary's {where[0]} is {where[1]} "
                            f"(the states reach {peak:.3g} in magnitude, beyond what their "
                            f"squares can represent); the run is treated as diverged, its "
                            f"segments are kept")
            sc = self.scenario
            raise SimulationError(f"{sc.source or sc.title}: {self.message}; no summary")
        return out

    def plot(self, signals=("iL", "vsw", "vo"), window=None, **kw):
        """Figure: stacked waveforms over ``window = (start, stop)`` [s] (default the
        whole run) with the conduction-state band
        (:func:`bucksim.plotting.waveform_figure`)."""
        from bucksim.plotting import waveform_figure
        return waveform_figure(self, signals, window, **kw)

    def to_dict(self) -> dict:
        """Plain values: the scenario (resolved, SI), the outcome, the segment table as
        columns (conduction states by name), the steady state the run started
        from and, in closed loop, the per-period duty and compensator output
        (None elsewhere). Sizes grow with the run: for long runs prefer
        :meth:`save`."""
        from bucksim.model.scenario import scenario_to_dict

        seg = self.segments

        def listed(a):
            return None if a is None else np.asarray(a, dtype=float).tolist()

        return {
            "scenario": scenario_to_dict(self.scenario),
            "status": int(self.status), "message": self.message, "success": self.success,
            "t_end": float(self.t_end), "x_end": listed(self.x_end),
            "state_names": list(self.stage.state_names),
            "segments": {"t0": listed(seg.t0), "dt": listed(seg.dt),
                         "conduction": [str(c) for c in seg.conduction_names()],
                         "system": [int(v) for v in seg.system], "x0": listed(seg.x0)},
            "steady_state": None if self.steady_state is None else self.steady_state.to_dict(),
            "duty": listed(self.duty), "control_output": listed(self.control_output),
            "path": self.path,
        }

    def save(self, path, compression=None):
        """Write this run to the HDF5 file ``path`` (see :mod:`bucksim.io.hdf5`)."""
        return save_run(self, path, compression)


def open_run(path) -> Run:
    """Open a run file written by :meth:`Run.save` or :func:`bucksim.simulation.simulate_to_file`.

    The scenario is rebuilt from its stored values, the stage from the
    scenario, and the transition table is the stored one, so
    ``open_run(p).summary()`` equals the summary of the run that was saved.
    Refusals (StorageError, FileNotFoundError) are those of
    :func:`bucksim.io.runfile.read_run`.
    """
    return Run(*read_run(path), path=path)


def first_non_finite(tree, path=""):
    """``(dotted path, value)`` of the first NaN or infinite float in a nested
    dict/list of plain values (a summary's ``to_dict()``), or None."""
    if isinstance(tree, dict):
        items = ((f"{path}.{k}" if path else str(k), v) for k, v in tree.items())
    elif isinstance(tree, (list, tuple)):
        items = ((f"{path}[{i}]", v) for i, v in enumerate(tree))
    else:
        if isinstance(tree, float) and not np.isfinite(tree):
            return path, tree
        return None
    for p, v in items:
        hit = first_non_finite(v, p)
        if hit is not None:
            return hit
    return None


__all__ = ["Run", "SegmentTable", "open_run", "SIGNALS", "LOOP_SIGNALS", "UNITS", "STATE_NAMES"]
