"""PFM in periodic steady state: one pulse, then idle until the output falls to a threshold.

A PFM controller fires one pulse when the output falls to its threshold: the
high side conducts until the inductor current reaches a peak (or for a fixed
on-time), the low side (diode emulation) or the freewheel diode carries the
current back to zero, and the stage then idles until the output is back at
the threshold, which starts the next pulse. The period is therefore not a
setting but an unknown, closed by the threshold crossing.

:func:`pfm_steady_state` finds that period by shooting on a period of unknown
length. For a candidate period ``T`` and on-time ``t_on`` the stage is the
open-loop stage at frequency ``1/T`` and duty ``t_on/T``; its exact periodic
steady state (:func:`bucksim.simulation.simulate_settled`) is one PFM period
if ``iL(t_on) = I_pk`` (fixed peak current) and ``vo(0) = V_th``. Both are
solved by safeguarded root finding (Brent's method on a bracket [1]_, the
period nested inside the on-time; the lossless charge balance [2]_ starts the
bracket), and the solution is then checked: the current
must return to zero (an idle interval exists) and the output must stay above
the threshold over the idle interval, else the controller would have started
the next pulse sooner and the orbit is not one it runs.

The helpers here (threshold default, input checks, the audible-band warning)
are shared with :mod:`bucksim.studies.pulse_skipping`.

References
----------
.. [1] R. P. Brent, *Algorithms for Minimization without Derivatives*,
   Prentice-Hall, 1973, ch. 4 (the bracketed root finder, as
   :func:`scipy.optimize.brentq`).
.. [2] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 2 (inductor volt-second and capacitor charge
   balance) and ch. 5 (the discontinuous conduction mode).
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from dataclasses import dataclass

import numpy as np

from bucksim.errors import ScenarioError, SimulationError
from bucksim.model.conduction import CONDUCTION_NAMES
from bucksim.model.parts import Control, RunSettings
from bucksim.model.scenario import locate_in, require_scenario

#: Below this frequency [Hz] a switching converter can be heard: its
#: inductor and ceramic capacitors turn the pulses into sound (20 Hz to
#: 20 kHz audible band, common practice).
AUDIBLE_LIMIT = 20e3

#: Result codes of the light-load modes (``success`` is ``status == 0``).
MODE_FOUND = 0
MODE_NO_PERIOD = 1        # no period closes: the load is outside the mode's range
MODE_NOT_AN_ORBIT = 2     # the periodic state fails the mode's own rule (checked)
MODE_SOLVER_FAILED = 3           # a steady-state solve failed

#: Conduction states of the idle interval (no switch conducts; the node open).
_IDLE_STATES = tuple(CONDUCTION_NAMES.index(n) for n in ("idle", "open"))
#: The pulse's freewheel: the low side or its diode carries the current back to zero.
_FREEWHEEL_STATES = tuple(CONDUCTION_NAMES.index(n) for n in ("low", "low-diode"))
#: Geometric step of the bracket search, and how far it may go [factor of the guess].
_GROW, _REACH = 1.6, 1e4


# ----------------------------------------------------------------------------- shared helpers

def _refuse(scenario, key, expected, value):
    return locate_in(scenario, ScenarioError(key, expected, value))


def check_light_strategy(scenario, mode: str):
    """Refuse forced PWM: its low side stays on, the current reverses and the stage
    never idles, so neither PFM nor pulse skipping can run."""
    strategy = scenario.switching.strategy
    if strategy == "forced-pwm":
        raise _refuse(scenario, "switching.strategy", f"must be 'diode-emulation' or "
                      f"'asynchronous' for {mode} (in forced PWM the low side stays on and "
                      f"the current reverses, so the stage never idles)", strategy)


def _positive_number(key, value, unit):
    ok = (isinstance(value, (int, float, np.floating, np.integer))
          and not isinstance(value, bool) and math.isfinite(value) and value > 0)
    if not ok:
        raise ScenarioError(key, f"must be a finite number > 0 {unit}", value)
    return float(value)


def light_threshold(scenario, threshold):
    """The output threshold [V]: ``threshold``, else ``control.reference``, else the mean
    output of the scenario's own settled operating point. Refused outside (0, Vin)."""
    if threshold is None:
        if scenario.control.reference is not None:
            return float(scenario.control.reference)
        from bucksim.simulation import simulate_settled
        return float(simulate_settled(scenario, cycles=1).summary().output_voltage.mean)
    vin = scenario.supply.voltage
    value = _positive_number("threshold", threshold, "V")
    if value >= vin:
        raise ScenarioError("threshold", f"must be an output voltage below the supply "
                            f"voltage ({vin:g} V)", threshold)
    return value


