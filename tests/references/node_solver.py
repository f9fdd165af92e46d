"""Independent stiff reference for the buck stage with a switch-node capacitance.

Written from the circuit description alone (not from the engine) to check
the engine's switch-node model from the outside. The node capacitance ``Cn``
is always present; every closed channel is a resistor and every diode a
``Vf + r`` branch, so the node settles through ``R Cn`` time constants of
picoseconds. The equations are integrated by ``scipy.integrate.solve_ivp``
(Radau IIA, an L-stable implicit method, with the exact constant Jacobian)
interval by interval, restarted at every gate edge and at every event (a
diode starting or stopping, the diode-emulation zero-current turn-off).

Notes
-----
States ``x = [iL, vC, vn, E]``: inductor current [A] (from the node toward
the output), ideal output-capacitor voltage [V], switch-node voltage [V] and
the energy delivered by the ideal source since t = 0 [J]. Load conductance
``G = 1/R`` [S] (0 when absent) in parallel with a sink ``Icc`` [A]; with
``k = 1/(1 + ESR G)`` the output node is ``vo = k (vC + ESR (iL - Icc))``::

    L  diL/dt = vn - vo - DCR iL
    C  dvC/dt = k (iL - G vC - Icc)
    Cn dvn/dt = i_h + i_l - iL
       dE/dt  = Vin i_h

``i_h`` flows from the source into the node through the high side and
``i_l`` from ground into the node through the low side, each a branch
``g (V - vn)`` to a Thevenin source::

    high-side channel (gate on)          g = 1/(Rs + Rds_hs),  V = Vin
    high-side body diode, vn > Vin+Vf    g = 1/(Rs + r_hs),    V = Vin + Vf_hs
    low-side channel (gate on)           g = 1/Rds_ls,         V = 0
    low-side diode, vn < -Vf_ls          g = 1/r_ls,           V = -Vf_ls

A body diode is considered only while its own channel's gate is off (a
closed channel carries either sign; the small channel drop keeps the diode
blocked). The asynchronous stage's freewheel diode (vf, r) takes the
low-side diode's place and has no gate. ``Cn = coss_hs + coss_ls``
(synchronous) or ``coss_hs + cj`` (asynchronous). A diode conducts exactly
when ``vn`` is past its threshold, so its on and off instants are the events
``vn = Vin + Vf_hs`` and ``vn = -Vf_ls``.

Gate program of period ``T`` (open loop, duty ``D``): high side on over
``[0, D T)``, both off for ``td_fall``, low side on until ``T - td_rise``,
both off for ``td_rise``; asynchronous: high side then nothing. Diode
emulation: the low-side channel closes at its gate edge only if ``iL > 0``
and opens at ``iL = 0``, staying open for the rest of the period. The node
starts at its conducting value ``Vin - (Rs + Rds_hs) iL(0)``.

Difference from the engine's model: the engine treats ``vn`` as algebraic
while a branch conducts and jumps it at once when a channel closes at
another voltage. Here the node follows the jump with the lag ``tau = R Cn``
of the branch, so the inductor sees ``dV tau`` less volt-seconds per jump
``dV``: the currents differ by ``dV tau / L`` per edge, relative differences
of order ``R Cn / T`` (1e-6 to 1e-5 for milliohm branches and nanofarad
nodes). A diode's conducting value ``-Vf - r iL`` lies ``dV = -r iL`` past
its threshold; a model that jumps there at the threshold, or lets the free
node slew on to it, differs from this one by at most ``|dV| tau`` as well.
:attr:`NodeTrace.lags` lists each such ``(time, dV, tau)`` and
:meth:`NodeTrace.drift_lags` the same for the node trailing its moving
conducting value (``R^2 Cn diL/dt``, far smaller), so that a comparison can
bound what it should see.

References
----------
E. Hairer and G. Wanner, *Solving Ordinary Differential Equations II: Stiff
and Differential-Algebraic Problems*, 2nd ed., Springer, 1996, sec. IV.8
(Radau IIA), as implemented by ``scipy.integrate.solve_ivp``.
R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*, 3rd
ed., Springer, 2020, ch. 2 and 5 (buck stage, conduction modes; from memory).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

from tests.references.stage_solver import buck_scenario

_MAX_EVENTS = 64        # per gate phase; more means a toggling topology (a bug)


@dataclass(frozen=True)
class NodeCircuit:
    """Flat parameters of an open-loop stage with node capacitance [SI units]."""

    vin: float
    rs: float
    rds_hs: float
    vf_hs: float
    r_hs: float
    rds_ls: float | None     # None: asynchronous (freewheel diode only)
    vf_ls: float
    r_ls: float
    cn: float
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

    @classmethod
    def from_scenario(cls, s):
        """Read a :class:`bucksim.model.parts.Scenario` (open loop, constant levels)."""
        if s.control.mode != "open-loop" or s.control.soft_start:
            raise ValueError("node reference: open loop without soft start only")
        if s.supply.steps or s.load.steps:
            raise ValueError("node reference: constant supply and load only")
        if s.run.start != "rest":
            raise ValueError("node reference: run.start must be 'rest' (a given state)")
        sync = s.switching.strategy != "asynchronous"
        hs, ls = s.high_side, s.low_side
        lsd = ls.body_diode if sync else ls
        for name, d in (("high_side.body_diode", hs.body_diode), ("low_side diode", lsd)):
            if d.qrr or d.tau:
                raise ValueError(f"node reference: {name} must have qrr = 0 and tau = 0")
        for name, m in (("high_side", hs),) + ((("low_side", ls),) if sync else ()):
            if m.rise_time or m.fall_time:
                raise ValueError(f"node reference: {name} rise/fall times must be 0")
        cn = hs.coss + (ls.coss if sync else ls.cj)
        g = 0.0 if s.load.resistance in (None, math.inf) else 1.0 / s.load.resistance
        out = cls(vin=s.supply.voltage, rs=s.supply.resistance, rds_hs=hs.rds_on,
                  vf_hs=hs.body_diode.vf, r_hs=hs.body_diode.r,
                  rds_ls=ls.rds_on if sync else None, vf_ls=lsd.vf, r_ls=lsd.r, cn=cn,
                  inductance=s.inductor.inductance, dcr=s.inductor.dcr,
                  capacitance=s.output_capacitor.capacitance, esr=s.output_capacitor.esr,
                  conductance=g, sink=s.load.current, period=s.period, duty=s.control.duty,
                  strategy=s.switching.strategy,
                  dead_time=tuple(s.switching.dead_time) if sync else (0.0, 0.0))
        if cn <= 0.0:
            raise ValueError("node reference: the node capacitance (coss + coss or cj) must "
                             "be > 0")
        if min(out.rs + out.r_hs, out.r_ls) <= 0.0:
            raise ValueError("node reference: diode branches need a resistance > 0 (Rs + "
                             "r_hs and r_ls): an ideal clamp has no finite node time constant")
        return out

    @property
    def _k(self):
        return 1.0 / (1.0 + self.esr * self.conductance)

    def branches(self, topo):
        """``(g_h, V_h, g_l, V_l)`` of topology ``topo = (hs_ch, hs_d, ls_ch, ls_d)``."""
        hs_ch, hs_d, ls_ch, ls_d = topo
        g_h, v_h, g_l, v_l = 0.0, 0.0, 0.0, 0.0
        if hs_ch:
            g_h, v_h = 1.0 / (self.rs + self.rds_hs), self.vin
        elif hs_d:
            g_h, v_h = 1.0 / (self.rs + self.r_hs), self.vin + self.vf_hs
        if ls_ch:
            g_l = 1.0 / self.rds_ls
        elif ls_d:
            g_l, v_l = 1.0 / self.r_ls, -self.vf_ls
        return g_h, v_h, g_l, v_l

    def system(self, topo):
        """``(A, b)`` of ``x' = A x + b`` for ``x = [iL, vC, vn, E]`` in ``topo``."""
        k, L, C, Cn = self._k, self.inductance, self.capacitance, self.cn
        g_h, v_h, g_l, v_l = self.branches(topo)
        A = np.zeros((4, 4))
        b = np.zeros(4)
        A[0, :3] = [-(self.dcr + k * self.esr) / L, -k / L, 1.0 / L]
        b[0] = k * self.esr * self.sink / L
        A[1, :2] = [k / C, -k * self.conductance / C]
        b[1] = -k * self.sink / C
        A[2, [0, 2]] = [-1.0 / Cn, -(g_h + g_l) / Cn]
        b[2] = (g_h * v_h + g_l * v_l) / Cn
        A[3, 2] = -self.vin * g_h
        b[3] = self.vin * g_h * v_h
        return A, b

    def output_voltage(self, x):
        """Output node voltage [V] for states ``x`` (..., 4)."""
        return self._k * (x[..., 1] + self.esr * (x[..., 0] - self.sink))

    def phases(self):
        """Gate phases of one period: ``[(offset [s], length [s], high on, low on)]``."""
        T, on = self.period, self.duty * self.period
        if self.rds_ls is None:
            out = [(0.0, on, True, False), (on, T - on, False, False)]
        else:
            tf, tr = self.dead_time
            out = [(0.0, on, True, False), (on, tf, False, False),
                   (on + tf, T - tr - on - tf, False, True), (T - tr, tr, False, False)]
        return [p for p in out if p[1] > 0.0]

    def scales(self):
        """``[A, V, V, J]`` scales of the states (for absolute tolerances)."""
        i_s = self.vin * self.period / self.inductance
        return np.array([i_s, self.vin, self.vin, self.vin * i_s * self.period])

    def ring_period(self):
        """Period [s] of the free L-Cn swing, ``2 pi sqrt(L Cn)``."""
        return 2.0 * math.pi * math.sqrt(self.inductance * self.cn)


