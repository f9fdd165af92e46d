"""Status codes and their messages: the one table for runs and for steady-state searches.

A result object (:class:`~bucksim.engine.driver.EngineResult`,
:class:`~bucksim.waveforms.Run`, :class:`~bucksim.steady.result.SteadyState`)
carries ``status`` (one of the codes below), ``message`` (a sentence for the
user, often the table's message with the figures of the case) and
``success``, in the manner of ``scipy.integrate.solve_ivp``'s ``OdeResult``.

Run codes (the engine and :func:`bucksim.simulate`):

====  ======================  =================================================
code  name                    meaning
====  ======================  =================================================
 0    STATUS_OK               the run reached its end time
 1    STATUS_DIVERGED         a state became non-finite (or too large for its
                              square); segments up to there are kept
 2    STATUS_FULL             the cycle loop's segment buffer filled up; the
                              driver runs the chunk again with a larger
                              buffer, so no result ever carries this code
 3    STATUS_LOOP_UNSETTLED   a closed loop ended swinging between its duty
                              limits (set by :func:`bucksim.simulate`, not by
                              the engine)
====  ======================  =================================================

Steady-state codes (:func:`bucksim.steady_state`) are a separate table, whose
numbers overlap the run codes with other meanings: ``STEADY_OK`` (0, Newton
converged), ``STEADY_FALLBACK`` (1, a fallback converged) and
``STEADY_FAILED`` (2, nothing converged).

The numba kernels read the run codes as module constants (numba freezes a
global's value at compile time), so they import them from here.
"""

from __future__ import annotations

STATUS_OK = 0
STATUS_DIVERGED = 1
STATUS_FULL = 2
STATUS_LOOP_UNSETTLED = 3

#: Message of each run code.
RUN_MESSAGES = {
    STATUS_OK: "run completed",
    STATUS_DIVERGED: "state diverged (non-finite values); segments up to that point are kept",
    STATUS_FULL: ("segment buffer full (internal: the driver runs the chunk again with a "
                  "larger buffer)"),
    STATUS_LOOP_UNSETTLED: ("control loop did not settle (the duty swings between its limits "
                            "at the end of the run); segments up to the end are kept"),
}

STEADY_OK = 0
STEADY_FALLBACK = 1
STEADY_FAILED = 2

#: Message of each steady-state code.
STEADY_MESSAGES = {
    STEADY_OK: "converged by Newton's method",
    STEADY_FALLBACK: "converged by a fallback (damped Newton or brute-force settling)",
    STEADY_FAILED: "no periodic steady state found (neither Newton nor the fallback converged)",
}


def run_message(status: int) -> str:
    """Message of a run status code (ValueError for a code the table does not hold)."""
    return _lookup(RUN_MESSAGES, status, "run")


def steady_message(status: int) -> str:
    """Message of a steady-state status code (ValueError for an unknown code)."""
    return _lookup(STEADY_MESSAGES, status, "steady-state")


def _lookup(table, status, what):
    try:
        return table[int(status)]
    except (KeyError, TypeError, ValueError):
        raise ValueError(f"{status!r} is not a {what} status code (known: "
                         f"{', '.join(str(k) for k in table)})") from None
