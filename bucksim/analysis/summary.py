"""The Summary result: metrics of a run's window as typed records, a dict and a table.

Every part of a summary is a frozen dataclass (:class:`Window`,
:class:`OutputVoltage`, :class:`InductorCurrent`, :class:`Device`,
:class:`Power`, :class:`Transient`, :class:`SwitchNode`); read them as attributes
(``summary.power.loss``). :meth:`Summary.to_dict` gives the plain, JSON-ready
nested dict that ``bucksim run --json`` prints (keys in the order of the
summary reference, docs/summary-reference.md), and :meth:`Summary.from_dict`
reads one back. Values are SI units.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Mapping
from dataclasses import dataclass, field

from bucksim.analysis.gate_drive import GateDrive
from bucksim.analysis.loss_items import LOSS_ITEMS, item_label  # noqa: F401 (re-exported)
from bucksim.model.input_parts import MAX_BANKS

DEVICE_ORDER = ("high_side", "high_side_body_diode", "low_side", "low_side_body_diode",
                "switch_node", "inductor", "output_capacitor", "supply", "input_capacitor",
                *(f"input_capacitor_{k}" for k in range(2, MAX_BANKS + 1)), "input_filter",
                "input_filter_damping")

#: A mean current below this share of the same current's RMS (its natural
#: scale: RMS >= |mean|) prints as 0. The exact integrals carry rounding of
#: ~1e-15 of the scale, which a periodic state turns into "9.6 fA" of
#: capacitor current; 1e-9 is far above that and far below any real offset.
MEAN_ROUNDING = 1e-9


def _mean_text(mean: float, rms: float, unit: str) -> str:
    """The mean for the table: 0 when it is rounding of its natural scale."""
    from bucksim.model.units import format_si

    return format_si(0.0 if abs(mean) <= MEAN_ROUNDING * abs(rms) else mean, unit)


def _plain(record) -> dict:
    """A record's fields as a dict in declaration order; nested records become dicts.

    Fields marked ``metadata={"optional": True}`` are left out while None (a
    key the summary has only for some devices); fields marked ``internal``
    are never written (they are not part of the JSON).
    """
    out = {}
    for f in dataclasses.fields(record):
        value = getattr(record, f.name)
        if f.metadata.get("internal") or (f.metadata.get("optional") and value is None):
            continue
        if dataclasses.is_dataclass(value):
            value = _plain(value)
        elif isinstance(value, Mapping):
            value = {k: _plain(v) if dataclasses.is_dataclass(v) else v
                     for k, v in value.items()}
        elif isinstance(value, tuple):
            value = [_plain(v) if dataclasses.is_dataclass(v) else v for v in value]
        out[f.name] = value
    return out


_OPTIONAL = {"optional": True}


@dataclass(frozen=True)
class Window:
    """The summary window: ``start``, ``stop`` [s] and its width in ``cycles``
    (an int when the width is a whole number of periods)."""

    start: float
    stop: float
    cycles: float


@dataclass(frozen=True)
class OutputVoltage:
    """Output voltage over the window [V]: exact mean, extremes, peak-to-peak ripple."""

    mean: float
    min: float
    max: float
    ripple: float


@dataclass(frozen=True)
class InductorCurrent:
    """Inductor current over the window [A]: mean, RMS, extremes, peak-to-peak ripple."""

    mean: float
    rms: float
    min: float
    max: float
    ripple: float


@dataclass(frozen=True)
class FluxDensity:
    """Core flux density [T]: ``peak`` (largest ``|B|``) and peak-to-peak ``ripple``."""

    peak: float
    ripple: float


@dataclass(frozen=True)
class Device:
    """Currents [A] and losses [W] of one device over the window.

    Attributes
    ----------
    rms, mean : float
        RMS and mean of the device current [A].
    conduction_loss, switching_loss : float
        Mean powers [W].
    switching : dict or None
        The switches only: switching loss by kind [W] (keys as in the summary
        reference).
    core_loss : float or None
        The inductor only, when the scenario gives core data: iGSE core loss [W].
    flux_density : FluxDensity or None
        With ``core_loss``.
    """

    rms: float
    mean: float
    conduction_loss: float
    switching_loss: float
    switching: dict | None = field(default=None, metadata=_OPTIONAL)
    core_loss: float | None = field(default=None, metadata=_OPTIONAL)
    flux_density: FluxDensity | None = field(default=None, metadata=_OPTIONAL)

    @classmethod
    def from_dict(cls, data: Mapping) -> Device:
        flux = data.get("flux_density")
        switching = data.get("switching")
        return cls(rms=data["rms"], mean=data["mean"], conduction_loss=data["conduction_loss"],
                   switching_loss=data["switching_loss"],
                   switching=None if switching is None else dict(switching),
                   core_loss=data.get("core_loss"),
                   flux_density=None if flux is None else FluxDensity(**flux))


@dataclass(frozen=True)
class Power:
    """Mean powers over the window [W]: ``input`` (switching and core energy
    included), ``output`` (to the load) and ``loss``.

    With an input capacitor, ``input`` is the power at the converter's input
    terminals (the source side of the filter or capacitor), and
    ``source_loss``, the source resistance's, is in neither ``input`` nor
    ``loss``. Without one, ``input`` is the ideal source's power and the
    source resistance is the ``supply`` device inside ``loss``. ``bias`` is
    drawn from an external bias rail by the gate drive and the controller
    (``controller.driver_supply = "bias"`` only); the efficiency is ``output /
    (input + bias)``.
    """

    input: float
    output: float
    loss: float
    source_loss: float | None = field(default=None, metadata=_OPTIONAL)
    bias: float | None = field(default=None, metadata=_OPTIONAL)


@dataclass(frozen=True)
class InputVoltage:
    """The switch cell's input voltage over the window [V] (with an input capacitor)."""

    mean: float
    min: float
    max: float
    ripple: float


