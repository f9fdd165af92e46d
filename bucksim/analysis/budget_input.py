r"""Closed-form losses of the input side: capacitor banks, filter, source.

The high side draws a pulse from the switch cell each period: a ramp from
``i_a`` at turn-on to ``i_b`` at turn-off over ``D T``, zero otherwise. Its DC
part ``I_in = D (i_a + i_b) / 2`` flows in the source path; each harmonic ``n``
of its Fourier series (coefficient ``c_n``) divides among the paths at the cell
(the banks, the damping leg, the source path) in proportion to their
admittance at ``n fs``, so bank ``k`` carries

.. math::

    I_k^2 = \sum_{n \ge 1} 2 |c_n|^2 \left|\frac{Y_k(n f_s)}{\sum_j Y_j(n f_s)}\right|^2,

    c_n = \frac{1}{T} \int_0^{D T} \left(i_a + (i_b - i_a) \frac{t}{D T}\right)
          e^{-j n \omega t} \, dt

(derived: the cell's voltage taken stiff, the network linear; the series is
summed to :data:`HARMONICS` terms). With one bank and an inductive source the
bank takes all of the AC part: ``Io^2 D (1 - D)`` at small ripple (common
practice), ``D (Io^2 + dI^2/12) - (D Io)^2`` in general. The source
resistance's loss is the source's own, outside the converter's
(:attr:`bucksim.analysis.summary.Power.source_loss`).
"""

from __future__ import annotations

import numpy as np

_SOURCE = ("derived: the Fourier series of the high side's current pulse, each harmonic "
           "divided among the cell's paths by their admittance")
_NEGLECTS = "the cell voltage's own ripple (the pulse taken from a stiff cell)"
#: Harmonics summed (the pulse's coefficients fall as 1/n: the tail beyond is < 1e-3).
HARMONICS = 400


def _admittances(scenario, w: np.ndarray):
    """Admittances [S] at angular frequencies ``w`` of each bank, the damping leg and
    the source path: arrays over ``w``."""
    cap, filt, sup = scenario.input_capacitor, scenario.input_filter, scenario.supply
    banks = [1.0 / (b.esr - 1j / (w * b.capacitance)) for b in cap.banks]
    damp = np.zeros_like(w, dtype=complex)
    if filt is not None and filt.damped_leg:
        damp = 1.0 / (filt.damping_resistance - 1j / (w * filt.damping_capacitance))
    z_src = sup.resistance + 1j * w * sup.inductance
    if filt is not None:
        z_f = filt.dcr + 1j * w * filt.inductance
        if filt.parallel_resistance is not None:
            z_f = 1.0 / (1.0 / z_f + 1.0 / filt.parallel_resistance)
        z_src = z_src + z_f
    return banks, damp, 1.0 / z_src


def pulse_harmonics(i_a: float, i_b: float, duty: float, n: np.ndarray) -> np.ndarray:
    """Fourier coefficients ``c_n`` [A] of the high side's current pulse (module notes)."""
    s = 2j * np.pi * n * duty       # j n w D T, per unit of D T
    slope = i_b - i_a
    e = np.exp(-s)
    return duty * (i_a * (1.0 - e) / s + slope * (1.0 - e * (1.0 + s)) / (s * s))


def input_items(scenario, i_a: float, i_b: float, duty: float, fs: float) -> list[tuple]:
    """Budget rows ``(key, device, kind, value [W], formula, source, neglects)`` of the
    input network, from the high side's current at turn-on ``i_a`` and turn-off
    ``i_b`` [A] and its duty; [] without an ``[input_capacitor]``."""
    if scenario.input_capacitor is None:
        return []
    n = np.arange(1, HARMONICS + 1, dtype=float)
    c2 = 2.0 * np.abs(pulse_harmonics(i_a, i_b, duty, n)) ** 2
    banks, damp, src = _admittances(scenario, 2.0 * np.pi * fs * n)
    total = sum(banks) + damp + src

    def square(y):
        return float(np.sum(c2 * np.abs(y / total) ** 2))

    rows = []
    for k, (bank, y) in enumerate(zip(scenario.input_capacitor.banks, banks, strict=True)):
        name = "input_capacitor" if k == 0 else f"input_capacitor_{k + 1}"
        rows.append((f"{name}.conduction", name, "conduction", bank.esr * square(y),
                     "ESR_k sum_n 2 |c_n|^2 |Y_k / sum Y|^2 (n fs)", _SOURCE, _NEGLECTS))
    filt = scenario.input_filter
    if filt is not None:
        dc = duty * 0.5 * (i_a + i_b)
        rows.append(("input_filter.conduction", "input_filter", "conduction",
                     filt.dcr * (dc * dc + square(src)),
                     "DCR_f (I_in^2 + sum_n 2 |c_n|^2 |Y_src / sum Y|^2)", _SOURCE,
                     _NEGLECTS + "; a parallel resistor's share of the current left out"))
        if filt.damped_leg:
            rows.append(("input_filter_damping.conduction", "input_filter_damping",
                         "conduction", filt.damping_resistance * square(damp),
                         "Rd sum_n 2 |c_n|^2 |Y_d / sum Y|^2", _SOURCE, _NEGLECTS))
    return rows
