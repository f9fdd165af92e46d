"""Conduction states of the buck power stage as linear systems.

The stage has two energy-storage states, ``x = [iL, vC]``: the inductor
current (positive toward the load) and the voltage across the ideal part of
the output capacitor. Within one conduction state the circuit is linear,
``x' = A x + b``. The engine works on the augmented state ``z = [iL, vC, 1]``
with ``z' = M z``, ``M = [[A, b], [0, 0]]``, which treats singular ``A`` (the
idle state, a load with no resistor) without special cases.

Circuit (all values from the scenario)::

    Vin --Rs--+--[high side]--+-- sw --L--DCR--+--+-- vo
              |               |                |  |
                        [low side]          ESR  load (R || Icc)
                              |              C    |
    gnd ------+---------------+----------------+--+

Output voltage with ESR ``rC`` and load conductance ``g``:
``vo = (vC + rC (iL - Icc)) / (1 + rC g)``; load current ``io = g vo + Icc``;
capacitor current ``iC = iL - io``.

Switch-node voltage per conduction state (``iL`` sign in brackets):

===========  ======================================  ==========================
state        vsw                                     current through the part
===========  ======================================  ==========================
HIGH         Vin - (Rs + Rds_hs) iL                  high-side channel: iL
LOW          -Rds_ls iL                              low-side channel: iL
LOW_DIODE    -Vf_ls - r_ls iL (iL > 0)               low-side diode: iL
HIGH_DIODE   Vin + Vf_hs - (Rs + r_hs) iL (iL < 0)   high-side body diode: -iL
IDLE         vo (iL = 0, held)                       none
OPEN         vn - Rn iL (vn: Cn's voltage)            Cn and its resistance: iL
===========  ======================================  ==========================

The switch node's capacitance ``Cn`` (high-side ``coss`` plus the low-side
MOSFET's ``coss`` or the freewheel diode's ``cj``, in series with
``switching.node_resistance`` ``Rn``) makes its voltage a state ``vn`` whenever
nothing conducts (``OPEN``: dead times, the DCM idle interval, the asynchronous
off-time once the diode stops): ``Cn vn' = -iL``, ``L iL' = vn - (Rn + DCR) iL
- vo``. A body diode (or the freewheel diode) starts conducting when the node
reaches its clamp, ``-Vf_ls - r_ls iL`` or ``Vin + Vf_hs - (Rs + r_hs) iL``: an
event on the analytic solution, the state continuous. While a channel or diode
conducts the node is algebraic (the table), ``vn`` is not integrated (its row is
zero; the cycle loop sets it to the node voltage whenever the node opens), and
a channel that closes on the node at another voltage moves the node's charge
through itself at once (:mod:`bucksim.analysis.edges` books that energy).
Without node capacitance the node jumps: the stage idles in ``IDLE`` and the
states are ``[iL, vC]`` alone.

Analog closed loop (``control.implementation = "analog"``): the compensator
``w' = Ac w + Bc e``, ``u = Cc w + Dc e`` (:func:`bucksim.model.compensator.analog_realization`)
with ``e = H (vref - vo)`` joins the state, and so does the reference ``vref``
(it rises at ``reference / soft_start`` until ``soft_start``, then holds):
``x = [iL, vC, w_1 .. w_k, vref]``. The plant rows do not depend on the
controller's states, so within a segment the plant evolves as in open loop;
the controller acts only through the switching instants. With an integrator,
every system has a second copy with the integrator held (anti-windup, see
:meth:`Stage.integrator_limits`). A node capacitance given as a table
(:mod:`bucksim.model.capacitance`) is piecewise constant in ``vn``: the open
node has one system per band, and the band's edges are events. System id
``s = ((level * n_modes + held) * n_bands + band) * N_CONDUCTION + conduction``
(``band = 0`` but for the open node).
"""

from __future__ import annotations

import numpy as np

