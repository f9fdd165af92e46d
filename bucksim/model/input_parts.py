"""The input side's parts: input capacitor banks and the input filter.

All values SI base units; each class checks its own values and raises
:class:`~bucksim.errors.ScenarioError` naming the dotted scenario key. The
circuit they form is :mod:`bucksim.model.input_network`.
"""

from __future__ import annotations

from dataclasses import dataclass

from bucksim.errors import ScenarioError
from bucksim.model.checks import non_negative, positive

#: Banks an input capacitor may have (the table's own and its further ``banks``).
MAX_BANKS = 8


@dataclass(frozen=True)
class CapacitorBank:
    """One input capacitor bank: ``capacitance`` [F] in series with ``esr`` [ohm]."""

    capacitance: float
    esr: float = 0.0
    key: str = "input_capacitor"

    def __post_init__(self):
        positive(f"{self.key}.capacitance", self.capacitance, "F")
        non_negative(f"{self.key}.esr", self.esr, "ohm")


@dataclass(frozen=True)
class InputCapacitor:
    """The banks across the switch cell's input, in parallel: the table's own
    ``capacitance``/``esr`` first, then ``banks`` in order.

    At most one bank may have zero ESR: two ideal capacitors in parallel would
    be one capacitor with two names.
    """

    banks: tuple[CapacitorBank, ...]

    def __post_init__(self):
        if not self.banks:
            raise ScenarioError("input_capacitor.capacitance", "is required (the first bank)")
        if len(self.banks) > MAX_BANKS:
            raise ScenarioError("input_capacitor.banks", f"must hold at most {MAX_BANKS - 1} "
                                f"further banks (merge parallel parts of one kind into one "
                                f"bank)", len(self.banks) - 1)
        ideal = [b.key for b in self.banks if b.esr == 0.0]
        if len(ideal) > 1:
            raise ScenarioError(f"{ideal[1]}.esr", "must be > 0 ohm: only one bank may be an "
                                f"ideal capacitor (zero ESR), and {ideal[0]} is one already", 0.0)


@dataclass(frozen=True)
class InputFilter:
    """One LC section between the source and the input capacitor.

    ``inductance`` [H] with ``dcr`` [ohm]; optional damping: a series
    ``damping_resistance`` [ohm] and ``damping_capacitance`` [F] across the input
    capacitor, and/or ``parallel_resistance`` [ohm] across the inductor (with its DCR).
    """

    inductance: float
    dcr: float = 0.0
    damping_resistance: float | None = None
    damping_capacitance: float | None = None
    parallel_resistance: float | None = None

    def __post_init__(self):
        positive("input_filter.inductance", self.inductance, "H")
        non_negative("input_filter.dcr", self.dcr, "ohm")
        if (self.damping_resistance is None) != (self.damping_capacitance is None):
            raise ScenarioError("input_filter.damping", "must give both resistance and "
                                "capacitance (a series R-C across the input capacitor)")
        if self.damping_resistance is not None:
            positive("input_filter.damping.resistance", self.damping_resistance, "ohm")
            positive("input_filter.damping.capacitance", self.damping_capacitance, "F")
        if self.parallel_resistance is not None:
            positive("input_filter.parallel_resistance", self.parallel_resistance, "ohm")

    @property
    def damped_leg(self) -> bool:
        """True when the series R-C damping leg is present."""
        return self.damping_resistance is not None


def check_input_side(supply, cap: InputCapacitor | None, filt: InputFilter | None):
    """Refuse input-side combinations without a defined circuit.

    A source inductance, or a filter inductor, chopped by the high side with no
    capacitor to carry the pulses would need infinite voltage; an input
    capacitor straight across an ideal source (no resistance, inductance or
    filter) does nothing, and a zero-ESR one makes the source's steps infinite.
    """
    if cap is None:
        if supply.inductance > 0:
            raise ScenarioError("supply.inductance", "needs an [input_capacitor]: the high "
                                "side chops the input current, and an inductance in its path "
                                "with nothing to carry the pulses has no defined voltage",
                                supply.inductance)
        if filt is not None:
            raise ScenarioError("input_filter", "needs an [input_capacitor] (the filter's "
                                "capacitor at the switch cell)")
        return
    if filt is None and supply.resistance == 0 and supply.inductance == 0:
        raise ScenarioError("input_capacitor", "needs supply.resistance or supply.inductance "
                            "> 0 (or an [input_filter]): across an ideal source the capacitor "
                            "carries nothing, and the source alone sets the cell's voltage")
