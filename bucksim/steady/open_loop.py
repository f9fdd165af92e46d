"""Periodic steady state by shooting-Newton on the one-period map.

The one-period map ``x_{k+1} = P(x_k)`` is evaluated exactly by the engine.
Its Jacobian, the monodromy matrix, is the product of the segments' state
transition matrices ``expm(A_s d_s)``, with a saltation matrix at every
state-dependent event (the inductor current reaching zero):

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
from bucksim.model.stage import HIGH_DIODE, IDLE, LOW, LOW_DIODE, Stage
from bucksim.steady.result import (STEADY_FAILED, STEADY_FALLBACK, STEADY_OK, SteadyState,
                                   check_settings, periodic_scenario)

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
        self._evented = {LOW_DIODE, HIGH_DIODE}
        if self.scenario.switching.strategy == "diode-emulation":
            self._evented.add(LOW)

    def __call__(self, x):
        """Return ``(P(x), J, segments)`` for one period from state ``x``."""
        res = integrate(self.stage, x, table=self.table, n_cycles=1,
                        t_end=self.scenario.period, phase_cache=self._phases)
        self.evaluations += 1
        return res.x_end.copy(), self.monodromy(res), res

    def monodromy(self, res) -> np.ndarray:
        n = self.stage.n
        Ms = self.table.matrices
        J = np.eye(n)
        count = res.t0.shape[0]
        T = self.scenario.period
        for j in range(count):
            s = res.system[j]
            J = expm(Ms[s] * res.dt[j])[:n, :n] @ J
            if j + 1 < count and res.conduction[j + 1] == IDLE and res.conduction[j] in self._evented:
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


def _scale(res, x, x1):
    mags = np.abs(res.x0).max(axis=0) if res.x0.shape[0] else np.zeros_like(x)
    return np.maximum(np.maximum(mags, np.abs(x)), np.maximum(np.abs(x1), 1e-12))


def initial_guess(scenario) -> np.ndarray:
    """Starting point for Newton: the averaged operating point.

    CCM: ``[Io - dI/2, Vo]`` (the valley current: a cycle starts at high-side turn-on) from :func:`bucksim.analysis.budget.operating_point` (the
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
    """Periodic steady state of an open-loop scenario (see :func:`bucksim.steady.solve.steady_state`)."""
    opts = {"tol": tol, "max_iter": max_iter, "max_brute_cycles": max_brute_cycles}
    if controller is not None:
        raise ValueError(f"{scenario.source or scenario.title}: controller: an open-loop "
                         f"scenario has no controller state, got {controller!r}")
    check_settings(**opts)
    tol, max_iter, max_brute_cycles = opts["tol"], opts["max_iter"], opts["max_brute_cycles"]
    pmap = PeriodMap(scenario)
    if x0 is None:
        x = initial_guess(scenario)
    else:
        x = np.asarray(x0, dtype=float).ravel().copy()
        if x.shape[0] != 2 or not np.all(np.isfinite(x)):
            raise ValueError(f"x0 must be two finite values [iL [A], vC [V]], got {x.tolist()}")
    n = x.shape[0]
    eye = np.eye(n)
    method = "newton"
    x1, J, res = pmap(x)
    r = x1 - x
    resid = float(np.max(np.abs(r) / _scale(res, x, x1)))
    it = 0
    while resid > tol and it < max_iter:
        try:
            step = np.linalg.solve(J - eye, -r)
        except np.linalg.LinAlgError:
            break
        lam = 1.0
        for _ in range(30):
            xt = x + lam * step
            xt1, Jt, rest = pmap(xt)
            rt = xt1 - xt
            rt_norm = float(np.max(np.abs(rt) / _scale(rest, xt, xt1)))
            if np.all(np.isfinite(rt)) and (rt_norm < resid or rt_norm <= tol):
                break
            lam *= 0.5
            method = "damped-newton"
        else:
            break
        x, x1, J, res, r, resid = xt, xt1, Jt, rest, rt, rt_norm
        it += 1
    newton_failed = (f"Newton did not converge in {it} of max_iter = {max_iter} updates "
                     f"(residual {resid:.2e} > tol {tol:g})")
    if resid <= tol:
        status = STEADY_OK if method == "newton" else STEADY_FALLBACK
        msg = f"converged by {method} in {it} updates (residual {resid:.2e}, tol {tol:g})"
    elif max_brute_cycles == 0:
        status, msg = STEADY_FAILED, newton_failed
    else:
        x, x1, J, resid, done = _brute_force(pmap, x, tol, max_brute_cycles)
        method = "brute-force"
        status = STEADY_FALLBACK if done else STEADY_FAILED
        msg = (f"{newton_failed}; brute-force settling "
               + (f"converged (residual {resid:.2e})" if done else
                  f"did not converge in {max_brute_cycles} periods (residual {resid:.2e})"))
    mu = np.linalg.eigvals(J) if np.all(np.isfinite(J)) else np.full(n, np.nan)
    return SteadyState(x=x, iterations=it, residual=resid, floquet=mu, monodromy=J,
                       method=method, cycles=pmap.evaluations, status=status, message=msg)


def _brute_force(pmap, x, tol, max_cycles):
    """Iterate the map until the change per cycle is below ``tol`` (relative)."""
    J = np.eye(x.shape[0])
    resid = np.inf
    x1 = x
    for _ in range(max_cycles):
        res = integrate(pmap.stage, x, table=pmap.table, n_cycles=1,
                        t_end=pmap.scenario.period, phase_cache=pmap._phases)
        pmap.evaluations += 1
        x1 = res.x_end.copy()
        resid = float(np.max(np.abs(x1 - x) / _scale(res, x, x1)))
        if not np.all(np.isfinite(x1)):
            break
        if resid <= tol:
            J = pmap.monodromy(res)
            return x1, x1, J, resid, True
        x = x1
    return x1, x1, J, resid, False