from bucksim.errors import ScenarioError
from bucksim.model.conduction import (
    CONDUCTION_NAMES,
    CONTROLLER_UNIT,
    GATE_HIGH,
    GATE_LOW,
    GATE_OFF,
    HIGH,
    HIGH_DIODE,
    IDLE,
    LOW,
    LOW_DIODE,
    N_CONDUCTION,
    N_STATES,
    NODE_STATE,
    OPEN,
    REVERSE_CURRENT_THRESHOLD,
    STATE_NAMES,
    STRATEGY_CODES,
    UNITS,
    clamp_current,
    current_reverses,
    node_capacitance,
    node_curve,
    zero_current_states,
)
from bucksim.model.input_network import input_network
from bucksim.model.levels import Level, is_analog_loop, operating_levels
from bucksim.model.parts import Diode, Mosfet, Scenario
from bucksim.model.stage_input import INPUT_SIGNALS, InputRows
from bucksim.model.stage_ramps import RAMP_STATES, RampRows, check_ramps_fit, ramp_switches

#: The stage and the conduction rules it is read by (defined in conduction).
__all__ = ["Stage", "CONDUCTION_NAMES", "CONTROLLER_UNIT", "GATE_HIGH", "GATE_LOW", "GATE_OFF",
           "HIGH", "HIGH_DIODE", "IDLE", "LOW", "LOW_DIODE", "N_CONDUCTION", "N_STATES",
           "NODE_STATE", "OPEN", "REVERSE_CURRENT_THRESHOLD", "STATE_NAMES", "STRATEGY_CODES",
           "UNITS", "clamp_current", "current_reverses", "node_capacitance", "node_curve",
           "zero_current_states"]


