"""``steady_state``: the periodic steady state of any scenario, open or closed loop."""

from __future__ import annotations

from bucksim.model.scenario import require_scenario
from bucksim.steady.closed_loop import closed_loop_steady_state
from bucksim.steady.open_loop import open_loop_steady_state
from bucksim.steady.result import CLOSED_LOOP_DEFAULTS, OPEN_LOOP_DEFAULTS, SteadyState
from bucksim.threads import single_blas_thread


@single_blas_thread
def steady_state(scenario, x0=None, *, controller=None, tol: float | None = None,
                 max_iter: int | None = None,
                 max_brute_cycles: int | None = None) -> SteadyState:
    """Periodic steady state of a scenario at its t = 0 level.

    Closed-loop scenarios are handed to
    :func:`bucksim.steady.closed_loop.closed_loop_steady_state` (plant and
    controller states) with the same arguments; the rest of this docstring
    is the open-loop method.

    Parameters
    ----------
    scenario : Scenario
    x0 : array_like, optional
        Starting guess ``[iL [A], vC [V]]`` (closed loop: the plant state);
        default the averaged operating point.
    controller : ControllerState or array_like, optional
        Closed loop only: the controller's starting state (see
        :func:`~bucksim.steady.closed_loop.closed_loop_steady_state`).
    tol : float, optional
        Converged when the relative residual is at most ``tol``; default
        1e-12 (open loop), 1e-11 (closed loop).
    max_iter : int, optional
        Newton updates before falling back; default 20 (closed loop 12).
    max_brute_cycles : int, optional
        Periods the brute-force fallback may simulate (0: no fallback);
        default 200 000 (closed loop 100 000).

    Returns
    -------
    SteadyState
        ``method`` says which path converged; a fallback is reported in
        ``status`` (1) and ``message``, never silent; status 2 when neither
        converged within ``max_iter`` / ``max_brute_cycles``.
    """
    require_scenario(scenario, "steady_state")
    closed = scenario.control.mode != "open-loop"
    given = {"tol": tol, "max_iter": max_iter, "max_brute_cycles": max_brute_cycles}
    opts = {k: (v if v is not None else (CLOSED_LOOP_DEFAULTS if closed else
                                         OPEN_LOOP_DEFAULTS)[k]) for k, v in given.items()}
    if closed:
        return closed_loop_steady_state(scenario, x0, controller=controller, **opts)
    return open_loop_steady_state(scenario, x0, controller=controller, **opts)
