"""Input filter against the converter: the output impedance the cell sees.

A regulated converter draws constant power ``P``, so its small-signal input
looks like a negative resistance ``-Vin^2 / P`` at frequencies below its loop's
crossover. An input network whose output impedance (seen from the switch cell
into the filter and the source) peaks near or above that magnitude can cancel
the network's damping and ring or oscillate. Middlebrook's criterion asks the
filter's output impedance to stay well below the converter's input impedance
[1]_; :func:`filter_interaction` compares the peak of ``|Z_o|`` with
``Vin^2 / P`` and reports the margin in dB.

References
----------
.. [1] R. D. Middlebrook, "Input filter considerations in design and application
   of switching regulators", IEEE Industry Applications Society Annual
   Meeting, 1976, pp. 366-382.
.. [2] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020, ch. 17 (the negative input resistance; damping the
   filter).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from bucksim.model.input_network import input_network

#: Below this margin [dB] between ``Vin^2 / P`` and the filter's peak output
#: impedance the interaction is called thin (a factor of 2; common practice
#: asks for the filter's impedance to be well below the converter's).
THIN_MARGIN_DB = 6.0


@dataclass(frozen=True)
class FilterInteraction:
    """The input network's peak output impedance against the converter's input.

    Attributes
    ----------
    peak_impedance : float      peak of ``|Z_o(j 2 pi f)|`` below half the switching frequency [ohm]
    peak_frequency : float      where it peaks [Hz]
    input_resistance : float    ``Vin^2 / P``, the magnitude of the converter's
                                negative input resistance [ohm]
    margin_db : float           ``20 log10(input_resistance / peak_impedance)``
    thin : bool                 ``margin_db < THIN_MARGIN_DB``
    """

    peak_impedance: float
    peak_frequency: float
    input_resistance: float
    margin_db: float
    thin: bool

    def message(self) -> str:
        """One line for a report or a warning."""
        return (f"input filter: peak output impedance {self.peak_impedance:.4g} ohm at "
                f"{self.peak_frequency:.4g} Hz against the converter's input resistance "
                f"-{self.input_resistance:.4g} ohm (Vin^2 / P): margin {self.margin_db:.1f} dB"
                + (f", thin (below {THIN_MARGIN_DB:.0f} dB): the filter may ring or oscillate "
                   "with the loop; damp it" if self.thin else ""))


def output_impedance(scenario, frequencies) -> np.ndarray:
    """The input network's output impedance ``Z_o = -dv_cell / di_d`` [ohm]
    (complex) at ``frequencies`` [Hz], the converter removed; None without an
    input capacitor.

    Notes
    -----
    ``Z_o(s) = -(c (s I - A)^{-1} b_d + d_d)`` with the network's state matrix
    ``A``, its column ``b_d`` of the drawn current and the cell voltage's row
    ``[c, d_s, d_d]`` (:mod:`bucksim.model.input_network`).
    """
    net = input_network(scenario)
    if net is None:
        return None
    row = net.rows["vin"]
    c, d_d = row[:net.n], row[net.n + 1]
    s = 2j * np.pi * np.atleast_1d(np.asarray(frequencies, dtype=float))
    x = np.linalg.solve(s[:, None, None] * np.eye(net.n) - net.A,
                        np.broadcast_to(net.b_d[:, None], (s.shape[0], net.n, 1)))
    return -(x[:, :, 0] @ c + d_d)


def filter_interaction(scenario, power: float, points: int = 2000) -> FilterInteraction | None:
    """Compare the input network's peak output impedance with ``Vin^2 / P``.

    Parameters
    ----------
    scenario : Scenario
        With an ``[input_capacitor]`` (else None is returned).
    power : float
        The converter's input power [W] (e.g. ``summary.power.input``).
    points : int
        Log-spaced frequencies from 10 Hz to half the switching frequency.
    """
    if input_network(scenario) is None or not power > 0:
        return None
    f = np.geomspace(10.0, 0.5 * scenario.switching.frequency, points)
    z = np.abs(output_impedance(scenario, f))
    k = int(np.argmax(z))
    r_in = scenario.supply.voltage ** 2 / power
    margin = 20.0 * np.log10(r_in / z[k])
    return FilterInteraction(float(z[k]), float(f[k]), float(r_in), float(margin),
                             bool(margin < THIN_MARGIN_DB))