class Stage(InputRows, RampRows):
    """Linear systems and output maps for every (level, conduction state).

    System id ``s = ((level * n_modes + held) * n_bands + band) * N_CONDUCTION + conduction``
    (``n_modes = 1`` but for an analog integrator). ``matrices[s]`` is the
    augmented ``M`` (``m x m``, ``m = n + 1``; 3 x 3 without an analog loop).
    :meth:`signal` returns a row vector ``c`` such that a signal equals
    ``c @ z`` in that system.

    Attributes
    ----------
    n : int
        Number of states: 2, plus ``k + 1`` in an analog loop.
    state_names : tuple of str
        ``("iL", "vC")``, then ``"w1" .. "wk"`` and ``"vref"`` in an analog loop.
    plant_index : ndarray of int
        Positions of ``iL``, ``vC`` and the constant 1 in ``z``; every power
        signal lives there, so measurements may work on that block alone.
    loop : AnalogCompensator or None
    """

    def __init__(self, scenario: Scenario):
        self.scenario = scenario
        self._signal_rows: dict[tuple[str, int], np.ndarray] = {}
        self.levels = operating_levels(scenario)
        self.analog = is_analog_loop(scenario)
        self.loop = None
        k = 0
        if self.analog:
            from bucksim.model.compensator import analog_realization
            self.loop = analog_realization(scenario.control.compensator)
            k = self.loop.order
        self.n_controller = k
        hs, ls = scenario.high_side, scenario.low_side
        self.cn = node_capacitance(scenario)
        #: the node is a state (index 2) when it has capacitance
        self.node = self.cn > 0.0
        #: the node's capacitance against vn per level, piecewise constant in bands
        self.curves = [node_curve(scenario, lev.vin) for lev in self.levels]
        self.n_bands = self.curves[0].n_bands if self.node else 1
        if self.node and any(np.any(c.caps <= 0) for c in self.curves):
            raise ScenarioError("high_side.coss", "the switch node's capacitance (high-side "
                                "coss plus low-side coss or cj) must be > 0 at every voltage "
                                "once it is given anywhere", min(float(np.min(c.caps))
                                                                for c in self.curves))
        self.i_node = N_STATES if self.node else -1
        #: the input network (input capacitor, source inductance, filter) or None
        self.net = input_network(scenario)
        self.n_in = 0 if self.net is None else self.net.n
        #: position of the first input-network state
        self.i_in = N_STATES + int(self.node)
        #: which switches ramp (stage_ramps), and where their [current, slope] states are
        ramps = ramp_switches(scenario, self.node)
        check_ramps_fit(scenario, *ramps)
        first = self.i_in + self.n_in
        self.i_hs = first if ramps[0] else -1
        self.i_ls = first + 2 * ramps[0] if ramps[1] else -1
        #: (4,) [rise_hs, fall_hs, rise_ls, fall_ls] [s]: the ramps' durations
        self.ramp_times = np.array([hs.rise_time, hs.fall_time, getattr(ls, "rise_time", 0.0),
                                    getattr(ls, "fall_time", 0.0)], dtype=float)
        #: position of the first controller state (analog loop)
        self.i_ctl = first + 2 * (ramps[0] + ramps[1])
        self.n = self.i_ctl + (k + 1 if self.analog else 0)
        ramp_names = sum((RAMP_STATES[j] for j in (0, 1) if ramps[j]), ())
        self.state_names = (STATE_NAMES + ((NODE_STATE,) if self.node else ())
                            + (self.net.names if self.net is not None else ()) + ramp_names
                            + (tuple(f"w{i + 1}" for i in range(k)) + ("vref",)
                               if self.analog else ()))
        self.plant_index = np.array([0, 1] + ([2] if self.node else [])
                                    + list(range(self.i_in, self.i_ctl)) + [self.n])
        # anti-windup of an analog integrator: a second copy of every system
        # with the integrator held (its row zeroed), see integrator_limits
        self.n_modes = 2 if self.analog and scenario.control.compensator.get(
            "integrator", True) else 1
        ind, cap = scenario.inductor, scenario.output_capacitor
        self.L, self.dcr = ind.inductance, ind.dcr
        self.C, self.esr = cap.capacitance, cap.esr
        self.rs = scenario.supply.resistance
        #: series resistance of the node's capacitance (acts while the node is open)
        self.r_node = scenario.switching.node_resistance if self.node else 0.0
        self.rds_hs = hs.rds_on
        self.vf_hs, self.r_hs = hs.body_diode.vf, hs.body_diode.r
        if isinstance(ls, Mosfet):
            self.rds_ls = ls.rds_on
            self.vf_ls, self.r_ls = ls.body_diode.vf, ls.body_diode.r
        else:
            assert isinstance(ls, Diode)
            self.rds_ls = 0.0  # no channel: the LOW state is never entered
            self.vf_ls, self.r_ls = ls.vf, ls.r
        self.matrices = np.array([self._matrix(lev, k, held, self._band_cn(i, b))
                                  for i, lev in enumerate(self.levels)
                                  for held in range(self.n_modes)
                                  for b in range(self.n_bands)
                                  for k in range(N_CONDUCTION)])

    def _band_cn(self, level: int, band: int) -> float:
        return float(self.curves[level].caps[band]) if self.node else 0.0

    # -- maps ----------------------------------------------------------------
    def system_id(self, level: int, conduction: int, held: int = 0, band: int = 0) -> int:
        """System id of a level, a conduction state, (analog loop) the integrator hold
        and (open node, nonlinear capacitance) the node's band."""
        return ((level * self.n_modes + held) * self.n_bands + band) * N_CONDUCTION + conduction

    def split_id(self, system: int) -> tuple[int, int]:
        """Return ``(level, conduction)`` of a system id."""
        group, conduction = divmod(int(system), N_CONDUCTION)
        return group // (self.n_bands * self.n_modes), conduction

    def level_at(self, t: float) -> int:
        """Index of the operating level in force at time ``t`` [s]."""
        times = [lev.time for lev in self.levels]
        return max(int(np.searchsorted(times, t, side="right")) - 1, 0)

    @property
    def integrator_index(self) -> int:
        """Position of the analog compensator's integrator in ``z`` (-1: none)."""
        return self.i_ctl if self.n_modes == 2 else -1

    def integrator_limits(self) -> tuple[float, float]:
        """Range [V] of the analog integrator state (anti-windup).

        The integrator holds at a limit while the error pushes it further:
        ``[0, max_duty * ramp]`` in voltage mode and ``[0, inf)`` in
        peak-current mode, the range the compensator output spans at a steady
        state (each further section has unity gain at DC), as the digital
        controller's conditional integration does.
        """
        ctl = self.scenario.control
        if ctl.mode == "peak-current":
            return 0.0, np.inf
        return 0.0, ctl.max_duty * ctl.ramp

    def error_row(self, level: int) -> np.ndarray:
        """Row with the loop error ``e = H (vref - vo) = row @ z`` at ``level`` [V]."""
        return self._error_row(self.levels[level])

    def _error_row(self, lev: Level) -> np.ndarray:
        gain = self.scenario.control.sense_gain
        row = -gain * self._embed(self._vo(lev))
        row[self.n - 1] += gain
        return row

    def _vo(self, lev: Level):
        den = 1.0 + self.esr * lev.conductance
        return np.array([self.esr, 1.0, -self.esr * lev.current]) / den

    def _embed(self, row3: np.ndarray, vn: float = 0.0) -> np.ndarray:
        """A row over ``[iL, vC, 1]`` (plus ``vn`` times the node state) as a
        row over the whole augmented state."""
        if not self.analog and not self.node and self.net is None:
            return row3
        out = np.zeros(self.n + 1)
        out[[0, 1, self.n]] = row3
        if self.node:
            out[self.i_node] = vn
        elif vn != 0.0:
            raise ValueError("a node-voltage term in a stage without node capacitance")
        return out

    def clamp_rows(self, level: int) -> tuple[np.ndarray, np.ndarray]:
        """Event rows of the two clamps on the open node at ``level``.

        Returns ``(low, high)``: ``low @ z = vn + Vf_ls + r_ls iL`` and
        ``high @ z = Vin + Vf_hs - (Rs + r_hs) iL - vn``; each is positive
        while its diode blocks and reaches zero where the diode's clamped node
        voltage (the module table) equals ``vn``.
        """
        if not self.node:
            raise ValueError("the node has no capacitance: it has no clamp events")
        vin = self.levels[level].vin
        rn = self.r_node     # the open node's voltage is vn - rn iL (vn: its capacitance's)
        low = self._embed(np.array([self.r_ls - rn, 0.0, self.vf_ls]), vn=1.0)
        if self.net is None:
            high = self._embed(np.array([rn - self.rs - self.r_hs, 0.0, vin + self.vf_hs]),
                               vn=-1.0)
        else:   # the body diode's node voltage: the cell's (carrying iL) + Vf - r_hs iL
            high = self._cell_row(self.levels[level], HIGH_DIODE) + self._embed(
                np.array([rn - self.r_hs, 0.0, self.vf_hs]), vn=-1.0)
        # ramp currents (stage_ramps): each clamp's diode carries what the ramp does not
        open_extra = self._ramp_extra(OPEN)
        low += open_extra - self._ramp_extra(LOW_DIODE)
        high += self._ramp_extra(HIGH_DIODE) - open_extra
        return low, high

    def initial_state(self, x0) -> np.ndarray:
        """Full state at t = 0 from ``[iL, vC]`` (controller at rest) or a full state.

        At rest the compensator states are zero and the reference is 0 with a
        soft-start ramp, else ``control.reference``.
        """
        x0 = np.asarray(x0, dtype=float).ravel()
        if x0.shape[0] == self.n:
            return x0.copy()
        if x0.shape[0] != N_STATES:
            raise ValueError(f"initial state must have {N_STATES} or {self.n} entries "
                             f"({', '.join(self.state_names)}), got {x0.shape[0]}")
        out = np.zeros(self.n)
        out[:N_STATES] = x0
        if self.net is not None:
            out[self.i_in:self.i_in + self.n_in] = self.net.rest_state(self.levels[0].vin)
        if self.analog:
            ctl = self.scenario.control
            out[-1] = 0.0 if ctl.soft_start > 0 else ctl.reference
        return out

    def control_output(self, level: int) -> np.ndarray:
        """Row ``c_u`` with the analog compensator output ``u = c_u @ z`` at ``level`` [V]."""
        row = self.loop.D * self.error_row(level)
        row[self.i_ctl:self.i_ctl + self.n_controller] += self.loop.C
        return row

    def _vsw(self, lev: Level, k: int, vo: np.ndarray):
        if k == HIGH:
            return np.array([-(self.rs + self.rds_hs), 0.0, lev.vin])
        if k == LOW:
            return np.array([-self.rds_ls, 0.0, 0.0])
        if k == LOW_DIODE:
            return np.array([-self.r_ls, 0.0, -self.vf_ls])
        if k == HIGH_DIODE:
            return np.array([-(self.rs + self.r_hs), 0.0, lev.vin + self.vf_hs])
        return vo.copy()  # idle: inductor voltage is zero

    def _matrix(self, lev: Level, k: int, held: int = 0, cn: float = 0.0) -> np.ndarray:
        vo = self._vo(lev)
        io = lev.conductance * vo + np.array([0.0, 0.0, lev.current])
        ic = np.array([1.0, 0.0, 0.0]) - io
        di_vn = dvn = 0.0
        dvn_row = np.zeros(3)
        if k == IDLE or (k == OPEN and not self.node):
            di = np.zeros(3)  # iL is held at exactly zero (OPEN is unused without Cn)
        elif k == OPEN:
            # with ramps, + rn (ihs + ils) in vsw and + (ihs + ils) / Cn in vn' (below)
            # L iL' = vn - rn iL - vo - DCR iL, Cn vn' = -iL (the open node)
            di = (-vo - np.array([self.dcr + self.r_node, 0.0, 0.0])) / self.L
            di_vn = 1.0 / self.L
            if self.node:
                dvn_row = np.array([-1.0 / cn, 0.0, 0.0])
        else:
            di = (self._vsw(lev, k, vo) - vo - np.array([self.dcr, 0.0, 0.0])) / self.L
        dv = ic / self.C
        if not self.analog and not self.node and self.net is None:
            return np.array([di, dv, [0.0, 0.0, 0.0]])
        m = self.n + 1
        q = self.n_controller
        M = np.zeros((m, m))
        M[0], M[1] = self._embed(di, vn=di_vn if self.node else 0.0), self._embed(dv)
        if k not in (IDLE, HIGH, LOW):
            M[0] += self._ramp_extra(k) / self.L
        if self.node:
            M[self.i_node] = self._embed(dvn_row, vn=dvn)
            if k == OPEN:
                M[self.i_node] += (self._ramp_unit(0) + self._ramp_unit(1)) / cn
        self._ramp_rows(M)
        if self.net is not None:
            self._with_network(M, lev, k, vo)
        if not self.analog:
            return M
        # compensator: w' = Ac w + Bc e, e = H (vref - vo)
        e_row = self._error_row(lev)
        c0 = self.i_ctl
        for i in range(q):
            M[c0 + i] = self.loop.B[i] * e_row
            M[c0 + i, c0:c0 + q] += self.loop.A[i]
        M[c0 + q, m - 1] = lev.ref_slope
        if held:
            M[c0] = 0.0     # the integrator (first section) holds its value
        return M

    def signal(self, name: str, system: int) -> np.ndarray:
        """Row vector ``c`` with ``signal = c @ z`` in ``system`` (read-only: one array per
        name and system, built once; the steady state's Jacobian asks for the same rows
        every period).

        Names: ``iL``, ``vC``, ``vo``, ``io``, ``ic``, ``iin`` (current drawn
        from the ideal source), ``vsw``, ``vin``, and the device currents
        ``high_side``, ``low_side``, ``high_side_body_diode``,
        ``low_side_body_diode`` (each positive in its conducting direction:
        channels carry iL, the high-side body diode carries -iL). In an
        analog loop also ``u`` (compensator output [V]) and ``vref`` [V].
        """
        key = (name, int(system))
        row = self._signal_rows.get(key)
        if row is None:
            row = np.array(self._signal_row(name, system), dtype=float)
            row.flags.writeable = False
            self._signal_rows[key] = row
        return row

    def _signal_row(self, name: str, system: int) -> np.ndarray:
        if name in ("u", "vref"):
            return self._controller_signal(name, system)
        if name.endswith(("_ramp", "_ramp_voltage")):
            return self._ramp_signal(name, system)
        if name in INPUT_SIGNALS or name.startswith("icin"):
            return self._input_signal(name, system)
        level, k = self.split_id(system)
        if name == "vsw" and self.net is not None and k in (HIGH, HIGH_DIODE):
            return self._cell_vsw(self.levels[level], k)    # the cell's voltage, less drops
        if name == "vsw" and self.node and k == OPEN:
            return self._embed(np.array([-self.r_node, 0.0, 0.0]), vn=1.0) + self._ramp_extra(k)
        if name == "iin":
            return self._drawn(k)
        row = self._embed(self._signal3(name, system))
        if name == "vsw":
            return row + self._ramp_extra(k)
        # a diode carries what a ramping channel does not (stage_ramps)
        if k == LOW_DIODE and name in ("low_side", "low_side_body_diode", "switch_node"):
            return row - self._ramp_unit(0) if row[0] != 0.0 else row
        if k == HIGH_DIODE and name == "high_side_body_diode":
            return row + self._ramp_unit(1)
        if k == OPEN and name == "switch_node":
            return row - self._ramp_unit(0) - self._ramp_unit(1)
        return row

    def _controller_signal(self, name: str, system: int) -> np.ndarray:
        if not self.analog:
            raise KeyError(f"signal {name!r} exists only in an analog closed loop")
        level, _ = self.split_id(system)
        if name == "u":
            return self.control_output(level)
        row = np.zeros(self.n + 1)
        row[self.n - 1] = 1.0
        return row

    def _signal3(self, name: str, system: int) -> np.ndarray:
        level, k = self.split_id(system)
        lev = self.levels[level]
        il = np.array([1.0, 0.0, 0.0])
        zero = np.zeros(3)
        vo = self._vo(lev)
        if name == "iL":
            return il
        if name == "vC":
            return np.array([0.0, 1.0, 0.0])
        if name == "vo":
            return vo
        if name == "io":
            return lev.conductance * vo + np.array([0.0, 0.0, lev.current])
        if name == "ic":
            return il - (lev.conductance * vo + np.array([0.0, 0.0, lev.current]))
        if name == "iin":
            return il if k in (HIGH, HIGH_DIODE) else zero
        if name == "vsw":
            return self._vsw(lev, k, vo)
        asynchronous = self.scenario.switching.strategy == "asynchronous"
        if name == "high_side":
            return il if k == HIGH else zero
        if name == "high_side_body_diode":
            return -il if k == HIGH_DIODE else zero
        if name == "low_side":
            if asynchronous:
                return il if k == LOW_DIODE else zero
            return il if k == LOW else zero
        if name == "low_side_body_diode":
            return il if (k == LOW_DIODE and not asynchronous) else zero
        if name == "switch_node":    # the open node's current (its resistance's loss)
            return il if k == OPEN and self.node else zero
        raise KeyError(f"unknown signal {name!r}")

    def device_models(self):
        """Per device: ``(name, resistance [ohm], forward drop [V])`` of its conduction loss.

        The conduction loss of a device is ``r * i**2 + vf * i`` with its
        current ``i`` from :meth:`signal`.
        """
        asynchronous = self.scenario.switching.strategy == "asynchronous"
        out = [("high_side", self.rds_hs, 0.0),
               ("high_side_body_diode", self.r_hs, self.vf_hs)]
        if asynchronous:
            out.append(("low_side", self.r_ls, self.vf_ls))
        else:
            out += [("low_side", self.rds_ls, 0.0),
                    ("low_side_body_diode", self.r_ls, self.vf_ls)]
        return out + ([("switch_node", self.r_node, 0.0)] if self.r_node > 0 else [])

    def stored_energy(self, x: np.ndarray, vsw: float = 0.0, level: int = 0) -> float:
        """Energy in L, C and the node capacitance [J] for state ``x = [iL, vC, ...]``
        and switch-node voltage ``vsw`` [V] at operating ``level`` (the node's energy
        is :meth:`~bucksim.model.capacitance.NodeCurve.stored`, ``Cn vsw^2 / 2`` when
        linear)."""
        node = float(self.curves[level].stored(vsw)) if self.node else 0.0
        net = (self.net.stored_energy(x[self.i_in:self.i_in + self.n_in])
               if self.net is not None else 0.0)
        return 0.5 * self.L * x[0] ** 2 + 0.5 * self.C * x[1] ** 2 + node + net
