"""Pulse skipping at the clock in periodic steady state: a multi-period orbit.

At each clock edge the controller compares the output with its threshold:
below it, the high side conducts for the minimum on-time; above it, the
period is skipped. The current returns to zero after each pulse (diode
emulation or a freewheel diode) and the output decays until the comparator
fires again, so the stage runs a pattern of pulses and skipped periods whose
length ``K`` (clock periods) is set by the load.

:func:`pulse_skipping_scenario` writes this rule as the existing digital
voltage-mode controller (no new engine code): a plain gain so high that the
demanded duty is either clamped at ``max_duty = t_min / T`` or below the
minimum on-time (``control.min_on_time``, ``control.pulse_skipping``), i.e. a
comparator at the clock. :func:`pulse_skipping_steady_state` runs that
closed loop exactly, block after block, from the output at the threshold,
until the pulse pattern and the clock-edge states repeat.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from bucksim.errors import ScenarioError
from bucksim.model.parts import Control, RunSettings
from bucksim.model.scenario import require_scenario
from bucksim.studies.light_modes import (
    MODE_FOUND,
    MODE_NO_PERIOD,
    MODE_NOT_AN_ORBIT,
    ModeResult,
    _positive_number,
    _refuse,
    check_light_strategy,
    light_threshold,
    load_current,
    steady_base,
    warn_if_audible,
)

#: Gain of the clocked comparator [duty per volt of error]: it pulses once
#: the output is ``(t_min / T) / COMPARATOR_GAIN`` below the threshold (< 1e-9 V).
COMPARATOR_GAIN = 1e9
#: The minimum on-time is set this fraction below ``max_duty T`` so rounding of
#: ``(t_min / T) T`` cannot skip a pulse the comparator asked for.
_ON_TIME_MARGIN = 1e-9
#: Clock-edge states repeat when they agree to this fraction of each state's range.
REPEAT_RTOL = 1e-9
#: Summaries span at least this many clock periods (whole patterns).
_MIN_WINDOW = 20


@dataclass
class SkipResult(ModeResult):
    """The periodic orbit of pulse skipping (:func:`pulse_skipping_steady_state`).

    Attributes
    ----------
    status : int
        0 an orbit found (pattern and states repeat); 1 none within
        ``max_periods`` (the figures are over the last block's whole pulses:
        averages of a pattern that did not repeat); 2 not skipping: the
        output stays below the threshold with a pulse every clock (the load
        is above what minimum on-time pulses carry).
    message : str
    pattern : tuple of int
        One period of the orbit, a 1 per clock period with a pulse, as
        :func:`canonical_pattern` cuts it (empty when none was found).
    clocks, pulses : int
        Length ``K`` of the pattern [clock periods] and the pulses in it.
    clock_frequency, switching_frequency, pattern_frequency : float
        The clock, the pulses per second (effective switching frequency) and
        the pattern's repetition rate ``1 / (K T)`` [Hz].
    min_on_time, threshold : float
        The pulse [s] and the threshold [V].
    audible : bool
        The effective switching frequency is below 20 kHz (a warning was issued).
    periods_run : int
        Clock periods simulated.
    run : Run or None
        The last block simulated; ``summary`` covers its last whole patterns.
    summary : Summary or None
    """

    status: int
    message: str
    pattern: tuple = ()
    clocks: int = 0
    pulses: int = 0
    clock_frequency: float = math.nan
    switching_frequency: float = math.nan
    pattern_frequency: float = math.nan
    min_on_time: float = math.nan
    threshold: float = math.nan
    audible: bool = False
    periods_run: int = 0
    run: object = None
    summary: object = None


def _min_on_time(scenario, min_on_time):
    key = "min_on_time" if min_on_time is not None else "control.min_on_time"
    value = scenario.control.min_on_time if min_on_time is None else min_on_time
    if min_on_time is None and not value > 0:
        raise _refuse(scenario, key, "must be > 0 s for pulse skipping (or pass min_on_time "
                      "[s])", value)
    value = _positive_number(key, value, "s")
    tf, tr = scenario.switching.dead_time
    room = scenario.period - (tf + tr if scenario.switching.strategy != "asynchronous" else 0)
    if value >= room:
        raise ScenarioError(key, f"must fit in the clock period with the dead times: below "
                            f"{room:.6g} s", value)
    return value


def pulse_skipping_scenario(scenario, min_on_time, threshold, cycles: int = 1000):
    """The stage under the clocked comparator: a pulse of ``min_on_time`` [s] at each
    clock edge where ``vo`` is below ``threshold`` [V], none where it is above.

    The controller is the digital voltage-mode loop with a plain gain of
    :data:`COMPARATOR_GAIN`, ``max_duty = min_on_time / T``, ``min_on_time``
    just below ``max_duty T`` and ``pulse_skipping = true``; the run starts
    from rest (``cycles`` clock periods). Simulating the result directly
    (:func:`bucksim.simulate`) is the reference for the steady state.
    """
    T = scenario.period
    control = Control(mode="voltage-mode", reference=float(threshold), sense_gain=1.0,
                      compensator={"gain": COMPARATOR_GAIN, "integrator": False}, ramp=1.0,
                      max_duty=min_on_time / T,
                      min_on_time=min_on_time * (1 - _ON_TIME_MARGIN), pulse_skipping=True)
    base = steady_base(scenario)
    return dataclasses.replace(base, control=control,
                               run=RunSettings(cycles=int(cycles), summary_cycles=_MIN_WINDOW))


def pulse_skipping_steady_state(scenario, *, min_on_time=None, threshold=None,
                                max_periods: int = 400_000, block: int = 50_000):
    """Periodic orbit of pulse skipping at the clock: pattern, frequency, ripple, efficiency.

    Parameters
    ----------
    scenario : Scenario
        A stage with diode emulation or an asynchronous one (forced PWM is
        refused); its clock is ``switching.frequency``, its controller is
        replaced by the clocked comparator (:func:`pulse_skipping_scenario`).
    min_on_time : float, optional
        The pulse [s]; default ``control.min_on_time``.
    threshold : float, optional
        Output threshold [V]; default ``control.reference``, else the mean
        output of the scenario's own settled operating point.
    max_periods : int
        Clock periods to simulate at most before giving up on a repeat (a
        stage with node capacitance runs some 1e4 to 1e5 periods a second).
    block : int
        Clock periods per simulated block (memory: about 4 segments each);
        patterns up to ``block / 4`` periods long are found.

    Returns
    -------
    SkipResult
        Warns (UserWarning) when the effective switching frequency is in the
        audible band (< 20 kHz, common practice).

    Raises
    ------
    ScenarioError
        Forced PWM, a load that draws no current, a minimum on-time not > 0 or
        not fitting the clock period, a threshold outside (0, Vin).

    Notes
    -----
    First, the stage with a pulse at every clock edge (open loop, duty
    ``t_min / T``): when its periodic output at the edge is below ``V_th``
    the comparator never skips (status 2). Otherwise the closed loop is
    simulated exactly from ``iL = 0``, ``vC = V_th`` in blocks. When the
    second half of a block repeats a pulse pattern ``p`` of ``K`` clock
    periods (smallest such ``K``, prefix function), the stage under that
    fixed on-time schedule has one periodic state, ``x = F_p(x)`` over ``K``
    periods, found by Newton's method with a differenced Jacobian (each
    ``F_p`` is an exact open-loop run). It is the closed loop's orbit when the
    closed loop started there reproduces ``p`` and returns to ``x`` within
    1e-9 of each state's range (checked over ``max(2, ceil(20/K))``
    patterns, the run reported). The fixed pattern's map contracts only
    weakly (a pulse's charge changes little with the output), so waiting for
    the states themselves to repeat would take many patterns; the pattern
    locks much sooner. The effective frequency is ``pulses / (K T)``; with
    ``I_o`` the load current and ``q`` one pulse's charge, charge balance
    makes it ``I_o / q`` whatever the pattern (derived).
    """
    require_scenario(scenario, "pulse_skipping_steady_state")
    check_light_strategy(scenario, "pulse skipping")
    for key, v, low in (("max_periods", max_periods, 3), ("block", block, 3)):
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            raise ScenarioError(key, f"must be a whole number >= {low}", v)
    t_min = _min_on_time(scenario, min_on_time)
    vth = light_threshold(scenario, threshold)
    load_current(scenario, vth)
    sc = pulse_skipping_scenario(scenario, t_min, vth, cycles=block)
    result = SkipResult(MODE_FOUND, "", min_on_time=t_min, threshold=vth,
                        clock_frequency=sc.switching.frequency)
    every = _every_clock(sc, t_min, vth)
    if every is not None:
        return _not_skipping(result, every)
    run, done, found = _search(sc, np.array([0.0, vth]), max_periods, block)
    if found is None:
        return _report(dataclasses.replace(result, periods_run=done), run, None)
    K, verified = found
    return _report(dataclasses.replace(result, periods_run=done + verified.duty.shape[0]),
                   verified, K)


def _search(sc, x0, max_periods, block):
    """Closed-loop blocks from ``x0`` until an orbit is found or the budget is spent:
    ``(last run, periods run, (K, verified run) or None)``."""
    from bucksim.simulation import simulate

    done, found = 0, None
    while done < max_periods and found is None:
        run = simulate(sc, x0=x0)
        done += block
        x0 = run.x_end
        found = _orbit_after(sc, run)
    return run, done, found


def _every_clock(sc, t_min, vth):
    """The periodic state with a pulse at every clock edge, when its output at the edge
    is below the threshold (the comparator then never skips); else None."""
    from bucksim.simulation import simulate_settled

    pwm = dataclasses.replace(sc, control=Control(mode="open-loop",
                                                  duty=t_min / sc.period))
    run = simulate_settled(pwm, cycles=_MIN_WINDOW)
    return run if float(run.at(0.0, "vo")[0]) < vth else None


def _not_skipping(result, run):
    return dataclasses.replace(result, status=MODE_NOT_AN_ORBIT, run=run, clocks=1,
                               pulses=1, pattern=(1,), pattern_frequency=1.0 / run.period,
                               switching_frequency=1.0 / run.period,
                               summary=run.summary(), message=(
        "not skipping: with a pulse at every clock edge the output stays below the "
        "threshold; the load is above what minimum on-time pulses carry"))


def pattern_period(pulses) -> int | None:
    """Smallest ``K`` with ``p[k] = p[k - K]`` over the whole sequence, when it repeats
    at least twice in it (the prefix function of Knuth, Morris and Pratt, SIAM J.
    Comput. 6(2), 1977); else None."""
    seq = [int(p) for p in pulses]
    n = len(seq)
    fail = [0] * n
    for i in range(1, n):
        k = fail[i - 1]
        while k and seq[i] != seq[k]:
            k = fail[k - 1]
        fail[i] = k + (seq[i] == seq[k])
    K = n - fail[-1] if n else 0
    return K if 0 < K <= n // 2 else None


def _orbit_after(sc, run):
    """``(K, verified run)`` when the block's second half repeats a pattern whose
    fixed-pattern periodic state the closed loop reproduces; else None."""
    from bucksim.simulation import simulate

    pulses, _ = clock_edges(run)
    n = pulses.shape[0]
    K = pattern_period(pulses[n // 2:])
    if K is None:
        return None
    schedule = pulses[n - K:] * (sc.control.max_duty * sc.period)
    x = _fixed_pattern_state(sc, schedule, run.x_end, np.max(np.abs(run.segments.x0), axis=0))
    if x is None:
        return None
    reps = max(2, math.ceil(_MIN_WINDOW / K))
    check = simulate(dataclasses.replace(sc, run=dataclasses.replace(
        sc.run, cycles=reps * K, summary_cycles=reps * K)), x0=x)
    again, _ = clock_edges(check)
    scale = np.max(np.abs(check.segments.x0), axis=0)
    same = np.array_equal(again, np.tile(pulses[n - K:], reps))
    back = np.all(np.abs(check.x_end - x) <= REPEAT_RTOL * scale)
    return (K, check) if same and back else None


def _fixed_pattern_state(sc, schedule, x0, scale, max_iter: int = 8):
    """Periodic state of the stage under a fixed on-time ``schedule`` (one per clock
    period) by Newton on the K-period map, Jacobian by forward differences; None when
    it does not converge."""
    from bucksim.engine.driver import build_table, integrate
    from bucksim.model.stage import Stage

    stage = Stage(sc)
    table = build_table(stage.matrices, sc.period)
    cache: dict = {}
    K = schedule.shape[0]

    def step(x):
        res = integrate(stage, x, on_times=schedule, table=table, n_cycles=K,
                        phase_cache=cache)
        return res.x_end if res.status == 0 else None

    scale = np.where(scale > 0, scale, 1.0)
    x = np.asarray(x0, dtype=float).copy()
    for _ in range(max_iter):
        fx = step(x)
        if fx is None:
            return None
        r = fx - x
        if np.all(np.abs(r) <= 1e-13 * scale):
            return x
        jac = np.empty((x.size, x.size))
        for i in range(x.size):
            h = 1e-7 * scale[i]
            xi = x.copy()
            xi[i] += h
            fi = step(xi)
            if fi is None:
                return None
            jac[:, i] = (fi - xi - r) / h
        x = x - np.linalg.solve(jac, r)
    last = step(x)
    return x if last is not None and np.all(np.abs(last - x) <= REPEAT_RTOL * scale) else None


def clock_edges(run):
    """Pulses (1/0) of each clock period and the states at the ``n + 1`` clock edges."""
    n = run.duty.shape[0]
    edges = run.at(np.minimum(np.arange(n + 1) * run.period, run.t_end))
    return (np.nan_to_num(run.duty) > 0).astype(np.int8), edges


def canonical_pattern(pulses) -> tuple:
    """The rotation of a cyclic pulse pattern that reads largest (longest run of pulses
    first), so one orbit gives one pattern wherever it was cut.

    Booth's least-rotation algorithm on the complement, O(K) (K. S. Booth,
    Inf. Process. Lett. 10(4-5), 1980).
    """
    s = [1 - int(p) for p in pulses]
    n = len(s)
    fail = [-1] * (2 * n)
    k = 0
    for j in range(1, 2 * n):
        c = s[j % n]
        i = fail[j - k - 1]
        while i != -1 and c != s[(k + i + 1) % n]:
            if c < s[(k + i + 1) % n]:
                k = j - i - 1
            i = fail[i]
        if c != s[(k + i + 1) % n]:     # here i == -1
            if c < s[k % n]:
                k = j
            fail[j - k] = -1
        else:
            fail[j - k] = i + 1
    return tuple(1 - v for v in s[k:] + s[:k])


def _report(result, run, K):
    """Pattern, frequencies and the summary over whole patterns (``K`` None: averages
    over the second half of the last block)."""
    pulses, _ = clock_edges(run)
    n = pulses.shape[0]
    T = run.period
    if K is None:
        status, window = MODE_NO_PERIOD, n // 2
    else:
        status, window = MODE_FOUND, K * math.ceil(_MIN_WINDOW / K)
    f_eff = float(pulses[n - window:].sum()) / (window * T)
    out = dataclasses.replace(result, status=status, switching_frequency=f_eff, run=run,
                              summary=run.summary(cycles=int(window)))
    if K is not None:
        pattern = canonical_pattern(pulses[n - K:])
        out = dataclasses.replace(out, pattern=pattern, clocks=K, pulses=int(sum(pattern)),
                                  pattern_frequency=1.0 / (K * T))
        message = (f"orbit of {out.pulses} pulses in {K} clock periods after "
                   f"{out.periods_run} periods: {f_eff:.6g} pulses/s")
    else:
        message = (f"no repeating pattern within {out.periods_run} clock periods (the "
                   f"figures are over the last {window} periods: averages)")
    audible = warn_if_audible(f_eff, "pulse skipping")
    return dataclasses.replace(out, audible=audible, message=message)
