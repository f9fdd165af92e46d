"""Stored waveforms: the segment table and everything derived from it.

A run is kept as segments (start time, duration, conduction state, system
id, start state). Within a segment the state is ``z(t) = expm(M_s t) z0``, so
any value at any time and any integral is recovered exactly from the table;
uniform samples are derived data for plots, never the source of metrics.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .engine import EngineResult, TransitionTable
from .engine.kernels import evaluate
from .stage import CONDUCTION_NAMES, STATE_NAMES, Stage

#: Signals every run can evaluate (see :meth:`bucksim.stage.Stage.signal`).
SIGNALS = ("iL", "vC", "vo", "io", "ic", "iin", "vsw", "vin",
           "high_side", "low_side", "high_side_body_diode", "low_side_body_diode")

#: Further signals of an analog closed loop: compensator output and reference [V].
LOOP_SIGNALS = ("u", "vref")

UNITS = {"iL": "A", "vC": "V", "vo": "V", "io": "A", "ic": "A", "iin": "A", "vsw": "V",
         "vin": "V", "high_side": "A", "low_side": "A", "high_side_body_diode": "A",
         "low_side_body_diode": "A", "t": "s", "u": "V", "vref": "V"}


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


class Run:
    """The result of :func:`bucksim.simulate`: segments plus what evaluates them.

    Attributes
    ----------
    scenario : Scenario
    stage : Stage
    segments : SegmentTable
    t_end : float   time reached [s]
    x_end : ndarray   state at ``t_end``
    status : int    0 completed, 1 diverged
    message : str
    success : bool
    """

    def __init__(self, scenario, stage: Stage, table: TransitionTable, result: EngineResult):
        self.scenario = scenario
        self.stage = stage
        self.table = table
        self.segments = SegmentTable(result.t0, result.dt, result.conduction, result.system,
                                     result.x0)
        self.t_end = result.t_end
        self.x_end = result.x_end
        self.status = result.status
        self.message = result.message
        self._signal_tables = {}

    @property
    def success(self) -> bool:
        return self.status == 0

    @property
    def signals(self) -> tuple:
        """Names this run can evaluate: :data:`SIGNALS`, plus ``u`` and ``vref`` in an analog loop."""
        return SIGNALS + (LOOP_SIGNALS if self.stage.analog else ())

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
        """Segment index holding each time (the later segment at a boundary)."""
        times = np.atleast_1d(np.asarray(times, dtype=float))
        seg = self.segments
        if len(seg) == 0:
            raise ValueError("the run holds no segments")
        if np.any(times < seg.t0[0]) or np.any(times > self.t_end):
            raise ValueError(f"times must lie in [{seg.t0[0]:.6g}, {self.t_end:.6g}] s")
        idx = np.searchsorted(seg.t0, times, side="right") - 1
        return np.clip(idx, 0, len(seg) - 1), times

    def augmented_at(self, times):
        """Augmented states ``z = [iL, vC, ..., 1]`` at ``times`` and their segment indices."""
        idx, times = self.locate(times)
        tau = times - self.segments.t0[idx]
        out = np.empty((times.shape[0], self.stage.n + 1))
        tbl = self.table
        evaluate(tbl.matrices, tbl.exponentials, tbl.steps, self.segments.system,
                 self.segments.x0, idx.astype(np.int64), tau, out)
        return out, idx

    def at(self, times, signal: str | None = None):
        """State ``[iL [A], vC [V], ...]`` at ``times`` (shape (len, n)), or one signal's values.

        The columns are ``stage.state_names``: ``iL``, ``vC``, and in an analog
        loop the compensator states ``w1 .. wk`` and the reference ``vref`` [V].

        ``signal`` is one of :attr:`signals` (e.g. ``"vo"``, ``"vsw"``). At a
        segment boundary the later segment is used (matters for ``vsw`` only;
        states are continuous).
        """
        z, idx = self.augmented_at(times)
        if signal is None:
            return z[:, :self.stage.n]
        c = self.signal_table(signal)[self.segments.system[idx]]
        return np.einsum("ij,ij->i", c, z)

    def sample(self, n: int = 2001, start: float | None = None, stop: float | None = None,
               signals=("iL", "vo", "vsw")):
        """Uniform samples for plots: dict with ``t`` and each signal [SI units]."""
        start = self.segments.t0[0] if start is None else start
        stop = self.t_end if stop is None else stop
        t = np.linspace(start, stop, n)
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
    def summary(self, cycles: int | None = None):
        """Summary over the last ``cycles`` periods (default ``run.summary_cycles``)."""
        from .measure import summarize
        return summarize(self, cycles)

    def save(self, path, compression=None):
        """Write this run to the HDF5 file ``path`` (see :mod:`bucksim.storage`)."""
        from .storage import save_run
        return save_run(self, path, compression)


__all__ = ["Run", "SegmentTable", "SIGNALS", "LOOP_SIGNALS", "UNITS", "STATE_NAMES"]
