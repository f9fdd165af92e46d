"""Independent event-driven reference simulator for the buck power stage.

Written from the circuit description alone, to check the engine from the
outside. Two integrators share one gate schedule and one set of switching
rules:

* :func:`simulate_expm` steps each conduction interval with the augmented
  matrix exponential (``scipy.linalg.expm``) and finds zero-current events with
  ``scipy.optimize.brentq`` on that exact solution (about 1e-15 of a period);
* :func:`simulate_ivp` integrates the same equations with
  ``scipy.integrate.solve_ivp`` (DOP853, rtol 1e-12), restarted at every gate
  change, with terminal events at iL = 0.

Notes
-----
States ``x = [iL, vC]``: inductor current [A] (positive from the switch node
``sw`` toward the output node ``vo``) and the voltage [V] on the ideal part of
the output capacitor. Load: conductance ``G = 1/R`` [S] (0 when absent) in
parallel with a constant sink ``Icc`` [A] (0 when absent).

Output node (KCL at ``vo`` with ``iC = iL - G vo - Icc`` and
``vo = vC + ESR iC``)::

    k  = 1 / (1 + ESR G)
    vo = k (vC + ESR iL - ESR Icc)
    iC = k (iL - G vC - Icc)

Switch node, an affine Thevenin form ``vsw = a - r iL`` per conduction state
(supply node ``vs = Vin - Rs iL`` whenever the high side carries iL)::

    HIGH        vsw = Vin - (Rs + Rds_hs) iL           (channel, either sign)
    LOW         vsw = -Rds_ls iL                       (channel, either sign)
    LOW_DIODE   vsw = -(Vf_ls + r_ls iL)               (iL > 0, diode ground -> sw)
    HIGH_DIODE  vsw = Vin + Vf_hs - (Rs + r_hs) iL     (iL < 0, diode sw -> supply)

State equations in every state but IDLE::

    L  diL/dt = a - (r + DCR + k ESR) iL - k vC + k ESR Icc
    C  dvC/dt = k iL - k G vC - k Icc

IDLE holds ``iL = 0`` (``diL/dt = 0``) and keeps the second row. Each
interval is linear, ``x' = A x + b``, solved exactly as
``[x(t); 1] = expm([[A, b], [0, 0]] t) [x(0); 1]`` (augmented form, valid for
singular or defective ``A``; Van Loan 1978).

Switching rules (cycle k starts at ``kT``): high side on for ``D T``; the
synchronous stages then have the falling dead time, the low-side gate until
``kT + T - td_r`` and the rising dead time. With both gates off the state is
LOW_DIODE (iL > 0), HIGH_DIODE (iL < 0) or IDLE (iL = 0); a diode state that
reaches iL = 0 becomes IDLE until the next gate change. Forced PWM: low-side
gate -> LOW. Diode emulation: low-side gate -> LOW while iL > 0 (IDLE at
iL = 0); if iL <= 0 at its start the channel stays off (both-off rules).

References
----------
C. F. Van Loan, "Computing integrals involving the matrix exponential",
IEEE Trans. Automatic Control 23(3), 1978 (augmented exponential).
R. W. Erickson and D. Maksimovic, Fundamentals of Power Electronics, 3rd ed.,
2020, ch. 2 and 5 (buck stage, conduction modes).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.linalg import expm
from scipy.optimize import brentq

# Conduction codes of the contract (own copy, so the reference does not read
# the engine's tables).
HIGH, LOW, LOW_DIODE, HIGH_DIODE, IDLE = range(5)
_GATE_HIGH, _GATE_OFF, _GATE_LOW = "high", "off", "low"
_EPS = np.finfo(float).eps


@dataclass(frozen=True)
class Circuit:
    """Flat parameter set of one open-loop buck stage [SI units]."""

    vin: float
    rs: float
    rds_hs: float
    vf_hs: float
    r_hs: float
    rds_ls: float | None      # None: freewheel diode (asynchronous stage)
    vf_ls: float
    r_ls: float
    inductance: float
    dcr: float
    capacitance: float
    esr: float
    conductance: float
    sink: float
    frequency: float
    duty: float
    strategy: str
    dead_falling: float = 0.0
    dead_rising: float = 0.0

    @classmethod
    def from_scenario(cls, s):
        """Read a :class:`bucksim.model.parts.Scenario` (open loop, no steps)."""
        if s.control.mode != "open-loop" or s.control.soft_start:
            raise ValueError("reference covers open loop without soft start")
        if s.supply.steps or s.load.steps:
            raise ValueError("reference covers constant supply and load")
        g = 0.0 if s.load.resistance in (None, math.inf) else 1.0 / s.load.resistance
        hs, ls = s.high_side, s.low_side
        sync = s.switching.strategy != "asynchronous"
        lsd = ls.body_diode if sync else ls
        tf, tr = s.switching.dead_time if sync else (0.0, 0.0)
        return cls(vin=s.supply.voltage, rs=s.supply.resistance, rds_hs=hs.rds_on,
                   vf_hs=hs.body_diode.vf, r_hs=hs.body_diode.r,
                   rds_ls=ls.rds_on if sync else None, vf_ls=lsd.vf, r_ls=lsd.r,
                   inductance=s.inductor.inductance, dcr=s.inductor.dcr,
                   capacitance=s.output_capacitor.capacitance, esr=s.output_capacitor.esr,
                   conductance=g, sink=s.load.current, frequency=s.switching.frequency,
                   duty=s.control.duty, strategy=s.switching.strategy,
                   dead_falling=tf, dead_rising=tr)

    @property
    def period(self):
        """Switching period [s]."""
        return 1.0 / self.frequency

    @property
    def _k(self):
        return 1.0 / (1.0 + self.esr * self.conductance)

    def system(self, code):
        """Return ``(A, b)`` of ``x' = A x + b`` in conduction state ``code``."""
        k, L, C = self._k, self.inductance, self.capacitance
        A = np.zeros((2, 2))
        b = np.zeros(2)
        A[1] = [k / C, -k * self.conductance / C]
        b[1] = -k * self.sink / C
        if code != IDLE:
            a, r = {HIGH: (self.vin, self.rs + self.rds_hs),
                    LOW: (0.0, math.nan if self.rds_ls is None else self.rds_ls),
                    LOW_DIODE: (-self.vf_ls, self.r_ls),
                    HIGH_DIODE: (self.vin + self.vf_hs, self.rs + self.r_hs)}[code]
            A[0] = [-(r + self.dcr + k * self.esr) / L, -k / L]
            b[0] = (a + k * self.esr * self.sink) / L
        return A, b

    def output_voltage(self, x):
        """Output node voltage [V] for states ``x`` (..., 2)."""
        x = np.asarray(x, float)
        return self._k * (x[..., 1] + self.esr * (x[..., 0] - self.sink))

    def phases(self):
        """Gate phases of one cycle: ``[(start offset [s], length [s], gate)]``."""
        T = self.period
        on = self.duty * T
        if self.strategy == "asynchronous":
            out = [(0.0, on, _GATE_HIGH), (on, T - on, _GATE_OFF)]
        else:
            tf, tr = self.dead_falling, self.dead_rising
            out = [(0.0, on, _GATE_HIGH), (on, tf, _GATE_OFF),
                   (on + tf, T - tr - on - tf, _GATE_LOW), (T - tr, tr, _GATE_OFF)]
        return [p for p in out if p[1] > 0.0]

    def conduction(self, gate, il):
        """Conduction state and event direction (-1, +1, 0 none) at a phase start."""
        if gate == _GATE_HIGH:
            return HIGH, 0
        if gate == _GATE_LOW:
            if self.strategy == "forced-pwm":
                return LOW, 0
            if il > 0.0:
                return LOW, -1
        if il > 0.0:
            return LOW_DIODE, -1
        if il < 0.0:
            return HIGH_DIODE, +1
        return IDLE, 0