@dataclass(frozen=True)
class SourceCurrent:
    """The current the source delivers [A] (with an input capacitor)."""

    mean: float
    rms: float


@dataclass(frozen=True)
class SwitchNode:
    """The switch node's capacitance at the input voltage (present with node capacitance).

    ``capacitance`` [F] is charge-equivalent over ``0 .. input_voltage`` [V]; each
    device's ``qoss`` [C] and ``eoss`` [J] are its output charge and stored energy
    at ``Vds = input_voltage`` (the freewheel diode's from its ``cj``), from its
    ``coss`` (a number or a table, :mod:`bucksim.model.capacitance`).
    ``high_side_turn_on`` and ``low_side_turn_on`` [V]: the node voltage the
    switch's channel closed on at its turn-ons in the window, ``(min, mean, max)``
    (None when it did not turn on): ``Vin`` minus it is the high side's
    drain-source voltage at turn-on (0 at full ZVS, ``Vin + Vf`` when hard).
    """

    input_voltage: float
    capacitance: float
    high_side_qoss: float
    high_side_eoss: float
    low_side_qoss: float
    low_side_eoss: float
    high_side_turn_on: tuple[float, float, float] | None = None
    low_side_turn_on: tuple[float, float, float] | None = None


def _switch_node_from(data) -> SwitchNode | None:
    """A :class:`SwitchNode` from its dict (JSON gives the turn-on triples as lists)."""
    if not data:
        return None
    d = dict(data)
    for key in ("high_side_turn_on", "low_side_turn_on"):
        if d.get(key) is not None:
            d[key] = tuple(float(v) for v in d[key])
    return SwitchNode(**d)


@dataclass(frozen=True)
class Transient:
    """One event (start-up, load step, supply step) and the output's response.

    ``time`` [s] of the event, settled ``reference`` [V], ``vo_max``/``vo_min``
    [V], ``overshoot``/``undershoot`` [V] and in percent of the reference,
    ``settling_time`` [s] (0: never left the band; None: not back in it by the
    end), ``settled``, the relative ``band`` and the peak inductor current
    ``il_peak`` [A].
    """

    event: str
    time: float
    reference: float
    vo_max: float
    vo_min: float
    overshoot: float
    undershoot: float
    overshoot_percent: float
    undershoot_percent: float
    settling_time: float | None
    settled: bool
    band: float
    il_peak: float


