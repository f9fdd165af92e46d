"""PFM at the clock in closed loop: a digital peak-current loop that fires no pulse where
it asks for less than ``control.pfm_peak_current``, through a load step out of PFM.

Facts checked (each with its source):

* each pulse ends where the comparator trips, ``iL = u / Ri - (Se / Ri) t_on`` with the
  loop's demand ``u / Ri >= I_pfm`` (the peak-current comparator with slope
  compensation; Erickson & Maksimovic, *Fundamentals of Power Electronics*, 3rd ed.,
  2020, ch. 18, from memory), so at light load the pulses peak at about
  ``I_pfm - Se t_on / Ri``;
* the pulse rate is charge balance's ``Io / (0.5 Ipk (t_on + t_off))``, ``t_on = L Ipk
  / (Vin - Vo)``, ``t_off = L Ipk / Vo`` (derived, as for PFM in steady state; the node
  swing in the dead time and the losses leave it within 2 % here);
* above the PFM range every clock edge pulses and the inductor's mean current is the
  load's (capacitor charge balance, same source, ch. 2);
* in diode emulation each pulse turns each switch on once (common practice), so the
  gates are charged once a pulse.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.errors import ScenarioError
from bucksim.model.conduction import CONDUCTION_NAMES

RAIL = Path(__file__).resolve().parents[2] / "scenarios" / "radio_rail_3v3_wake_pfm.toml"
HIGH = CONDUCTION_NAMES.index("high")


@pytest.fixture(scope="module")
def wake():
    sc = bucksim.load_scenario(RAIL)
    return sc, bucksim.simulate(sc)


def _peaks(run, t_a, t_b):
    """(turn-off time, iL there) of every high-side pulse that ends in [t_a, t_b)."""
    seg = run.segments
    last = np.flatnonzero((seg.conduction[:-1] == HIGH) & (seg.conduction[1:] != HIGH))
    ends = seg.t0[last] + seg.dt[last]
    ends = ends[(ends >= t_a) & (ends < t_b)]
    return ends, np.array([run.at(t)[0, 0] for t in ends - 1e-13])


def test_asleep_the_pulses_come_at_the_pfm_peak_and_the_charge_balance_rate(wake):
    sc, run = wake
    ctl, T = sc.control, sc.period
    t_step = sc.load.steps[0].time
    ends, ipk = _peaks(run, 0.5e-3, t_step)
    duty = np.nan_to_num(run.duty)
    c0, c1 = int(round(0.5e-3 / T)), int(round(t_step / T))
    on = duty[c0:c1][duty[c0:c1] > 0] * T
    assert ends.shape[0] == on.shape[0] > 50
    floor = ctl.pfm_peak_current - ctl.slope_compensation * on / ctl.current_sense
    assert np.all(ipk >= floor * (1 - 1e-9))
    assert np.all(ipk <= floor * 1.01)               # the loop asks for just enough
    rate = on.shape[0] / (t_step - 0.5e-3)
    assert 0.05 / T < rate < 0.2 / T                  # PFM: one clock edge in 5 to 20
    L, vin, vo = sc.inductor.inductance, sc.supply.voltage, ctl.reference
    # the pulse's peak: the current goes on rising after the turn-off while the
    # channel's current ramps down and the node falls (model.stage_ramps), a few ns
    grid = ends[:, None] + np.linspace(0.0, 30e-9, 301)[None, :]
    p = float(np.mean(run.at(grid.ravel(), "iL").reshape(grid.shape).max(axis=1)))
    q = 0.5 * p * (L * p / (vin - vo) + L * p / vo)
    assert rate == pytest.approx(sc.load.current / q, rel=0.02)


def test_the_load_step_leaves_pfm_for_a_pulse_at_every_clock_edge(wake):
    sc, run = wake
    T, t_step = sc.period, sc.load.steps[0].time
    duty = np.nan_to_num(run.duty)
    after = duty[int(round((t_step + 0.2e-3) / T)):]
    assert np.all(after > 0)
    s = run.summary()
    assert s.inductor_current.mean == pytest.approx(sc.load.steps[0].current, rel=1e-4)
    assert abs(s.output_voltage.mean - sc.control.reference) < 0.01
    assert s.energy_balance_error < 1e-9
    step, = (e for e in s.transients if e.event == "load step")
    assert step.settled and step.undershoot_percent < 5.0


def test_asleep_the_gates_are_charged_once_a_pulse(wake):
    from bucksim.analysis.switching import switching_energy

    sc, run = wake
    ev = switching_energy(run, 0.5e-3, sc.load.steps[0].time)["events"]
    assert ev["low_side_on"] == ev["high_side_on"] > 50


def test_pfm_peak_current_is_refused_where_no_peak_is_demanded():
    sc = bucksim.load_scenario(RAIL)
    for change in ({"mode": "voltage-mode", "ramp": 1.0}, {"implementation": "analog"}):
        with pytest.raises(ScenarioError, match="pfm_peak_current"):
            dataclasses.replace(sc.control, **change)
    with pytest.raises(ScenarioError, match="pfm_peak_current"):
        dataclasses.replace(sc.control, pfm_peak_current=-0.1)


def test_the_summary_counts_the_pulses(wake):
    """The summary's pulse rate is the high side's turn-ons over the window: the clock
    after the step (every edge pulses), and pulse skipping's own rate in its orbit."""
    import warnings

    from bucksim.studies.pulse_skipping import pulse_skipping_steady_state

    sc, run = wake
    assert run.summary().pulse_rate == pytest.approx(sc.switching.frequency, rel=1e-12)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        skip = pulse_skipping_steady_state(
            bucksim.load_scenario(RAIL.parent / "radio_rail_3v3_controller_supply.toml"),
            min_on_time=80e-9, threshold=3.3, max_periods=4000, block=2000)
    assert skip.summary.pulse_rate == pytest.approx(skip.switching_frequency, rel=1e-12)
    assert "pulses" in skip.summary.table()