@dataclass
class NodeTrace:
    """A reference run: dense Radau solutions, interval by interval.

    Attributes
    ----------
    circuit : NodeCircuit
    t0 : ndarray [s]   start of each interval
    topology : list of tuple   ``(hs_ch, hs_d, ls_ch, ls_d)`` per interval
    solutions : list   ``OdeSolution`` per interval (dense output)
    gate_times : ndarray [s]   every gate edge
    event_times : ndarray [s]   every diode on/off and diode-emulation turn-off
    lags : ndarray (n, 3)   ``(time [s], dV [V], tau [s])`` of every place where
        an algebraic-node model's node changes at once (a channel closing at a
        gate edge; a diode taking over, from its threshold to its conducting
        value) and this model follows with the lag ``tau = R Cn`` (see also
        :meth:`drift_lags`)
    stop : float [s]
    """

    circuit: NodeCircuit
    t0: np.ndarray
    topology: list
    solutions: list
    gate_times: np.ndarray
    event_times: np.ndarray
    lags: np.ndarray
    stop: float

    def states(self, times):
        """``[iL, vC, vn, E]`` at ``times`` [s] (the later interval at a boundary)."""
        times = np.atleast_1d(np.asarray(times, float))
        if times.size and (times.min() < self.t0[0] or times.max() > self.stop):
            raise ValueError(f"times must lie in [{self.t0[0]:.6g}, {self.stop:.6g}] s")
        idx = np.clip(np.searchsorted(self.t0, times, side="right") - 1, 0, len(self.t0) - 1)
        out = np.empty((times.size, 4))
        for i in np.unique(idx):
            m = idx == i
            out[m] = self.solutions[i](times[m]).T
        return out

    def drift_lags(self):
        """``(start [s], dV [V], tau [s])`` of the node following its moving
        conducting value: in an interval where branches of total conductance
        ``g`` conduct, that value ``(sum g_j V_j - iL) / g`` moves by
        ``dV = -d(iL) / g`` and the node trails it by ``tau = Cn / g``, a
        volt-second difference up to ``|dV| tau`` (listed at the start)."""
        c = self.circuit
        ends = np.append(self.t0[1:], self.stop)
        rows = []
        for t0, t1, topo, sol in zip(self.t0, ends, self.topology, self.solutions,
                                     strict=True):
            g_h, _, g_l, _ = c.branches(topo)
            g = g_h + g_l
            if g > 0.0:
                rows.append((t0, -(sol(t1)[0] - sol(t0)[0]) / g, c.cn / g))
        return np.array(rows, float).reshape(-1, 3)

    def at(self, times, signal):
        """One signal at ``times`` [s]: ``iL``, ``vC``, ``vsw``, ``vo`` or ``energy``."""
        x = self.states(times)
        if signal == "vo":
            return self.circuit.output_voltage(x)
        return x[:, {"iL": 0, "vC": 1, "vsw": 2, "energy": 3}[signal]]


