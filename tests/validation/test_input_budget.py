"""The closed-form input-side budget (bucksim.analysis.budget_input) against
closed forms and the exact waveforms.

* Parseval: the pulse's harmonics carry its AC power, ``sum 2 |c_n|^2 =
  D (i_a^2 + i_a i_b + i_b^2) / 3 - (D (i_a + i_b) / 2)^2`` (mean square of a
  trapezoidal pulse, derived; Parseval's theorem).
* One bank behind an inductive source takes the whole AC part: the ripple-inclusive
  RMS ``sqrt(D (Io^2 + dI^2/12) - (D Io)^2)`` (derived from the high-side current).
* ``crosscheck`` rows of two banks, a filter and its damping leg agree with the
  waveform integrals (themselves checked against solve_ivp in test_input_network.py).
"""

from __future__ import annotations

import numpy as np
import pytest

import bucksim
from bucksim.analysis.budget_input import HARMONICS, input_items, pulse_harmonics
from bucksim.model.scenario import loads_scenario

RAIL = """
schema = 1
title = "input budget check (invented numbers)"
[supply]
voltage = "12 V"
resistance = "20 mohm"
inductance = "2 uH"
[input_capacitor]
capacitance = "22 uF"
esr = "3 mohm"
{banks}
{filter}
[switching]
frequency = "500 kHz"
strategy = "forced-pwm"
dead_time = ["15 ns", "25 ns"]
[inductor]
inductance = "3.3 uH"
dcr = "8 mohm"
[output_capacitor]
capacitance = "100 uF"
esr = "3 mohm"
[high_side]
rds_on = "12 mohm"
body_diode = {{ vf = "0.8 V", r = "10 mohm" }}
[low_side]
device = "mosfet"
rds_on = "6 mohm"
body_diode = {{ vf = "0.75 V", r = "8 mohm" }}
[load]
resistance = "660 mohm"
[control]
mode = "open-loop"
duty = 0.284
[run]
cycles = 40
start = "steady-state"
summary_cycles = 20
"""


@pytest.mark.parametrize("i_a, i_b, duty", [(4.0, 6.0, 0.3), (0.0, 3.0, 0.1), (-1.0, 2.0, 0.6)])
def test_harmonics_carry_the_pulse_ac_power(i_a, i_b, duty):
    n = np.arange(1, 20001, dtype=float)
    ac = np.sum(2.0 * np.abs(pulse_harmonics(i_a, i_b, duty, n)) ** 2)
    mean = duty * (i_a + i_b) / 2
    square = duty * (i_a * i_a + i_a * i_b + i_b * i_b) / 3
    # the tail beyond n falls as 1/n^2 (a pulse with jumps): 2e4 terms leave ~1e-5
    assert ac == pytest.approx(square - mean * mean, rel=2e-4)


def test_one_bank_takes_the_whole_ac_part():
    sc = loads_scenario(RAIL.format(banks="", filter="").replace('inductance = "2 uH"',
                                                                 'inductance = "1 mH"'))
    io, di, D, fs = 5.0, 1.5, 0.3, 500e3
    row = input_items(sc, io - di / 2, io + di / 2, D, fs)[0]
    rms2 = D * (io * io + di * di / 12) - (D * io) ** 2
    # the source path (1 mH) takes ~1e-6 of the AC; the series' tail ~1/HARMONICS
    assert row[3] == pytest.approx(sc.input_capacitor.banks[0].esr * rms2, rel=3.0 / HARMONICS)


@pytest.mark.parametrize("banks, filt", [
    ('banks = [{ capacitance = "220 uF", esr = "40 mohm" }]', ""),
    ("", '[input_filter]\ninductance = "1 uH"\ndcr = "4 mohm"\n'
         'damping = { resistance = "0.3 ohm", capacitance = "100 uF" }'),
])
def test_crosscheck_rows_agree_with_the_waveforms(banks, filt):
    sc = loads_scenario(RAIL.format(banks=banks, filter=filt))
    cc = bucksim.crosscheck(sc)
    rows = {r["item"]: r for r in cc.rows}
    keys = [k for k in rows if k.startswith("input_")]
    assert len(keys) == (2 if banks else 3)
    for k in keys:
        r = rows[k]
        # 2 %: the crosscheck's CCM conduction tolerance (bucksim.analysis.crosscheck)
        assert r["closed_form"] == pytest.approx(r["simulated"], rel=0.02), k
        assert not r["flagged"]
    assert "supply.conduction" not in rows
