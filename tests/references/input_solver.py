"""Independent event-driven reference for the buck stage with its input network.

Written from the circuit description alone (the stage of
:mod:`tests.references.stage_solver`, its switching rules reused, plus the
input network: source resistance and inductance, capacitor banks with ESR, an
optional filter inductor with DCR and a parallel resistor, an optional R-C
damping leg). Integrated with ``scipy.integrate.solve_ivp`` (DOP853 rtol 1e-12
by default, or Radau with the exact Jacobian), restarted at every gate change
and supply step, with terminal events at iL = 0. No node capacitance.

Notes
-----
Circuit (``v``: voltage of the switch cell, ``vT``: converter input terminals)::

    Vs --Rs--Ls--+ T --[(Lf + dcr) || Rp]-- cell --+-- high side (draws iin)
                                                  |
              bank k: C_k in series with E_k to ground; damping: Rd + Cd to ground

``iin = iL`` in the conduction states HIGH and HIGH_DIODE, else 0. Without a
filter T is the cell.

States: stage ``iL, vC``; network ``vcin`` (bank 1), ``vcin2``, ...;
``isrc`` (when ``Ls > 0``, or a filter without ``Rp``: then Ls and Lf carry
one current); ``ilf`` (filter inductor, only with ``Rp``); ``vcd`` (damping
capacitor). An extra quadrature state ``E`` integrates ``Vs isrc`` and is reset
at every cycle start.

Feed of the cell. Every current leaving the source reaches the cell (no shunt
element at T), so the current into the cell from the source side is ``isrc``
and can be written ``isrc = J - Gf v`` with:

* ``isrc`` a state: ``J = isrc``, ``Gf = 0``;
* no filter, ``Ls = 0``: ``isrc = (Vs - v) / Rs``: ``J = Vs / Rs``, ``Gf = 1 / Rs``;
* filter with ``Rp``, ``Ls = 0``. KVL/KCL at T: ``(Vs - vT) / Rs = ilf + (vT - v) / Rp``
  gives ``vT = (Rp Vs - Rs Rp ilf + Rs v) / (Rs + Rp)`` and
  ``isrc = (Vs + Rp ilf - v) / (Rs + Rp)``: ``J = (Vs + Rp ilf) / (Rs + Rp)``,
  ``Gf = 1 / (Rs + Rp)`` (``Rs = 0``: ``vT = Vs``).

Cell voltage. KCL at the cell, bank currents ``(v - vcin_k) / E_k``, damping
``(v - vcd) / Rd``::

    J - Gf v = sum_k (v - vcin_k) / E_k + (v - vcd) / Rd + iin
    v = (J - iin + sum_k vcin_k / E_k + vcd / Rd) / (Gf + sum_k 1 / E_k + 1 / Rd)

A bank with ``E_j = 0`` (at most one) pins ``v = vcin_j``; its current is the
KCL remainder ``isrc - iin - (other banks) - (damping)``. Without any bank the
network is the stage's own supply, ``v = Vs - Rs iin``.

Terminal voltage: ``vT = v`` without a filter; ``vT = v + Rp (isrc - ilf)``
with ``Rp``; without ``Rp`` ``vT = v + dcr isrc + Lf disrc/dt``.

State equations::

    C_k dvcin_k/dt = (v - vcin_k) / E_k
    Cd  dvcd/dt    = (v - vcd) / Rd
    Ls  disrc/dt   = Vs - Rs isrc - vT                    (Ls > 0, no filter or Rp)
    (Ls + Lf) disrc/dt = Vs - (Rs + dcr) isrc - v          (filter without Rp)
    Lf  dilf/dt    = vT - v - dcr ilf                      (filter with Rp)
    dE/dt          = Vs isrc

Stage, with ``vo = k (vC + ESR iL - ESR Icc)``, ``k = 1 / (1 + ESR G)``::

    HIGH        vsw = v - Rds_hs iL
    HIGH_DIODE  vsw = v + Vf_hs - r_hs iL
    LOW         vsw = -Rds_ls iL
    LOW_DIODE   vsw = -(Vf_ls + r_ls iL)
    L diL/dt = vsw - DCR iL - vo        (IDLE: diL/dt = 0, iL = 0)
    C dvC/dt = k (iL - G vC - Icc)

Every equation is affine in the states for a given conduction state and
``Vs``; ``x' = A x + b`` is read off the right-hand side by probing it with
unit vectors. Start "from rest": every capacitor of the network at ``Vs(0)``,
every inductor current 0.

References
----------
R. W. Erickson and D. Maksimovic, Fundamentals of Power Electronics, 3rd ed.,
2020, ch. 2 (buck stage, capacitor charge balance) and ch. 17 (input filters);
chapter numbers from memory.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

from tests.references.stage_solver import HIGH, HIGH_DIODE, IDLE, LOW, LOW_DIODE, Circuit

NETWORK_NAMES = ("vcin", "isrc", "ilf", "vcd")


@dataclass(frozen=True)
class Network:
    """Input network [SI units]: ``banks`` is ``((C [F], ESR [ohm]), ...)``;
    ``lf`` None: no filter; ``rp`` None: no parallel resistor; ``rd``/``cd``
    None: no damping leg."""

    rs: float
    ls: float = 0.0
    banks: tuple = ()
    lf: float | None = None
    dcr: float = 0.0
    rp: float | None = None
    rd: float | None = None
    cd: float | None = None

    @classmethod
    def from_scenario(cls, s):
        """Read the values of a :class:`bucksim.model.parts.Scenario`."""
        sup, cap, filt = s.supply, s.input_capacitor, s.input_filter
        banks = () if cap is None else tuple((b.capacitance, b.esr) for b in cap.banks)
        kw = {}
        if filt is not None:
            kw = dict(lf=filt.inductance, dcr=filt.dcr, rp=filt.parallel_resistance,
                      rd=filt.damping_resistance, cd=filt.damping_capacitance)
        return cls(rs=sup.resistance, ls=sup.inductance, banks=banks, **kw)

    @property
    def has_isrc(self):
        """True when the source current is a state."""
        return bool(self.banks) and (self.ls > 0.0 or (self.lf is not None and self.rp is None))

    @property
    def has_ilf(self):
        """True when the filter inductor carries its own current (parallel R present)."""
        return self.lf is not None and self.rp is not None

    def names(self):
        """Network state names in the spec's order."""
        out = [("vcin" if k == 0 else f"vcin{k + 1}") for k in range(len(self.banks))]
        out += ["isrc"] * self.has_isrc + ["ilf"] * self.has_ilf
        return tuple(out + ["vcd"] * (self.rd is not None))


