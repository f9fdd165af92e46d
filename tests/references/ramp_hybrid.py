"""Event-driven reference for the buck stage whose channels ramp their current at the edges.

Written from the circuit (the switch node of :mod:`tests.references.node_hybrid`
with a channel in its ramp as a current source), not from the engine's code.
A MOSFET with ``rise_time``/``fall_time`` > 0 does not switch at once: over
the ramp its channel carries a current that changes linearly in time and the
node capacitance ``Cn`` takes the rest. Between gate edges, ramp ends and
events each interval is one small ODE, integrated by
``scipy.integrate.solve_ivp`` (DOP853, dense output) with ``events=`` for the
diode clamps, zero currents and the breaks of a piecewise-constant ``Cn``.

Notes
-----
States ``y = [iL, vC, vn, E, ihs, ils, Whs, Wls]``: inductor current [A],
output-capacitor voltage [V], ``Cn``'s voltage [V], energy from the ideal
source [J], the ramp currents of the high-side and low-side channels [A]
(positive toward the node: from the input through the high side, from ground
through the low side; 0 outside a ramp) and the energy each ramping channel
dissipates [J]. With the path current ``x = iL - ihs - ils`` and the paths of
:meth:`HybridCircuit.path` (``vn = V - R x`` while a path conducts)::

    open        vsw = vn - Rn x,   Cn dvn/dt = -x
    path mode   vsw = vn = V - R x,  dvn/dt = -R dx/dt
    L diL/dt = vsw - vo - DCR iL,   C dvC/dt = k (iL - G vC - Icc)
    dE/dt   = Vin ihs + Vin (x + Cn dvn/dt)   (second term: high, high-diode)
    dWhs/dt = (Vin - Rs ihs - vsw) ihs,   dWls/dt = -vsw ils

(low-side diode ``x = iL - ihs``, high-side body diode current ``ils - iL``).
``ihs``/``ils`` have constant slopes, so DOP853 integrates them exactly.

Ramps (``t0`` the gate edge; a ramp still running at the period's end is
ended there):

* high side off, channel current ``I0 > 0`` (``iL`` when fully on, else its
  ramp current): ``ihs = I0 (1 - (t - t0)/tf_hs)``, the node opens with ``vn``
  continuous (``x = 0``: ``vsw`` too). ``I0 <= 0`` or ``tf_hs = 0``: opens at once;
* high side on, ``iL(t0) > 0``: ``ihs = iL(t0) (t - t0)/tr_hs`` (slope fixed at
  ``t0``) until ``t0 + tr_hs`` or until the open, rising node reaches
  ``Vin + Vf_hs - (Rs + r_hs) iL``; then the channel closes fully (mode high,
  ``E += Vin Q`` for the node charge ``Q`` moved at once, as in node_hybrid).
  ``iL(t0) <= 0``: the same with slope 0 (the channel closes after its rise
  time); closes at once on its own conducting body diode;
* low side (forced PWM, MOSFET low side only) off in mode low with
  ``iL(t0) < 0``: ``ils`` from ``iL(t0)`` to 0 over ``tf_ls``; on with
  ``ils = min(iL(t0), 0) (t - t0)/tr_ls`` until ``t0 + tr_ls`` or until
  the falling node reaches ``-Vf_ls - r_ls iL``, then mode low. Otherwise the
  low side switches as in node_hybrid (diode emulation, asynchronous: no ramps).

Diode clamps of the open node are events at ``vsw = -Vf_ls - r_ls x`` with
``x > 0`` and ``vsw = Vin + Vf_hs + (Rs + r_hs)(-x)`` with ``x < 0`` (replaced
by the channel's full closing while that side ramps on); a diode stops where
``x`` reaches 0. A ramp's turn-off overlapping the opposite channel's gate
edge (``fall_time > dead time``) is refused. An interval shorter than 1e-10 of
the period (a diode stopping a few attoseconds before a ramp's end) runs
without events: the node there still sits on the clamp it just left.

References
----------
E. Hairer, S. P. Norsett and G. Wanner, *Solving Ordinary Differential
Equations I: Nonstiff Problems*, 2nd ed., Springer, 1993, sec. II.5 and II.6
(DOP853 and its dense output), as implemented by ``scipy.integrate.solve_ivp``.
R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*, 3rd
ed., Springer, 2020, ch. 4 (switching loss of a current ramp against a
clamped or capacitive node; from memory).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

from tests.references.node_hybrid import HybridCircuit

STATES = ("iL", "vC", "vn", "energy", "ihs", "ils", "whs", "wls")
_MAX_INTERVALS = 64         # per gate phase; more means a toggling topology (a bug)
_MAX_NFEV = 3_000_000       # right-hand-side calls per run: a wrong case fails, not hangs
_HIGH_PATHS = ("high", "high-diode")
#: intervals shorter than this share of the period are integrated without events: an
#: event there coincides with a ramp's end or a gate edge (a node that just left a clamp
#: sits on that clamp's event surface and would toggle)
_TINY = 1e-10


@dataclass(frozen=True)
class RampCircuit(HybridCircuit):
    """:class:`HybridCircuit` with the channels' ramp times [s] (0: switches at once).

    ``tr_ls``/``tf_ls`` are 0 but in forced PWM with a MOSFET low side.
    """

    tr_hs: float = 0.0
    tf_hs: float = 0.0
    tr_ls: float = 0.0
    tf_ls: float = 0.0

    @classmethod
    def from_scenario(cls, s):
        """Read a :class:`bucksim.model.parts.Scenario` (open loop, constant levels)."""
        base = super().from_scenario(s)
        ls_ramps = base.rds_ls is not None and base.strategy == "forced-pwm"
        c = dataclasses.replace(
            base, tr_hs=s.high_side.rise_time, tf_hs=s.high_side.fall_time,
            tr_ls=s.low_side.rise_time if ls_ramps else 0.0,
            tf_ls=s.low_side.fall_time if ls_ramps else 0.0)
        if base.rds_ls is not None and c.tf_hs > c.dead_time[0]:
            raise ValueError("ramp reference: high_side.fall_time must not exceed the "
                             "falling dead time (overlapping ramps are not modelled)")
        return c

    def derivative(self, y, mode, cn, khs, kls):
        """``dy/dt`` in ``mode`` with node capacitance ``cn`` [F] and ramp slopes [A/s]."""
        il, vc, vn, _, ihs, ils = y[:6]
        k = 1.0 / (1.0 + self.esr * self.conductance)
        vo = k * (vc + self.esr * (il - self.sink))
        x = il - ihs - ils
        if mode == "open":
            vsw = vn - self.rn * x
        else:
            v, r = self.path(mode)
            vsw = v - r * x
        dil = (vsw - vo - self.dcr * il) / self.inductance
        dvc = k * (il - self.conductance * vc - self.sink) / self.capacitance
        dvn = -x / cn if mode == "open" else -r * (dil - khs - kls)
        isrc = ihs + (x + cn * dvn if mode in _HIGH_PATHS else 0.0)
        return np.array([dil, dvc, dvn, self.vin * isrc, khs, kls,
                         (self.vin - self.rs * ihs - vsw) * ihs, -vsw * ils])

    def scales(self):
        """Scales of :data:`STATES` [A, V, V, J, A, A, J, J]."""
        i_s, v, _, e = super().scales()
        return np.array([i_s, v, v, e, i_s, i_s, e, e])


def path_current(y):
    """``x = iL - ihs - ils`` [A] of states ``y`` (last axis)."""
    y = np.asarray(y)
    return y[..., 0] - y[..., 4] - y[..., 5]


@dataclass
class RampTrace:
    """A reference run, interval by interval.

    Attributes
    ----------
    circuit : RampCircuit
    t0, t1 : ndarray [s]   start and end of each interval
    modes : list of str    node mode of each interval
    bands : ndarray of int band of ``Cn`` in each interval
    solutions : list       dense ``OdeSolution`` per interval
    period_ends : ndarray (n + 1, 8)   states just before each turn-on at ``k T``
    jumps : ndarray (m, 4) ``(t [s], va [V], vb [V], supply [J])`` of every node
        charge moved at once
    ramps : list of dict   every ramp: ``side`` ("hs"/"ls"), ``kind`` ("on"/"off"),
        ``t0``, ``t1`` [s], ``i0`` [A] (channel current at ``t0``), ``slope`` [A/s]
    nfev : int
    """

    circuit: RampCircuit
    t0: np.ndarray
    t1: np.ndarray
    modes: list
    bands: np.ndarray
    solutions: list
    period_ends: np.ndarray
    jumps: np.ndarray
    ramps: list
    nfev: int

    def _index(self, times, side):
        times = np.atleast_1d(np.asarray(times, float))
        if times.size and (times.min() < self.t0[0] or times.max() > self.t1[-1]):
            raise ValueError(f"times must lie in [{self.t0[0]:.6g}, {self.t1[-1]:.6g}] s")
        if side == "right":
            idx = np.searchsorted(self.t0, times, side="right") - 1
        else:
            idx = np.searchsorted(self.t1, times, side="left")
        return times, np.clip(idx, 0, len(self.t0) - 1)

    def states(self, times, side="right"):
        """:data:`STATES` at ``times`` [s]; at a boundary the later interval
        (``side="right"``) or the earlier (``"left"``)."""
        times, idx = self._index(times, side)
        out = np.empty((times.size, len(STATES)))
        for i in np.unique(idx):
            m = idx == i
            out[m] = self.solutions[i](times[m]).T
        return out

    def at(self, times, signal, side="right"):
        """A state of :data:`STATES`, ``vsw`` (the node's terminal voltage) or ``vo``."""
        x, c = self.states(times, side), self.circuit
        if signal == "vo":
            k = 1.0 / (1.0 + c.esr * c.conductance)
            return k * (x[:, 1] + c.esr * (x[:, 0] - c.sink))
        if signal == "vsw":
            is_open = np.array([m == "open" for m in self.modes])[self._index(times, side)[1]]
            return x[:, 2] - c.rn * path_current(x) * is_open
        return x[:, STATES.index(signal)]

    def mode_changes(self):
        """``(time [s], mode)`` where the node mode changes (band switches merged)."""
        keep = [0] + [i for i in range(1, len(self.modes)) if self.modes[i] != self.modes[i - 1]]
        return self.t0[keep], [self.modes[i] for i in keep]

    def ramp_energy(self, ramp):
        """Energy [J] the ramping channel dissipates over ``ramp`` (a :attr:`ramps` entry)."""
        j = STATES.index("whs" if ramp["side"] == "hs" else "wls")
        w = self.states([ramp["t0"], ramp["t1"]], side="left")[:, j]
        return float(w[1] - w[0])


class _Run:
    """Interval bookkeeping, ramps and event logic of one reference run."""

    def __init__(self, c, rtol, atol, method):
        self.c, self.rtol, self.atol, self.method = c, rtol, atol * c.scales(), method
        self.nfev = 0
        self.t0, self.t1, self.modes, self.bands, self.sols = [], [], [], [], []
        self.jumps, self.log = [], []
        self.ramp = {"hs": None, "ls": None}    # active ramp: its entry in self.log
        self.ring = 2.0 * math.pi * math.sqrt(c.inductance * c.node.smallest)

    # -- ramps ---------------------------------------------------------------
    def start(self, side, kind, t, i0, slope, stop):
        self.ramp[side] = {"side": side, "kind": kind, "t0": t, "t1": stop, "i0": i0,
                           "slope": slope}
        self.log.append(self.ramp[side])

    def slopes(self):
        return tuple(0.0 if self.ramp[s] is None else self.ramp[s]["slope"] for s in ("hs", "ls"))

    def end_ramp(self, side, t, y, mode):
        """The ramp of ``side`` ends at ``t``: a turn-on closes the channel fully."""
        r, self.ramp[side] = self.ramp[side], None
        r["t1"] = t
        y[4 if side == "hs" else 5] = 0.0
        if r["kind"] == "on":
            return self.settle(t, "high" if side == "hs" else "low", y)
        return self.settle(t, mode, y)      # rounding of the last ~1e-16 A: keep vn on its path

    # -- one interval --------------------------------------------------------
    def band(self, mode, y):
        """Band of ``Cn`` the node is in or moving into."""
        dv = self.c.derivative(y, mode, float(self.c.node.bands[0]), *self.slopes())[2]
        return self.c.node.band_of(y[2], dv > 0.0)

    def events(self, mode, emulate, skip):
        """Event functions ``[(g, direction, kind)]`` of ``mode``; ``skip = (break, d)``
        watches the break just crossed only on the way back."""
        c, out = self.c, []
        rd, rn = c.rs + c.r_hs, c.rn

        def vsw(y):
            return y[2] - rn * (y[0] - y[4] - y[5])

        if mode == "open":
            if self.ramp["hs"] is not None and self.ramp["hs"]["kind"] == "on":
                out.append((lambda t, y: vsw(y) - c.vin - c.vf_hs + rd * y[0], 1.0, "high"))
            else:
                out.append((lambda t, y: vsw(y) - c.vin - c.vf_hs
                            - rd * max(-(y[0] - y[4] - y[5]), 0.0), 1.0, "high-diode"))
            if self.ramp["ls"] is not None and self.ramp["ls"]["kind"] == "on":
                out.append((lambda t, y: vsw(y) + c.vf_ls + c.r_ls * y[0], -1.0, "low"))
            else:
                out.append((lambda t, y: vsw(y) + c.vf_ls
                            + c.r_ls * max(y[0] - y[4] - y[5], 0.0), -1.0, "low-diode"))
        elif mode == "low-diode" or (mode == "low" and emulate):
            out.append((lambda t, y: y[0] - y[4] - y[5], -1.0, "zero"))
        elif mode == "high-diode":
            out.append((lambda t, y: y[0] - y[4] - y[5], 1.0, "zero"))
        for j, v in enumerate(c.node.breaks):
            d = -skip[1] if skip is not None and skip[0] == j else 0.0
            out.append((lambda t, y, v=v: y[2] - v, d, ("break", j)))
        return out

    def integrate(self, t, t_end, y, mode, band, events):
        cn, (khs, kls), f = float(self.c.node.bands[band]), self.slopes(), self.c.derivative
        for g, d, _ in events:
            g.terminal, g.direction = True, d

        def rhs(_t, x):
            self.nfev += 1
            return f(x, mode, cn, khs, kls)

        if self.nfev > _MAX_NFEV:
            raise RuntimeError(f"ramp reference: more than {_MAX_NFEV} right-hand-side "
                               f"calls by t = {t:.9g} s")
        max_step = self.ring / 16 if mode == "open" else np.inf
        sol = solve_ivp(rhs, (t, t_end), y, method=self.method, rtol=self.rtol, atol=self.atol,
                        events=[e[0] for e in events] or None, dense_output=True,
                        max_step=max_step)
        if not sol.success:
            raise RuntimeError(f"ramp reference: {self.method} failed at t = {t:.9g} s: "
                               f"{sol.message}")
        return sol

    def record(self, t, t_end, mode, band, sol):
        for store, value in zip((self.t0, self.t1, self.modes, self.bands, self.sols),
                                (t, t_end, mode, band, sol), strict=True):
            store.append(value)

    def settle(self, t, mode, y):
        """``(mode, y)`` once ``mode`` conducts at ``t``: ``vn`` pinned to its path, the
        charge that moves booked (through the high side: ``E += Vin Q``) and listed."""
        if mode != "open":
            v, r = self.c.path(mode)
            v_a, y[2] = y[2], v - r * float(path_current(y))
            supply = self.c.vin * self.c.node.charge(v_a, y[2]) if mode in _HIGH_PATHS else 0.0
            y[3] += supply
            if v_a != y[2]:
                self.jumps.append((t, v_a, y[2], supply))
        return mode, y

    def clamp(self, t, y):
        """The node just opened at ``t``: open, or held at once by a diode."""
        c, x = self.c, float(path_current(y))
        vsw, mode = y[2] - c.rn * x, "open"
        if x > 0.0 and vsw <= -c.vf_ls - c.r_ls * x:
            mode = "low-diode"
        elif x < 0.0 and vsw >= c.vin + c.vf_hs - (c.rs + c.r_hs) * x:
            mode = "high-diode"
        return self.settle(t, mode, y)

    # -- gate phases ---------------------------------------------------------
    def _next_stop(self, t_end):
        ends = [(r["t1"], s) for s, r in self.ramp.items() if r is not None and r["t1"] <= t_end]
        return min(ends) if ends else (t_end, None)

    def _event(self, kind, t_ev, y, mode):
        """New ``(mode, y)`` after the event ``kind`` (not a break)."""
        if kind in ("high", "low"):         # a turn-on ramp's node reached its clamp
            return self.end_ramp("hs" if kind == "high" else "ls", t_ev, y, mode)
        x = float(path_current(y))
        if kind != "zero" and (x > 0.0) != (kind == "low-diode"):
            raise RuntimeError(f"ramp reference: the {kind} clamp reached with the current "
                               f"away from it at t = {t_ev:.9g} s")
        return self.settle(t_ev, "open" if kind == "zero" else kind, y)

    def phase(self, t, t_end, y, mode, emulate):
        """Integrate one gate phase from ``(t, y, mode)``; return ``(y, mode)`` at its end."""
        band, skip = self.band(mode, y), None
        for _ in range(_MAX_INTERVALS):
            stop, side = self._next_stop(t_end)
            ev = self.events(mode, emulate, skip) if stop - t > _TINY * self.c.period else []
            sol = self.integrate(t, stop, y, mode, band, ev)
            if sol.status != 1:
                self.record(t, stop, mode, band, sol.sol)
                t, y, skip = stop, sol.y[:, -1].copy(), None
                if side is not None:
                    mode, y = self.end_ramp(side, t, y, mode)
                    band = self.band(mode, y)
                if t >= t_end:
                    return y, mode
                continue
            j = min((j for j, te in enumerate(sol.t_events) if len(te)),
                    key=lambda j: sol.t_events[j][0])
            t_ev, y = float(sol.t_events[j][0]), sol.y_events[j][0].copy()
            if t_ev <= t:
                raise RuntimeError(f"ramp reference: the mode toggles at t = {t:.9g} s")
            self.record(t, t_ev, mode, band, sol.sol)
            kind, skip = ev[j][2], None
            if isinstance(kind, tuple):         # a break of Cn: same mode, next band
                rising = self.c.derivative(y, mode, float(self.c.node.bands[band]),
                                           *self.slopes())[2] > 0.0
                band = kind[1] + 1 if rising else kind[1]
                skip = (kind[1], 1.0 if rising else -1.0)
            else:
                mode, y = self._event(kind, t_ev, y, mode)
                band = self.band(mode, y)
            t = t_ev
            if t >= t_end:
                return y, mode
        raise RuntimeError(f"ramp reference: more than {_MAX_INTERVALS} intervals in one "
                           f"gate phase before t = {t_end:.9g} s")

    def turn_on(self, side, t, y, mode, period_end):
        """A channel's gate edge on: a ramp while ``iL`` flows against it, else closed."""
        c, il = self.c, float(y[0])
        tr = c.tr_hs if side == "hs" else c.tr_ls
        own = "high-diode" if side == "hs" else "low-diode"
        # the channel takes its rise time to enhance at any current; the ramp's slope
        # is the current it must take from the diode (none at iL of the other sign)
        if tr > 0.0 and mode != own:
            slope = max(il, 0.0) / tr if side == "hs" else min(il, 0.0) / tr
            self.start(side, "on", t, 0.0, slope, min(t + tr, period_end))
            return y, mode
        mode, y = self.settle(t, "high" if side == "hs" else "low", y)
        return y, mode

    def turn_off(self, side, t, y, mode, period_end):
        """A channel's gate edge off: the channel current ramps to 0, or stops at once."""
        c, j = self.c, 4 if side == "hs" else 5
        full, tf = ("high", c.tf_hs) if side == "hs" else ("low", c.tf_ls)
        if mode != full and self.ramp[side] is None:
            return y, mode          # not conducting (opened at zero current before)
        i0 = float(y[0] if mode == full else y[j])
        if self.ramp[side] is not None:     # a turn-on ramp still running ends here
            self.ramp[side]["t1"] = t
        if tf > 0.0 and (i0 > 0.0 if side == "hs" else i0 < 0.0):
            self.start(side, "off", t, i0, -i0 / tf, min(t + tf, period_end))
            y[j] = i0
            return y, ("open" if mode == full else mode)   # x = 0: vn and vsw continuous
        self.ramp[side], y[j] = None, 0.0
        mode, y = self.clamp(t, y) if mode in (full, "open") else self.settle(t, mode, y)
        return y, mode

    def gate_edge(self, t, gate, prev, y, mode, period_end):
        """``(y, mode, emulate)`` just after the gate edge ``gate`` (from ``prev``) at ``t``."""
        c, y = self.c, y.copy()
        if gate == "high":
            return (*self.turn_on("hs", t, y, mode, period_end), False)
        if gate == "low":
            if c.strategy == "forced-pwm":
                return (*self.turn_on("ls", t, y, mode, period_end), False)
            if y[0] > 0.0:
                mode, y = self.settle(t, "low", y)
                return y, mode, c.strategy == "diode-emulation"
            return y, mode, False
        return (*self.turn_off("hs" if prev == "high" else "ls", t, y, mode, period_end), False)


def simulate_ramps(scenario, cycles=None, *, x0=None, rtol=1e-12, atol=1e-16, method="DOP853"):
    """Reference run of an open-loop stage with node capacitance and channel ramps.

    Parameters
    ----------
    scenario : Scenario
        Open loop, constant supply and load, node capacitance > 0; MOSFET
        ``rise_time``/``fall_time`` [s] set the ramps (0: that edge switches at once).
    cycles : int, optional
        Periods to run (default ``scenario.n_cycles``).
    x0 : array_like, optional
        ``[iL [A], vC [V], vn [V]]`` at ``t = 0``, ``vn`` the node just before the
        first turn-on (open there, or held by a diode it already reaches);
        default ``run.initial_current``, ``run.initial_voltage``, 0 V.
    rtol, atol, method : float, float, str
        ``solve_ivp`` tolerances (``atol`` relative to :meth:`RampCircuit.scales`)
        and method (DOP853, or Radau / BDF with a finite-difference Jacobian).

    Returns
    -------
    RampTrace
    """
    c = RampCircuit.from_scenario(scenario)
    n = scenario.n_cycles if cycles is None else int(cycles)
    if x0 is None:
        x0 = (scenario.run.initial_current, scenario.run.initial_voltage, 0.0)
    run = _Run(c, rtol, atol, method)
    y = np.zeros(len(STATES))
    y[:3] = [float(v) for v in x0]
    mode, y = run.clamp(0.0, y)
    ends = []
    for kc in range(n):
        ends.append(y.copy())
        prev, period_end = "off", (kc + 1) * c.period
        for offset, length, gate in c.phases():
            t0 = kc * c.period + offset
            # the last phase ends on the period's end exactly (no rounding gap)
            t1 = period_end if offset + length >= c.period * (1 - 1e-12) else t0 + length
            y, mode, emulate = run.gate_edge(t0, gate, prev, y, mode, period_end)
            y, mode = run.phase(t0, t1, y, mode, emulate)
            prev = gate
    ends.append(y.copy())
    return RampTrace(c, np.array(run.t0), np.array(run.t1), run.modes, np.array(run.bands),
                     run.sols, np.array(ends), np.array(run.jumps, float).reshape(-1, 4),
                     run.log, run.nfev)
