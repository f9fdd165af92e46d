"""The result of a steady-state search, its status codes and the solver settings."""

from __future__ import annotations

import dataclasses
import numbers
from dataclasses import dataclass

import numpy as np

STEADY_OK, STEADY_FALLBACK, STEADY_FAILED = 0, 1, 2


@dataclass
class SteadyState:
    """Result of :func:`steady_state` (``scipy.optimize`` manners).

    Attributes
    ----------
    x : ndarray
        Periodic state ``[iL [A], vC [V]]`` at the start of a cycle.
    iterations : int
        Newton updates taken.
    residual : float
        ``max_i |P(x)_i - x_i| / scale_i`` at ``x`` (scale: the largest
        magnitude of each state over the period).
    floquet : ndarray of complex
        Eigenvalues of the monodromy matrix at ``x``.
    monodromy : ndarray
    method : str
        ``"newton"``, ``"damped-newton"`` or ``"brute-force"``.
    cycles : int
        Switching periods simulated to get here (one per map evaluation).
    status : int
        0 converged by Newton, 1 converged by a fallback, 2 not converged.
    message : str
    """

    x: np.ndarray
    iterations: int
    residual: float
    floquet: np.ndarray
    monodromy: np.ndarray
    method: str
    cycles: int
    status: int
    message: str

    @property
    def success(self) -> bool:
        return self.status != STEADY_FAILED

    @property
    def stable(self) -> bool:
        """All Floquet multipliers strictly inside the unit circle."""
        return bool(np.all(np.abs(self.floquet) < 1.0))


def periodic_scenario(scenario):
    """The scenario at its t = 0 operating level: no steps, no soft-start."""
    rep = dataclasses.replace
    return rep(scenario,
               supply=rep(scenario.supply, steps=()),
               load=rep(scenario.load, steps=()),
               control=rep(scenario.control, soft_start=0.0),
               run=rep(scenario.run, start="rest", cycles=1, duration=None))



def check_settings(tol, max_iter, max_brute_cycles):
    """Refuse solver settings that cannot mean anything (ValueError naming them)."""
    if not (isinstance(tol, numbers.Real) and not isinstance(tol, bool) and tol > 0
            and np.isfinite(tol)):
        raise ValueError(f"tol must be a finite number > 0, got {tol!r}")
    for name, v in (("max_iter", max_iter), ("max_brute_cycles", max_brute_cycles)):
        if isinstance(v, bool) or not isinstance(v, numbers.Integral) or v < 0:
            raise ValueError(f"{name} must be a whole number >= 0, got {v!r}")


#: Solver defaults: open loop (exact monodromy) and closed loop (differenced Jacobian).
OPEN_LOOP_DEFAULTS = {"tol": 1e-12, "max_iter": 20, "max_brute_cycles": 200_000}
CLOSED_LOOP_DEFAULTS = {"tol": 1e-11, "max_iter": 12, "max_brute_cycles": 100_000}