class InputStage:
    """The stage (:class:`Circuit`) fed from the cell of a :class:`Network`.

    ``steps``: supply steps ``((time [s], voltage [V]), ...)``.
    """

    def __init__(self, circuit, network, steps=()):
        self.c, self.net, self.steps = circuit, network, tuple(steps)
        self.names = ("iL", "vC") + network.names()
        self.index = {n: i for i, n in enumerate(self.names)}
        self.n = len(self.names) + 1          # + the energy quadrature E
        self._cache = {}

    @classmethod
    def from_scenario(cls, s):
        """Stage and network of an open-loop scenario (supply steps allowed)."""
        bare = dataclasses.replace(s, supply=dataclasses.replace(s.supply, steps=()))
        steps = tuple((st.time, st.voltage) for st in s.supply.steps)
        return cls(Circuit.from_scenario(bare), Network.from_scenario(s), steps)

    def supply_voltage(self, t):
        """Ideal source EMF [V] in force at ``t`` [s] (a step applies from its time on)."""
        v = self.c.vin
        for ts, vs in self.steps:
            if t >= ts:
                v = vs
        return v

    def _x(self, x, name):
        return x[self.index[name]]

    def _feed(self, x, vs):
        net = self.net
        if net.has_isrc:
            return self._x(x, "isrc"), 0.0
        if net.has_ilf:
            g = 1.0 / (net.rs + net.rp)
            return (vs + net.rp * self._x(x, "ilf")) * g, g
        return vs / net.rs, 1.0 / net.rs

    def cell(self, x, code, vs):
        """Algebraic quantities ``(v, isrc, iin, vT)`` [V, A, A, V] for state ``x``."""
        net = self.net
        iin = x[0] if code in (HIGH, HIGH_DIODE) else 0.0
        if not net.banks:
            v = vs - net.rs * iin
            return v, iin, iin, v
        J, g = self._feed(x, vs)
        ideal = [k for k, (_, e) in enumerate(net.banks) if e == 0.0]
        if ideal:
            v = x[2 + ideal[0]]
        else:
            num, den = J - iin, g
            for k, (_, e) in enumerate(net.banks):
                num += x[2 + k] / e
                den += 1.0 / e
            if net.rd is not None:
                num += self._x(x, "vcd") / net.rd
                den += 1.0 / net.rd
            v = num / den
        isrc = J - g * v
        if net.lf is None:
            vt = v
        elif net.rp is not None:
            vt = v + net.rp * (isrc - self._x(x, "ilf"))
        else:
            didt = (vs - (net.rs + net.dcr) * isrc - v) / (net.ls + net.lf)
            vt = v + net.dcr * isrc + net.lf * didt
        return v, isrc, iin, vt

    def _stage_rows(self, x, code, v, dx):
        c = self.c
        il, vc = x[0], x[1]
        k = 1.0 / (1.0 + c.esr * c.conductance)
        if code != IDLE:
            vsw = {HIGH: lambda: v - c.rds_hs * il,
                   HIGH_DIODE: lambda: v + c.vf_hs - c.r_hs * il,
                   LOW: lambda: -(math.nan if c.rds_ls is None else c.rds_ls) * il,
                   LOW_DIODE: lambda: -(c.vf_ls + c.r_ls * il)}[code]()
            vo = k * (vc + c.esr * (il - c.sink))
            dx[0] = (vsw - c.dcr * il - vo) / c.inductance
        dx[1] = k * (il - c.conductance * vc - c.sink) / c.capacitance

    def branches(self, x, code, vs):
        """Branch currents [A]: ``(icin per bank, idamp, ilf)`` and the cell tuple.

        ``ilf`` is the filter inductor's current (``isrc`` without ``Rp``, 0
        without a filter); an ideal bank's current is the KCL remainder."""
        net = self.net
        cell = v, isrc, iin, _ = self.cell(x, code, vs)
        icin = [0.0 if e == 0.0 else (v - x[2 + k]) / e for k, (_, e) in enumerate(net.banks)]
        idamp = 0.0 if net.rd is None else (v - self._x(x, "vcd")) / net.rd
        for k, (_, e) in enumerate(net.banks):
            if e == 0.0:
                icin[k] = isrc - iin - idamp - sum(icin)
        ilf = self._x(x, "ilf") if net.has_ilf else (isrc if net.lf is not None else 0.0)
        return icin, idamp, ilf, cell

    def derivative(self, x, code, vs):
        """Right-hand side ``dx/dt`` (with the quadrature ``E`` last)."""
        net = self.net
        dx = np.zeros(self.n)
        icin, idamp, ilf, (v, isrc, _, vt) = self.branches(x, code, vs)
        self._stage_rows(x, code, v, dx)
        for k, (cap, _) in enumerate(net.banks):
            dx[2 + k] = icin[k] / cap
        if net.rd is not None:
            dx[self.index["vcd"]] = idamp / net.cd
        if net.has_isrc:
            if net.lf is not None and net.rp is None:
                didt = (vs - (net.rs + net.dcr) * isrc - v) / (net.ls + net.lf)
            else:
                didt = (vs - net.rs * isrc - vt) / net.ls
            dx[self.index["isrc"]] = didt
        if net.has_ilf:
            dx[self.index["ilf"]] = (vt - v - net.dcr * ilf) / net.lf
        dx[-1] = vs * isrc
        return dx

    def system(self, code, vs):
        """``(A, b)`` of ``x' = A x + b`` (quadrature included), probed from
        :meth:`derivative` (affine in ``x``)."""
        key = (code, vs)
        if key not in self._cache:
            b = self.derivative(np.zeros(self.n), code, vs)
            A = np.empty((self.n, self.n))
            for j in range(self.n):
                e = np.zeros(self.n)
                e[j] = 1.0
                A[:, j] = self.derivative(e, code, vs) - b
            self._cache[key] = (A, b)
        return self._cache[key]

    def rest(self, **given):
        """Initial state "from rest" (network capacitors at Vs(0)), ``given`` by name."""
        x = np.zeros(self.n)
        for name in self.names:
            if name.startswith("vcin") or name == "vcd":
                x[self.index[name]] = self.supply_voltage(0.0)
        for name, value in given.items():
            x[self.index[name]] = value
        return x