def load_current(scenario, vo: float) -> float:
    """Load current [A] at output ``vo`` [V]; refused when the load draws none (the
    output would never fall to the threshold)."""
    load = scenario.load
    r = load.resistance
    io = load.current + (0.0 if r is None or r == math.inf else vo / r)
    if not io > 0:
        raise _refuse(scenario, "load", "must draw current from the output (a resistance or "
                      "a current > 0 A): without a load the output never falls to the "
                      "threshold and no light-load period closes", io)
    return io


def warn_if_audible(frequency: float, mode: str) -> bool:
    """True, with a UserWarning, when ``frequency`` [Hz] is below :data:`AUDIBLE_LIMIT`."""
    audible = bool(frequency < AUDIBLE_LIMIT)
    if audible:
        warnings.warn(f"{mode}: the switching frequency {frequency:.4g} Hz is in the audible "
                      f"band (below {AUDIBLE_LIMIT:.0f} Hz): the inductor and ceramic "
                      f"capacitors may be heard", UserWarning, stacklevel=3)
    return audible


def steady_base(scenario):
    """The scenario at its t = 0 level, with no steps and no soft-start."""
    rep = dataclasses.replace
    return rep(scenario, supply=rep(scenario.supply, steps=()),
               load=rep(scenario.load, steps=()),
               control=rep(scenario.control, soft_start=0.0))


# ----------------------------------------------------------------------------- PFM

class ModeResult:
    """What the light-load results share: ``success`` (``status == 0``), and the
    output's ripple [V] and the efficiency read from their ``summary`` (NaN without
    one)."""

    @property
    def success(self) -> bool:
        return self.status == MODE_FOUND

    @property
    def output_ripple(self) -> float:
        """Peak-to-peak output voltage over the orbit [V] (NaN without a solution)."""
        return math.nan if self.summary is None else self.summary.output_voltage.ripple

    @property
    def efficiency(self) -> float:
        return math.nan if self.summary is None else self.summary.efficiency


@dataclass
class PfmResult(ModeResult):
    """The periodic steady state of PFM (:func:`pfm_steady_state`), scipy manners.

    Attributes
    ----------
    status : int
        0 found; 1 no period closes (the load is outside the mode's range);
        2 the periodic state fails the PFM rule (no idle interval, or the
        output below the threshold during it); 3 a steady-state solve failed.
    message : str
    kind : str
        ``"peak-current"`` or ``"on-time"``: what the pulse is set by.
    switching_frequency, period : float
        Pulse frequency [Hz] and period [s] (NaN when none was found).
    on_time, peak_current : float
        High-side on-time [s] and the current at its end [A].
    threshold : float
        Output threshold [V] that closes the period.
    idle_start : float
        Start of the idle interval [s] from the pulse's start (NaN: none).
    audible : bool
        The frequency is below 20 kHz (a warning was issued).
    too_heavy : bool
        The load is above what these pulses carry (no period closes, or no idle
        interval is left): a controller hands over to fixed-frequency PWM there.
    run : Run or None
        One exact period from the periodic state (``run.steady_state`` holds it).
    summary : Summary or None
        Its summary: efficiency, losses, ``output_voltage.ripple``.
    evaluations : int
        Periodic steady states solved.
    """

    status: int
    message: str
    kind: str
    switching_frequency: float = math.nan
    period: float = math.nan
    on_time: float = math.nan
    peak_current: float = math.nan
    threshold: float = math.nan
    idle_start: float = math.nan
    audible: bool = False
    too_heavy: bool = False
    run: object = None
    summary: object = None
    evaluations: int = 0


