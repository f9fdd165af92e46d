"""Hybrid (event-driven) reference for the buck stage with an algebraic-or-free switch node.

Written from the circuit (the one :mod:`bucksim.model.stage` and
``docs/architecture.md`` describe in words), not from the engine's matrices,
tables or event search, to check the engine's switch-node model in its own
limit: every closed channel and conducting diode holds the node at once
(``R Cn -> 0``). Unlike :mod:`tests.references.node_solver` (``Cn`` always in
the circuit, picosecond ``R Cn`` lags) nothing here lags, so the two must agree
to the integration tolerance. Each interval between gate edges and events is
one small linear ODE, integrated by ``scipy.integrate.solve_ivp`` (DOP853, an
explicit 8th-order Runge-Kutta pair with a 7th-order dense output; not stiff
once the node is algebraic while it conducts) with ``events=`` for the diode
clamps, zero current and the breaks of a piecewise-constant ``Cn``; scipy's
root finder locates them on the dense output.

Notes
-----
States ``y = [iL, vC, vn, E]``: inductor current [A] (node toward output),
ideal output-capacitor voltage [V], voltage of the node capacitance ``Cn`` [V],
energy delivered by the ideal source since t = 0 [J]. ``Cn`` sits in series
with the node resistance ``Rn`` (``switching.node_resistance``) from the node
to ground; ``vsw`` is the node's terminal voltage. Load ``G`` [S] in parallel
with a sink ``Icc`` [A]; ``k = 1/(1 + ESR G)``, ``vo = k (vC + ESR (iL - Icc))``::

    L  diL/dt = vsw - vo - DCR iL
    C  dvC/dt = k (iL - G vC - Icc)

Node modes (``Rh = Rs + Rds_hs``, ``Rd = Rs + r_hs``)::

    high        vsw = vn = Vin - Rh iL            dE/dt = Vin (iL + Cn(vn) dvn/dt)
    low         vsw = vn = -Rds_ls iL             dE/dt = 0
    low-diode   vsw = vn = -Vf_ls - r_ls iL       dE/dt = 0
    high-diode  vsw = vn = Vin + Vf_hs - Rd iL    dE/dt = Vin (iL + Cn(vn) dvn/dt)
    open        vsw = vn - Rn iL,  Cn(vn) dvn/dt = -iL,  dE/dt = 0

so the open node is the series circuit L, Rn + DCR, Cn. While a path conducts,
``Rn`` carries only the charge of the node following the path's drop, so in
this limit ``vn = vsw``; ``vn`` is still carried with ``dvn/dt = -R diL/dt``
(a linear invariant, kept exactly by the Runge-Kutta step) so that the charge
``Cn dvn`` the path moves is booked where it flows. The asynchronous stage's
freewheel diode takes the low-side diode's place. ``Cn(vn) = C_hs(Vin - vn) +
C_ls(vn)``; each a number or a table ``(v_k, c_k)`` held piecewise constant,
``C = c_k`` for ``v_k <= v < v_{k+1}``, ``c_0`` below and the last value above.

Transitions (``iL, vC`` always continuous):

* gate edges: the high side closes at every turn-on; the low side at its edge
  in forced PWM, in diode emulation only if ``iL > 0``; a channel closing on
  the node at another voltage moves the charge ``Q = int_{va}^{vb} Cn dv`` at
  once (through the high side: ``E += Vin Q``). At a turn-off the node opens
  with ``vn`` continuous: ``vsw`` steps by ``-Rn iL`` as the current moves into
  the ``Rn``-``Cn`` branch;
* open node whose ``vsw`` reaches ``-Vf_ls - r_ls iL`` with ``iL > 0``: the
  low-side diode conducts; ``Vin + Vf_hs - Rd iL`` with ``iL < 0``: the
  high-side body diode (events ``vsw + Vf_ls + r_ls max(iL, 0)`` falling,
  ``vsw - Vin - Vf_hs - Rd max(-iL, 0)`` rising: they cross only while the
  current drives the node toward them). ``Cn`` then settles from ``vsw + Rn
  iL`` to ``vsw`` through ``Rn`` and the diode at once, a node charge like a
  channel's (through the high-side diode: ``E += Vin Q``);
* a diode stops at ``iL = 0`` and the node opens at its clamped voltage; in
  diode emulation the low-side channel opens at ``iL = 0`` too and stays open
  for the rest of the period;
* ``vn`` crossing a break of ``Cn``: the band (and the ODE) switches.

Gate program (open loop, duty ``D``, period ``T``): high side on over ``[0,
D T)``, both off for ``td_fall``, low side on until ``T - td_rise``, both off
for ``td_rise``; asynchronous: high side, then nothing. The node voltage just
before ``t = 0`` is given (the high side closes on it at ``t = 0``).

References
----------
E. Hairer, S. P. Norsett and G. Wanner, *Solving Ordinary Differential
Equations I: Nonstiff Problems*, 2nd ed., Springer, 1993, sec. II.5 and II.6
(the DOP853 pair and its dense output), as implemented by
``scipy.integrate.solve_ivp``.
R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*, 3rd
ed., Springer, 2020, ch. 2 and 5 (buck stage, conduction modes; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.integrate import solve_ivp

MODES = ("high", "low", "low-diode", "high-diode", "open")
_MAX_INTERVALS = 64         # per gate phase; more means a toggling topology (a bug)
_MAX_NFEV = 3_000_000       # right-hand-side calls per run: a wrong case fails, not hangs


class StepCapacitance:
    """Piecewise-constant capacitance ``C(v)`` [F] of one device against its ``Vds`` [V].

    Parameters
    ----------
    value : float, sequence of (v [V], c [F]) pairs, or an object with
        ``voltages`` and ``capacitances`` (the model's table)
    """

    def __init__(self, value):
        if hasattr(value, "voltages"):
            value = list(zip(value.voltages, value.capacitances, strict=True))
        if np.ndim(value) == 0:
            self.breaks, self.values = np.zeros(0), np.array([float(value)])
        else:
            pts = np.asarray(value, dtype=float).reshape(-1, 2)
            if np.any(np.diff(pts[:, 0]) <= 0):
                raise ValueError("capacitance table voltages must increase strictly")
            self.breaks, self.values = pts[1:, 0], pts[:, 1]

    def at(self, v):
        """``C(v)`` [F]."""
        return self.values[np.searchsorted(self.breaks, np.asarray(v, float), side="right")]

    def charge(self, w):
        """``int_0^w C(u) du`` [C] (signed), band by band."""
        w = np.asarray(w, dtype=float)
        lo = np.concatenate(([-np.inf], self.breaks))
        hi = np.concatenate((self.breaks, [np.inf]))
        out = np.zeros(w.shape)
        for c, a, b in zip(self.values, lo, hi, strict=True):
            out += c * (np.clip(w, a, b) - np.clip(0.0, a, b))
        return out


class NodeCapacitance:
    """``Cn(vn) = C_hs(Vin - vn) + C_ls(vn)`` [F] with its breaks in ``vn`` [V]."""

    def __init__(self, high, low, vin):
        self.high, self.low, self.vin = StepCapacitance(high), StepCapacitance(low), vin
        self.breaks = np.unique(np.concatenate((vin - self.high.breaks, self.low.breaks)))
        e = self.breaks
        mids = (np.concatenate(([e[0] - 1.0], 0.5 * (e[:-1] + e[1:]), [e[-1] + 1.0]))
                if e.size else np.zeros(1))
        self.bands = self.at(mids)      # value inside each band (no break at the midpoint)

    def at(self, vn):
        """``Cn(vn)`` [F]."""
        return self.high.at(self.vin - np.asarray(vn, float)) + self.low.at(vn)

    def band_of(self, vn, rising):
        """Band holding ``vn``; on a break, the band the node moves into."""
        return int(np.searchsorted(self.breaks, vn, side="right" if rising else "left"))

    def charge(self, va, vb):
        """``int_va^vb Cn dv`` [C]."""
        lo = self.low.charge(vb) - self.low.charge(va)
        hi = self.high.charge(self.vin - va) - self.high.charge(self.vin - vb)
        return float(lo + hi)

    @property
    def smallest(self):
        """The smallest ``Cn`` of any band [F]."""
        return float(self.bands.min())


@dataclass(frozen=True)
class HybridCircuit:
    """Flat parameters of an open-loop stage [SI units]; ``c_hs``/``c_ls`` numbers or
    tables of (v [V], c [F]) pairs."""

    vin: float
    rs: float
    rn: float
    rds_hs: float
    vf_hs: float
    r_hs: float
    rds_ls: float | None     # None: asynchronous (freewheel diode only)
    vf_ls: float
    r_ls: float
    c_hs: object
    c_ls: object
    inductance: float
    dcr: float
    capacitance: float
    esr: float
    conductance: float
    sink: float
    period: float
    duty: float
    strategy: str
    dead_time: tuple[float, float]
    node: NodeCapacitance = field(init=False, compare=False, repr=False)

    def __post_init__(self):
        object.__setattr__(self, "node", NodeCapacitance(self.c_hs, self.c_ls, self.vin))
        if self.node.smallest <= 0.0:
            raise ValueError("hybrid reference: the node capacitance must be > 0 in every band")

    @classmethod
    def from_scenario(cls, s):
        """Read a :class:`bucksim.model.parts.Scenario` (open loop, constant levels)."""
        if s.control.mode != "open-loop" or s.control.soft_start:
            raise ValueError("hybrid reference: open loop without soft start only")
        if s.run.start != "rest":
            raise ValueError("hybrid reference: run.start must be 'rest' (a given state)")
        if s.supply.steps or s.load.steps:
            raise ValueError("hybrid reference: constant supply and load only")
        sync = s.switching.strategy != "asynchronous"
        hs, ls = s.high_side, s.low_side
        lsd = ls.body_diode if sync else ls
        for name, d in (("high_side.body_diode", hs.body_diode), ("low_side diode", lsd)):
            if d.qrr or d.tau:
                raise ValueError(f"hybrid reference: {name} must have qrr = 0 and tau = 0")
        g = 0.0 if s.load.resistance in (None, math.inf) else 1.0 / s.load.resistance
        return cls(vin=s.supply.voltage, rs=s.supply.resistance,
                   rn=s.switching.node_resistance, rds_hs=hs.rds_on,
                   vf_hs=hs.body_diode.vf, r_hs=hs.body_diode.r,
                   rds_ls=ls.rds_on if sync else None, vf_ls=lsd.vf, r_ls=lsd.r,
                   c_hs=hs.coss, c_ls=ls.coss if sync else ls.cj,
                   inductance=s.inductor.inductance, dcr=s.inductor.dcr,
                   capacitance=s.output_capacitor.capacitance, esr=s.output_capacitor.esr,
                   conductance=g, sink=s.load.current, period=s.period, duty=s.control.duty,
                   strategy=s.switching.strategy,
                   dead_time=tuple(s.switching.dead_time) if sync else (0.0, 0.0))

    def path(self, mode):
        """``(V, R)`` of a conducting mode: ``vn = V - R iL``."""
        return {"high": (self.vin, self.rs + self.rds_hs), "low": (0.0, self.rds_ls),
                "low-diode": (-self.vf_ls, self.r_ls),
                "high-diode": (self.vin + self.vf_hs, self.rs + self.r_hs)}[mode]

    def system(self, mode, cn):
        """``(A, b)`` of ``y' = A y + b`` in ``mode`` with node capacitance ``cn`` [F]."""
        k, L, C = 1.0 / (1.0 + self.esr * self.conductance), self.inductance, self.capacitance
        A, b = np.zeros((4, 4)), np.zeros(4)
        A[1, :2] = [k / C, -k * self.conductance / C]
        b[1] = -k * self.sink / C
        b[0] = k * self.esr * self.sink / L
        if mode == "open":
            A[0, :3] = [-(self.rn + self.dcr + k * self.esr) / L, -k / L, 1.0 / L]
            A[2, 0] = -1.0 / cn
            return A, b
        v, r = self.path(mode)
        A[0, :2] = [-(r + self.dcr + k * self.esr) / L, -k / L]
        b[0] += v / L
        A[2], b[2] = -r * A[0], -r * b[0]
        if mode in ("high", "high-diode"):
            A[3], b[3] = self.vin * cn * A[2], self.vin * cn * b[2]
            A[3, 0] += self.vin
        return A, b

    def phases(self):
        """Gate phases of one period: ``[(offset [s], length [s], gate)]``."""
        T, on = self.period, self.duty * self.period
        if self.rds_ls is None:
            out = [(0.0, on, "high"), (on, T - on, "off")]
        else:
            tf, tr = self.dead_time
            out = [(0.0, on, "high"), (on, tf, "off"), (on + tf, T - tr - on - tf, "low"),
                   (T - tr, tr, "off")]
        return [p for p in out if p[1] > 0.0]

    def scales(self):
        """``[A, V, V, J]`` scales of the states."""
        i_s = self.vin * self.period / self.inductance
        return np.array([i_s, self.vin, self.vin, self.vin * i_s * self.period])


@dataclass
class HybridTrace:
    """A reference run, interval by interval.

    Attributes
    ----------
    circuit : HybridCircuit
    t0, t1 : ndarray [s]   start and end of each interval
    modes : list of str   node mode of each interval (:data:`MODES`)
    bands : ndarray of int   band of ``Cn`` in each interval
    solutions : list   dense ``OdeSolution`` per interval
    period_ends : ndarray (n + 1, 4)   ``[iL, vC, vn, E]`` just before each
        turn-on at ``t = k T`` (row 0: the start), before the node jumps there
    jumps : ndarray (m, 4)   ``(t [s], va [V], vb [V], supply [J])`` of every
        node charge moved at once (a channel closing on the node, a diode taking
        over from the open node)
    nfev : int   right-hand-side evaluations of the run
    """

    circuit: HybridCircuit
    t0: np.ndarray
    t1: np.ndarray
    modes: list
    bands: np.ndarray
    solutions: list
    period_ends: np.ndarray
    jumps: np.ndarray
    nfev: int

    def states(self, times, side="right"):
        """``[iL, vC, vn, E]`` at ``times`` [s]; at an interval boundary the later
        (``side="right"``) or the earlier (``"left"``) interval."""
        times, idx = self._index(times, side)
        out = np.empty((times.size, 4))
        for i in np.unique(idx):
            m = idx == i
            out[m] = self.solutions[i](times[m]).T
        return out

    def at(self, times, signal, side="right"):
        """One signal at ``times`` [s]: ``iL``, ``vC``, ``vn`` (Cn's voltage), ``vsw``
        (the node's terminal voltage), ``vo`` or ``energy`` (see :meth:`states`)."""
        x, c = self.states(times, side), self.circuit
        if signal == "vo":
            k = 1.0 / (1.0 + c.esr * c.conductance)
            return k * (x[:, 1] + c.esr * (x[:, 0] - c.sink))
        if signal == "vsw":
            is_open = np.array([m == "open" for m in self.modes])[self._index(times, side)[1]]
            return x[:, 2] - c.rn * x[:, 0] * is_open
        return x[:, {"iL": 0, "vC": 1, "vn": 2, "energy": 3}[signal]]

    def _index(self, times, side):
        """``(times, interval index)``: at a boundary the later (``side="right"``) or
        the earlier (``"left"``) interval."""
        times = np.atleast_1d(np.asarray(times, float))
        if times.size and (times.min() < self.t0[0] or times.max() > self.t1[-1]):
            raise ValueError(f"times must lie in [{self.t0[0]:.6g}, {self.t1[-1]:.6g}] s")
        if side == "right":
            idx = np.searchsorted(self.t0, times, side="right") - 1
        else:
            idx = np.searchsorted(self.t1, times, side="left")
        return times, np.clip(idx, 0, len(self.t0) - 1)

    def mode_changes(self):
        """``(time [s], mode)`` where the node mode changes (band switches merged)."""
        keep = [0] + [i for i in range(1, len(self.modes)) if self.modes[i] != self.modes[i - 1]]
        return self.t0[keep], [self.modes[i] for i in keep]


class _Run:
    """Interval bookkeeping and the event logic of one reference run."""

    def __init__(self, c, rtol, atol, method):
        self.c, self.rtol, self.atol, self.method = c, rtol, atol * c.scales(), method
        self.nfev = 0
        self.t0, self.t1, self.modes, self.bands, self.sols = [], [], [], [], []
        self.jumps = []
        self.systems = {}
        self.ring = 2.0 * math.pi * math.sqrt(c.inductance * c.node.smallest)

    def system(self, mode, band):
        key = (mode, band)
        if key not in self.systems:
            self.systems[key] = self.c.system(mode, float(self.c.node.bands[band]))
        return self.systems[key]

    def events(self, mode, emulate, skip):
        """Event functions ``[(g, direction, kind)]`` of ``mode``; ``skip = (break, d)``
        watches the break just crossed only on the way back."""
        c, out = self.c, []
        if mode == "open":
            rd, rn = c.rs + c.r_hs, c.rn
            out.append((lambda t, y: y[2] - rn * y[0] + c.vf_ls + c.r_ls * max(y[0], 0.0),
                        -1.0, "low-diode"))
            out.append((lambda t, y: y[2] - rn * y[0] - c.vin - c.vf_hs
                        - rd * max(-y[0], 0.0), 1.0, "high-diode"))
        elif mode == "low-diode" or (mode == "low" and emulate):
            out.append((lambda t, y: y[0], -1.0, "zero"))
        elif mode == "high-diode":
            out.append((lambda t, y: y[0], 1.0, "zero"))
        for j, v in enumerate(c.node.breaks):
            d = -skip[1] if skip is not None and skip[0] == j else 0.0
            out.append((lambda t, y, v=v: y[2] - v, d, ("break", j)))
        return out

    def integrate(self, t, t_end, y, mode, band, events):
        A, b = self.system(mode, band)
        for g, d, _ in events:
            g.terminal, g.direction = True, d

        def rhs(_t, x):
            self.nfev += 1
            return A @ x + b

        if self.nfev > _MAX_NFEV:
            raise RuntimeError(f"hybrid reference: more than {_MAX_NFEV} right-hand-side "
                               f"calls by t = {t:.9g} s")
        max_step = self.ring / 16 if mode == "open" else np.inf
        jac = {"jac": A} if self.method in ("Radau", "BDF") else {}   # implicit methods only
        sol = solve_ivp(rhs, (t, t_end), y, method=self.method, rtol=self.rtol, atol=self.atol,
                        events=[e[0] for e in events] or None, dense_output=True,
                        max_step=max_step, **jac)
        if not sol.success:
            raise RuntimeError(f"hybrid reference: {self.method} failed at t = {t:.9g} s: "
                               f"{sol.message}")
        return sol

    def record(self, t, t_end, mode, band, sol):
        for store, value in zip((self.t0, self.t1, self.modes, self.bands, self.sols),
                                (t, t_end, mode, band, sol), strict=True):
            store.append(value)

    def band(self, mode, y):
        """Band of ``Cn`` the node is in or moving into."""
        A, b = self.system(mode, 0)
        return self.c.node.band_of(y[2], (A @ y + b)[2] > 0.0)

    def settle(self, t, mode, y):
        """``(mode, y)`` once ``mode`` conducts at ``t``: ``vn`` pinned to its path, the
        charge that moves booked (through the high side: ``E += Vin Q``) and listed."""
        if mode != "open":
            v, r = self.c.path(mode)
            v_a, y[2] = y[2], v - r * y[0]
            supply = 0.0
            if mode in ("high", "high-diode"):
                supply = self.c.vin * self.c.node.charge(v_a, y[2])
            y[3] += supply
            if v_a != y[2]:
                self.jumps.append((t, v_a, y[2], supply))
        return mode, y

    def phase(self, t, t_end, y, mode, emulate):
        """Integrate one gate phase from ``(t, y, mode)``; return ``(y, mode)`` at its end."""
        band, skip = self.band(mode, y), None
        for _ in range(_MAX_INTERVALS):
            ev = self.events(mode, emulate, skip)
            sol = self.integrate(t, t_end, y, mode, band, ev)
            if sol.status != 1:
                self.record(t, t_end, mode, band, sol.sol)
                return sol.y[:, -1].copy(), mode
            j = min((j for j, te in enumerate(sol.t_events) if len(te)),
                    key=lambda j: sol.t_events[j][0])
            t_ev, y = float(sol.t_events[j][0]), sol.y_events[j][0].copy()
            if t_ev <= t:
                raise RuntimeError(f"hybrid reference: the mode toggles at t = {t:.9g} s")
            self.record(t, t_ev, mode, band, sol.sol)
            kind, skip = ev[j][2], None
            if isinstance(kind, tuple):         # a break of Cn: same mode, next band
                A, b = self.system(mode, band)
                rising = (A @ y + b)[2] > 0.0
                band = kind[1] + 1 if rising else kind[1]
                skip = (kind[1], 1.0 if rising else -1.0)
            else:
                if kind != "zero" and (y[0] > 0.0) != (kind == "low-diode"):
                    raise RuntimeError(f"hybrid reference: the {kind} clamp reached with the "
                                       f"current away from it at t = {t_ev:.9g} s")
                mode, y = self.settle(t_ev, "open" if kind == "zero" else kind, y)
                band = self.band(mode, y)
            t = t_ev
            if t >= t_end:
                return y, mode
        raise RuntimeError(f"hybrid reference: more than {_MAX_INTERVALS} intervals in one "
                           f"gate phase before t = {t_end:.9g} s")

    def gate_edge(self, t, gate, y, mode):
        """``(y, mode, emulate)`` just after the gate edge ``gate`` at ``t``."""
        c, y = self.c, y.copy()
        if gate == "high" or (gate == "low" and (c.strategy == "forced-pwm" or y[0] > 0.0)):
            mode, y = self.settle(t, gate, y)
            return y, mode, gate == "low" and c.strategy == "diode-emulation"
        if gate == "off" and mode in ("high", "low"):
            # the node opens with Cn's voltage continuous; a clamp may hold it at once
            mode, vsw = "open", y[2] - c.rn * y[0]
            if y[0] > 0.0 and vsw <= -c.vf_ls - c.r_ls * y[0]:
                mode = "low-diode"
            elif y[0] < 0.0 and vsw >= c.vin + c.vf_hs - (c.rs + c.r_hs) * y[0]:
                mode = "high-diode"
            mode, y = self.settle(t, mode, y)
        return y, mode, False


def simulate_hybrid(scenario, cycles=None, *, x0=None, rtol=1e-12, atol=1e-16, method="DOP853"):
    """Reference run of an open-loop stage with switch-node capacitance.

    Parameters
    ----------
    scenario : Scenario
        Open loop, constant supply and load, node capacitance > 0.
    cycles : int, optional
        Periods to run (default ``scenario.n_cycles``).
    x0 : array_like, optional
        ``[iL [A], vC [V], vn [V]]`` at ``t = 0``, ``vn`` the node just before
        the first turn-on; default ``run.initial_current``,
        ``run.initial_voltage`` and a discharged node (0 V).
    rtol, atol, method : float, float, str
        ``solve_ivp`` tolerances (``atol`` relative to :meth:`HybridCircuit.scales`)
        and method: DOP853, or Radau / BDF (implicit, with the exact Jacobian).

    Returns
    -------
    HybridTrace
    """
    c = HybridCircuit.from_scenario(scenario)
    n = scenario.n_cycles if cycles is None else int(cycles)
    if x0 is None:
        x0 = (scenario.run.initial_current, scenario.run.initial_voltage, 0.0)
    run = _Run(c, rtol, atol, method)
    y, mode = np.array([*map(float, x0), 0.0]), "open"
    ends = []
    for kc in range(n):
        ends.append(y.copy())
        for offset, length, gate in c.phases():
            t0 = kc * c.period + offset
            y, mode, emulate = run.gate_edge(t0, gate, y, mode)
            y, mode = run.phase(t0, t0 + length, y, mode, emulate)
    ends.append(y.copy())
    return HybridTrace(c, np.array(run.t0), np.array(run.t1), run.modes, np.array(run.bands),
                       run.sols, np.array(ends), np.array(run.jumps, float).reshape(-1, 4),
                       run.nfev)
