"""The three switching strategies on the same parts, across load and over a load profile.

For one set of parts, :func:`compare` evaluates in periodic steady state

* the asynchronous stage: high-side MOSFET and a freewheel diode (by default
  the undriven low-side MOSFET's body diode, its ``coss`` kept on the node);
* forced PWM: synchronous, the low-side channel on for the whole off-time;
* diode emulation: synchronous, the low side turned off at zero current
  (switch realisations and DCM as in [1]_; why the choice matters at light
  and at heavy load: [2]_);

at each load level: efficiency and the loss of every device (conduction and
switching), the inductor (DCR, and core loss when the scenario gives core
data), the output capacitor (ESR) and the supply resistance.

By default the duty is trimmed so that the mean output voltage equals the
scenario's own (an ideal regulator): every strategy delivers the same power
to the same load; ``regulate=False`` keeps the scenario's duty.

A load profile (levels and the share of time the rail spends at each) gives
each strategy's energy-weighted efficiency ``sum(share P_out) / sum(share
P_in)`` and its energy lost per day, names the best strategy and the one
number that decides it. Load levels are written as in
:mod:`bucksim.studies.reverse` (``"0.3 A"``, ``"2 ohm"``).

References
----------
.. [1] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 4-5 (switch realisation, DCM). From memory.
.. [2] Diode emulation avoids forced PWM's circulating current at light load;
   at low output voltage and high current a freewheel diode's ``Vf Io (1-D)``
   is a large share of the output power: common practice.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import math
from dataclasses import dataclass

from bucksim.analysis.loss_items import LOSS_ITEMS
from bucksim.errors import ScenarioError
from bucksim.model.capacitance import as_plain
from bucksim.model.parts import STRATEGIES, STRATEGY_NAMES, Diode, Mosfet
from bucksim.model.scenario import DIODE_KEYS
from bucksim.model.units import format_si, parse_quantity
from bucksim.studies.compare_rows import Row, RowMaker, loss_items  # noqa: F401 (loss_items: public here)
from bucksim.studies.levels import (
    LoadLevel,
    load_kind,
    parse_level,
    parse_levels,
    periodic_run,
    require_open_loop,
    with_level,
)
from bucksim.studies.light_rows import pfm_pulse, skip_pulse
from bucksim.studies.profile import (
    ProfileResult,
    _profile_result,
    make_profile,
)
from bucksim.studies.reverse import CAUTION, cycle_mean
from bucksim.threads import single_blas_thread

# ----------------------------------------------------------------------------- strategies

def strategy_scenario(scenario, strategy: str, diode: Diode | None = None):
    """The scenario's parts run with ``strategy``.

    Synchronous strategies need a low-side MOSFET; the asynchronous one uses
    ``diode`` (its own ``cj``, ``tau``, ``qrr_current``), by default the
    scenario's freewheel diode or else the undriven low-side MOSFET's body diode,
    with that MOSFET's ``coss`` as its ``cj``; and no dead time."""
    rep = dataclasses.replace
    ls = scenario.low_side
    if strategy == "asynchronous":
        if diode is None and isinstance(ls, Mosfet):
            diode = rep(ls.body_diode, cj=ls.coss)
        elif diode is None:
            diode = ls
        diode = rep(diode, section="low_side")
        return rep(scenario, low_side=diode,
                   switching=rep(scenario.switching, strategy=strategy, dead_time=(0.0, 0.0)))
    if not isinstance(ls, Mosfet):
        raise ScenarioError("low_side.device", "must be \"mosfet\" to compare the synchronous "
                            "strategies (describe the low-side MOSFET; give the freewheel "
                            "diode with diode=... or --diode)", "diode")
    return rep(scenario, switching=rep(scenario.switching, strategy=strategy))


# ----------------------------------------------------------------------------- rows