class _NoRoot(Exception):
    """No sign change within the search's reach (a plain-words reason attached)."""


class _Shooter:
    """Periodic states of the open-loop stage at a candidate ``(T, t_on)``, counted;
    the last few are kept, as the root finders ask for a point again."""

    def __init__(self, scenario):
        self.base = steady_base(scenario)
        self.count = 0
        self.kept = {}

    def run(self, period, on_time):
        from bucksim.simulation import simulate_settled

        key = (float(period), float(on_time))
        if key in self.kept:
            return self.kept[key]
        rep = dataclasses.replace
        sc = rep(self.base, switching=rep(self.base.switching, frequency=1.0 / period),
                 control=Control(mode="open-loop", duty=on_time / period),
                 run=RunSettings(cycles=1, summary_cycles=1))
        self.count += 1
        if len(self.kept) >= 8:
            self.kept.pop(next(iter(self.kept)))
        self.kept[key] = simulate_settled(sc, cycles=1)
        return self.kept[key]


def _bracket(fun, guess, lo, hi, increasing):
    """``(a, fa, b, fb)`` around a sign change of the monotone ``fun``, searching
    geometrically from ``guess`` within ``[lo, hi]`` on the side its sign points to;
    :class:`_NoRoot` ``"up"`` or ``"down"`` when that side has none."""
    x = min(max(guess, lo), hi)
    fx = fun(x)
    if fx == 0.0:
        return x, fx, x, fx
    up = (fx < 0) == increasing
    while True:
        y = min(x * _GROW, hi) if up else max(x / _GROW, lo)
        if y == x:
            raise _NoRoot("up" if up else "down")
        fy = fun(y)
        if (fy > 0) != (fx > 0) or fy == 0.0:
            return (x, fx, y, fy) if x < y else (y, fy, x, fx)
        x, fx = y, fy


def _brent(fun, guess, lo, hi, rtol, increasing):
    from scipy.optimize import brentq

    a, fa, b, fb = _bracket(fun, guess, lo, hi, increasing)
    if a == b:
        return a
    memo = {a: fa, b: fb}
    return brentq(lambda x: memo[x] if x in memo else fun(x), a, b, xtol=rtol * a,
                  rtol=max(rtol, 4 * np.finfo(float).eps), maxiter=100)


def _pulse_fits(scenario, period):
    tf, tr = scenario.switching.dead_time
    sync = scenario.switching.strategy != "asynchronous"
    return period * (1 - 1e-9) - (tf + tr if sync else 0.0)


