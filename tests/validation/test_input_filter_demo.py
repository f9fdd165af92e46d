"""The bundled input-filter scenarios: the filter meets the loop.

Checks, against facts outside the project:

* Middlebrook's criterion (R. D. Middlebrook, 1976; Erickson & Maksimovic,
  *Fundamentals of Power Electronics*, 3rd ed., ch. 17): a regulated converter's
  input is a negative resistance ``-Vin^2 / P``; an input filter whose peak output
  impedance exceeds it can oscillate, one well below it cannot destabilise the loop.
* The undamped filter's peak output impedance is ``Q sqrt(Lf / C)`` with
  ``Q = sqrt(Lf / C) / R_series`` (series RLC, common practice), the filter's
  resonance ``1 / (2 pi sqrt(Lf C))``.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.analysis.input_filter import filter_interaction

SCENARIOS = Path(__file__).resolve().parents[2] / "scenarios"


@pytest.fixture(scope="module")
def runs():
    return {name: bucksim.simulate(bucksim.load_scenario(SCENARIOS / f"input_filter_{name}.toml"))
            for name in ("undamped", "damped")}


def _cell_swing(run, start, stop):
    t = np.linspace(start, stop, 8001)
    return float(np.ptp(run.at(t, "vin")))


def test_peak_impedance_is_the_series_rlc_peak():
    sc = bucksim.load_scenario(SCENARIOS / "input_filter_undamped.toml")
    lf, c = sc.input_filter.inductance, sc.input_capacitor.banks[0].capacitance
    r = sc.input_filter.dcr + sc.input_capacitor.banks[0].esr + sc.supply.resistance
    z0 = math.sqrt(lf / c)
    check = filter_interaction(sc, 18.0)
    # series RLC seen from the capacitor: peak ~ Q z0 = z0^2 / R near f0 (high Q, within 5 %)
    assert check.peak_impedance == pytest.approx(z0 * z0 / r, rel=0.05)
    assert check.peak_frequency == pytest.approx(1 / (2 * math.pi * math.sqrt(lf * c)), rel=0.05)


def test_undamped_filter_oscillates_after_the_step_and_damped_settles(runs):
    und, dam = runs["undamped"], runs["damped"]
    before = _cell_swing(und, 0.10e-3, 0.19e-3)
    late_und = _cell_swing(und, 1.0e-3, 1.2e-3)
    late_dam = _cell_swing(dam, 1.0e-3, 1.2e-3)
    # before the step (2 A: -Vin^2/P ~ -11 ohm) the filter is stable: switching ripple only
    assert before < 0.05
    # after it (18 A: ~ -1.4 ohm < the 3.5 ohm peak) the cell oscillates by volts
    assert late_und > 1.0
    assert late_dam < 0.15 and late_und > 10 * late_dam
    s_und, s_dam = und.summary(), dam.summary()
    assert not s_und.transients[0].settled and s_dam.transients[0].settled
    for s in (s_und, s_dam):
        assert s.energy_balance_error < 1e-9


def test_margin_sign_matches_the_outcome(runs):
    for name, negative in (("undamped", True), ("damped", False)):
        run = runs[name]
        s = run.summary()
        check = filter_interaction(run.scenario, s.power.output + s.power.loss)
        assert (check.margin_db < 0) == negative
        assert check.thin == negative
