"""The stage's rows that involve the input network (a mixin of
:class:`bucksim.model.stage.Stage`).

With an ``[input_capacitor]`` (:mod:`bucksim.model.input_network`) the high side
draws ``iL`` from the switch cell, whose voltage is a row over the network's
states, the source voltage and that current. While the high side's channel or
body diode conducts, the node voltage is the cell's less the channel's (or plus
the diode's) drop, and the network's rows carry ``b_d iL``; otherwise the network
evolves on its own. Without one, the cell sits on the ideal source behind ``Rs``
(the ``supply`` device), as the stage's own rows say.
"""

from __future__ import annotations

import numpy as np

from bucksim.model.conduction import HIGH, HIGH_DIODE
from bucksim.model.levels import Level

#: Signals of the input side (with ``icin1``, ``icin2``, ... per bank).
INPUT_SIGNALS = ("vin", "vs", "vterm", "isrc", "icin", "ilf", "idamp", "irp")


class InputRows:
    """Rows over the augmented state ``z`` that read the input network."""

    def _net_row(self, row: np.ndarray, lev: Level, k: int) -> np.ndarray:
        """A network row over ``[x_in, Vs, i_d]`` as a row over ``z`` at ``lev``; the
        cell draws ``i_d`` of conduction state ``k`` (``iL`` while the high side
        conducts, a ramp's current, else nothing: :meth:`_drawn`)."""
        n_in = self.n_in
        out = np.zeros(self.n + 1)
        out[self.i_in:self.i_in + n_in] = row[:n_in]
        out[self.n] = row[n_in] * lev.vin
        return out + row[n_in + 1] * self._drawn(k)

    def _cell_row(self, lev: Level, k: int) -> np.ndarray:
        """The switch cell's input voltage as a row over ``z`` in conduction ``k``."""
        return self._net_row(self.net.rows["vin"], lev, k)

    def _cell_vsw(self, lev: Level, k: int) -> np.ndarray:
        """The node voltage while the high side's channel (``HIGH``) or body
        diode conducts, with the cell's voltage from the input network."""
        if k == HIGH:
            return self._cell_row(lev, k) + self._embed(np.array([-self.rds_hs, 0.0, 0.0]))
        return (self._cell_row(lev, k) + self._embed(np.array([-self.r_hs, 0.0, self.vf_hs]))
                + self._ramp_extra(k))

    def _with_network(self, M: np.ndarray, lev: Level, k: int, vo: np.ndarray):
        """Fill the network's rows of ``M`` (and iL's, while the high side conducts)."""
        net = self.net
        A = np.hstack([net.A, net.b_s[:, None], net.b_d[:, None]])
        for j in range(net.n):
            M[self.i_in + j] = self._net_row(A[j], lev, k)
        if k in (HIGH, HIGH_DIODE):
            M[0] = (self._cell_vsw(lev, k) - self._embed(vo + np.array([self.dcr, 0.0, 0.0]))
                    ) / self.L

    def _input_signal(self, name: str, system: int) -> np.ndarray:
        level, k = self.split_id(system)
        lev = self.levels[level]
        if self.net is None:     # the cell on the source behind Rs (the supply device)
            if name in ("vin", "vs", "vterm"):
                return self._embed(np.array([0.0, 0.0, lev.vin]))
            if name == "isrc":
                return self._drawn(k)
            raise KeyError(f"signal {name!r} exists only with an [input_capacitor]")
        if name == "vs":
            return self._embed(np.array([0.0, 0.0, lev.vin]))
        if name not in self.net.rows:
            raise KeyError(f"unknown signal {name!r} (input banks: icin1 .. "
                           f"icin{sum(nm.startswith('vcin') for nm in self.net.names)})")
        return self._net_row(self.net.rows[name], lev, k)