@dataclass
class Trace:
    """Result of a reference run.

    ``gate_times`` [s] / ``gate_states`` (n, 2): every gate-change instant
    (and the end of the run) with ``[iL, vC]`` there; ``event_times`` [s]:
    zero-current events; ``seg_t0``, ``seg_code``, ``seg_x0``: the interval
    table (a new row at every gate change and every event).
    """

    circuit: Circuit
    gate_times: np.ndarray
    gate_states: np.ndarray
    event_times: np.ndarray
    seg_t0: np.ndarray
    seg_code: np.ndarray
    seg_x0: np.ndarray
    stop: float

    @property
    def scale(self):
        """``[max |iL|, max |vC|]`` over the gate instants [A, V]."""
        return np.abs(self.gate_states).max(axis=0)

    def at(self, times):
        """States ``[iL, vC]`` at ``times`` [s], exact from the interval table."""
        times = np.atleast_1d(np.asarray(times, float))
        idx = np.clip(np.searchsorted(self.seg_t0, times, side="right") - 1, 0, None)
        out = np.empty((times.size, 2))
        aug = _augmented(self.circuit)
        for j, (t, i) in enumerate(zip(times, idx, strict=True)):
            out[j] = _step(aug[self.seg_code[i]], self.seg_x0[i], t - self.seg_t0[i])
        return out

    def idle_margin(self):
        """Smallest margin [V] by which both diodes stay blocked in IDLE.

        In IDLE ``vsw = vo``; the low-side diode blocks while ``vo > -Vf_ls``
        and the high-side body diode while ``vo < Vin + Vf_hs``. A negative
        value means the contract's "held at zero" idles a physically
        conducting diode, so a comparison there tests a convention only.
        """
        c = self.circuit
        ends = np.append(self.seg_t0[1:], self.stop)
        mask = self.seg_code == IDLE
        if not mask.any():
            return math.inf
        x = np.vstack([self.seg_x0[mask], self.at(np.nextafter(ends[mask], -np.inf))])
        vo = c.output_voltage(x)
        return float(min((vo + c.vf_ls).min(), (c.vin + c.vf_hs - vo).min()))


