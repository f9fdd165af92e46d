"""Output and junction capacitance that depends on voltage, and the switch node it makes.

A device's capacitance is a number [F] (linear) or a :class:`CapacitanceTable`
of ``(voltage, capacitance)`` points, held piecewise constant: ``C(v) = c_k``
for ``v_k <= v < v_{k+1}``, ``c_0`` below the second point and the last value
above the last point. Piecewise constant is what the exact engine can carry:
within each band the node is a linear system, and the band's edges are events
on the analytic solution, so the node's charge and energy come out consistent
with each other (``Q = integral C dv``, ``E = integral v C dv``).

Entering a curve read from a measured C(V) plot: pick voltages where the
curve bends (denser at low voltage, where it changes fastest) and give each
interval the *charge-equivalent* value ``(Q(v_{k+1}) - Q(v_k)) / (v_{k+1} -
v_k)``, i.e. the curve's mean over the interval, not its value at the left
point; then the table's charge at every point equals the curve's. The part
summary shows the resulting ``Qoss`` and ``Eoss`` at the input voltage to
compare with the plot.

The switch node lumps both devices to ground (the input is stiff at the
switching frequency): the high side sees ``Vds = Vin - vn``, the low side
``Vds = vn``, so ``Cn(vn) = C_hs(Vin - vn) + C_ls(vn)``. :class:`NodeCurve`
holds that sum's bands for one input voltage.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from bucksim.errors import ScenarioError
from bucksim.model.units import parse_quantity

__all__ = ["CapacitanceTable", "NodeCurve", "parse_capacitance", "read_capacitance", "charge",
           "energy", "capacitance_at", "is_positive", "as_plain"]


@dataclass(frozen=True)
class CapacitanceTable:
    """``(voltage [V], capacitance [F])`` points, voltages strictly increasing,
    held piecewise constant (module notes)."""

    voltages: tuple[float, ...]
    capacitances: tuple[float, ...]

    @property
    def breaks(self) -> np.ndarray:
        """Voltages [V] where the value changes (the second point on)."""
        return np.asarray(self.voltages[1:], dtype=float)

    @property
    def values(self) -> np.ndarray:
        """Capacitance [F] of each band: below the first break, between breaks, above."""
        return np.asarray(self.capacitances, dtype=float)


def parse_capacitance(value, key: str):
    """A capacitance key's value: a number (or a prefixed string, parsed by the
    caller) stays as it is; a list of ``[voltage, capacitance]`` pairs (numbers in
    V and F, or prefixed strings such as ``"1.2 nF"``) becomes a
    :class:`CapacitanceTable`. Refuses anything else naming ``key``."""
    if not isinstance(value, (list, tuple)):
        return value
    if len(value) == 0:
        raise ScenarioError(key, "a capacitance table needs at least one [voltage [V], "
                            "capacitance [F]] pair", value)
    vs, cs = [], []
    for i, pair in enumerate(value):
        if not (isinstance(pair, (list, tuple)) and len(pair) == 2):
            raise ScenarioError(f"{key}[{i}]", "must be a [voltage [V], capacitance [F]] pair "
                                '(numbers in V and F, or strings such as "1.2 nF")', pair)
        v = parse_quantity(pair[0], "V", f"{key}[{i}][0]")
        c = parse_quantity(pair[1], "F", f"{key}[{i}][1]")
        for j, (x, unit) in enumerate(((v, "V"), (c, "F"))):
            if not math.isfinite(x):      # the element itself is named, as for a unit
                raise ScenarioError(f"{key}[{i}][{j}]", f"must be finite [{unit}]", pair[j])
        if c < 0:
            raise ScenarioError(f"{key}[{i}][1]", "capacitance must be >= 0 F", pair[1])
        if vs and v <= vs[-1]:
            raise ScenarioError(f"{key}[{i}]", f"voltages must increase strictly (after "
                                f"{vs[-1]:g} V)", pair)
        vs.append(v)
        cs.append(c)
    return CapacitanceTable(tuple(vs), tuple(cs))


def read_capacitance(table, name: str):
    """A scenario table's capacitance key: a number or prefixed string [F], or a
    list of [voltage, capacitance] pairs (``table``: the scenario reader's table)."""
    value = table.data.get(name)
    if isinstance(value, list):
        return parse_capacitance(value, table.sub(name))
    return table.quantity(name, "F", 0.0)


def as_plain(value):
    """The value as written to a scenario file: a number, or a list of pairs."""
    if isinstance(value, CapacitanceTable):
        return [[v, c] for v, c in zip(value.voltages, value.capacitances, strict=True)]
    return value


def is_positive(value) -> bool:
    """True when the capacitance is above zero anywhere."""
    if isinstance(value, CapacitanceTable):
        return bool(np.any(value.values > 0))
    return value > 0


def _bands(value):
    if isinstance(value, CapacitanceTable):
        return value.breaks, value.values
    return np.zeros(0), np.array([float(value)])


def capacitance_at(value, v):
    """``C(v)`` [F] (the value of the band holding ``v``; at a break, the band above)."""
    breaks, caps = _bands(value)
    return caps[np.searchsorted(breaks, np.asarray(v, dtype=float), side="right")]


def _integral(value, v, power: int):
    """``integral_0^v u**power C(u) du`` for piecewise-constant ``C``, exactly."""
    breaks, caps = _bands(value)
    v = np.asarray(v, dtype=float)
    lo = np.concatenate(([-np.inf], breaks))
    hi = np.concatenate((breaks, [np.inf]))
    out = np.zeros(v.shape)
    for c, a, b in zip(caps, lo, hi, strict=True):
        if c == 0.0:
            continue
        # the part of [0, v] (or [v, 0]) inside the band [a, b)
        x1 = np.clip(v, a, b)
        x0 = min(max(0.0, a), b)
        out += c * (x1 ** (power + 1) - x0 ** (power + 1)) / (power + 1)
    return out


def charge(value, v):
    """``Q(v) = integral_0^v C(u) du`` [C] of a capacitance (number or table) at ``v`` [V]."""
    return _integral(value, v, 0)


def energy(value, v):
    """``E(v) = integral_0^v u C(u) du`` [J], the energy stored at ``v`` [V]."""
    return _integral(value, v, 1)


class NodeCurve:
    """The switch node's lumped capacitance ``Cn(vn) = C_hs(vin - vn) + C_ls(vn)``
    at one input voltage ``vin`` [V] (module notes).

    Attributes
    ----------
    edges : ndarray
        Band edges [V] of ``vn``, ``-inf`` first and ``+inf`` last (a band of zero
        width appears where a high- and a low-side break coincide).
    caps : ndarray
        ``Cn`` [F] within each band, ``len(edges) - 1`` values.
    """

    def __init__(self, high, low, vin: float):
        self.high, self.low, self.vin = high, low, float(vin)
        hb, _ = _bands(high)
        lb, _ = _bands(low)
        inner = np.sort(np.concatenate((lb, self.vin - hb)))
        self.edges = np.concatenate(([-np.inf], inner, [np.inf]))
        mids = np.empty(len(inner) + 1)
        if len(inner):
            mids[0], mids[-1] = inner[0] - 1.0, inner[-1] + 1.0
            mids[1:-1] = 0.5 * (inner[:-1] + inner[1:])
        else:
            mids[0] = 0.0
        self.caps = self.at(mids)

    @property
    def n_bands(self) -> int:
        return len(self.caps)

    @property
    def linear(self) -> bool:
        return self.n_bands == 1

    def at(self, vn):
        """``Cn(vn)`` [F]."""
        vn = np.asarray(vn, dtype=float)
        return capacitance_at(self.low, vn) + capacitance_at(self.high, self.vin - vn)

    def charge(self, va, vb):
        """``integral_va^vb Cn dv`` [C]: the charge a source delivers to move the node."""
        q_low = charge(self.low, vb) - charge(self.low, va)
        q_high = charge(self.high, self.vin - va) - charge(self.high, self.vin - vb)
        return q_low + q_high

    def moment(self, va, vb):
        """``integral_va^vb v Cn(v) dv`` [J]: the change of the node's stored energy."""
        w_low = energy(self.low, vb) - energy(self.low, va)
        ua, ub = self.vin - np.asarray(va, dtype=float), self.vin - np.asarray(vb, dtype=float)
        # v = vin - u on the high side: integral (vin - u) C_hs(u) du from ub to ua
        w_high = (self.vin * (charge(self.high, ua) - charge(self.high, ub))
                  - (energy(self.high, ua) - energy(self.high, ub)))
        return w_low + w_high

    def stored(self, vn):
        """Energy [J] of the lumped node at ``vn`` (zero at 0 V)."""
        return self.moment(0.0, vn)

    def transfer_loss(self, va, vb, v_path):
        """Energy [J] dissipated when a branch at ``v_path`` [V] moves the node from
        ``va`` to ``vb`` at once: ``integral_va^vb (v_path - v) Cn(v) dv``."""
        return v_path * self.charge(va, vb) - self.moment(va, vb)

    def equivalent(self) -> float:
        """The charge-equivalent capacitance ``Q(0 -> vin) / vin`` [F] (for the
        closed forms that need one number)."""
        if self.vin == 0.0:
            return float(self.at(0.0))
        return float(self.charge(0.0, self.vin) / self.vin)
