"""The light-load controller's row of :func:`bucksim.compare`: PFM below the clock's rate,
fixed-frequency diode emulation above it.
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
    load (a controller leaves PFM where its pulse rate reaches the clock: common
    practice). The audible-band warning is left to the row (``light_mode``).
    """
    import warnings

    from bucksim.studies.light_modes import MODE_NO_PERIOD, pfm_steady_state

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        res = pfm_steady_state(with_level(scenario, level), threshold=threshold, **pulse)
    heavy = res.status == MODE_NO_PERIOD and "above what PFM" in res.message
    fast = res.success and res.switching_frequency >= scenario.switching.frequency
    return res, heavy or fast


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