def _augmented(c):
    out = []
    for code in range(5):
        A, b = c.system(code)
        M = np.zeros((3, 3))
        M[:2, :2], M[:2, 2] = A, b
        out.append(M)
    return out


def _step(M, x, tau):
    E = expm(M * tau)
    return E[:2, :2] @ x + E[:2, 2]


def _run(c, cycles, x0, solve_phase):
    """Drive the gate schedule; ``solve_phase`` integrates one gate phase."""
    T = c.period
    x = np.array(x0, float)
    gate_t, gate_x, events, seg_t, seg_c, seg_x = [], [], [], [], [], []
    for kc in range(cycles):
        for offset, length, gate in c.phases():
            t0 = kc * T + offset
            gate_t.append(t0)
            gate_x.append(x.copy())
            code, direction = c.conduction(gate, x[0])
            seg_t.append(t0)
            seg_c.append(code)
            seg_x.append(x.copy())
            x, t_event = solve_phase(code, direction, x, length)
            if t_event is not None:
                events.append(t0 + t_event)
                if t_event < length:
                    seg_t.append(t0 + t_event)
                    seg_c.append(IDLE)
                    seg_x.append(np.array([0.0, np.nan]))  # filled below
    stop = cycles * T
    gate_t.append(stop)
    gate_x.append(x.copy())
    tr = Trace(c, np.array(gate_t), np.array(gate_x), np.array(events), np.array(seg_t),
               np.array(seg_c, int), np.array(seg_x), stop)
    _fill_event_states(tr)
    return tr


def _fill_event_states(tr):
    # The vC at an event start is recovered from the previous interval with
    # the exact flow, so both integrators give one comparable table.
    aug = _augmented(tr.circuit)
    for i in np.flatnonzero(np.isnan(tr.seg_x0[:, 1])):
        x = _step(aug[tr.seg_code[i - 1]], tr.seg_x0[i - 1], tr.seg_t0[i] - tr.seg_t0[i - 1])
        tr.seg_x0[i] = [0.0, x[1]]


class _ExpmPhase:
    """Exact interval propagation with cached flows and brentq events."""

    def __init__(self, c, grid=64):
        self.c = c
        self.aug = _augmented(c)
        self.grid = grid
        self.flows = {}
        self.T = c.period

    def flow(self, code, tau):
        key = (code, tau)
        E = self.flows.get(key)
        if E is None:
            E = self.flows[key] = expm(self.aug[code] * tau)
        return E

    def __call__(self, code, direction, x, length):
        if direction == 0:
            E = self.flow(code, length)
            return E[:2, :2] @ x + E[:2, 2], None
        # Bracket the first crossing on a fine grid (the diode states are
        # monotonic in the scenarios of interest; the grid guards against a
        # filter ringing within one phase), then refine on the exact flow.
        n = self.grid
        h = length / n
        Eh = self.flow(code, h)
        xi = x
        for i in range(n):
            xn = Eh[:2, :2] @ xi + Eh[:2, 2]
            if direction * xn[0] >= 0.0:
                a, b = i * h, (i + 1) * h if i < n - 1 else length
                M = self.aug[code]

                def il(tau, M=M):
                    return _step(M, x, tau)[0]

                fb = il(b)
                if direction * fb >= 0.0 and direction * il(a) < 0.0:
                    tau = b if fb == 0.0 else brentq(il, a, b, xtol=1e-18 * self.T,
                                                     rtol=4 * _EPS, maxiter=200)
                else:  # marched grid and exact flow disagree by rounding at a node
                    tau = a if direction * il(a) >= 0.0 else b
                xe = _step(M, x, tau)
                xe[0] = 0.0
                E = self.flow(IDLE, length - tau) if tau < length else np.eye(3)
                return E[:2, :2] @ xe + E[:2, 2], tau
            xi = xn
        E = self.flow(code, length)
        return E[:2, :2] @ x + E[:2, 2], None


