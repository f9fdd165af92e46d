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


#: Below this share of ``M`` the lossless DCM duty is not a start: the load is so light
#: (a microampere on an ampere rail) that losses and the node's charge set the output,
#: and a duty of ~1e-5 settles over seconds before its steady state says so.
LIGHTEST = 0.05


def _lossless_duty(scenario, target: float) -> tuple[float, float]:
    """The lossless stage's duty for the output ``target`` [V] and ``dVo/dD`` there [V]:
    ``D = M`` in CCM (Erickson & Maksimovic, 3rd ed., ch. 2), ``D = M sqrt(K / (1 -
    M))`` in DCM, the inverse of ``M = 2 / (1 + sqrt(1 + 4 K / D^2))``, ``K = 2 L fs /
    R`` (ch. 5; derived by solving it for D), where the stage blocks reversal,
    ``K < 1 - D`` and ``D >= LIGHTEST M``. The load at ``target`` as a resistance
    ``R = Vo / Io``."""
    vin = scenario.supply.voltage
    m = min(max(target / vin, 1e-9), 1.0 - 1e-9)
    load = scenario.load
    r = load.resistance if load.resistance is not None else math.inf
    io = target / r + load.current
    if scenario.switching.strategy == "forced-pwm" or not io > 0:
        return m, vin
    k = 2.0 * scenario.inductor.inductance * scenario.switching.frequency * io / target
    d = m * math.sqrt(k / (1.0 - m))
    if not k < 1.0 - d or d < LIGHTEST * m:
        return m, vin
    # dM/dD of the DCM ratio at d: M = 2 / (1 + s), s = sqrt(1 + 4K/D^2)
    s = math.sqrt(1.0 + 4.0 * k / d ** 2)
    return d, vin * (2.0 / (1.0 + s) ** 2) * (4.0 * k / d ** 3) / s


def _secant(at, a, fa, lo, hi, slope, vin):
    """Secant steps on ``at(d) = Vo(d) - target`` from ``(a, fa)``, the first with the
    slope ``slope`` [V per unit duty]: the duty where ``|at| <= 1e-12 vin`` or the
    step is below 1e-12, or None when a step leaves ``[lo, hi]``, the slope is not
    positive or twelve steps do not reach it (the caller brackets the root instead)."""
    for _ in range(12):
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
    secant steps from the lossless stage's duty and slope (:func:`_lossless_duty`;
    or from ``guess``, a neighbouring point's duty) reach the duty to 1e-12 in
    three or four steady states (:func:`_secant`); where they do not (a kink at the CCM
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

    vin = scenario.supply.voltage
    if guess is None:
        guess, slope = _lossless_duty(scenario, target)
    else:
        slope = _lossless_duty(scenario, target)[1]
    a = min(max(guess, lo), hi)
    fa = at(a)
    d = _secant(at, a, fa, lo, hi, slope, vin)
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
