"""Periodic steady state by shooting-Newton on the one-period map [1]_.

The one-period map ``x_{k+1} = P(x_k)`` is evaluated exactly by the engine.
Its Jacobian, the monodromy matrix, is the product of the segments' state
transition matrices ``expm(A_s d_s)``, with a saltation matrix at every
state-dependent event (the inductor current reaching zero) [2]_:

.. math::

    S = I + \\frac{(f^+ - f^-)\\, e_1^T}{e_1^T f^-},

where ``f^-`` and ``f^+`` are the vector fields just before and after the
event and ``e_1^T x = iL`` is the event surface. Gate changes happen at fixed
times and need no correction. Newton's update solves
``(J - I) dx = -(P(x) - x)``; in CCM the map is affine and one update is
exact. The eigenvalues of ``J`` at the periodic state are the Floquet
multipliers: all inside the unit circle for a stable operating point.

References
----------
.. [1] T. J. Aprille and T. N. Trick, "Steady-state analysis of nonlinear
   circuits with periodic inputs", Proc. IEEE 60(1), 108-114, 1972.
.. [2] M. di Bernardo, C. J. Budd, A. R. Champneys, P. Kowalczyk,
   *Piecewise-smooth Dynamical Systems*, Springer, 2008, ch. 2 (saltation
   matrices).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from bucksim.engine.driver import build_table, integrate, phase_durations
from bucksim.engine.small_expm import expm_many
from bucksim.model.input_network import input_network
from bucksim.model.pulse_limits import open_loop_on_time
from bucksim.model.stage import (
    HIGH,
    HIGH_DIODE,
    IDLE,
    LOW,
    LOW_DIODE,
    OPEN,
    Stage,
    node_capacitance,
    zero_current_states,
)
from bucksim.model.stage_ramps import RAMP_SCALE
from bucksim.steady.newton import shoot
from bucksim.steady.result import SteadyState, check_settings, periodic_scenario


class PeriodMap:
    """The exact one-period map of a scenario and its monodromy matrix."""

    def __init__(self, scenario):
        self.scenario = periodic_scenario(scenario)
        self.stage = Stage(self.scenario)
        self.table = build_table(self.stage.matrices, self.scenario.period)
        self._phases = {}
        self.evaluations = 0
        T = self.scenario.period
        self.on_time = float(open_loop_on_time(self.scenario.control,
                                               self.scenario.control.duty * T))
        bounds = np.cumsum([0.0] + phase_durations(self.scenario, self.on_time))
        # a ramp that runs its time ends at a gate edge plus its duration: no event there
        spans = [0.0] + [t for t in self.stage.ramp_times if t > 0.0]
        self._edges = np.unique(np.add.outer(bounds, spans).ravel()) if ramp_indices(
            self.stage) else bounds
        self._evented = zero_current_states(self.scenario.switching.strategy)

    def step(self, x):
        """Return ``(P(x), result)``: one period from state ``x`` and the engine's result."""
        res = integrate(self.stage, x, table=self.table, n_cycles=1,
                        t_end=self.scenario.period, phase_cache=self._phases)
        self.evaluations += 1
        return res.x_end.copy(), res

    def __call__(self, x):
        """Return ``(P(x), J, result)`` for one period from state ``x``."""
        x1, res = self.step(x)
        return x1, self.monodromy(res), res

    def monodromy(self, res) -> np.ndarray:
        """The one-period map's Jacobian: the segments' transition matrices, each
        followed by its reset and saltation matrix (:func:`jump_matrix`)."""
        n = self.stage.n
        Ms = self.table.matrices
        J = np.eye(n)
        count = res.t0.shape[0]
        T = self.scenario.period
        phi = expm_many(Ms[res.system], res.dt)      # every segment's, in one call
        # the ramps' states are zero at a period's start and end (engine.ramps): the
        # map neither reads nor returns them
        hidden = ramp_indices(self.stage)
        ramps = bool(hidden)
        J[hidden, hidden] = 0.0
        if ramps and count:
            # a ramp that starts at the period's first edge: its slope is read from the
            # start state (the map's input has the ramps at zero)
            x_start = res.x0[0].copy()
            x_start[hidden] = 0.0
            R = ramp_reset(self.stage, res.conduction[-1], x_start, res.x0[0])
            if R is not None:
                J = R @ J
        for j in range(count):
            s = res.system[j]
            J = phi[j, :n, :n] @ J
            at_edge = j + 1 >= count or np.min(np.abs(self._edges - res.t0[j + 1])) <= 1e-12 * T
            nxt = -1 if j + 1 >= count else res.conduction[j + 1]
            S = jump_matrix(self.stage, s, res.conduction[j], nxt, at_edge, self._evented,
                            None if j + 1 >= count else res.x0[j + 1], res.system[j + 1]
                            if j + 1 < count else -1)
            if S is not None:
                J = S @ J
            if ramps and j + 1 < count:
                z_end = phi[j] @ np.append(res.x0[j], 1.0)
                R = ramp_reset(self.stage, res.conduction[j], z_end[:n], res.x0[j + 1])
                if R is not None:
                    J = R @ J
        J[hidden] = 0.0
        return J


