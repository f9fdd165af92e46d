"""Periodic steady state of a closed loop: shooting on plant and controller states.

The one-period map now acts on ``y = [iL, vC, w..., delayed duties...]``
(digital controller) or ``y = [iL, vC, w...]`` (analog controller, whose
states are part of the stage; its reference state is held at
``control.reference``).
The controller's update is a discrete map and the comparator instant is a
state-dependent event, so the Jacobian is taken by central differences of
the exact map (each column costs two one-period simulations); Newton's
shooting iteration [1]_ is otherwise that of :mod:`bucksim.steady.open_loop`. Near a solution the
map is smooth, so the differenced Jacobian is accurate to ~1e-7 and Newton
still converges to round-off in a few steps. The eigenvalues of that
Jacobian are the loop's Floquet multipliers.

References
----------
.. [1] T. J. Aprille and T. N. Trick, "Steady-state analysis of nonlinear
   circuits with periodic inputs", Proc. IEEE 60(1), 1972.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from bucksim.engine.controlled import ControllerState, integrate_closed_loop
from bucksim.engine.tables import build_table
from bucksim.model.compensator import design
from bucksim.model.stage import Stage
from bucksim.steady.newton import shoot
from bucksim.steady.result import SteadyState, check_settings, periodic_scenario


class LoopMap:
    """Exact one-period map of plant + controller at the final reference."""

    def __init__(self, scenario):
        sc = periodic_scenario(scenario)
        self.scenario = dataclasses.replace(sc, control=dataclasses.replace(sc.control,
                                                                            soft_start=0.0))
        self.stage = Stage(self.scenario)
        self.table = build_table(self.stage.matrices, self.scenario.period)
        self.analog = self.stage.analog
        if self.analog:
            self.comp = self.stage.loop
            self.k = 0                       # no discrete controller state
            self.n_plant = self.stage.n - 1  # every state but the reference
        else:
            self.comp = design(self.scenario.control.compensator, self.scenario.period)
            self.k = self.comp.order
            self.n_plant = self.stage.i_ctl  # iL, vC (and vn with node capacitance)
        self.delay = self.scenario.control.delay
        self.evaluations = 0
        self._phases = {}

    def split(self, y):
        """``(stage state, ControllerState)`` of a shooting vector ``y``."""
        y = np.asarray(y, dtype=float)
        p = self.n_plant
        x = y[:p]
        if self.analog:
            x = np.append(x, self.scenario.control.reference)
        return x, ControllerState(y[p:p + self.k].copy(), y[p + self.k:].copy())

    def __call__(self, y):
        x, st = self.split(y)
        res, end, _, _ = integrate_closed_loop(self.stage, self.comp, x, st, table=self.table,
                                               n_cycles=1, t_end=self.scenario.period,
                                               phase_cache=self._phases)
        self.evaluations += 1
        return np.concatenate([res.x_end[:self.n_plant], end.vector()]), res

    def jacobian(self, y, scale):
        n = y.shape[0]
        J = np.empty((n, n))
        for j in range(n):
            hj = 1e-6 * scale[j]
            yp, ym = y.copy(), y.copy()
            yp[j] += hj
            ym[j] -= hj
            J[:, j] = (self(yp)[0] - self(ym)[0]) / (2 * hj)
        return J


def closed_loop_steady_state(scenario, x0=None, *, controller=None, tol: float = 1e-11,
                             max_iter: int = 12, max_brute_cycles: int = 100_000) -> SteadyState:
    """Periodic steady state of a closed-loop scenario (see module notes).

    Parameters
    ----------
    scenario : Scenario
        A closed-loop scenario (``control.mode`` not ``"open-loop"``).
    x0 : array_like, optional
        Starting plant state ``[iL [A], vC [V]]``. An analog loop also takes
        its full stage state (``SteadyState.x``: ``[iL, vC, w1..wk, vref]``;
        the reference is held at ``control.reference``). Default: the
        averaged operating point, then (if Newton needs help) a few hundred
        periods from rest.
    controller : ControllerState or array_like, optional
        Starting controller state: a digital loop's ``ControllerState`` (or
        its ``vector()``: compensator states, then the delayed duties); an
        analog loop's compensator states ``w1..wk`` [V]. Default: the
        compensator's equilibrium at the averaged operating point.
    tol : float
        Converged when the relative residual ``max_i |P(y)_i - y_i| / scale_i``
        is at most ``tol``.
    max_iter : int
        Newton updates before falling back to brute-force settling.
    max_brute_cycles : int
        Periods the brute-force fallback may simulate (0: no fallback).

    Returns
    -------
    SteadyState
        ``x`` is the stage state (analog: with the compensator states and the
        reference); the extra attribute ``controller`` is a ControllerState.
        A periodic state whose largest |Floquet multiplier| is at least 1 is
        returned (``stable`` False) and its ``message`` says it is unstable.
    """
    from bucksim.model.scenario import require_scenario
    require_scenario(scenario, "closed_loop_steady_state")
    if scenario.control.mode == "open-loop":
        raise ValueError(f"{scenario.source or scenario.title}: control.mode: "
                         f"closed_loop_steady_state needs a closed loop, got 'open-loop' "
                         f"(use bucksim.steady_state)")
    check_settings(tol, max_iter, max_brute_cycles)
    lm = LoopMap(scenario)
    if x0 is None and controller is None:
        first = _solve(lm, _averaged_guess(lm), tol, max_iter)
        if first.success and first.method == "newton":
            return first
        y0 = _settle_guess(lm)
    else:
        y0 = _start_vector(lm, x0, controller)
    return _solve(lm, y0, tol, max_iter, max_brute_cycles)


def _start_vector(lm, x0, controller):
    """The shooting vector from a plant state and/or a controller state."""
    guess = _averaged_guess(lm)
    p, n_ctl = lm.n_plant, guess.shape[0] - lm.n_plant
    y = guess.copy()
    if x0 is not None:
        x = np.asarray(x0, dtype=float).ravel()
        full = lm.stage.n if lm.analog else None
        if x.shape[0] == 2:
            y[:2] = x
        elif lm.analog and x.shape[0] in (p, full):
            y[:p] = x[:p]
        else:
            want = "2 ([iL, vC])" + (f", {p} or {full} (the stage state)" if lm.analog else "")
            raise ValueError(f"x0 must hold {want} values, got {x.shape[0]}")
        if not np.all(np.isfinite(x)):
            raise ValueError(f"x0 must be finite, got {x.tolist()}")
    if controller is not None:
        if isinstance(controller, ControllerState):
            c = controller.vector() if not lm.analog else np.asarray(controller.w, dtype=float)
        else:
            c = np.asarray(controller, dtype=float).ravel()
        c0 = lm.stage.i_ctl
        width = (p - c0) if lm.analog else n_ctl
        if c.shape[0] != width or not np.all(np.isfinite(c)):
            raise ValueError(f"controller must hold {width} finite values (the compensator "
                             f"states{'' if lm.analog else ', then the delayed duties'}), "
                             f"got {c.tolist()}")
        if lm.analog:
            y[c0:p] = c
        else:
            y[p:] = c
    return y


def _averaged_guess(lm):
    """Plant at the averaged CCM point, controller on its equilibrium.

    At a steady state the error is zero each period, so the compensator
    state is a fixed point of ``w = Ad w`` whose output ``Cd w`` is the
    control value that holds the operating point: ``D V_ramp`` (voltage
    mode) or ``Ri I_peak + Se D T`` (peak-current mode).
    """
    from bucksim.analysis.budget import operating_point
    sc = lm.scenario
    ctl = sc.control
    op = operating_point(sc)
    # the node's value at a period's start only sets the first edge's jump: 0 V
    plant = [op["valley"], op["vo"]] + [0.0] * (lm.stage.i_ctl - 2)
    if ctl.mode == "peak-current":
        u = ctl.current_sense * op["peak"] + ctl.slope_compensation * op["duty"] * sc.period
    else:
        u = op["duty"] * ctl.ramp
    if lm.analog:
        # continuous equilibrium: w' = A w = 0 at zero error, C w = u
        q = lm.comp.order
        lhs = np.vstack([lm.comp.A, lm.comp.C[None, :]])
        rhs = np.concatenate([np.zeros(q), [u]])
        w = np.linalg.lstsq(lhs, rhs, rcond=None)[0]
        return np.concatenate([plant, w])
    k = lm.k
    lhs = np.vstack([lm.comp.Ad - np.eye(k), lm.comp.Cd[None, :]])
    rhs = np.concatenate([np.zeros(k), [u]])
    w = np.linalg.lstsq(lhs, rhs, rcond=None)[0]
    return np.concatenate([plant, w, np.full(lm.delay, op["duty"])])


def _solve(lm, y0, tol, max_iter, max_brute_cycles=0):
    """Shoot from ``y0`` (:func:`bucksim.steady.newton.shoot`), then linearise at the answer.

    The scale is the starting point's throughout: it sizes the differenced
    Jacobian's steps as well as the residual.
    """
    shot = shoot(lm, y0, jacobian=lambda y, y1, res, scale: lm.jacobian(y, scale),
                 scale=_scale, tol=tol, max_iter=max_iter, max_halvings=20,
                 max_brute_cycles=max_brute_cycles, frozen_scale=True,
                 hint=": the loop may be unstable or limit-cycling (check control.compensator)")
    y, n, msg = shot.x, shot.x.shape[0], shot.message
    if np.all(np.isfinite(y)):
        J = lm.jacobian(y, shot.scale)
        mu = np.linalg.eigvals(J) if np.all(np.isfinite(J)) else np.full(n, np.nan)
    else:
        J, mu = np.full((n, n), np.nan), np.full(n, np.nan)
    if shot.success and not np.all(np.abs(mu) < 1.0):
        msg += (f"; unstable: largest |Floquet multiplier| {np.max(np.abs(mu)):.3g} >= 1, "
                f"the loop cannot hold this periodic state")
    x, ctl = lm.split(y)   # x: the stage's full state (analog: with the reference)
    out = SteadyState(x=x, iterations=shot.iterations, residual=shot.residual, floquet=mu,
                      monodromy=J, method=shot.method, cycles=lm.evaluations,
                      status=shot.status, message=msg)
    out.controller = ctl
    return out


def _scale(y, y1, res):
    """Residual scale: plant states' largest magnitude over the period, all states' ends."""
    mags = np.abs(res.x0[:, :2]).max(axis=0) if res.x0.shape[0] else np.zeros(2)
    s = np.maximum(np.abs(y), np.abs(y1))
    s[:2] = np.maximum(s[:2], mags)
    return np.maximum(s, 1e-9)


def _settle_guess(lm, cycles=400):
    """A few hundred periods from rest: close enough for Newton to take over."""
    sc = lm.scenario
    res, st, _, _ = integrate_closed_loop(lm.stage, lm.comp, [0.0, 0.0], None, table=lm.table,
                                          n_cycles=cycles, t_end=cycles * sc.period)
    lm.evaluations += cycles
    return np.concatenate([res.x_end[:lm.n_plant], st.vector()])