def pfm_steady_state(scenario, *, peak_current=None, on_time=None, threshold=None):
    """Periodic steady state of PFM: one pulse, then idle until the output falls back to
    the threshold.

    Parameters
    ----------
    scenario : Scenario
        A stage with diode emulation or an asynchronous one (forced PWM is
        refused); its controller is replaced by the PFM rule, its switching
        frequency and duty are not used.
    peak_current : float, optional
        The high side conducts until the inductor current reaches it [A].
    on_time : float, optional
        Or for this fixed time [s]. Give exactly one of the two.
    threshold : float, optional
        Output voltage [V] at which the next pulse starts; default
        ``control.reference``, else the mean output of the scenario's own
        settled operating point.

    Returns
    -------
    PfmResult
        With ``status``/``message``/``success``; warns (UserWarning) when the
        frequency is in the audible band (< 20 kHz, common practice).

    Raises
    ------
    ScenarioError
        Forced PWM, a load that draws no current, a peak current or on-time
        not > 0, both or neither of them given, a threshold outside (0, Vin).

    Notes
    -----
    Shooting on a period of unknown length, closed by the threshold
    crossing. With ``P(T, t_on)`` the open-loop stage's exact periodic state
    at period ``T`` and on-time ``t_on`` (pulse at ``t = 0``):

    .. math::

        i_L(t_{on}) = I_{pk}, \\qquad v_o(0) = V_{th}

    (the first only at fixed peak current). ``T`` is solved inside each
    evaluation of the first equation (along ``v_o(0) = V_th`` the peak grows
    with the on-time), both by Brent's method on a bracket
    grown geometrically from the lossless charge-balance estimate
    ``f = I_o / (I_{pk} (t_{on} + t_{off}) / 2)``,
    ``t_on = L I_pk / (V_in - V_o)``, ``t_off = L I_pk / V_o`` [2]_. At the
    solution, ``i_L`` must return to zero before ``T`` and
    ``min v_o >= V_th`` over the idle interval (exact extrema), which also
    makes ``v_o`` fall through ``V_th`` at ``T``; during the pulse itself the
    output may dip below the threshold (the current is still below the
    load's), which a PFM controller ignores while the pulse runs.
    """
    ipk, ton, vth, io = _pfm_inputs(scenario, peak_current, on_time, threshold)
    ton_guess, period_guess = _lossless_guess(scenario, ipk, ton, vth, io)
    result = PfmResult(MODE_FOUND, "", "on-time" if ipk is None else "peak-current",
                       threshold=vth)
    shooter = _Shooter(scenario)
    try:
        period, t_on = _solve_period(shooter, ipk, ton, ton_guess, vth, period_guess)
    except _NoRoot as exc:
        return _no_period(result, str(exc), shooter.count, io)
    except SimulationError as exc:
        return dataclasses.replace(result, status=MODE_SOLVER_FAILED, evaluations=shooter.count,
                                   message=f"a periodic steady state was not found: {exc}")
    run = shooter.run(period, t_on)
    return _checked(result, run, period, t_on, shooter.count)


def _lossless_guess(scenario, ipk, ton, vth, io):
    """``(t_on, T)`` of the lossless stage by charge balance (the bracket's start):
    ``t_on = L I_pk / (Vin - Vo)``, ``t_off = L I_pk / Vo``, ``T = I_pk (t_on +
    t_off) / (2 I_o)``, at least 1.2 pulses."""
    vin, L = scenario.supply.voltage, scenario.inductor.inductance
    ipk_guess = (vin - vth) * ton / L if ipk is None else ipk
    ton_guess = L * ipk_guess / (vin - vth) if ton is None else ton
    pulse = ton_guess + L * ipk_guess / vth
    return ton_guess, max(pulse / (2 * io / ipk_guess), 1.2 * pulse)


def _pfm_inputs(scenario, peak_current, on_time, threshold):
    """``(I_pk or None, t_on or None, V_th, I_o)``, each checked (Raises of
    :func:`pfm_steady_state`)."""
    require_scenario(scenario, "pfm_steady_state")
    check_light_strategy(scenario, "PFM")
    if (peak_current is None) == (on_time is None):
        raise ScenarioError("peak_current", "give exactly one of peak_current [A] or "
                            "on_time [s]", {"peak_current": peak_current, "on_time": on_time})
    ipk = None if peak_current is None else _positive_number("peak_current", peak_current, "A")
    ton = None if on_time is None else _positive_number("on_time", on_time, "s")
    vth = light_threshold(scenario, threshold)
    return ipk, ton, vth, load_current(scenario, vth)


