"""The switches' current ramps as circuit states (a mixin of :class:`bucksim.model.stage.Stage`).

With node capacitance, a MOSFET with a ``rise_time`` or ``fall_time`` does not
open or close at once: over that time its channel is a current source that
ramps linearly, and the node capacitance takes the rest (docs: physics, Edges).
A ramp is two states per switch, the channel current and its slope::

    d ihs / dt = khs / RAMP_SCALE,   d khs / dt = 0        (the same for ils, kls)

(``k`` is the slope times :data:`RAMP_SCALE`, in amperes, so that every state has
the size of a current). The cycle loop sets both at the ramp's start, a linear
function of the state (:mod:`bucksim.engine.ramps`), and zeroes them at its end;
outside a ramp they are zero, so the rows below reduce to the instantaneous
node's. Every current through the node is then continuous in the state:

===========  =====================================================  ==============
state        vsw                                                    cell draws
===========  =====================================================  ==============
OPEN         vn + Rn (ihs + ils - iL)                               ihs
LOW_DIODE    -Vf_ls - r_ls (iL - ihs)                               ihs
HIGH_DIODE   Vin + Vf_hs - (Rs + r_hs) (iL - ils)                   iL - ils
===========  =====================================================  ==============

and the open node's capacitance charges with ``ihs + ils - iL``. The high side
ramps wherever it has a rise or fall time; the low side only in forced PWM
(diode emulation opens it at zero current and closes it on its conducting body
diode, where a ramp carries no voltage; an asynchronous stage has no channel).
"""

from __future__ import annotations

import numpy as np

from bucksim.errors import ScenarioError
from bucksim.model.conduction import HIGH, HIGH_DIODE, LOW_DIODE, OPEN
from bucksim.model.parts import Mosfet

#: Time scale [s] of the slope states: ``k = RAMP_SCALE * di/dt`` [A].
RAMP_SCALE = 1e-9

#: State names of the two ramps (current [A], slope times RAMP_SCALE [A]).
RAMP_STATES = (("ihs", "khs"), ("ils", "kls"))


def ramp_switches(scenario, node: bool) -> tuple[bool, bool]:
    """``(high side ramps, low side ramps)``: with node capacitance (``node``), the
    high side when it has a rise or fall time, the low side too in forced PWM."""
    if not node:
        return False, False
    hs, ls = scenario.high_side, scenario.low_side
    high = hs.rise_time > 0.0 or hs.fall_time > 0.0
    low = (isinstance(ls, Mosfet) and scenario.switching.strategy == "forced-pwm"
           and (ls.rise_time > 0.0 or ls.fall_time > 0.0))
    return high, low


def check_ramps_fit(scenario, high: bool, low: bool):
    """A turn-off ramp must end within its dead time: the opposite switch would close
    onto a channel that still conducts (shoot-through, not modelled)."""
    sw = scenario.switching
    if sw.strategy == "asynchronous":
        return
    td_fall, td_rise = sw.dead_time
    if high and scenario.high_side.fall_time > td_fall:
        raise ScenarioError("high_side.fall_time", f"must be <= switching.dead_time[0] = "
                            f"{td_fall:.6g} s (the low side would close while the high side's "
                            f"current still falls)", scenario.high_side.fall_time)
    if low and scenario.low_side.fall_time > td_rise:
        raise ScenarioError("low_side.fall_time", f"must be <= switching.dead_time[1] = "
                            f"{td_rise:.6g} s (the high side would close while the low side's "
                            f"current still falls)", scenario.low_side.fall_time)


class RampRows:
    """Rows over the augmented state ``z`` that read the ramps (zero without them)."""

    def _ramp_unit(self, which: int) -> np.ndarray:
        """Row of the ramp current of the high side (``which = 0``) or low side (1)."""
        out = np.zeros(self.n + 1)
        i = self.i_hs if which == 0 else self.i_ls
        if i >= 0:
            out[i] = 1.0
        return out

    def _ramp_extra(self, k: int) -> np.ndarray:
        """What the ramp currents add to the node voltage's row in conduction ``k``."""
        ihs, ils = self._ramp_unit(0), self._ramp_unit(1)
        if k == OPEN and self.node:
            return self.r_node * (ihs + ils)
        if k == LOW_DIODE:
            return self.r_ls * ihs
        if k == HIGH_DIODE:
            return (self.r_hs + (self.rs if self.net is None else 0.0)) * ils
        return np.zeros(self.n + 1)

    def _drawn(self, k: int) -> np.ndarray:
        """The current the switch cell delivers into the node in conduction ``k`` as a row."""
        out = np.zeros(self.n + 1)
        if k in (HIGH, HIGH_DIODE):
            out[0] = 1.0
            if k == HIGH_DIODE:
                out -= self._ramp_unit(1)
        elif k in (OPEN, LOW_DIODE):
            out += self._ramp_unit(0)
        return out

    def _ramp_rows(self, M: np.ndarray):
        """Each ramp current's row: ``i' = k / RAMP_SCALE`` (the slope holds)."""
        for i in (self.i_hs, self.i_ls):
            if i >= 0:
                M[i] = 0.0
                M[i, i + 1] = 1.0 / RAMP_SCALE

    def _ramp_signal(self, name: str, system: int) -> np.ndarray:
        """``high_side_ramp`` / ``low_side_ramp`` [A] and the voltage across each
        ramping channel [V] (``..._ramp_voltage``: drain to source along its current)."""
        level, k = self.split_id(system)
        if name == "high_side_ramp":
            return self._ramp_unit(0)
        if name == "low_side_ramp":
            return self._ramp_unit(1)
        vsw = self.signal("vsw", system)
        if name == "low_side_ramp_voltage":
            return -vsw
        # the drain: the cell's voltage (the source less Rs times what it draws)
        if self.net is None:
            cell = self._embed(np.array([0.0, 0.0, self.levels[level].vin]))
            cell = cell - self.rs * self._drawn(k)
        else:
            cell = self._cell_row(self.levels[level], k)
        return cell - vsw