#: Periods settled in one engine call before Newton is tried again (doubled each time).
PRE_SETTLE_CYCLES = 2000


def jump_matrix(stage, s, cond, nxt, at_edge, evented, x_next, s_next):
    """Reset and saltation at the end of a segment in system ``s`` (None: identity).

    With node capacitance the cycle loop sets ``vn`` to the node's voltage
    ``c_sw . z`` at the end of every conducting segment: a linear reset ``R``
    (identity with the ``vn`` row replaced by ``c_sw``). A segment that ends at
    a state-dependent event ``g . x = const`` (zero current; a clamp of the
    open node; an edge of its capacitance band) rather than at a fixed gate edge
    adds the saltation term [2]_:
    ``S = R + (f^+ - R f^-) g^T / (g^T f^-)``, with the vector fields ``f^-``
    of the ending system and ``f^+`` of the next at the event state.
    """
    n = stage.n
    R = None
    if stage.node and cond not in (OPEN, IDLE):
        R = np.eye(n)
        R[stage.i_node] = stage.signal("vsw", s)[:n]
    g = None
    if not at_edge and x_next is not None:
        level = stage.split_id(s)[0]
        if cond in evented and nxt in (IDLE, OPEN):
            g = _diode_row(stage, cond)
        elif cond == OPEN and nxt in (LOW_DIODE, HIGH_DIODE, HIGH, LOW):
            # a clamp; or a turning-on channel's ramp ending at its own (engine.ramps)
            g = stage.clamp_rows(level)[0 if nxt in (LOW_DIODE, LOW) else 1][:n]
        elif (cond == OPEN and nxt == OPEN and s_next != s
              and stage.split_id(s_next)[0] == level):
            g = np.zeros(n)         # an edge of the node capacitance's band: vn = edge
            g[stage.i_node] = 1.0
    if g is None:
        return R
    Ms = stage.matrices
    z = np.append(x_next, 1.0)
    f_minus = (Ms[s] @ z)[:n]
    f_plus = (Ms[s_next] @ z)[:n]
    den = float(g @ f_minus)
    if den == 0.0:
        return R
    base = np.eye(n) if R is None else R
    return base + np.outer(f_plus - base @ f_minus, g) / den


def _diode_row(stage, cond) -> np.ndarray:
    """The zero-current event's row: the diode's current, ``iL`` less a ramping
    channel's (``iL`` itself for the low-side channel in diode emulation)."""
    g = np.zeros(stage.n)
    g[0] = -1.0 if cond == HIGH_DIODE else 1.0
    ramp = stage.i_hs if cond == LOW_DIODE else stage.i_ls if cond == HIGH_DIODE else -1
    if ramp >= 0:
        g[ramp] = -g[0]
    return g


def ramp_reset(stage, cond, x_end, x_next):
    """The linear reset of the ramps' states between two segments (None: none).

    A ramp that runs on is continuous; one that ends is zeroed; one that starts
    takes its current and slope from ``iL`` or from the ramp it follows
    (:mod:`bucksim.engine.ramps`): rise ``k = RAMP_SCALE iL / t_r``, fall
    ``i = I0``, ``k = -RAMP_SCALE I0 / t_f``."""
    n = stage.n
    R = None
    times = stage.ramp_times.reshape(2, 2)
    for dev, i in enumerate((stage.i_hs, stage.i_ls)):
        if i < 0:
            continue
        new, old = x_next[i:i + 2], x_end[i:i + 2]
        # continuous (np.isclose's test, rtol 1e-9, in plain floats: this runs per segment)
        if (abs(new[0] - old[0]) <= 1e-300 + 1e-9 * abs(old[0])
                and abs(new[1] - old[1]) <= 1e-300 + 1e-9 * abs(old[1])):
            continue
        R = np.eye(n) if R is None else R
        R[i], R[i + 1] = 0.0, 0.0
        if new[0] == 0.0 and new[1] == 0.0:
            continue                            # the ramp ended
        if new[0] == 0.0:                       # a turn-on: slope from iL
            R[i + 1, 0] = RAMP_SCALE / times[dev][0]
            continue
        src = 0 if cond in (HIGH, LOW) else i  # a turn-off: from iL, or the rising ramp
        R[i, src] = 1.0
        R[i + 1, src] = -RAMP_SCALE / times[dev][1]
    return R


