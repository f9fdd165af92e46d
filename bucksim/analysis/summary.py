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
    pulse_rate : float or None    high-side pulses a second over the window [Hz]: the
        clock in fixed-frequency operation, fewer where pulses are skipped
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
    pulse_rate: float | None = field(default=None, metadata=_OPTIONAL)
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
                   pulse_rate=data.get("pulse_rate"), strategy=strategy)

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
        """A readable multi-line table with engineering units
        (:func:`bucksim.analysis.summary_table.summary_table`)."""
        from bucksim.analysis.summary_table import summary_table
        return summary_table(self)

    def __str__(self):
        return self.table()

    def __repr__(self):
        return f"<Summary efficiency={self.efficiency:.5f} {self.conduction_mode}>"


def _record(cls, data):
    return None if data is None else cls(**data)