@dataclass
class Trace:
    """Result of :func:`simulate`.

    ``gate_times`` [s] / ``gate_states`` (n, len(names)): every gate change
    and supply step (and the end of the run) with the named states there;
    ``event_times`` [s]: zero-current events; ``cycle_energy`` [J]: per cycle,
    ``int Vs isrc dt`` of the ideal source; ``seg_*``: one row per integrated
    interval (``seg_sol`` its dense output over ``[0, length]``).
    """

    model: InputStage
    gate_times: np.ndarray
    gate_states: np.ndarray
    event_times: np.ndarray
    cycle_energy: np.ndarray
    seg_t0: np.ndarray
    seg_t1: np.ndarray
    seg_code: np.ndarray
    seg_vs: np.ndarray
    seg_x0: np.ndarray
    seg_sol: list

    @property
    def names(self):
        """State names, the columns of :meth:`states`."""
        return self.model.names

    def full_states(self, times):
        """States with the quadrature at ``times`` [s] (the later interval at a boundary)."""
        times = np.atleast_1d(np.asarray(times, float))
        idx = np.clip(np.searchsorted(self.seg_t0, times, side="right") - 1, 0, None)
        out = np.empty((times.size, self.model.n))
        for j, (t, i) in enumerate(zip(times, idx, strict=True)):
            tau = min(max(t - self.seg_t0[i], 0.0), self.seg_t1[i] - self.seg_t0[i])
            sol = self.seg_sol[i]
            out[j] = self.seg_x0[i] if sol is None or tau == 0.0 else sol(tau)
        return out, idx

    def states(self, times):
        """Named states (columns :attr:`names`) at ``times`` [s]."""
        return self.full_states(times)[0][:, :-1]

    def values(self, times):
        """Dict of every state by name plus the signals ``vin`` (cell), ``isrc``,
        ``iin``, ``vterm``, ``vs`` [V, A], the bank currents ``icin1``, ... and
        their sum ``icin``, ``idamp`` and ``ilf`` [A] at ``times`` [s]."""
        x, idx = self.full_states(times)
        out = {name: x[:, i] for i, name in enumerate(self.names)}
        rows = [self.model.branches(xi, self.seg_code[i], self.seg_vs[i])
                for xi, i in zip(x, idx, strict=True)]
        cell = np.array([r[3] for r in rows]).reshape(-1, 4)
        out.update(vin=cell[:, 0], isrc=cell[:, 1], iin=cell[:, 2], vterm=cell[:, 3],
                   vs=self.seg_vs[idx], idamp=np.array([r[1] for r in rows]),
                   ilf=np.array([r[2] for r in rows]))
        icin = np.array([r[0] for r in rows]).reshape(len(rows), -1)
        for k in range(icin.shape[1]):
            out[f"icin{k + 1}"] = icin[:, k]
        out["icin"] = icin.sum(axis=1)
        return out

    def window_mean(self, start, stop, fn, nodes=16):
        """``(1 / (stop - start)) int fn(values) dt`` over a window of whole
        intervals, Gauss-Legendre with ``nodes`` points per interval."""
        g, w = np.polynomial.legendre.leggauss(nodes)
        slack = 1e-9 * (stop - start)        # the caller's window edges may round apart
        keep = ((self.seg_t0 >= start - slack) & (self.seg_t1 <= stop + slack)
                & (self.seg_t1 > self.seg_t0))
        a, b = self.seg_t0[keep], self.seg_t1[keep]
        t = (0.5 * (a + b)[:, None] + 0.5 * (b - a)[:, None] * g).ravel()
        # interior nodes only, so each lies strictly inside its own interval
        f = np.asarray(fn(self.values(t))).reshape(a.size, nodes)
        return float((0.5 * (b - a) * (f @ w)).sum() / (b - a).sum())


