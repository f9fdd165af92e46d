"""The light-load controllers' rows of :func:`bucksim.compare`: PFM below the clock's rate,
pulse skipping while minimum on-time pulses carry more than the load, fixed-frequency
diode emulation above either.
"""

from __future__ import annotations

from bucksim.errors import ScenarioError
from bucksim.model.units import parse_quantity
from bucksim.studies.levels import with_level


def pfm_pulse(pfm):
    """The ``pfm`` argument of :func:`compare` as keyword arguments, or None."""
    if pfm is None:
        return None
    if not isinstance(pfm, dict) or len(pfm) != 1 or not set(pfm) <= {"peak_current",
                                                                       "on_time"}:
        raise ScenarioError("pfm", "must be {'peak_current': A} or {'on_time': s}", pfm)
    (key, value), = pfm.items()
    return {key: parse_quantity(value, "A" if key == "peak_current" else "s", f"pfm.{key}")}


def pfm_point(scenario, level, threshold, pulse):
    """The light-load controller at ``level``: PFM on the diode-emulation stage
    ``scenario`` (one pulse, ``pulse`` the keyword arguments of
    :func:`~bucksim.studies.light_modes.pfm_steady_state`, idle until the output falls
    to ``threshold`` [V]) while its pulses come slower than the clock.

    Returns ``(result, fixed)``: the :class:`~bucksim.studies.light_modes.PfmResult`,
    and True where the controller runs fixed-frequency diode emulation instead:
    PFM's pulse rate would reach the PWM clock, or no PFM period closes for a heavy
    load, or no idle interval is left between the pulses (a controller leaves PFM
    where its pulse rate reaches the clock: common practice). The audible-band
    warning is left to the row (``light_mode``).
    """
    import warnings

    from bucksim.studies.light_modes import pfm_steady_state

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        res = pfm_steady_state(with_level(scenario, level), threshold=threshold, **pulse)
    fast = res.success and res.switching_frequency >= scenario.switching.frequency
    return res, res.too_heavy or fast


def skip_pulse(pulse_skipping):
    """The ``pulse_skipping`` argument of :func:`compare` (``{"min_on_time": s}``) as the
    minimum on-time [s], or None."""
    if pulse_skipping is None:
        return None
    if not isinstance(pulse_skipping, dict) or set(pulse_skipping) != {"min_on_time"}:
        raise ScenarioError("pulse_skipping", "must be {'min_on_time': s}", pulse_skipping)
    return parse_quantity(pulse_skipping["min_on_time"], "s", "pulse_skipping.min_on_time")


#: Clock periods a compare point of pulse skipping simulates at most, and per block:
#: a pattern that has not repeated by then is reported by its averages over the last
#: half block (a light load's pattern can be quasi-periodic).
SKIP_PERIODS, SKIP_BLOCK = 20_000, 5_000


def skip_point(scenario, level, threshold, min_on_time):
    """Pulse skipping at ``level`` on the diode-emulation stage ``scenario``: pulses of
    ``min_on_time`` [s] at the clock edges where the output is below ``threshold`` [V]
    (:func:`~bucksim.studies.pulse_skipping.pulse_skipping_steady_state`).

    Returns ``(result, fixed)``: the :class:`~bucksim.studies.pulse_skipping.SkipResult`,
    and True where the controller runs fixed-frequency diode emulation instead: a pulse
    at every clock edge leaves the output below the threshold (the load needs more than
    minimum on-time pulses; the loop then sets the duty, common practice).
    """
    import warnings

    from bucksim.studies.light_modes import MODE_NOT_AN_ORBIT
    from bucksim.studies.pulse_skipping import pulse_skipping_steady_state

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        res = pulse_skipping_steady_state(with_level(scenario, level), min_on_time=min_on_time,
                                          threshold=threshold, max_periods=SKIP_PERIODS,
                                          block=SKIP_BLOCK)
    return res, res.status == MODE_NOT_AN_ORBIT