class _Integrator:
    """Radau per interval; events switch the topology."""

    def __init__(self, c, rtol, max_step):
        self.c = c
        self.opts = dict(method="Radau", rtol=rtol, atol=rtol * c.scales(), dense_output=True,
                         max_step=max_step)
        self.systems = {}
        self.t0, self.topo, self.sols, self.events, self.lags = [], [], [], [], []

    def system(self, topo):
        if topo not in self.systems:
            self.systems[topo] = self.c.system(topo)
        return self.systems[topo]

    def watched(self, topo, emulate):
        """Event functions ``(g, direction, flag index)`` of a topology."""
        c = self.c
        hs_ch, hs_d, ls_ch, ls_d = topo
        out = []
        if not hs_ch:
            out.append((lambda t, y: y[2] - c.vin - c.vf_hs, -1.0 if hs_d else 1.0, 1))
        if not ls_ch:
            out.append((lambda t, y: y[2] + c.vf_ls, 1.0 if ls_d else -1.0, 3))
        elif emulate:
            out.append((lambda t, y: y[0], -1.0, 2))
        return out

    def phase(self, t_start, length, x, topo, emulate):
        """Integrate one gate phase; return the end state."""
        t, t_end = t_start, t_start + length
        for _ in range(_MAX_EVENTS):
            A, b = self.system(topo)
            watch = self.watched(topo, emulate)
            funcs = []
            for g, direction, _ in watch:
                g.terminal, g.direction = True, direction
                funcs.append(g)
            sol = solve_ivp(lambda _t, y, A=A, b=b: A @ y + b, (t, t_end), x,
                            jac=A, events=funcs or None, **self.opts)
            if not sol.success:
                raise RuntimeError(f"node reference: Radau failed at t = {t:.9g} s: "
                                   f"{sol.message}")
            self.t0.append(t)
            self.topo.append(topo)
            self.sols.append(sol.sol)
            if sol.status != 1:
                return sol.y[:, -1]
            j = next(j for j, te in enumerate(sol.t_events) if len(te))
            t_ev, x = float(sol.t_events[j][0]), sol.y_events[j][0].copy()
            if t_ev <= t:
                raise RuntimeError(f"node reference: topology toggles at t = {t:.9g} s")
            flag = watch[j][2]
            new = list(topo)
            new[flag] = not new[flag]
            topo = tuple(new)
            self.events.append(t_ev)
            if new[flag] and flag in (1, 3):     # a diode takes over past its threshold
                self.record_lag(t_ev, x, tuple(f and i == flag for i, f in enumerate(new)))
            t = t_ev
            if t >= t_end:
                return x
        raise RuntimeError(f"node reference: more than {_MAX_EVENTS} events in one phase "
                           f"from t = {t_start:.9g} s")

    def record_lag(self, t, x, branch):
        """Jump the engine makes at ``t``: to the conducting node value of ``branch``
        (a topology with the one branch that takes over)."""
        c = self.c
        g_h, v_h, g_l, v_l = c.branches(branch)
        g = g_h + g_l
        # conducting node value: Cn dvn/dt = 0 with the present iL
        v_alg = (g_h * v_h + g_l * v_l - x[0]) / g
        self.lags.append((t, v_alg - x[2], c.cn / g))