def _solve_period(shooter, ipk, ton, ton_guess, vth, period_guess):
    """``(T, t_on)`` with ``vo(0) = vth`` (and ``iL(t_on) = ipk``); see Notes above.

    The period is solved for each on-time, and the on-time (fixed peak) outside it:
    along ``vo(0) = vth`` the output is pinned, so ``iL(t_on)`` grows with ``t_on``,
    whereas at a fixed period the open-loop output climbs with the on-time and
    ``iL(t_on)`` need not reach the peak at all.
    """
    guess = {"ton": ton_guess, "T": period_guess}
    dead = sum(shooter.base.switching.dead_time)

    def period_for(t_on):
        def above(period):
            return float(shooter.run(period, t_on).at(0.0, "vo")[0]) - vth
        start = guess["T"] * (t_on / guess["ton"]) ** 2   # pulse charge ~ t_on^2
        shortest = 1.0001 * (t_on + dead)
        try:
            period = _brent(above, max(start, 1.2 * shortest), shortest, start * _REACH,
                            1e-11, increasing=False)
        except _NoRoot as exc:
            raise _NoRoot("light" if str(exc) == "up" else "heavy") from None
        guess.update(ton=t_on, T=period)
        return period

    if ton is not None:
        return period_for(ton), ton

    def excess(t_on):
        period = period_for(t_on)
        return float(shooter.run(period, t_on).at(t_on)[0, 0]) - ipk
    t_on = _brent(excess, ton_guess, 1e-3 * ton_guess, 1e3 * ton_guess, 1e-12,
                  increasing=True)
    return period_for(t_on), t_on


def _no_period(result, side, count, io):
    if side == "light":
        why = ("the output stays above the threshold even with a period 1e4 times the "
               f"charge-balance estimate: the load ({io:.4g} A) is too light for these pulses")
    else:
        why = ("even back-to-back pulses leave the output below the threshold: the load "
               f"({io:.4g} A) is above what PFM with these pulses can carry")
    return dataclasses.replace(result, status=MODE_NO_PERIOD, evaluations=count,
                               too_heavy=side != "light", message=f"no PFM period closes: {why}")


def _checked(result, run, period, t_on, count):
    """The result at the solution, after the PFM rule's checks (idle, threshold)."""
    seg = run.segments
    vth = result.threshold
    peak = float(run.at(t_on)[0, 0])
    # the idle interval follows the freewheel: the open node of the dead time right
    # after the pulse is the swing to the low clamp, not idling
    after = seg.t0 >= t_on
    freewheel = np.flatnonzero(np.isin(seg.conduction, _FREEWHEEL_STATES) & after)
    if freewheel.size:
        after &= np.arange(len(seg)) > freewheel[0]
    idle = np.flatnonzero(np.isin(seg.conduction, _IDLE_STATES) & after)
    out = dataclasses.replace(result, period=period, switching_frequency=1.0 / period,
                              on_time=t_on, peak_current=peak, run=run, evaluations=count,
                              summary=run.summary(cycles=1))
    if idle.size == 0:
        return dataclasses.replace(out, status=MODE_NOT_AN_ORBIT, too_heavy=True, message=(
            "no idle interval: the current does not return to zero before the next pulse "
            "(continuous conduction); the load is too heavy for PFM with these pulses"))
    from bucksim.analysis.extrema import extrema

    first = int(idle[0])
    pieces = np.arange(first, len(seg))
    low, _ = extrema(run, "vo", pieces, np.zeros(pieces.size), seg.dt[pieces])
    out = dataclasses.replace(out, idle_start=float(seg.t0[first]))
    if low < vth * (1 - 1e-9):
        ring = (" (the switch node rings through the idle interval: its current through the "
                "capacitor's ESR carries the output below the threshold on a ring lobe)"
                if np.any(seg.conduction[pieces] == CONDUCTION_NAMES.index("open")) else "")
        return dataclasses.replace(out, status=MODE_NOT_AN_ORBIT, message=(
            f"the output falls to {low:.9g} V during the idle interval, below the threshold "
            f"{vth:.9g} V, before the period closes{ring}: the controller would start the "
            f"next pulse sooner, so this periodic state is not a PFM orbit"))
    audible = warn_if_audible(out.switching_frequency, "PFM")
    return dataclasses.replace(out, audible=audible, message=(
        f"PFM period found: {out.switching_frequency:.6g} Hz, on-time {t_on:.6g} s, peak "
        f"{peak:.6g} A ({count} periodic states solved)"))
