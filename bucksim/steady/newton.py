"""Shooting on a one-period map: damped Newton, then brute-force settling.

A periodic state is a fixed point ``x = P(x)`` of the one-period map. Newton's
update solves ``(J - I) dx = -(P(x) - x)`` with ``J`` the map's Jacobian (the
monodromy matrix) [1]_; the step is halved [2]_ until the residual falls (or meets the
tolerance), so a poor start cannot throw the iteration out of the basin. When
Newton stalls, the map itself is iterated ("brute-force" settling: what a
stable operating point does on the bench, period after period) until the change
per period meets the tolerance.

What differs between the open and the closed loop is passed in: the map, its
Jacobian (exact monodromy, or central differences) and the residual scale.

Notes
-----
Residual: ``max_i |P(x)_i - x_i| / s_i`` with the scale ``s`` from
``scale(x, P(x), aux)``, re-taken at every point, or (``frozen_scale``) the
starting point's throughout. Near a fixed point whose ``J - I`` is regular,
Newton converges quadratically; the map iteration converges linearly, at the
rate of the largest ``|eigenvalue|`` of ``J``, when that is below 1 (the
Banach fixed-point theorem for a contraction).

References
----------
.. [1] T. J. Aprille and T. N. Trick, "Steady-state analysis of nonlinear
   circuits with periodic inputs", Proc. IEEE 60(1), 108-114, 1972.
.. [2] J. E. Dennis and R. B. Schnabel, *Numerical Methods for Unconstrained
   Optimization and Nonlinear Equations*, SIAM, 1996, ch. 6 (backtracking line
   search).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from bucksim.steady.result import STEADY_FAILED, STEADY_FALLBACK, STEADY_OK

#: ``period_map(x) -> (P(x), aux)``: ``aux`` is whatever the Jacobian and the
#: scale need from that evaluation (the engine's result of the period).
PeriodMapFn = Callable[[np.ndarray], tuple[np.ndarray, Any]]


@dataclass
class Shot:
    """Outcome of :func:`shoot`.

    Attributes
    ----------
    x : ndarray
        The periodic state found, or the last iterate when none was.
    aux : object
        What ``period_map`` returned with ``P(x)`` for the evaluation the
        residual belongs to (after brute-force settling: the last period run,
        which started one period before ``x``).
    scale : ndarray
        The residual scale at ``x`` (``frozen_scale``: the starting point's).
    residual : float
        ``max_i |P(x)_i - x_i| / scale_i``.
    iterations : int
        Newton updates taken.
    method : str
        ``"newton"``, ``"damped-newton"`` or ``"brute-force"``.
    status : int
        :data:`~bucksim.steady.result.STEADY_OK` (Newton),
        ``STEADY_FALLBACK`` (damped Newton or settling) or ``STEADY_FAILED``.
    message : str
    """

    x: np.ndarray
    aux: Any
    scale: np.ndarray
    residual: float
    iterations: int
    method: str
    status: int
    message: str

    @property
    def success(self) -> bool:
        return self.status != STEADY_FAILED


def residual(x, x1, scale) -> float:
    """``max_i |x1_i - x_i| / scale_i``: the relative change over one period."""
    return float(np.max(np.abs(x1 - x) / scale))


def shoot(period_map: PeriodMapFn, x0, *, jacobian, scale, tol: float, max_iter: int,
          max_halvings: int, max_brute_cycles: int = 0, frozen_scale: bool = False,
          hint: str = "") -> Shot:
    """Fixed point of ``period_map`` by damped Newton, then brute-force settling.

    Parameters
    ----------
    period_map : callable
        ``period_map(x) -> (P(x), aux)``.
    x0 : array_like
        Starting point.
    jacobian : callable
        ``jacobian(x, P(x), aux, scale) -> J``, the map's Jacobian at ``x``;
        called once per Newton update, at the current iterate.
    scale : callable
        ``scale(x, P(x), aux) -> s`` (positive), the residual's scale.
    tol : float
        Converged when the residual is at most ``tol``.
    max_iter : int
        Newton updates before settling takes over.
    max_halvings : int
        Step halvings tried per update before Newton gives up.
    max_brute_cycles : int
        Periods the settling may run (0: no fallback).
    frozen_scale : bool
        Keep the starting point's scale throughout (a differenced Jacobian's
        steps are sized by it, so the residual stays comparable).
    hint : str
        Appended to the message when settling fails too (what to check).

    Returns
    -------
    Shot
    """
    x = np.array(x0, dtype=float)
    x1, aux = period_map(x)
    s0 = scale(x, x1, aux)
    measure = (lambda a, b, c: s0) if frozen_scale else scale
    x, x1, aux, s, resid, it, method = _newton(period_map, jacobian, measure, x, x1, aux, s0,
                                               tol, max_iter, max_halvings)
    newton_failed = (f"Newton did not converge in {it} of max_iter = {max_iter} updates "
                     f"(residual {resid:.2e} > tol {tol:g})")
    if resid <= tol:
        status = STEADY_OK if method == "newton" else STEADY_FALLBACK
        msg = f"converged by {method} in {it} updates (residual {resid:.2e}, tol {tol:g})"
    elif max_brute_cycles == 0:
        status, msg = STEADY_FAILED, newton_failed
    else:
        x, aux, s, resid, done = settle(period_map, measure, x, tol, max_brute_cycles)
        method = "brute-force"
        status = STEADY_FALLBACK if done else STEADY_FAILED
        msg = (f"{newton_failed}; brute-force settling "
               + (f"converged (residual {resid:.2e})" if done else
                  f"did not converge in {max_brute_cycles} periods (residual {resid:.2e})"
                  + hint))
    return Shot(x=x, aux=aux, scale=s, residual=resid, iterations=it, method=method,
                status=status, message=msg)


#: Full Newton steps allowed to raise the residual before the best point is
#: restored and damping takes over (a watchdog: Chamberlain, Powell, Lemarechal
#: and Pedersen, "The watchdog technique for forcing convergence in algorithms
#: for constrained optimization", Math. Programming Study 16, 1982; from memory).
#: A map that is nearly neutral in one state (an output capacitor over a DCM
#: period whose turn-on current depends on a node ring's phase) sends the first
#: full step far out and back; strict monotone damping then crawls.
WATCHDOG_STEPS = 4


def _newton(period_map, jacobian, measure, x, x1, aux, s, tol, max_iter, max_halvings):
    """Newton updates from ``x`` while the residual is above ``tol``: full steps under
    a watchdog (:data:`WATCHDOG_STEPS`), then damped steps from the best point."""
    eye = np.eye(x.shape[0])
    method = "newton"
    resid = residual(x, x1, s)
    best = (x, x1, aux, s, resid)
    free = WATCHDOG_STEPS
    it = 0
    while resid > tol and it < max_iter:
        J = jacobian(x, x1, aux, s)
        try:
            step = np.linalg.solve(J - eye, -(x1 - x))
        except np.linalg.LinAlgError:
            break
        if free > 0:
            xt = x + step
            xt1, auxt = period_map(xt)
            st = measure(xt, xt1, auxt)
            rt = residual(xt, xt1, st)
            if np.isfinite(rt):
                free = WATCHDOG_STEPS if rt < best[4] else free - 1
                x, x1, aux, s, resid = xt, xt1, auxt, st, rt
                if rt < best[4]:
                    best = (x, x1, aux, s, resid)
                it += 1
                if free == 0 and best[4] < resid:
                    x, x1, aux, s, resid = best     # the watchdog: back to the best point
                continue
            free = 0
            x, x1, aux, s, resid = best
            continue
        lam = 1.0
        for _ in range(max_halvings):
            xt = x + lam * step
            xt1, auxt = period_map(xt)
            st = measure(xt, xt1, auxt)
            rt = residual(xt, xt1, st)
            if np.isfinite(rt) and (rt < resid or rt <= tol):
                break
            lam *= 0.5
            method = "damped-newton"
        else:
            break
        x, x1, aux, s, resid = xt, xt1, auxt, st, rt
        it += 1
    return x, x1, aux, s, resid, it, method


def settle(period_map: PeriodMapFn, scale, x, tol: float, max_cycles: int):
    """Iterate the map until the change per period is at most ``tol`` (relative).

    Returns ``(x, aux, scale, residual, done)``: ``x`` the last image, ``aux``
    from the period that produced it. A state that stops being finite ends
    the settling with residual ``inf``.
    """
    x1, aux, s, resid = x, None, None, np.inf
    for _ in range(max_cycles):
        x1, aux = period_map(x)
        s = scale(x, x1, aux)
        resid = residual(x, x1, s)
        if not np.all(np.isfinite(x1)):
            return x1, aux, s, np.inf, False
        if resid <= tol:
            return x1, aux, s, resid, True
        x = x1
    return x1, aux, s, resid, False