@dataclass(frozen=True)
class Summary:
    """Metrics over the summary window (SI units; see docs/summary-reference.md).

    Read the parts as attributes (``summary.power.loss``,
    ``summary.devices["high_side"].rms``). :meth:`to_dict` gives the plain
    JSON-ready copy. Indexing (``summary["power"]["loss"]``) is kept for
    earlier callers: it reads the same :meth:`to_dict` view.

    Attributes
    ----------
    window : Window
    conduction_mode : str         ``"ccm"`` or ``"dcm"`` (``mode`` until 0.x: a read-only
        alias for one release, in attribute and index access)
    reverse_current : bool        the inductor current goes negative
    output_voltage : OutputVoltage
    inductor_current : InductorCurrent
    devices : dict of str -> Device   in the order of the stage's devices
    power : Power
    efficiency : float            output over input power (0 when none is drawn)
    energy_balance_error : float  relative residual of the energy balance
    transients : tuple of Transient
    zero_current_in_dead_time : bool  forced PWM: the current reached zero inside a
        dead time (a body diode stopped conducting); the mode stays ``"ccm"``
    switch_node : SwitchNode or None  the node's capacitance, Qoss and Eoss at the
        input voltage (None without node capacitance)
    input_voltage : InputVoltage or None  the switch cell's input voltage (None
        without an input capacitor)
    source_current : SourceCurrent or None  the source's current (likewise)
    gate_drive : GateDrive or None  the gate drive and the controller: where their
        energy goes and what they draw (None without gate charge or a controller table)
    strategy : str or None        the stage's switching strategy (names the
        asynchronous low side a freewheel diode in :meth:`loss_items`); not
        part of :meth:`to_dict`
    """

    window: Window
    conduction_mode: str
    reverse_current: bool
    output_voltage: OutputVoltage
    inductor_current: InductorCurrent
    devices: dict
    power: Power
    efficiency: float
    energy_balance_error: float
    transients: tuple = ()
    zero_current_in_dead_time: bool = False
    switch_node: SwitchNode | None = field(default=None, metadata={"optional": True})
    input_voltage: InputVoltage | None = field(default=None, metadata=_OPTIONAL)
    source_current: SourceCurrent | None = field(default=None, metadata=_OPTIONAL)
    gate_drive: GateDrive | None = field(default=None, metadata=_OPTIONAL)
    strategy: str | None = field(default=None, compare=False, metadata={"internal": True})

    # -- plain views ------------------------------------------------------------
    def to_dict(self) -> dict:
        """A fresh nested dict of plain Python values (what ``run --json`` prints)."""
        return _plain(self)

    @classmethod
    def from_dict(cls, data: Mapping, strategy: str | None = None) -> Summary:
        """The summary a :meth:`to_dict` dict (or its JSON) describes."""
        # (files written before the field was renamed say "mode")
        return cls(window=Window(**data["window"]),
                   conduction_mode=data.get("conduction_mode", data.get("mode")),
                   reverse_current=data["reverse_current"],
                   output_voltage=OutputVoltage(**data["output_voltage"]),
                   inductor_current=InductorCurrent(**data["inductor_current"]),
                   devices={k: Device.from_dict(v) for k, v in data["devices"].items()},
                   power=Power(**data["power"]), efficiency=data["efficiency"],
                   energy_balance_error=data["energy_balance_error"],
                   transients=tuple(Transient(**e) for e in data.get("transients", ())),
                   zero_current_in_dead_time=data.get("zero_current_in_dead_time", False),
                   switch_node=_switch_node_from(data.get("switch_node")),
                   input_voltage=_record(InputVoltage, data.get("input_voltage")),
                   source_current=_record(SourceCurrent, data.get("source_current")),
                   gate_drive=_record(GateDrive, data.get("gate_drive")),
                   strategy=strategy)

    def with_transients(self, events) -> Summary:
        """This summary with its transients replaced by ``events`` (dicts or records)."""
        return dataclasses.replace(self, transients=tuple(
            e if isinstance(e, Transient) else Transient(**e) for e in events))

    def to_json(self, **kw) -> str:
        return json.dumps(self.to_dict(), **kw)

    @property
    def mode(self) -> str:
        """The former name of :attr:`conduction_mode` (kept for one release)."""
        return self.conduction_mode

    # compatibility: the summary used to be a dict read by string keys
    def __getitem__(self, key):
        if key == "mode":      # the former name, kept for one release
            key = "conduction_mode"
        return self.to_dict()[key]

    def __contains__(self, key):
        return key in self.to_dict()

    def keys(self):
        return self.to_dict().keys()

    # -- derived views ----------------------------------------------------------
    def loss_items(self) -> dict:
        """Loss items [W] (keys of :data:`LOSS_ITEMS`, in that order); they add up
        to ``power.loss``. An asynchronous stage's low side is booked as
        ``freewheel_diode.conduction`` (its reverse recovery is dissipated in,
        and booked to, the high side) and, with node capacitance,
        ``freewheel_diode.switching`` (the node's charge that moves along its
        path, :mod:`bucksim.analysis.edges`)."""
        d = self.devices
        out = {}
        for dev in ("high_side", "high_side_body_diode", "low_side", "low_side_body_diode"):
            if dev not in d:
                continue
            if dev == "low_side" and self.strategy == "asynchronous":
                out["freewheel_diode.conduction"] = d[dev].conduction_loss
                if d[dev].switching_loss:   # the node's charge moved along its path
                    out["freewheel_diode.switching"] = d[dev].switching_loss
                continue
            out[f"{dev}.conduction"] = d[dev].conduction_loss
            if not dev.endswith("body_diode"):
                out[f"{dev}.switching"] = d[dev].switching_loss
        if "switch_node" in d:      # the open node's current in its series resistance
            out["switch_node.resistance"] = d["switch_node"].conduction_loss
        g = self.gate_drive
        if g is not None:           # (the MOSFETs' own share is in their switching)
            out.update({"gate_drive.driver": g.driver, "gate_drive.resistors": g.resistors,
                        "gate_drive.regulator": g.regulator,
                        "controller.quiescent": g.quiescent})
        out["inductor.dcr"] = d["inductor"].conduction_loss
        if d["inductor"].core_loss is not None:
            out["inductor.core"] = d["inductor"].core_loss
        out["output_capacitor.esr"] = d["output_capacitor"].conduction_loss
        if "supply" in d:
            out["supply.resistance"] = d["supply"].conduction_loss
        banks = [v.conduction_loss for k, v in d.items() if k.startswith("input_capacitor")]
        if banks:
            out["input_capacitor.esr"] = sum(banks)
        for dev in ("input_filter", "input_filter_damping"):
            if dev in d:
                out[f"{dev}.resistance"] = d[dev].conduction_loss
        return out

    def plot(self, *, title: str | None = None, size=(7.0, 4.5)):
        """Figure: the window's loss breakdown, one horizontal bar per loss item [W]
        (see :func:`bucksim.plotting.summary_loss_figure`)."""
        from bucksim.plotting import summary_loss_figure
        return summary_loss_figure(self, title=title, size=size)

    def table(self) -> str:
        """A readable multi-line table with engineering units."""
        from bucksim.model.units import format_si

        w, vo, il, p = self.window, self.output_voltage, self.inductor_current, self.power
        lines = [
            f"window        {format_si(w.start, 's')} .. {format_si(w.stop, 's')} "
            f"({w.cycles:.4g} cycles)",
            f"mode          {self.conduction_mode.upper()}"
            + ("   inductor current reverses" if self.reverse_current else ""),
            f"output        mean {format_si(vo.mean, 'V')}   ripple {format_si(vo.ripple, 'V')} p-p"
            f"   [{format_si(vo.min, 'V')}, {format_si(vo.max, 'V')}]",
            f"inductor      mean {_mean_text(il.mean, il.rms, 'A')}   "
            f"rms {format_si(il.rms, 'A')}"
            f"   ripple {format_si(il.ripple, 'A')} p-p   [{format_si(il.min, 'A')}, "
            f"{format_si(il.max, 'A')}]",
            "",
            f"{'device':<22}{'rms':>12}{'mean':>12}{'conduction':>13}{'switching':>13}",
        ]
        for name in DEVICE_ORDER:
            if name not in self.devices:
                continue
            v = self.devices[name]
            lines.append(f"{name:<22}{format_si(v.rms, 'A'):>12}"
                         f"{_mean_text(v.mean, v.rms, 'A'):>12}"
                         f"{format_si(v.conduction_loss, 'W'):>13}"
                         f"{format_si(v.switching_loss, 'W'):>13}")
        if self.switch_node is not None:
            sn = self.switch_node
            lines += [f"switch node   Cn {format_si(sn.capacitance, 'F')} (charge-equivalent,"
                      f" 0 .. {format_si(sn.input_voltage, 'V')})",
                      f"              high side Qoss {format_si(sn.high_side_qoss, 'C')}, Eoss "
                      f"{format_si(sn.high_side_eoss, 'J')}   low side Qoss "
                      f"{format_si(sn.low_side_qoss, 'C')}, Eoss "
                      f"{format_si(sn.low_side_eoss, 'J')}"]
            for side, v in (("high", sn.high_side_turn_on), ("low", sn.low_side_turn_on)):
                if v is not None:
                    lines.append(f"              {side} side turns on at node "
                                 f"{format_si(v[1], 'V')} (min {format_si(v[0], 'V')}, "
                                 f"max {format_si(v[2], 'V')})")
        inductor = self.devices.get("inductor")
        if inductor is not None and inductor.core_loss is not None:
            lines.append(f"{'inductor core (iGSE)':<22}{'':>24}"
                         f"{format_si(inductor.core_loss, 'W'):>13}")
        if self.input_voltage is not None:
            v, src = self.input_voltage, self.source_current
            lines += [f"input         cell mean {format_si(v.mean, 'V')}   ripple "
                      f"{format_si(v.ripple, 'V')} p-p   source current mean "
                      f"{format_si(src.mean, 'A')}, rms {format_si(src.rms, 'A')}"]
        if self.gate_drive is not None:
            lines += _drive_lines(self.gate_drive, format_si)
        lines += [
            "",
            f"power         in {format_si(p.input, 'W')}   out {format_si(p.output, 'W')}"
            f"   loss {format_si(p.loss, 'W')}"
            + ("" if p.source_loss is None else
               f"   (source resistance {format_si(p.source_loss, 'W')}, outside)")
            + ("" if p.bias is None else f"   bias rail {format_si(p.bias, 'W')} (in)"),
            f"efficiency    {100 * self.efficiency:.3f} %",
            f"energy balance error {self.energy_balance_error:.2e} (relative)",
        ]
        if self.transients:
            lines += ["", _transient_table(self.transients)]
        return "\n".join(lines)

    def __str__(self):
        return self.table()

    def __repr__(self):
        return f"<Summary efficiency={self.efficiency:.5f} {self.conduction_mode}>"


