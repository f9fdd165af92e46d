"""The parts of a buck power stage, as plain validated dataclasses.

All values are SI base units (V, A, ohm, H, F, s, Hz, C, J). Each class checks
its own values on construction and raises :class:`~bucksim.errors.ScenarioError`
naming the dotted scenario key, so a scenario built in Python fails the same
way as one read from a file.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from bucksim.errors import ScenarioError
from bucksim.model.capacitance import CapacitanceTable, is_positive
from bucksim.model.checks import finite, non_negative, positive
from bucksim.model.drive_parts import Controller, GateResistance, check_drive
from bucksim.model.input_parts import InputCapacitor, InputFilter, check_input_side
from bucksim.model.pulse_limits import check_pfm, fitted_on_time

STRATEGIES = ("asynchronous", "forced-pwm", "diode-emulation")
#: Readable name of each strategy, for tables and figures (and of the light-load mode
#: that ``compare`` evaluates beside them, PFM on the diode-emulation stage).
STRATEGY_NAMES = {"asynchronous": "asynchronous", "forced-pwm": "forced PWM",
                  "diode-emulation": "diode emulation", "pfm": "PFM",
                  "pulse-skipping": "pulse skipping"}
CONTROL_MODES = ("open-loop", "voltage-mode", "peak-current")
IMPLEMENTATIONS = ("digital", "analog")
START_MODES = ("rest", "steady-state")


_finite, _positive, _non_negative = finite, positive, non_negative


def _capacitance(key, value):
    """A number >= 0 [F] or a checked :class:`~bucksim.model.capacitance.CapacitanceTable`."""
    if not isinstance(value, CapacitanceTable):
        _non_negative(key, value, "F")


def _choice(key, value, choices):
    if value not in choices:
        raise ScenarioError(key, "must be one of " + ", ".join(repr(c) for c in choices), value)


def _step_times(key, steps):
    last = -math.inf
    for i, step in enumerate(steps):
        _non_negative(f"{key}[{i}].time", step.time, "s")
        if step.time <= last:
            raise ScenarioError(f"{key}[{i}].time", "must be later than the previous step",
                                step.time)
        last = step.time


@dataclass(frozen=True)
class SupplyStep:
    """Input voltage changes to ``voltage`` [V] at ``time`` [s]."""

    time: float
    voltage: float


@dataclass(frozen=True)
class Supply:
    """Input supply: ideal source ``voltage`` [V] behind ``resistance`` [ohm] and
    ``inductance`` [H] (the source's or the cable's; needs an input capacitor)."""

    voltage: float
    resistance: float = 0.0
    steps: tuple[SupplyStep, ...] = ()
    inductance: float = 0.0

    def __post_init__(self):
        _positive("supply.voltage", self.voltage, "V")
        _non_negative("supply.resistance", self.resistance, "ohm")
        _non_negative("supply.inductance", self.inductance, "H")
        _step_times("supply.steps", self.steps)
        for i, s in enumerate(self.steps):
            _positive(f"supply.steps[{i}].voltage", s.voltage, "V")


@dataclass(frozen=True)
class Switching:
    """Switching frequency [Hz], strategy, and dead times [s].

    ``dead_time = (falling, rising)``: ``falling`` follows high-side turn-off,
    ``rising`` precedes high-side turn-on. Dead times apply to synchronous
    stages only; an asynchronous stage has no low-side gate.
    ``node_resistance`` [ohm] is the series resistance of the switch node's
    capacitance (the parts' ``coss`` ESR and the loop's resistance): it damps
    the dead-time swings and the DCM ring while the node is open.
    """

    frequency: float
    strategy: str
    dead_time: tuple[float, float] = (0.0, 0.0)
    node_resistance: float = 0.0

    def __post_init__(self):
        _positive("switching.frequency", self.frequency, "Hz")
        _choice("switching.strategy", self.strategy, STRATEGIES)
        if len(self.dead_time) != 2:
            raise ScenarioError("switching.dead_time", "must be [falling, rising] in s",
                                self.dead_time)
        for i, td in enumerate(self.dead_time):
            _non_negative(f"switching.dead_time[{i}]", td, "s")
        _non_negative("switching.node_resistance", self.node_resistance, "ohm")

    @property
    def period(self):
        """Switching period [s]."""
        return 1.0 / self.frequency


@dataclass(frozen=True)
class CoreLoss:
    """Core-loss data for the improved Generalized Steinmetz Equation.

    Parameters: ``k`` [W/m^3 per (T^beta Hz^alpha)], ``alpha`` (frequency
    exponent), ``beta`` (flux-density exponent), ``volume`` [m^3],
    ``turns``, ``area`` (effective core cross-section) [m^2].
    """

    k: float
    alpha: float
    beta: float
    volume: float
    turns: float
    area: float

    def __post_init__(self):
        _positive("inductor.core.k", self.k, "W/m^3")
        _positive("inductor.core.alpha", self.alpha, "(dimensionless)")
        _positive("inductor.core.beta", self.beta, "(dimensionless)")
        _positive("inductor.core.volume", self.volume, "m^3")
        _positive("inductor.core.turns", self.turns, "turns")
        _positive("inductor.core.area", self.area, "m^2")


@dataclass(frozen=True)
class Inductor:
    """Power inductor: ``inductance`` [H], winding resistance ``dcr`` [ohm]."""

    inductance: float
    dcr: float = 0.0
    core: CoreLoss | None = None

    def __post_init__(self):
        _positive("inductor.inductance", self.inductance, "H")
        _non_negative("inductor.dcr", self.dcr, "ohm")


@dataclass(frozen=True)
class Capacitor:
    """Output capacitor: ``capacitance`` [F], series resistance ``esr`` [ohm]."""

    capacitance: float
    esr: float = 0.0

    def __post_init__(self):
        _positive("output_capacitor.capacitance", self.capacitance, "F")
        _non_negative("output_capacitor.esr", self.esr, "ohm")


@dataclass(frozen=True)
class Diode:
    """Diode as a forward drop ``vf`` [V] plus series ``r`` [ohm].

    ``qrr`` [C] is the reverse-recovery charge drawn when the diode is forced
    off by the opposite switch. ``tau`` [s] (the charge-control lifetime)
    turns on the stored-charge model ``dq/dt = i_F - q / tau``;
    ``qrr_current`` [A] is the forward current at which a stated ``qrr`` was
    measured (after long conduction). The keys combine as follows
    (:func:`bucksim.analysis.recovery.recovery_parameters`):

    - ``qrr`` alone: a fixed charge per forced recovery;
    - ``qrr`` and ``qrr_current``: ``tau = qrr / qrr_current``, all the stored
      charge is swept out (``k = 1``);
    - ``tau`` alone: ``k = 1``;
    - ``tau``, ``qrr`` and ``qrr_current``: the swept-out share
      ``k = qrr / (qrr_current tau)``, which must lie in (0, 1];
    - ``qrr_current`` without ``qrr``, or ``tau`` and ``qrr`` without
      ``qrr_current``: refused.

    ``cj`` [F] is the junction capacitance (a freewheel diode's share of the
    switch node's capacitance). ``section`` is the scenario key it came from
    (used in error messages only).
    """

    vf: float
    r: float = 0.0
    qrr: float = 0.0
    cj: float | CapacitanceTable = 0.0
    tau: float = 0.0
    qrr_current: float = 0.0
    section: str = field(default="low_side", compare=False, repr=False)

    def __post_init__(self):
        _non_negative(f"{self.section}.vf", self.vf, "V")
        _non_negative(f"{self.section}.r", self.r, "ohm")
        _non_negative(f"{self.section}.qrr", self.qrr, "C")
        _capacitance(f"{self.section}.cj", self.cj)
        _non_negative(f"{self.section}.tau", self.tau, "s")
        _non_negative(f"{self.section}.qrr_current", self.qrr_current, "A")
        self._check_recovery_keys()

    def _check_recovery_keys(self):
        """Refuse combinations of ``qrr``, ``tau`` and ``qrr_current`` that say nothing
        definite (see the class docstring)."""
        s = self.section
        if self.qrr_current > 0 and self.qrr == 0:
            raise ScenarioError(f"{s}.qrr_current", "is the forward current at which qrr was "
                                "measured: give qrr [C] with it, or leave qrr_current out",
                                self.qrr_current)
        if self.tau > 0 and self.qrr > 0 and self.qrr_current == 0:
            raise ScenarioError(f"{s}.qrr_current", "must be > 0 A when tau and qrr are both "
                                "given (the forward current at which qrr was measured); or "
                                "give tau alone, or qrr with qrr_current", self.qrr_current)
        # 1e-12: tau stated as exactly qrr / qrr_current must not fail on rounding
        if self.tau > 0 and self.qrr > self.qrr_current * self.tau * (1 + 1e-12):
            raise ScenarioError(f"{s}.tau", f"must be >= qrr / qrr_current = "
                                f"{self.qrr / self.qrr_current:.6g} s (the swept-out share "
                                "qrr / (qrr_current tau) must lie in (0, 1])", self.tau)


@dataclass(frozen=True)
class Mosfet:
    """MOSFET: channel ``rds_on`` [ohm], body diode, and switching-loss data.

    ``rise_time``/``fall_time`` [s] are the drain voltage-current overlap
    times, ``coss`` [F] the output capacitance (a number, or a
    :class:`~bucksim.model.capacitance.CapacitanceTable` against ``Vds``), ``qg`` [C] the total gate
    charge at ``gate_voltage`` [V], ``gate_resistance`` its gate loop's internal and
    external resistances. The body diode's ``qrr`` [C] is its reverse-recovery charge.
    """

    rds_on: float
    body_diode: Diode
    rise_time: float = 0.0
    fall_time: float = 0.0
    coss: float | CapacitanceTable = 0.0
    qg: float = 0.0
    gate_voltage: float = 0.0
    gate_resistance: GateResistance = GateResistance()
    section: str = field(default="high_side", compare=False, repr=False)

    def __post_init__(self):
        s = self.section
        _positive(f"{s}.rds_on", self.rds_on, "ohm")
        _non_negative(f"{s}.rise_time", self.rise_time, "s")
        _non_negative(f"{s}.fall_time", self.fall_time, "s")
        _capacitance(f"{s}.coss", self.coss)
        if is_positive(self.body_diode.cj):
            raise ScenarioError(f"{s}.body_diode.cj", "must be 0: a body diode's junction "
                                f"capacitance is part of the MOSFET's coss (give it as {s}.coss)",
                                self.body_diode.cj)
        _non_negative(f"{s}.qg", self.qg, "C")
        _non_negative(f"{s}.gate_voltage", self.gate_voltage, "V")


@dataclass(frozen=True)
class LoadStep:
    """At ``time`` [s] the load takes a new ``resistance`` [ohm] and/or
    ``current`` [A]; a field left ``None`` keeps its previous value."""

    time: float
    resistance: float | None = None
    current: float | None = None


@dataclass(frozen=True)
class Load:
    """Output load: a resistor [ohm] (``None`` or ``inf`` = none) in
    parallel with a constant-current sink [A]."""

    resistance: float | None = None
    current: float = 0.0
    steps: tuple[LoadStep, ...] = ()

    def __post_init__(self):
        if self.resistance is not None and self.resistance != math.inf:
            _positive("load.resistance", self.resistance, "ohm")
        _finite("load.current", self.current, "A")
        _step_times("load.steps", self.steps)
        for i, s in enumerate(self.steps):
            if s.resistance is None and s.current is None:
                raise ScenarioError(f"load.steps[{i}]", "must set resistance and/or current", s)
            if s.resistance is not None and s.resistance != math.inf:
                _positive(f"load.steps[{i}].resistance", s.resistance, "ohm")
            if s.current is not None:
                _finite(f"load.steps[{i}].current", s.current, "A")

    def levels(self):
        """Return ``[(time, conductance [S], current [A]), ...]`` from t = 0."""
        def g(r):
            return 0.0 if r is None or r == math.inf else 1.0 / r
        out = [(0.0, g(self.resistance), float(self.current))]
        r, i = self.resistance, self.current
        for s in self.steps:
            r = s.resistance if s.resistance is not None else r
            i = s.current if s.current is not None else i
            out.append((float(s.time), g(r), float(i)))
        return out


@dataclass(frozen=True)
class Control:
    """Controller settings.

    Open loop: ``duty`` (0 < duty < 1) with an optional linear ramp of the
    duty from 0 over ``soft_start`` [s].

    Closed loop (``voltage-mode``, ``peak-current``; see :mod:`bucksim.model.compensator`):
    ``reference`` [V] (ramped from 0 over ``soft_start``), ``sense_gain``
    (divider, V/V), ``compensator`` = ``{gain [1/s], zeros [Hz], poles [Hz]}``,
    ``ramp`` (PWM ramp peak-to-peak [V], voltage mode), ``current_sense`` (Ri
    [V/A]) and ``slope_compensation`` [V/s] (peak-current mode),
    ``current_limit`` [A] (cycle by cycle), ``max_duty``, ``min_on_time`` [s],
    ``pulse_skipping``, ``pfm_peak_current`` [A] (PFM at the clock:
    :mod:`bucksim.model.pulse_limits`), ``delay`` (computation delay, periods)
    and ``duty_bits`` (duty resolution; 0 = exact).

    ``implementation`` is ``"digital"`` (the compensator sampled once per
    period, Tustin-discretised) or ``"analog"`` (the compensator as extra
    linear states of the stage, the PWM or peak-current comparator crossing
    located on the exact solution; ``delay`` and ``duty_bits`` must be 0).
    """

    mode: str = "open-loop"
    duty: float | None = None
    soft_start: float = 0.0
    reference: float | None = None
    compensator: dict | None = None
    slope_compensation: float = 0.0
    sense_gain: float = 1.0
    ramp: float = 1.0
    current_sense: float = 0.0
    current_limit: float | None = None
    max_duty: float = 0.95
    min_on_time: float = 0.0
    pulse_skipping: bool = False
    pfm_peak_current: float = 0.0
    delay: int = 0
    duty_bits: int = 0
    implementation: str = "digital"

    def __post_init__(self):
        _choice("control.mode", self.mode, CONTROL_MODES)
        _choice("control.implementation", self.implementation, IMPLEMENTATIONS)
        _non_negative("control.soft_start", self.soft_start, "s")
        _positive("control.sense_gain", self.sense_gain, "V/V")
        _positive("control.ramp", self.ramp, "V")
        _non_negative("control.current_sense", self.current_sense, "V/A")
        if self.current_limit is not None:
            _positive("control.current_limit", self.current_limit, "A")
        _finite("control.max_duty", self.max_duty, "(fraction of the period)")
        if not 0.0 < self.max_duty <= 1.0:
            raise ScenarioError("control.max_duty", "must be inside (0, 1]", self.max_duty)
        _non_negative("control.min_on_time", self.min_on_time, "s")
        if not isinstance(self.pulse_skipping, bool):
            raise ScenarioError("control.pulse_skipping", "must be true or false",
                                self.pulse_skipping)
        for key, v, hi in (("delay", self.delay, 8), ("duty_bits", self.duty_bits, 24)):
            if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= hi:
                raise ScenarioError(f"control.{key}", f"must be an integer in [0, {hi}]", v)
            if v and self.implementation == "analog":
                raise ScenarioError(f"control.{key}", "must be 0 with implementation = "
                                    "'analog' (it describes a sampled controller)", v)
        if self.mode == "open-loop":
            if self.implementation != "digital":
                raise ScenarioError("control.implementation", "applies to closed-loop modes "
                                    "only; leave it out in open loop", self.implementation)
            if self.duty is None:
                raise ScenarioError("control.duty", "is required in open-loop mode (0 < duty < 1)")
            _finite("control.duty", self.duty, "(fraction of the period)")
            if not 0.0 < self.duty < 1.0:
                raise ScenarioError("control.duty", "must be inside (0, 1)", self.duty)
        else:
            if self.reference is None:
                raise ScenarioError("control.reference", f"is required in {self.mode} mode "
                                    "(output voltage set point in V)")
        if self.reference is not None:
            _positive("control.reference", self.reference, "V")
        _non_negative("control.slope_compensation", self.slope_compensation, "V/s")
        check_pfm(self)
        if self.mode == "peak-current" and self.current_sense <= 0:
            raise ScenarioError("control.current_sense", "is required in peak-current mode "
                                "(current-sense gain Ri > 0 V/A)", self.current_sense)
        if self.mode != "open-loop" and not isinstance(self.compensator, dict):
            raise ScenarioError("control.compensator", f"is required in {self.mode} mode: a "
                                "table {gain, zeros = [Hz...], poles = [Hz...]}",
                                self.compensator)
        if self.compensator is not None:
            from bucksim.model.compensator import compensator_tf
            compensator_tf(self.compensator)  # raises ScenarioError naming the sub-key


@dataclass(frozen=True)
class RunSettings:
    """How long to run and what to report.

    Give ``duration`` [s] or ``cycles`` (switching periods). ``start`` is
    ``"rest"`` (or ``"steady-state"``); ``initial_current`` [A] and
    ``initial_voltage`` [V] set the inductor current and capacitor voltage at
    t = 0 when starting from a given state. ``summary_cycles`` is the width of
    the summary window, in periods, at the end of the run.
    """

    duration: float | None = None
    cycles: int | None = None
    start: str = "rest"
    summary_cycles: int = 20
    initial_current: float = 0.0
    initial_voltage: float = 0.0

    def __post_init__(self):
        if (self.duration is None) == (self.cycles is None):
            raise ScenarioError("run", "must give exactly one of duration [s] or cycles",
                                {"duration": self.duration, "cycles": self.cycles})
        if self.duration is not None:
            _positive("run.duration", self.duration, "s")
        if self.cycles is not None and (not isinstance(self.cycles, int) or self.cycles < 1):
            raise ScenarioError("run.cycles", "must be an integer >= 1", self.cycles)
        _choice("run.start", self.start, START_MODES)
        if not isinstance(self.summary_cycles, int) or self.summary_cycles < 1:
            raise ScenarioError("run.summary_cycles", "must be an integer >= 1",
                                self.summary_cycles)
        _finite("run.initial_current", self.initial_current, "A")
        _finite("run.initial_voltage", self.initial_voltage, "V")


@dataclass(frozen=True)
class Scenario:
    """A complete buck power stage, its load, controller and run settings.

    ``low_side`` is a :class:`Mosfet` in the synchronous strategies and a
    :class:`Diode` in the asynchronous one. ``source`` is the file it was read
    from (if any) and ``text`` that file's contents.
    """

    title: str
    supply: Supply
    switching: Switching
    inductor: Inductor
    output_capacitor: Capacitor
    high_side: Mosfet
    low_side: Mosfet | Diode
    load: Load
    control: Control
    run: RunSettings
    input_capacitor: InputCapacitor | None = None
    input_filter: InputFilter | None = None
    controller: Controller = Controller()
    source: str | None = field(default=None, compare=False)
    text: str | None = field(default=None, compare=False, repr=False)

    def __post_init__(self):
        check_input_side(self.supply, self.input_capacitor, self.input_filter)
        check_drive(self.controller, [m for m in (self.high_side, self.low_side)
                                      if isinstance(m, Mosfet)],
                    min([self.supply.voltage] + [s.voltage for s in self.supply.steps]))
        T = self.switching.period
        sync = self.switching.strategy != "asynchronous"
        if sync and not isinstance(self.low_side, Mosfet):
            raise ScenarioError("low_side.device", f"must be \"mosfet\" for strategy "
                                f"{self.switching.strategy!r}", "diode")
        if not sync and not isinstance(self.low_side, Diode):
            raise ScenarioError("low_side.device", "must be \"diode\" for strategy 'asynchronous'",
                                "mosfet")
        tf, tr = self.switching.dead_time
        if sync and tf + tr >= T:
            raise ScenarioError("switching.dead_time", f"must fit in the period: falling + "
                                f"rising < T = {T:.6g} s", list(self.switching.dead_time))
        if self.control.mode == "open-loop" and sync:
            on = fitted_on_time(self.control, T, tf + tr)
            if on + tf + tr >= T:
                raise ScenarioError("switching.dead_time",
                                    f"must fit in the off-time: falling + rising < (1 - duty) T "
                                    f"= {T - on:.6g} s", list(self.switching.dead_time))

    @property
    def period(self):
        """Switching period [s]."""
        return self.switching.period

    @property
    def n_cycles(self):
        """Number of switching periods the run covers (rounded up)."""
        if self.run.cycles is not None:
            return self.run.cycles
        assert self.run.duration is not None  # RunSettings holds exactly one of the two
        return max(1, math.ceil(self.run.duration * self.switching.frequency - 1e-9))

    @property
    def duration(self):
        """Simulated time [s]."""
        if self.run.duration is not None:
            return self.run.duration
        return self.run.cycles * self.period
