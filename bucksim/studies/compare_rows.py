"""The rows of :func:`bucksim.compare`: one strategy (or the light-load controller) at one
load, in periodic steady state, with its losses item by item.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

from bucksim.analysis.summary import Summary
from bucksim.errors import ScenarioError, SimulationError
from bucksim.model.parts import STRATEGY_NAMES
from bucksim.studies.levels import LoadLevel, periodic_run, with_level
from bucksim.studies.light_rows import pfm_point, skip_point
from bucksim.studies.regulate import regulated_point
from bucksim.studies.reverse import cycle_mean


def loss_items(summary, strategy: str) -> dict:
    """Loss items [W] of a summary (a :class:`~bucksim.analysis.summary.Summary` or its
    ``to_dict()``), keys of :data:`LOSS_ITEMS`; they add up to ``power.loss``
    (see :meth:`Summary.loss_items`)."""
    if not isinstance(summary, Summary):
        summary = Summary.from_dict(summary, strategy)
    elif summary.strategy != strategy:
        summary = dataclasses.replace(summary, strategy=strategy)
    return summary.loss_items()


@dataclass(frozen=True)
class Row:
    """One strategy at one load level, in steady state (SI units).

    ``losses`` maps each item of :data:`LOSS_ITEMS` present to its power [W].
    """

    strategy: str
    level: LoadLevel
    duty: float
    load_current: float
    output_voltage: float
    conduction_mode: str
    reverse_current: bool
    efficiency: float
    input_power: float
    output_power: float
    loss: float
    losses: dict
    energy_balance_error: float
    error: str | None = None
    #: Pulses per second [Hz] (the clock for the fixed-frequency strategies) and the
    #: output's peak-to-peak ripple [V].
    switching_frequency: float = math.nan
    output_ripple: float = math.nan
    #: The light-load rows only: ``"pfm"`` or ``"skip"`` (``"pfm-audible"``,
    #: ``"skip-audible"`` below 20 kHz) where the light-load mode ran, ``"pwm"`` where
    #: the controller ran fixed-frequency diode emulation instead.
    light_mode: str = ""

    @property
    def ok(self) -> bool:
        """True for an evaluated point; False when the point failed (see ``error``)."""
        return self.error is None

    @classmethod
    def failed(cls, strategy, level, error: str) -> Row:
        """A point that could not be evaluated: every metric NaN, ``error`` says why."""
        nan = math.nan
        return cls(strategy=strategy, level=level, duty=nan, load_current=nan,
                   output_voltage=nan, conduction_mode="", reverse_current=False, efficiency=nan,
                   input_power=nan, output_power=nan, loss=nan, losses={},
                   energy_balance_error=nan, error=str(error))

    def to_dict(self) -> dict:
        return {"strategy": self.strategy, "load": self.level.to_dict(), "error": self.error,
                "duty": self.duty,
                "load_current": self.load_current, "output_voltage": self.output_voltage,
                "conduction_mode": self.conduction_mode, "reverse_current": self.reverse_current,
                "switching_frequency": self.switching_frequency,
                "output_voltage_ripple": self.output_ripple, "light_mode": self.light_mode,
                "efficiency": self.efficiency,
                "power": {"input": self.input_power, "output": self.output_power,
                          "loss": self.loss},
                "losses": dict(self.losses),
                "energy_balance_error": self.energy_balance_error}


def _row(scenario, strategy, level, target, guess):
    sc = with_level(scenario, level)
    if target is None:
        _, run = periodic_run(sc)
    else:
        sc, _, run = regulated_point(sc, target, guess)
    return _row_of(strategy, level, sc.control.duty, run, run.summary(1),
                   sc.switching.frequency)


def _row_of(strategy, level, duty, run, s, frequency):
    p = s.power
    return Row(strategy=strategy, level=level, duty=duty,
               load_current=cycle_mean(run, "io"), output_voltage=s.output_voltage.mean,
               conduction_mode=s.conduction_mode, reverse_current=s.reverse_current,
               efficiency=s.efficiency, input_power=p.input, output_power=p.output,
               loss=p.input - p.output, losses=loss_items(s, strategy),
               energy_balance_error=float(s.energy_balance_error),
               switching_frequency=float(frequency), output_ripple=s.output_voltage.ripple)


#: The light-load rows: their mode word in ``light_mode`` and how a point is found.
LIGHT_MODES = {"pfm": "pfm", "pulse-skipping": "skip"}


def _light_row(mode, scenario, level, threshold, setting, fixed_row):
    """The ``mode`` row (``"pfm"``, ``"pulse-skipping"``): the light-load mode where it
    runs, else ``fixed_row()``, the fixed-frequency diode-emulation row
    (:func:`~bucksim.studies.light_rows.pfm_point`,
    :func:`~bucksim.studies.light_rows.skip_point`); ``light_mode`` says which."""
    if mode == "pfm":
        res, fixed = pfm_point(scenario, level, threshold, setting)
    else:
        res, fixed = skip_point(scenario, level, threshold, setting)
    if fixed:
        return dataclasses.replace(fixed_row(), strategy=mode, light_mode="pwm")
    # pulse skipping whose pattern did not repeat in the budget keeps its averages
    if not (res.success or (mode == "pulse-skipping" and res.summary is not None)):
        return Row.failed(mode, level, f"{STRATEGY_NAMES[mode]} at {level}: {res.message}")
    if mode == "pfm":
        duty = res.on_time / res.period
    else:   # the pulses' share of the clock periods, each min_on_time long
        duty = res.switching_frequency * res.min_on_time
    row = _row_of(mode, level, duty, res.run, res.summary, res.switching_frequency)
    word = LIGHT_MODES[mode]
    return dataclasses.replace(row, light_mode=f"{word}-audible" if res.audible else word)


# ----------------------------------------------------------------------------- profile


class RowMaker:
    """``self(strategy, levels)``: the rows of one strategy or light-load mode
    (``light``: ``{mode: (diode-emulation stage, threshold, setting)}``), each point
    evaluated once and shot from the previous level's duty; a point that fails keeps
    its reason."""

    def __init__(self, variants, target, light):
        self.variants, self.target, self.light, self.cache = variants, target, light, {}

    def fixed_row(self, lv):
        """The diode-emulation row at ``lv``, computed once (the light row's fallback)."""
        key = ("diode-emulation", lv.key, lv.value)
        if key not in self.cache:
            base = next(iter(self.light.values()))[0]
            self.cache[key] = _row(base, "diode-emulation", lv, self.target, None)
        return self.cache[key]

    def _one(self, strategy, lv, guess):
        if strategy in LIGHT_MODES:
            base, threshold, setting = self.light[strategy]
            return _light_row(strategy, base, lv, threshold, setting,
                              lambda: self.fixed_row(lv))
        return _row(self.variants[strategy], strategy, lv, self.target, guess)

    def __call__(self, strategy, lvls):
        out, guess = [], None
        for lv in lvls:
            key = (strategy, lv.key, lv.value)
            if key not in self.cache:
                try:
                    self.cache[key] = self._one(strategy, lv, guess)
                except (SimulationError, ScenarioError) as exc:
                    # one point without a steady state (or out of the duty's reach)
                    # must not hide the others: its row carries the reason
                    self.cache[key] = Row.failed(strategy, lv, f"{STRATEGY_NAMES[strategy]} "
                                                 f"at {lv}: {exc}")
            out.append(self.cache[key])
            if self.cache[key].ok:
                guess = self.cache[key].duty
        return tuple(out)