@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare`.

    Attributes
    ----------
    title : str
    strategies : tuple of str
    levels : tuple of LoadLevel     the sweep's load levels
    rows : dict                     strategy -> tuple of Row, one per level
    diode : Diode                   freewheel diode of the asynchronous stage
    target_voltage : float or None  regulated mean output voltage [V]
    log : bool                      loads spaced / plotted on a log axis
    profile : ProfileResult or None
    """

    title: str
    strategies: tuple
    levels: tuple
    rows: dict
    diode: Diode
    target_voltage: float | None
    log: bool = False
    profile: ProfileResult | None = None

    @property
    def failures(self) -> list:
        """The rows that could not be evaluated (sweep and profile levels)."""
        rows = [r for rs in self.rows.values() for r in rs]
        if self.profile is not None:
            rows += [r for rs in self.profile.rows.values() for r in rs]
        seen, out = set(), []
        for r in rows:
            if not r.ok and (r.strategy, r.level) not in seen:
                seen.add((r.strategy, r.level))
                out.append(r)
        return out

    def row(self, strategy: str, level) -> Row:
        """The row of ``strategy`` at sweep level ``level`` (equal to 1e-6 relative)."""
        k = self.level_index(level)
        return self.rows[strategy][k]

    def level_index(self, level) -> int:
        kind = self.levels[0].key
        lv = parse_level(level, kind)
        for k, have in enumerate(self.levels):
            if have.key == lv.key and math.isclose(have.value, lv.value, rel_tol=1e-6):
                return k
        raise KeyError(f"load level {lv} is not in the comparison; evaluated: "
                       + ", ".join(str(x) for x in self.levels))

    def to_dict(self) -> dict:
        return {"title": self.title, "strategies": list(self.strategies),
                "levels": [lv.to_dict() for lv in self.levels],
                "target_voltage": self.target_voltage,
                "diode": {k: as_plain(getattr(self.diode, k)) for k in DIODE_KEYS},
                "rows": {s: [r.to_dict() for r in rows] for s, rows in self.rows.items()},
                "profile": None if self.profile is None else self.profile.to_dict(),
                "caution": CAUTION}

    def records(self) -> list:
        """One dict per strategy and load (sweep levels, in order): the columns of
        :meth:`to_csv` and :meth:`to_pandas` with their values (SI units; a loss
        item a row lacks is 0, NaN in a failed row; ``error`` None when evaluated)."""
        present = self._present_items()
        out = []
        for s in self.strategies:
            for r in self.rows[s]:
                rec = {"strategy": s, "load_key": r.level.key, "load_value": r.level.value,
                       "load_current_A": r.load_current, "output_voltage_V": r.output_voltage,
                       "duty": r.duty, "conduction_mode": r.conduction_mode,
                       "reverse_current": r.reverse_current,
                       "frequency_Hz": r.switching_frequency, "ripple_V": r.output_ripple,
                       "efficiency": r.efficiency, "input_W": r.input_power,
                       "output_W": r.output_power, "loss_W": r.loss}
                rec.update({f"{it}_W": r.losses.get(it, 0.0 if r.ok else math.nan)
                            for it in present})
                rec["error"] = r.error
                out.append(rec)
        return out

    def _present_items(self):
        return [it for it in LOSS_ITEMS
                if any(it in r.losses for rows in self.rows.values() for r in rows)]

    def to_pandas(self):
        """The :meth:`records` as a ``pandas.DataFrame`` (pandas: the ``tables`` extra)."""
        from bucksim.frames import require_pandas
        return require_pandas().DataFrame.from_records(self.records())

    def to_csv(self, path=None) -> str:
        """One line per strategy and load; powers [W], current [A], voltage [V].

        Writes ``path`` when given; returns the CSV text either way.
        """
        recs = self.records()
        head = ["strategy", "load_key", "load_value", "load_current_A", "output_voltage_V",
                "duty", "conduction_mode", "reverse_current", "frequency_Hz", "ripple_V",
                "efficiency", "input_W", "output_W",
                "loss_W"] + [f"{it}_W" for it in self._present_items()] + ["error"]
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(head)
        for rec in recs:
            w.writerow([_csv_cell(name, rec[name]) for name in head])
        text = buf.getvalue()
        if path is not None:
            with open(path, "w", encoding="utf-8", newline="") as f:
                f.write(text)
        return text

    def table(self) -> str:
        """Readable report: efficiency and loss per load, the profile verdict, a caution."""
        head = f"{'load':>10}{'Io':>10}" + "".join(
            f"{STRATEGY_NAMES[s]:>24}" for s in self.strategies)
        sub = " " * 20 + "".join(f"{'efficiency':>13}{'loss':>11}" for _ in self.strategies)
        lines = [self.title]
        if self.target_voltage is not None:
            lines.append(f"duty trimmed to hold Vo = {format_si(self.target_voltage, 'V')} "
                         "at every point")
        d = self.diode
        lines += [(f"asynchronous stage: freewheel diode Vf {format_si(d.vf, 'V')}, "
                   f"r {format_si(d.r, 'ohm')}, Qrr {format_si(d.qrr, 'C')}"), "", head, sub]
        for k, lv in enumerate(self.levels):
            ok = [self.rows[s][k] for s in self.strategies if self.rows[s][k].ok]
            io = format_si(ok[0].load_current, 'A', 3) if ok else "-"
            cells = "".join(_cells(self.rows[s][k]) for s in self.strategies)
            lines.append(f"{lv!s:>10}{io:>10}{cells}")
        if self.profile is not None:
            lines += [""] + self.profile.table_lines(self.strategies)
        failed = self.failures
        if failed:
            lines += ["", "failed points:"] + [f"  {r.error}" for r in failed]
        lines += ["", CAUTION]
        return "\n".join(lines)

    def __str__(self):
        return self.table()

    def plot(self, kind: str = "efficiency", *, loads=None, log=None, **kw):
        """Figure of the comparison.

        Parameters
        ----------
        kind : {"efficiency", "breakdown"}
            ``"efficiency"``: efficiency against load, one line per strategy
            (:func:`bucksim.study_figures.efficiency_figure`); ``"breakdown"``:
            stacked loss items per strategy at ``loads``
            (:func:`bucksim.study_figures.loss_breakdown_figure`).
        loads : sequence, optional
            For ``"breakdown"``: sweep levels to show (default all of them).
        log : bool, optional
            For ``"efficiency"``: a log load axis (default the comparison's own).
        """
        from bucksim import study_figures

        if kind == "efficiency":
            return study_figures.efficiency_figure(self, log=log, **kw)
        if kind == "breakdown":
            picks = [lv.value for lv in self.levels] if loads is None else loads
            return study_figures.loss_breakdown_figure(self, picks, **kw)
        raise ValueError(f"kind must be 'efficiency' or 'breakdown', got {kind!r}")

    def efficiency_figure(self, log=None):
        """Same as ``plot("efficiency", log=log)``."""
        return self.plot("efficiency", log=log)

    def loss_breakdown_figure(self, loads):
        """Same as ``plot("breakdown", loads=loads)``."""
        return self.plot("breakdown", loads=loads)


@single_blas_thread
def compare(scenario, loads, *, diode=None, profile=None, output_voltage=None,
            regulate=True, strategies=STRATEGIES, log=False, pfm=None,
            pulse_skipping=None) -> Comparison:
    """Efficiency and losses of the three strategies across load, on the same parts.

    Parameters
    ----------
    scenario : Scenario
        Open loop, with a low-side MOSFET (its body diode is the default
        freewheel diode).
    loads : list, dict or value
        Sweep load levels (see :func:`bucksim.studies.reverse.parse_levels`).
    diode : Diode, optional
        Freewheel diode of the asynchronous stage: ``vf`` [V], ``r`` [ohm],
        ``qrr`` [C].
    profile : Profile or list of (level, share), optional
        Load profile for the weighted efficiency and energy lost per day.
    output_voltage : float, optional
        Mean output voltage [V] to hold at every point; default the
        scenario's own (steady state at its duty and t = 0 load).
    regulate : bool
        Trim the duty to hold the output voltage (default); ``False`` keeps
        the scenario's duty.
    strategies : sequence of str
    log : bool
        Loads meant for a logarithmic axis (figures follow it).
    pfm : dict, optional
        Add a ``"pfm"`` row beside the strategies: PFM on the diode-emulation
        stage (:func:`~bucksim.studies.light_modes.pfm_steady_state`) with
        ``{"peak_current": A}`` or ``{"on_time": s}``, its threshold the held
        output voltage (so PFM's mean output sits about half its ripple above
        the others'). Each row carries its ``switching_frequency`` and
        ``output_ripple``; a load PFM cannot hold (no idle interval left) is a
        failed row saying so.
    pulse_skipping : dict, optional
        Add a ``"pulse-skipping"`` row: ``{"min_on_time": s}``, pulses of that
        on-time at the clock edges where the output is below the held voltage,
        on the diode-emulation stage
        (:func:`~bucksim.studies.pulse_skipping.pulse_skipping_steady_state`,
        at most 20000 clock periods a point: a pattern that has not repeated by
        then is reported by its averages); fixed-frequency diode emulation where
        a pulse at every clock edge leaves the output low (``light_mode``
        ``"pwm"``).

    Returns
    -------
    Comparison
        A point that has no periodic steady state (or whose output voltage
        the duty cannot reach) is kept as a row with ``error`` set and every
        metric NaN; :attr:`Comparison.failures` lists them.
    """
    require_open_loop(scenario)
    for s in strategies:
        if s not in STRATEGIES:
            raise ScenarioError("strategies", "must name only " + ", ".join(STRATEGIES), s)
    levels = parse_levels(loads, scenario, "loads")
    pulse = pfm_pulse(pfm)
    variants = {s: strategy_scenario(scenario, s, diode) for s in strategies}
    if "asynchronous" in variants:
        used_diode = variants["asynchronous"].low_side
    else:
        used_diode = strategy_scenario(scenario, "asynchronous", diode).low_side
    target = _target_voltage(scenario, regulate, output_voltage)
    light = _light_modes(scenario, variants, diode, target, pulse,
                         skip_pulse(pulse_skipping))
    strategies = tuple(strategies) + tuple(light)
    rows_for = RowMaker(variants, target, light)
    rows = {s: rows_for(s, levels) for s in strategies}
    pres = None
    if profile is not None:
        prof = make_profile(profile, scenario)
        pres = _profile_result(prof, {s: list(rows_for(s, prof.levels)) for s in strategies})
    return Comparison(title=scenario.title, strategies=tuple(strategies), levels=tuple(levels),
                      rows=rows, diode=used_diode, target_voltage=target, log=bool(log),
                      profile=pres)


def _light_modes(scenario, variants, diode, target, pulse, t_min):
    """``{mode: (diode-emulation stage, threshold [V], setting)}`` of the light-load rows
    asked for (PFM's pulse, pulse skipping's minimum on-time); the threshold is the held
    output voltage, else the scenario's own."""
    light = {}
    for mode, setting in (("pfm", pulse), ("pulse-skipping", t_min)):
        if setting is None:
            continue
        base = variants.get("diode-emulation") or strategy_scenario(scenario,
                                                                    "diode-emulation", diode)
        threshold = target if target is not None else cycle_mean(
            periodic_run(with_level(scenario, _own_level(scenario)))[1], "vo")
        light[mode] = (base, threshold, setting)
    return light


def _target_voltage(scenario, regulate, output_voltage):
    """The output voltage every point holds [V] (None: the duty is kept)."""
    if not regulate:
        return None
    if output_voltage is None:
        _, run = periodic_run(with_level(scenario, _own_level(scenario)))
        return cycle_mean(run, "vo")
    target = parse_quantity(output_voltage, "V", "output_voltage")
    if not 0 < target < scenario.supply.voltage:
        raise ScenarioError("output_voltage", f"must lie between 0 and the supply "
                            f"voltage {scenario.supply.voltage:g} V", output_voltage)
    return target


def _csv_cell(name, value) -> str:
    """CSV text of one :meth:`Comparison.records` value: floats by ``repr`` (exact
    round trip), the reverse-current flag as 0/1, no error as an empty cell."""
    if name == "reverse_current":
        return str(int(value))
    return "" if value is None else value if isinstance(value, str) else repr(value)


def _cells(row) -> str:
    if not row.ok:
        return f"{'failed':>13}{'-':>11}"
    return f"{100 * row.efficiency:>12.2f}%{format_si(row.loss, 'W', 3):>11}"


def _own_level(scenario):
    kind = load_kind(scenario)
    value = scenario.load.current if kind == "current" else scenario.load.resistance
    return LoadLevel(kind, float(value))
