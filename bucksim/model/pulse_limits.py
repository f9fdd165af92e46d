"""The controller's limits on its pulses: the minimum on-time in open loop, and PFM at
the clock in a digital peak-current loop.

A controller cannot make a pulse shorter than its minimum on-time: an open-loop
schedule (a fixed duty, or a soft-start's ramp) asking for less gets the minimum,
or with pulse skipping no pulse (common practice). PFM at the clock: at a clock
edge where the loop asks for a peak below ``pfm_peak_current`` the controller
fires no pulse, so at light load the output drifts above the reference between
pulses of about that peak, fewer as the load falls, and the gates are charged
only for them; above that load the loop runs fixed-frequency PWM (the engine's
rule: :func:`bucksim.engine.period.decide_period`).
"""

from __future__ import annotations

import numpy as np

from bucksim.errors import ScenarioError
from bucksim.model.checks import non_negative


def open_loop_on_time(control, on_time):
    """The on-time [s] an open-loop ``control`` makes of a scheduled ``on_time`` [s] (a
    number or an array): below ``control.min_on_time`` it is raised to it, or with
    ``control.pulse_skipping`` dropped (0: no pulse)."""
    t = np.asarray(on_time, dtype=float)
    if control.min_on_time <= 0:
        return t
    short = t < control.min_on_time
    return np.where(short, 0.0 if control.pulse_skipping else control.min_on_time, t)


def fitted_on_time(control, period: float, dead_times: float) -> float:
    """The open loop's on-time [s] at its duty; refused when the minimum on-time it is
    raised to leaves no room for the dead times (``dead_times`` [s]) in ``period`` [s]."""
    asked = control.duty * period
    on = float(open_loop_on_time(control, asked))
    if on > asked and on + dead_times >= period:
        raise ScenarioError("control.min_on_time", f"must fit in the period with the dead "
                            f"times: below {period - dead_times:.6g} s", control.min_on_time)
    return on


def check_pfm(control) -> None:
    """Refuse ``control.pfm_peak_current`` below 0 A, or outside a digital peak-current
    loop (only there does a demanded peak decide each clock edge's pulse)."""
    non_negative("control.pfm_peak_current", control.pfm_peak_current, "A")
    if control.pfm_peak_current and (control.mode != "peak-current"
                                     or control.implementation != "digital"):
        raise ScenarioError("control.pfm_peak_current", "applies to mode = 'peak-current' "
                            "with implementation = 'digital' only (the loop's demanded peak "
                            "decides each clock edge's pulse)", control.pfm_peak_current)