def _scale(x, x1, res, n=None):
    """Residual scale: each state's largest magnitude over the period and at its ends
    (the first ``n`` states, or the states of the index array ``n``)."""
    cols = np.arange(x.shape[0] if n is None else n) if np.ndim(n) == 0 else n
    mags = np.abs(res.x0[:, cols]).max(axis=0) if res.x0.shape[0] else np.zeros_like(x)
    return np.maximum(np.maximum(mags, np.abs(x)), np.maximum(np.abs(x1), 1e-12))


def initial_guess(scenario) -> np.ndarray:
    """Starting point for Newton: the averaged operating point.

    CCM: ``[Io - dI/2, Vo]`` (the valley current: a cycle starts at high-side
    turn-on) from :func:`bucksim.analysis.budget.operating_point` (the
    capacitor's mean current is zero, so ``vC = Vo``). Where the stage can
    enter DCM (asynchronous, diode emulation) and ``K = 2 L / (R Ts)`` is
    below ``1 - D``, the DCM conversion ratio
    ``M = 2 / (1 + sqrt(1 + 4 K / D^2))`` (Erickson & Maksimovic, 3rd ed.,
    ch. 5) gives ``Vo`` and the cycle starts at ``iL = 0``.
    """
    from bucksim.analysis.budget import operating_point
    op = operating_point(scenario)
    guess = np.array([op["valley"], op["vo"]])  # a cycle starts at high-side turn-on
    guess = _with_node(scenario, guess, drawn=op["duty"] * op["io"])
    r = scenario.load.resistance
    if r in (None, np.inf) and scenario.load.current > 0 and op["vo"] > 0:
        r = op["vo"] / scenario.load.current    # a current sink: its resistance at Vo
    if scenario.switching.strategy != "forced-pwm" and r not in (None, np.inf) and r > 0:
        D = float(open_loop_on_time(scenario.control, scenario.control.duty * scenario.period)
                  ) / scenario.period
        K = 2.0 * scenario.inductor.inductance * scenario.switching.frequency / r
        if 0.0 < D and K < 1.0 - D:     # (D = 0: every pulse skipped, nothing to guess)
            M = 2.0 / (1.0 + np.sqrt(1.0 + 4.0 * K / D ** 2))
            # the node rings about the output in the idle interval
            vo = M * scenario.supply.voltage
            drawn = vo * vo / (r * scenario.supply.voltage)     # the input power at Vs
            guess = _with_node(scenario, np.array([0.0, vo]), vo, drawn)
    return guess


def _with_node(scenario, x, vn: float = 0.0, drawn: float = 0.0):
    """``[iL, vC]`` with the node state ``vn`` [V] appended when the node has
    capacitance (its value at a period's start only sets the first edge's jump),
    then the input network's DC state with ``drawn`` [A] taken from the cell."""
    x = np.append(x, vn) if node_capacitance(scenario) > 0 else x
    net = input_network(scenario)
    if net is None:
        return x
    dc = np.linalg.solve(net.A, -(net.b_s * scenario.supply.voltage + net.b_d * drawn))
    return np.append(x, dc)