def pfm_range(scenario, peak_current: float, threshold: float) -> dict:
    """The heaviest load [A] at which PFM with pulses of ``peak_current`` [A] still runs
    below the clock, in closed form, and the exact stage's pulse rate there.

    Parameters
    ----------
    scenario : Scenario
        A diode-emulation or asynchronous stage (its clock: ``switching.frequency``).
    peak_current : float
        The pulses' peak current [A].
    threshold : float
        The output threshold (the regulated voltage) [V].

    Returns
    -------
    dict
        ``closed_form`` [A]: ``Io = 0.5 I_pk (t_on + t_off) fs`` with ``t_on = L I_pk /
        (Vin - Vo)``, ``t_off = L I_pk / Vo`` (charge balance of the lossless stage,
        derived: a pulse delivers ``0.5 I_pk (t_on + t_off)``, ``fs`` of them a second);
        ``frequency`` [Hz]: the exact PFM state's pulse rate at that load (None when
        PFM has no state there; ``note`` says why). Not solved for the load where the
        rate meets the clock: with a ringing node the threshold crossing can move by a
        ring period between neighbouring loads (an unfiltered comparator sees the
        ring through the ESR), so the rate need not be continuous in the load.
    """
    import warnings

    from bucksim.studies.levels import LoadLevel
    from bucksim.studies.light_modes import pfm_steady_state

    L = scenario.inductor.inductance
    vin, vo, fs = scenario.supply.voltage, threshold, scenario.switching.frequency
    ipk = float(peak_current)
    closed = 0.5 * ipk * (L * ipk / (vin - vo) + L * ipk / vo) * fs

    def rate_at(io):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            res = pfm_steady_state(with_level(scenario, LoadLevel("current", io)),
                                   peak_current=ipk, threshold=threshold)
        return res.switching_frequency if res.success else None, res.message

    rate, why = rate_at(closed)
    return {"closed_form": closed, "frequency": rate, "note": why if rate is None else ""}


def skip_range(scenario, min_on_time: float, threshold: float) -> dict:
    """The heaviest load [A] at which pulse skipping with pulses of ``min_on_time`` [s]
    still skips clock edges: in closed form, and on the exact stage.

    Parameters
    ----------
    scenario : Scenario
        A diode-emulation or asynchronous stage (its clock: ``switching.frequency``).
    min_on_time : float
        The pulse [s].
    threshold : float
        The output threshold (the regulated voltage) [V].

    Returns
    -------
    dict
        ``closed_form`` [A]: ``Io = 0.5 Ip (t_min + L Ip / Vo) fs`` with ``Ip = (Vin -
        Vo) t_min / L`` (a pulse at every edge, charge balance of the lossless stage,
        derived); ``exact`` [A]: the load current at which the stage with a pulse at
        every clock edge (open loop, duty ``t_min / T``) sits at the threshold at the
        edge, where the comparator samples it (above it every edge pulses); found by
        Brent's method on the periodic steady state, to 1e-6 of the load (None when no
        bracket is found within 1/8 .. 8 times the closed form; ``note`` says why).
    """
    import dataclasses

    from scipy.optimize import brentq

    from bucksim.model.parts import Control
    from bucksim.simulation import simulate_settled
    from bucksim.studies.levels import LoadLevel

    L = scenario.inductor.inductance
    vin, vo, fs = scenario.supply.voltage, threshold, scenario.switching.frequency
    ip = (vin - vo) * min_on_time / L
    closed = 0.5 * ip * (min_on_time + L * ip / vo) * fs
    every = dataclasses.replace(scenario, control=Control(mode="open-loop",
                                                          duty=min_on_time * fs))

    def margin(io):
        run = simulate_settled(with_level(every, LoadLevel("current", io)), cycles=1)
        return float(run.at(0.0, "vo")[0]) - threshold

    lo, hi = closed / 8.0, closed * 8.0
    if not margin(lo) > 0.0 > margin(hi):
        return {"closed_form": closed, "exact": None,
                "note": "no load between 1/8 and 8 times the closed form puts the output at "
                        "the threshold with a pulse at every clock edge"}
    exact = brentq(margin, lo, hi, xtol=1e-9 * closed, rtol=1e-6)
    return {"closed_form": closed, "exact": float(exact), "note": ""}