class _IvpPhase:
    """``solve_ivp`` per gate phase, terminal event at iL = 0."""

    def __init__(self, c, rtol=1e-12, atol=1e-15, method="DOP853"):
        self.sys = [c.system(code) for code in range(5)]
        self.opts = dict(method=method, rtol=rtol, atol=atol)

    def _solve(self, code, x, length, events=None):
        A, b = self.sys[code]
        return solve_ivp(lambda t, y: A @ y + b, (0.0, length), x, events=events, **self.opts)

    def __call__(self, code, direction, x, length):
        if direction == 0:
            return self._solve(code, x, length).y[:, -1], None

        def il(t, y):
            return y[0]

        il.terminal = True
        il.direction = direction
        sol = self._solve(code, x, length, events=il)
        if sol.status != 1:
            return sol.y[:, -1], None
        tau = float(sol.t_events[0][0])
        xe = np.array([0.0, sol.y_events[0][0][1]])
        if tau >= length:
            return xe, tau
        return self._solve(IDLE, xe, length - tau).y[:, -1], tau


def simulate_expm(circuit, cycles, x0=(0.0, 0.0), grid=64):
    """Reference run by exact exponential stepping and brentq events.

    Parameters
    ----------
    circuit : Circuit
    cycles : int
        Number of switching periods.
    x0 : (2,) array_like
        ``[iL [A], vC [V]]`` at t = 0.
    grid : int
        Points per diode phase used to bracket the first zero crossing.

    Returns
    -------
    Trace
    """
    return _run(circuit, cycles, x0, _ExpmPhase(circuit, grid))


def simulate_ivp(circuit, cycles, x0=(0.0, 0.0), rtol=1e-12, atol=1e-15):
    """Reference run by ``solve_ivp`` (DOP853), restarted at each gate change.

    Event times come from solve_ivp's dense output, so they are good to about
    ``rtol`` of a phase, not to the 1e-15 of :func:`simulate_expm`.
    """
    return _run(circuit, cycles, x0, _IvpPhase(circuit, rtol, atol))


def periodic_state(circuit):
    """Periodic steady state ``[iL, vC]`` at t = kT for a stage without events.

    Valid when no interval ends on a zero-current event (e.g. forced PWM
    without dead-time diode idling): the cycle map is then affine,
    ``x+ = P x + q``, and the fixed point solves ``(I - P) x = q``.
    """
    aug = _augmented(circuit)
    P = np.eye(3)
    for _, length, gate in circuit.phases():
        code, direction = circuit.conduction(gate, 1.0)
        if gate == _GATE_OFF:
            raise ValueError("dead-time phases depend on the sign of iL; not affine")
        if direction != 0:
            raise ValueError("phase with zero-current events; cycle map not affine")
        P = expm(aug[code] * length) @ P
    return np.linalg.solve(np.eye(2) - P[:2, :2], P[:2, 2])


def buck_scenario(*, vin, duty, frequency, strategy, inductance, capacitance, dcr=0.0, esr=0.0,
                  resistance=None, current=0.0, rs=0.0, rds_hs=1e-3, rds_ls=1e-3,
                  vf_hs=0.7, r_hs=0.0, vf_ls=0.7, r_ls=0.0, dead_time=(0.0, 0.0),
                  cycles=1000, summary_cycles=20, x0=(0.0, 0.0), title="reference check"):
    """Build an open-loop :class:`bucksim.model.parts.Scenario` from flat values [SI units].

    In the asynchronous stage ``vf_ls``/``r_ls`` describe the freewheel diode;
    otherwise the low-side body diode.
    """
    from bucksim.model import parts as p

    sync = strategy != "asynchronous"
    high = p.Mosfet(rds_hs, p.Diode(vf_hs, r_hs, section="high_side"), section="high_side")
    if sync:
        low = p.Mosfet(rds_ls, p.Diode(vf_ls, r_ls, section="low_side"), section="low_side")
    else:
        low = p.Diode(vf_ls, r_ls, section="low_side")
    return p.Scenario(
        title=title,
        supply=p.Supply(vin, rs),
        switching=p.Switching(frequency, strategy, tuple(dead_time) if sync else (0.0, 0.0)),
        inductor=p.Inductor(inductance, dcr),
        output_capacitor=p.Capacitor(capacitance, esr),
        high_side=high, low_side=low,
        load=p.Load(resistance, current),
        control=p.Control(mode="open-loop", duty=duty),
        run=p.RunSettings(cycles=cycles, summary_cycles=summary_cycles,
                          initial_current=float(x0[0]), initial_voltage=float(x0[1])))
