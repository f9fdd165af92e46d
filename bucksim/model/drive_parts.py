"""The controller and the gate drive: quiescent draw, driver supply, gate-loop resistances.

All values SI base units; each class checks its own values and raises
:class:`~bucksim.errors.ScenarioError` naming the dotted scenario key. Where the
energy goes is :mod:`bucksim.analysis.gate_drive`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from bucksim.errors import ScenarioError
from bucksim.model.checks import non_negative, positive

#: Where the gate driver's rail comes from:
#:
#: * ``"ideal-rail"``: an ideal rail at each MOSFET's ``gate_voltage``, fed from the
#:   input without loss (the input gives ``Qg Vg`` per gate charge);
#: * ``"input"``: a linear regulator from the converter's input (the input gives
#:   ``Qg Vin``; the regulator drops ``Qg (Vin - Vg)``);
#: * ``"bias"``: an external bias rail at ``bias_voltage`` (the bias gives
#:   ``Qg Vbias``, reported apart as ``power.bias``).
DRIVER_SUPPLIES = ("ideal-rail", "input", "bias")


@dataclass(frozen=True)
class GateResistance:
    """The resistances of one MOSFET's gate loop besides the driver's own [ohm]:
    ``internal`` (the MOSFET's gate resistance, inside the package) and
    ``external`` (a resistor on the board)."""

    internal: float = 0.0
    external: float = 0.0
    key: str = field(default="high_side.gate_resistance", compare=False, repr=False)

    def __post_init__(self):
        non_negative(f"{self.key}.internal", self.internal, "ohm")
        non_negative(f"{self.key}.external", self.external, "ohm")


@dataclass(frozen=True)
class Controller:
    """The controller's own supply and its gate driver.

    Parameters
    ----------
    quiescent_current : float
        The controller's own draw [A] from the driver's source (the input, or
        the bias rail), switching or not.
    driver_supply : str
        One of :data:`DRIVER_SUPPLIES`.
    bias_voltage : float or None
        The external bias rail [V] (``driver_supply = "bias"`` only; it must
        reach every gate voltage).
    driver_resistance : float
        The driver's output resistance [ohm] (one figure for pull-up and
        pull-down) in each gate loop.
    """

    quiescent_current: float = 0.0
    driver_supply: str = "ideal-rail"
    bias_voltage: float | None = None
    driver_resistance: float = 0.0

    def __post_init__(self):
        non_negative("controller.quiescent_current", self.quiescent_current, "A")
        non_negative("controller.driver_resistance", self.driver_resistance, "ohm")
        if self.driver_supply not in DRIVER_SUPPLIES:
            raise ScenarioError("controller.driver_supply", "must be one of "
                                + ", ".join(repr(c) for c in DRIVER_SUPPLIES),
                                self.driver_supply)
        if self.driver_supply == "bias":
            if self.bias_voltage is None:
                raise ScenarioError("controller.bias_voltage", "is required (> 0 V) with "
                                    "driver_supply = \"bias\"")
            positive("controller.bias_voltage", self.bias_voltage, "V")
        elif self.bias_voltage is not None:
            raise ScenarioError("controller.bias_voltage", "is read only with driver_supply = "
                                f"\"bias\" (here {self.driver_supply!r}): remove it or set "
                                "driver_supply = \"bias\"", self.bias_voltage)

    @property
    def is_default(self) -> bool:
        """True when the table says nothing beyond the defaults (no quiescent draw,
        an ideal rail, no driver resistance)."""
        return self == Controller()


def check_drive(controller: Controller, mosfets, vin: float) -> None:
    """Refuse a driver supply that cannot drive the gates.

    ``mosfets``: the stage's MOSFETs (high side, and the low side when it is
    one); ``vin``: the supply voltage [V] (its lowest level). A regulator from
    the input or the bias rail must reach every gate voltage, and a gate with
    charge needs a gate voltage once the supply is not the ideal rail (the
    charge is drawn at the source's voltage, the loop's loss is ``Qg Vg``).
    """
    if controller.driver_supply == "ideal-rail":
        return
    for m in mosfets:
        if m.qg > 0 and m.gate_voltage <= 0:
            raise ScenarioError(f"{m.section}.gate_voltage", "must be > 0 V with qg > 0 and "
                                f"controller.driver_supply = {controller.driver_supply!r} (the "
                                "gate loop dissipates qg gate_voltage)", m.gate_voltage)
        source, name = ((controller.bias_voltage, "controller.bias_voltage")
                        if controller.driver_supply == "bias" else (vin, "supply.voltage"))
        if m.gate_voltage > source:
            raise ScenarioError(name, f"must reach {m.section}.gate_voltage = "
                                f"{m.gate_voltage:.6g} V: the driver's rail is regulated "
                                "down from it", source)
