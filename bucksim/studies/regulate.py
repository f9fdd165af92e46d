"""The duty that holds a stage's output voltage: an ideal regulator for the studies.

:func:`bucksim.compare` (and the light-load modes) compare strategies at the same
output voltage: each point's duty is trimmed until the periodic steady state's
mean output equals the target.
"""

from __future__ import annotations

import dataclasses
import math

from bucksim.errors import ScenarioError
from bucksim.studies.levels import periodic_run
from bucksim.studies.reverse import cycle_mean


def _duty_limits(scenario):
    T = scenario.period
    if scenario.switching.strategy == "asynchronous":
        return 1e-5, 1.0 - 1e-6
    tf, tr = scenario.switching.dead_time
    return 1e-5, 1.0 - (tf + tr) / T - 1e-6


def _secant(at, a, fa, lo, hi, vin):
    """Secant steps on ``at(d) = Vo(d) - target`` from ``(a, fa)``, the first with the
    slope ``vin``: the duty where ``|at| <= 1e-12 vin`` or the step is below 1e-12,
    or None when a step leaves ``[lo, hi]``, the slope is not positive or eight
    steps do not reach it (the caller brackets the root instead)."""
    slope = vin
    for _ in range(8):
        b = a - fa / slope
        if not lo <= b <= hi:
            return None
        fb = at(b)
        if abs(fb) <= 1e-12 * vin or abs(b - a) <= 1e-12:
            return b
        slope = (fb - fa) / (b - a)
        if not slope > 0:
            return None
        a, fa = b, fb
    return None


def regulated_point(scenario, target: float, guess: float | None = None):
    """Duty giving mean output voltage ``target`` [V] in steady state.

    Returns ``(scenario at that duty, SteadyState, Run over one period)``.

    Notes
    -----
    The mean output voltage rises monotonically with the duty (CCM: about
    ``Vin`` per unit duty, Erickson ch. 2; DCM: ch. 5) and nearly linearly, so
    secant steps from the slope ``Vin`` reach the duty to 1e-12 in three or four
    steady states (:func:`_secant`); where they do not (a kink at the CCM
    boundary, a slope of the wrong sign), the root is bracketed from a step of
    ``(target - Vo) / Vin`` and found by ``brentq`` to 1e-12 in duty. Each
    steady state is shot from the periodic state of the nearest duty tried.
    """
    from scipy.optimize import brentq

    rep = dataclasses.replace
    lo, hi = _duty_limits(scenario)
    memo = {}

    def at(d):
        if d not in memo:
            sc = rep(scenario, control=rep(scenario.control, duty=float(d)))
            # shoot from the periodic state of the nearest duty tried so far
            near = min(memo, key=lambda e: abs(e - d), default=None)
            ss, run = periodic_run(sc, None if near is None else memo[near][2].x)
            memo[d] = (cycle_mean(run, "vo") - target, sc, ss, run)
        return memo[d][0]

    a = min(max(scenario.control.duty if guess is None else guess, lo), hi)
    fa = at(a)
    d = _secant(at, a, fa, lo, hi, scenario.supply.voltage)
    if d is not None:
        _, sc, ss, run = memo[d]
        return sc, ss, run
    step = -fa / scenario.supply.voltage
    b = min(max(a + 1.2 * step, lo), hi)
    if b == a:
        b = min(max(a - math.copysign(1e-3, fa), lo), hi)
    fb = at(b)
    for _ in range(40):
        if fa * fb <= 0:
            break
        if b in (lo, hi):
            vmax = "the lowest" if b == lo else "the highest"
            strategy = scenario.switching.strategy
            raise ScenarioError("output_voltage", f"must be reachable with {strategy} at "
                                f"this load ({vmax} duty gives {fb + target:.6g} V)", target)
        a, fa, b = b, fb, min(max(b + 2.0 * (b - a), lo), hi)
        fb = at(b)
    if fa == 0 or fb == 0:
        d = a if fa == 0 else b
    else:
        d = brentq(at, min(a, b), max(a, b), xtol=1e-12, rtol=1e-12)
    at(d)
    _, sc, ss, run = memo[d]
    return sc, ss, run