def _topology_at(c, hs_on, ls_on, vn):
    """Topology at a gate edge from the gates and the node voltage."""
    hs_d = (not hs_on) and vn > c.vin + c.vf_hs
    ls_d = (not ls_on) and vn < -c.vf_ls
    return (hs_on, hs_d, ls_on, ls_d)


def simulate_node(scenario, cycles=None, *, rtol=1e-10, max_step=None):
    """Reference run of an open-loop stage with switch-node capacitance.

    Parameters
    ----------
    scenario : Scenario
        Open loop, constant supply and load, ``run.start = "rest"``; the
        start state is ``run.initial_current`` [A] and ``run.initial_voltage``
        [V], the node at its conducting value.
    cycles : int, optional
        Periods to run (default ``scenario.n_cycles``).
    rtol : float
        Radau relative tolerance; absolute tolerances are ``rtol`` times the
        state scales (:meth:`NodeCircuit.scales`).
    max_step : float, optional
        Largest Radau step [s]; default a sixteenth of the L-Cn ring period,
        so a brief threshold crossing of a ringing node is not stepped over.

    Returns
    -------
    NodeTrace
    """
    c = NodeCircuit.from_scenario(scenario)
    n = scenario.n_cycles if cycles is None else int(cycles)
    run = _Integrator(c, rtol, c.ring_period() / 16 if max_step is None else max_step)
    il0 = scenario.run.initial_current
    x = np.array([il0, scenario.run.initial_voltage,
                  c.vin - (c.rs + c.rds_hs) * il0, 0.0])
    emulate = c.strategy == "diode-emulation"
    gates = []
    for kc in range(n):
        for offset, length, hs_on, ls_on in c.phases():
            t0 = kc * c.period + offset
            gates.append(t0)
            if ls_on and emulate and x[0] <= 0.0:
                ls_on = False       # the channel stays open for the rest of the period
            topo = _topology_at(c, hs_on, ls_on, x[2])
            if (hs_on or ls_on) and t0 > 0.0:      # a channel closes on the node
                run.record_lag(t0, x, (hs_on, False, ls_on, False))
            x = run.phase(t0, length, x, topo, emulate and ls_on)
    lags = np.array(run.lags, float).reshape(-1, 3)
    return NodeTrace(c, np.array(run.t0), run.topo, run.sols, np.array(gates),
                     np.array(run.events), lags, n * c.period)


