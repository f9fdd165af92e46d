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

import numpy as np
from scipy.linalg import expm

from bucksim.engine.driver import build_table, integrate, phase_durations
from bucksim.model.stage import IDLE, Stage, zero_current_states
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
        bounds = np.cumsum([0.0] + phase_durations(self.scenario,
                                                   self.scenario.control.duty * T))
        self._edges = bounds
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
        n = self.stage.n
        Ms = self.table.matrices
        J = np.eye(n)
        count = res.t0.shape[0]
        T = self.scenario.period
        for j in range(count):
            s = res.system[j]
            J = expm(Ms[s] * res.dt[j])[:n, :n] @ J
            ended = res.conduction[j] in self._evented
            if j + 1 < count and res.conduction[j + 1] == IDLE and ended:
                t_next = res.t0[j + 1]
                if np.min(np.abs(self._edges - t_next)) > 1e-12 * T:
                    z = np.append(res.x0[j + 1], 1.0)
                    f_minus = (Ms[s] @ z)[:n]
                    f_plus = (Ms[res.system[j + 1]] @ z)[:n]
                    if f_minus[0] != 0.0:
                        salt = np.eye(n)
                        salt[:, 0] += (f_plus - f_minus) / f_minus[0]
                        J = salt @ J
        return J


def _scale(x, x1, res):
    """Residual scale: each state's largest magnitude over the period and at its ends."""
    mags = np.abs(res.x0).max(axis=0) if res.x0.shape[0] else np.zeros_like(x)
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
    r = scenario.load.resistance
    if scenario.switching.strategy != "forced-pwm" and r not in (None, np.inf):
        D = scenario.control.duty
        K = 2.0 * scenario.inductor.inductance * scenario.switching.frequency / r
        if K < 1.0 - D:
            M = 2.0 / (1.0 + np.sqrt(1.0 + 4.0 * K / D ** 2))
            guess = np.array([0.0, M * scenario.supply.voltage])
    return guess


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
    x = initial_guess(scenario) if x0 is None else _start_state(x0)
    shot = shoot(pmap.step, x, jacobian=lambda x, x1, res, s: pmap.monodromy(res),
                 scale=_scale, tol=tol, max_iter=max_iter, max_halvings=30,
                 max_brute_cycles=max_brute_cycles)
    n = x.shape[0]
    if shot.method == "brute-force" and not shot.success:
        J = np.eye(n)       # settling failed: no period to linearise about
    else:
        J = pmap.monodromy(shot.aux)
    mu = np.linalg.eigvals(J) if np.all(np.isfinite(J)) else np.full(n, np.nan)
    return SteadyState(x=shot.x, iterations=shot.iterations, residual=shot.residual,
                       floquet=mu, monodromy=J, method=shot.method, cycles=pmap.evaluations,
                       status=shot.status, message=shot.message)


def _start_state(x0) -> np.ndarray:
    """A caller's starting state ``[iL, vC]``, refused unless two finite values."""
    x = np.asarray(x0, dtype=float).ravel().copy()
    if x.shape[0] != 2 or not np.all(np.isfinite(x)):
        raise ValueError(f"x0 must be two finite values [iL [A], vC [V]], got {x.tolist()}")
    return x
