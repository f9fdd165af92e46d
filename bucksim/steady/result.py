"""The result of a steady-state search, its status codes and the solver settings."""

from __future__ import annotations

import dataclasses
import numbers
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

# the steady-state codes live in the one status table
from bucksim.engine.status import STEADY_FAILED
from bucksim.engine.status import STEADY_FALLBACK as STEADY_FALLBACK
from bucksim.engine.status import STEADY_OK as STEADY_OK

if TYPE_CHECKING:
    from bucksim.engine.controlled import ControllerState


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
    controller : ControllerState or None
        Closed loop only: the compensator states (``w``) and the queue of
        delayed duties at the start of the periodic cycle; None in open loop.
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
    controller: ControllerState | None = None

    @property
    def success(self) -> bool:
        return self.status != STEADY_FAILED

    @property
    def stable(self) -> bool:
        """All Floquet multipliers strictly inside the unit circle."""
        return bool(np.all(np.abs(self.floquet) < 1.0))

    def to_dict(self) -> dict:
        """Plain values: ``x`` [SI], the multipliers as ``{"real", "imag"}`` pairs, the
        monodromy matrix as rows, the solver's record and the controller's state
        (``{"w", "queue"}``, or None in open loop)."""
        ctl = self.controller
        return {
            "x": [float(v) for v in np.asarray(self.x, dtype=float)],
            "iterations": int(self.iterations), "residual": float(self.residual),
            "floquet": [{"real": float(m.real), "imag": float(m.imag)}
                        for m in np.asarray(self.floquet, dtype=complex).ravel()],
            "monodromy": np.asarray(self.monodromy, dtype=float).tolist(),
            "method": self.method, "cycles": int(self.cycles), "status": int(self.status),
            "message": self.message, "success": self.success, "stable": self.stable,
            "controller": None if ctl is None else {
                "w": np.asarray(ctl.w, dtype=float).tolist(),
                "queue": np.asarray(ctl.queue, dtype=float).tolist()},
        }

    def plot(self, kind: str = "floquet", run=None, **kw):
        """Figure of the periodic state.

        Parameters
        ----------
        kind : {"floquet", "orbit"}
            ``"floquet"``: the multipliers in the complex plane with the unit
            circle (:func:`bucksim.plotting.floquet_figure`). ``"orbit"``: the
            periodic orbit ``iL`` against ``vC`` (:func:`bucksim.plotting.orbit_figure`),
            drawn from ``run``.
        run : Run, optional
            For ``"orbit"``: a run started on this state, e.g.
            ``bucksim.simulation.simulate_settled(scenario, cycles=1)`` (whose
            ``steady_state`` is this result).
        """
        from bucksim import plotting

        if kind == "floquet":
            return plotting.floquet_figure(self, **kw)
        if kind == "orbit":
            if run is None:
                raise ValueError("SteadyState.plot(kind='orbit') needs run=..., a run started "
                                 "on this state (bucksim.simulation.simulate_settled(scenario, "
                                 "cycles=1))")
            return plotting.orbit_figure(self, run, **kw)
        raise ValueError(f"kind must be 'floquet' or 'orbit', got {kind!r}")


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