def node_reference(scenario, times, cycles=None, **kw):
    """Sampled reference: dict of ``t``, ``iL`` [A], ``vC`` [V], ``vsw`` [V], ``vo`` [V]
    and ``energy`` (supply energy since t = 0) [J] at ``times`` [s]."""
    tr = simulate_node(scenario, cycles, **kw)
    x = tr.states(times)
    return {"t": np.asarray(times, float), "iL": x[:, 0], "vC": x[:, 1], "vsw": x[:, 2],
            "vo": tr.circuit.output_voltage(x), "energy": x[:, 3]}


def node_scenario(*, coss_hs, coss_ls=0.0, cj=0.0, **kw):
    """:func:`~tests.references.stage_solver.buck_scenario` with node capacitance.

    ``coss_hs``/``coss_ls`` [F] on the MOSFETs, ``cj`` [F] on an asynchronous
    stage's freewheel diode; the other keywords go to ``buck_scenario``.
    """
    s = buck_scenario(**kw)
    high = dataclasses.replace(s.high_side, coss=coss_hs)
    if kw["strategy"] == "asynchronous":
        low = dataclasses.replace(s.low_side, cj=cj)
    else:
        low = dataclasses.replace(s.low_side, coss=coss_ls)
    return dataclasses.replace(s, high_side=high, low_side=low)


def settled_start(scenario, passes=4, n=4001):
    """``scenario`` with a start state near its periodic one, by period averages.

    A periodic state has zero mean inductor voltage and zero mean capacitor
    current over a period. Each pass runs one period of the reference and moves
    ``vC(0)`` by the mean inductor voltage and ``iL(0)`` by the mean capacitor
    current (both offsets pass through a period almost unchanged while the
    output filter is much slower than the period). Not a Newton solve: it only
    keeps a short comparison run from drifting out of its conduction regime.
    """
    c = NodeCircuit.from_scenario(scenario)
    t = np.linspace(0.0, c.period, n)
    s = scenario
    for _ in range(passes):
        x = simulate_node(s, 1).states(t)
        vo = c.output_voltage(x)
        v_l = np.trapezoid(x[:, 2] - vo - c.dcr * x[:, 0], t) / c.period
        i_c = np.trapezoid(x[:, 0] - c.conductance * vo - c.sink, t) / c.period
        run = dataclasses.replace(s.run, initial_current=s.run.initial_current - i_c,
                                  initial_voltage=s.run.initial_voltage + v_l)
        s = dataclasses.replace(s, run=run)
    return s