class _Phase:
    """``solve_ivp`` over one interval, terminal event at iL = 0."""

    def __init__(self, model, method, rtol, atol):
        self.model = model
        self.opts = dict(method=method, rtol=rtol, atol=atol, dense_output=True)
        self.implicit = method in ("Radau", "BDF", "LSODA")
        self.rows = []            # (t0, t1, code, vs, x0, sol)

    def _solve(self, code, vs, x, t0, length, events=None):
        A, b = self.model.system(code, vs)
        kw = dict(self.opts, jac=A) if self.implicit else self.opts
        sol = solve_ivp(lambda t, y: A @ y + b, (0.0, length), x, events=events, **kw)
        # scipy 1.17's Radau can stop a few ulps short of the bound ("required step
        # size is less than spacing between numbers" on the last, sub-ulp step): the
        # interval is integrated, the state at its last point is the end state
        short = length - sol.t[-1] <= 16 * np.spacing(length)
        if sol.status < 0 and not short:
            raise RuntimeError(f"solve_ivp failed at t = {t0!r} s: {sol.message}")
        self.rows.append((t0, t0 + length, code, vs, np.array(x, float), sol.sol))
        return sol

    def __call__(self, code, direction, vs, x, t0, length):
        """Integrate; return the end state and the event offset (None without one)."""
        if direction == 0:
            return self._solve(code, vs, x, t0, length).y[:, -1], None

        def il(t, y):
            return y[0]

        il.terminal = True
        il.direction = direction
        sol = self._solve(code, vs, x, t0, length, events=il)
        if sol.status != 1:
            return sol.y[:, -1], None
        tau = float(sol.t_events[0][0])
        xe = np.array(sol.y_events[0][0], float)
        xe[0] = 0.0
        t0_, _, code_, vs_, x0_, dense = self.rows[-1]
        self.rows[-1] = (t0_, t0 + tau, code_, vs_, x0_, dense)
        if tau >= length:
            return xe, tau
        return self._solve(IDLE, vs, xe, t0 + tau, length - tau).y[:, -1], tau