def _drive_lines(g: GateDrive, format_si) -> list[str]:
    w = {k: format_si(getattr(g, k), "W") for k in ("driver", "resistors", "internal",
                                                     "regulator", "quiescent", "input", "bias")}
    return [f"gate drive    driver {w['driver']}   gate resistors {w['resistors']}   MOSFET "
            f"gates {w['internal']}   regulator {w['regulator']}   controller {w['quiescent']}",
            f"              rail: {g.supply}; drawn from the input {w['input']}"
            + (f", from the bias rail {w['bias']}" if g.supply == "bias" else "")]


def _record(cls, data):
    return None if data is None else cls(**data)


def _transient_table(events) -> str:
    from bucksim.model.units import format_si

    lines = [f"{'event':<13}{'at':>10}{'vo max':>11}{'vo min':>11}{'over':>8}"
             f"{'under':>8}{'settles in':>12}{'iL peak':>10}"]
    for e in events:
        st = e.settling_time
        st = "not yet" if not e.settled else ("in band" if st == 0.0 else format_si(st, "s"))
        under = "" if e.event == "start-up" else f"{e.undershoot_percent:.2f}%"
        lines.append(f"{e.event:<13}{format_si(e.time, 's'):>10}"
                     f"{format_si(e.vo_max, 'V'):>11}{format_si(e.vo_min, 'V'):>11}"
                     f"{e.overshoot_percent:>7.2f}%{under:>8}{st:>12}"
                     f"{format_si(e.il_peak, 'A'):>10}")
    return "\n".join(lines)