def open_loop_steady_state(scenario, x0=None, *, controller=None, tol: float = 1e-12,
                           max_iter: int = 20, max_brute_cycles: int = 200_000) -> SteadyState:
    """Periodic steady state of an open-loop scenario.

    Parameters and result: :func:`bucksim.steady.solve.steady_state`.

    Shooting (:func:`bucksim.steady.newton.shoot`) on the exact one-period
    map with its exact monodromy matrix; the residual's scale is taken anew
    at every point.
    """
    if controller is not None:
        raise ValueError(f"{scenario.source or scenario.title}: controller: an open-loop "
                         f"scenario has no controller state, got {controller!r}")
    check_settings(tol, max_iter, max_brute_cycles)
    pmap = PeriodMap(scenario)
    x = _start_vector(scenario, x0, pmap.stage.n, len(ramp_indices(pmap.stage)))
    n = x.shape[0]
    red = _ShotStates(pmap, x)
    full, step, jacobian, keep, iv = red.full, red.step, red.jacobian, red.keep, red.iv
    reduced, node = red.reduced, red.node

    def scale(xr, x1, res):
        return _scale(xr, x1, res, keep)

    start = x[keep]
    shot = shoot(step, start, jacobian=jacobian, scale=scale, tol=tol, max_iter=max_iter,
                 max_halvings=30, max_brute_cycles=0)
    used, block = 0, PRE_SETTLE_CYCLES
    while not shot.success and used + block <= max_brute_cycles:
        # Newton's basin can be small (an output settling over thousands of periods, a
        # DCM ring whose phase at turn-on moves with the state): settle a block of
        # periods at once, shoot again, double the block; period by period is last
        x_full = full(shot.x)
        if not np.all(np.isfinite(x_full)):
            x_full = full(start)
        res = integrate(pmap.stage, x_full, table=pmap.table, n_cycles=block,
                        t_end=block * pmap.scenario.period, phase_cache=pmap._phases)
        pmap.evaluations += block
        used += block
        block *= 2
        if not (res.success and np.all(np.isfinite(res.x_end))):
            break
        node["vn"] = res.x_end[iv]
        again = res.x_end[keep]
        shot = shoot(step, again, jacobian=jacobian, scale=scale, tol=tol, max_iter=max_iter,
                     max_halvings=30, max_brute_cycles=0)
    if not shot.success and max_brute_cycles > used:
        again = shot.x if np.all(np.isfinite(shot.x)) else start
        last = shot.message
        shot = shoot(step, again, jacobian=jacobian, scale=scale, tol=tol, max_iter=0,
                     max_halvings=30, max_brute_cycles=max_brute_cycles - used)
        settled = shot.message.split("; ", 1)[-1]
        shot = dataclasses.replace(shot, message=f"{last}, also after {used} settled "
                                                 f"periods; {settled}")
    if keep.size < n:
        if reduced:
            node["vn"] = shot.aux.x_end[iv]
        shot = dataclasses.replace(shot, x=full(shot.x))
    if shot.method == "brute-force" and not shot.success:
        J = np.eye(n)       # settling failed: no period to linearise about
    else:
        J = pmap.monodromy(shot.aux)
    mu = np.linalg.eigvals(J) if np.all(np.isfinite(J)) else np.full(n, np.nan)
    return SteadyState(x=shot.x, iterations=shot.iterations, residual=shot.residual,
                       floquet=mu, monodromy=J, method=shot.method, cycles=pmap.evaluations,
                       status=shot.status, message=shot.message)


class _ShotStates:
    """The states the shooting solves for, and the map and Jacobian on them.

    A period that starts with the high side on never reads the node's start value
    (the channel sets the node; unless its current ramps up first): shoot on the rest
    and carry ``vn`` along, so that Newton's damping is not judged on a state the map
    does not depend on. The
    ramps' states are zero at every period's start (:mod:`bucksim.engine.ramps`):
    not shot on either."""

    def __init__(self, pmap, x):
        stage, n = pmap.stage, x.shape[0]
        self.pmap, self.n = pmap, n
        # (a turn-on ramp leaves the node open for its rise time: then the map reads it)
        self.reduced = (stage.node and pmap.on_time > 0
                        and not (stage.i_hs >= 0 and stage.scenario.high_side.rise_time > 0))
        self.iv, self.node = stage.i_node, {"vn": x[stage.i_node]}
        hidden = ([self.iv] if self.reduced else []) + ramp_indices(stage)
        self.keep = np.array([i for i in range(n) if i not in hidden], dtype=int)

    def full(self, xr):
        out = np.zeros(self.n)
        out[self.keep] = xr
        if self.reduced:
            out[self.iv] = self.node["vn"]
        return out

    def step(self, xr):
        x1, res = self.pmap.step(self.full(xr))
        if self.reduced:
            self.node["vn"] = x1[self.iv]
        return x1[self.keep], res

    def jacobian(self, xr, x1, res, s):
        return self.pmap.monodromy(res)[np.ix_(self.keep, self.keep)]


def ramp_indices(stage) -> list[int]:
    """Positions of the switches' ramp states (current and slope) in the state."""
    return [j for i in (stage.i_hs, stage.i_ls) if i >= 0 for j in (i, i + 1)]


def _start_vector(scenario, x0, n: int, n_ramps: int) -> np.ndarray:
    """The shooting's first state, ramps zero: the averaged guess, or the caller's."""
    if x0 is not None and np.size(x0) == n:
        return _start_state(x0, n)
    x = initial_guess(scenario) if x0 is None else _start_state(x0, n - n_ramps)
    return np.concatenate([x, np.zeros(n_ramps)])


def _start_state(x0, n: int = 2) -> np.ndarray:
    """A caller's starting state ``[iL, vC]`` (or ``[iL, vC, vn]`` with node
    capacitance, ``n = 3``), refused unless finite values of that length."""
    x = np.asarray(x0, dtype=float).ravel().copy()
    if n > 2 and x.shape[0] == 2:
        x = np.append(x, 0.0)
    if x.shape[0] != n or not np.all(np.isfinite(x)):
        names = "[iL [A], vC [V]]" if n == 2 else "[iL [A], vC [V]] or [iL, vC, vn [V]]"
        raise ValueError(f"x0 must be finite values {names}, got {x.tolist()}")
    return x