def _pieces(model, cycles):
    """``(cycle, t0, t1, gate, gate_change)`` over the run, split at supply steps."""
    T = model.c.period
    for kc in range(cycles):
        for offset, length, gate in model.c.phases():
            t0, t1 = kc * T + offset, kc * T + offset + length
            cuts = [t0] + sorted(ts for ts, _ in model.steps if t0 < ts < t1) + [t1]
            for a, b in zip(cuts[:-1], cuts[1:], strict=True):
                yield kc, a, b, gate


def simulate(model, cycles, x0=None, method="DOP853", rtol=1e-12, atol=None):
    """Reference run of an :class:`InputStage` over ``cycles`` switching periods.

    Parameters
    ----------
    model : InputStage
    cycles : int
    x0 : dict, optional
        Named states at t = 0 [SI units]; the others from rest (:meth:`InputStage.rest`).
    method : str
        ``"DOP853"`` (explicit) or ``"Radau"`` (implicit, exact Jacobian).
    rtol : float
        Relative tolerance; ``atol`` defaults to 1e-13 (states) and 1e-20 J.

    Returns
    -------
    Trace
    """
    if atol is None:
        atol = np.r_[np.full(model.n - 1, 1e-13), 1e-20]
    phase = _Phase(model, method, rtol, atol)
    x = model.rest(**(x0 or {}))
    gate_t, gate_x, events, energy = [], [], [], []
    cycle = 0
    for kc, t0, t1, gate in _pieces(model, cycles):
        if kc != cycle:
            energy.append(x[-1])
            x[-1], cycle = 0.0, kc
        gate_t.append(t0)
        gate_x.append(x[:-1].copy())
        code, direction = model.c.conduction(gate, x[0])
        x, tau = phase(code, direction, model.supply_voltage(t0), x, t0, t1 - t0)
        if tau is not None:
            events.append(t0 + tau)
    energy.append(x[-1])
    gate_t.append(cycles * model.c.period)
    gate_x.append(x[:-1].copy())
    rows = phase.rows
    return Trace(model, np.array(gate_t), np.array(gate_x), np.array(events), np.array(energy),
                 np.array([r[0] for r in rows]), np.array([r[1] for r in rows]),
                 np.array([r[2] for r in rows], int), np.array([r[3] for r in rows]),
                 np.array([r[4] for r in rows]), [r[5] for r in rows])


def cell_response(model, frequencies, source="vs"):
    """Small-signal transfer to the cell voltage of the network alone, from the
    state equations: ``c (j w I - A)^-1 B + d`` over the network states.

    ``source`` ``"vs"``: ``v / Vs`` [-] with the stage idle; ``"iin"``: ``v / iin``
    [ohm] (minus the network's impedance seen from the cell), ``iin`` taken as
    an input (the iL column of the HIGH state).
    """
    code = IDLE if source == "vs" else HIGH
    A, b0 = model.system(code, 0.0)
    keep = np.arange(2, model.n - 1)          # network states only
    e = np.eye(model.n)
    z = model.cell(np.zeros(model.n), code, 0.0)[0]
    if source == "vs":
        B = model.system(code, 1.0)[1][keep] - b0[keep]
        d = model.cell(np.zeros(model.n), code, 1.0)[0] - z
    else:
        B = A[keep, 0]
        d = model.cell(e[0], code, 0.0)[0] - z
    crow = np.array([model.cell(e[j], code, 0.0)[0] - z for j in keep])
    out = []
    for f in np.atleast_1d(frequencies):
        w = 2j * math.pi * f
        out.append(crow @ np.linalg.solve(w * np.eye(keep.size) - A[np.ix_(keep, keep)], B) + d)
    return np.array(out)
