"""PFM and pulse skipping against charge balance and against the closed loop run directly.

Stages (numbers our own): 12 V in, 3.3 V threshold, 4.7 uH. The PFM checks use
a nearly lossless stage (0.1 mohm channels, no DCR, ESR, dead time or node
capacitance) with a current-sink load and 100 uF, so the output ripple is a
few mV and the formulas' one approximation, a constant output during the
pulse, is small.

References
----------
.. [EM] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020: ch. 2, inductor volt-second balance and capacitor
   charge balance (chapter from memory).
.. [CB] Derived here from those two balances for one PFM period: the
   current rises at (Vin - Vo) / L to Ipk in ton = L Ipk / (Vin - Vo), falls
   at Vo / L (at (Vo + Vf) / L through a freewheel diode of drop Vf) to zero
   in toff = L Ipk / Vo, and is zero while the stage idles; the capacitor's
   charge balance makes the triangle's charge Ipk (ton + toff) / 2 equal to
   Io T, so f = Io / (Ipk (ton + toff) / 2). At a fixed on-time Ipk = (Vin -
   Vo) ton / L, ton + toff = ton Vin / Vo and f = 2 L Io Vo / ((Vin - Vo)
   Vin ton^2).
.. [AU] The audible band ends at 20 kHz: common practice.
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np
import pytest

import bucksim
from bucksim.model.conduction import CONDUCTION_NAMES
from bucksim.simulation import simulate
from bucksim.studies.levels import LoadLevel, with_level
from bucksim.studies.light_modes import pfm_steady_state
from bucksim.studies.pulse_skipping import (
    pulse_skipping_scenario,
    pulse_skipping_steady_state,
)
from tests.references.stage_solver import buck_scenario

VIN, VTH, L = 12.0, 3.3, 4.7e-6


def lossless(current, strategy="diode-emulation", vf=0.7):
    return buck_scenario(vin=VIN, duty=0.3, frequency=1e6, strategy=strategy, inductance=L,
                         capacitance=100e-6, current=current, rds_hs=1e-4, rds_ls=1e-4,
                         vf_ls=vf, r_ls=1e-4)


def quiet(fn, **kw):
    """Call with every warning an error (no audible-band warning expected)."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return fn(**kw)


def frequency_slope(vo, vf=0.0):
    """|d ln f / d Vo| [1/V] of the peak-current formula [CB]: the formula's error when
    the output moves by the ripple during the pulse (derived)."""
    return abs(1.0 / (vo + vf) - 1.0 / (VIN - vo))


@pytest.mark.parametrize("io, ipk", [(0.05, 0.5), (0.01, 0.3)])
def test_pfm_peak_current_frequency_is_charge_balance(io, ipk):
    r = quiet(pfm_steady_state, scenario=lossless(io), peak_current=ipk, threshold=VTH)
    assert r.success, r.message
    vo = r.summary.output_voltage.mean
    ton, toff = L * ipk / (VIN - vo), L * ipk / vo                       # [CB]
    f_cb = io / (0.5 * ipk * (ton + toff))
    dev = r.switching_frequency / f_cb - 1
    assert abs(dev) < 0.01                                              # the acceptance: 1 %
    assert abs(dev) < frequency_slope(vo) * r.output_ripple             # the Vo-constant error
    assert r.peak_current == pytest.approx(ipk, rel=1e-9)
    assert r.on_time == pytest.approx(ton, rel=2 * r.output_ripple / (VIN - vo))
    assert r.period == pytest.approx(1 / r.switching_frequency, rel=1e-15)
    # the threshold closes the period: vo there, and the idle interval inside it
    assert float(r.run.at(0.0, "vo")[0]) == pytest.approx(VTH, abs=1e-9)
    assert r.on_time < r.idle_start < r.period
    assert r.summary.output_voltage.min < VTH < r.summary.output_voltage.max
    assert not r.audible


def test_pfm_asynchronous_stage_falls_at_vo_plus_vf():
    io, ipk, vf = 0.02, 0.4, 0.3
    r = quiet(pfm_steady_state, scenario=lossless(io, "asynchronous", vf), peak_current=ipk,
              threshold=VTH)
    assert r.success, r.message
    vo = r.summary.output_voltage.mean
    f_cb = io / (0.5 * ipk * (L * ipk / (VIN - vo) + L * ipk / (vo + vf)))    # [CB]
    dev = r.switching_frequency / f_cb - 1
    assert abs(dev) < frequency_slope(vo, vf) * r.output_ripple


@pytest.mark.parametrize("io, ton", [(0.05, 200e-9), (0.01, 300e-9)])
def test_pfm_fixed_on_time_frequency_is_charge_balance(io, ton):
    r = quiet(pfm_steady_state, scenario=lossless(io), on_time=ton, threshold=VTH)
    assert r.success, r.message
    vo = r.summary.output_voltage.mean
    f_cb = 2 * L * io * vo / ((VIN - vo) * VIN * ton ** 2)                # [CB]
    assert abs(r.switching_frequency / f_cb - 1) < 0.01
    assert r.on_time == ton
    assert r.peak_current == pytest.approx((VIN - vo) * ton / L,
                                           rel=2 * r.output_ripple / (VIN - vo))


def test_audible_band_warns_below_20_khz_and_not_above():
    """Loads set by [CB] for about 18 kHz and 22 kHz at a 200 ns on-time."""
    ton = 200e-9
    with pytest.warns(UserWarning, match="audible band"):                 # [AU]
        low = pfm_steady_state(lossless(0.00242), on_time=ton, threshold=VTH)
    assert low.success and low.audible and 17e3 < low.switching_frequency < 20e3
    high = quiet(pfm_steady_state, scenario=lossless(0.00296), on_time=ton, threshold=VTH)
    assert high.success and not high.audible and 20e3 < high.switching_frequency < 23e3


def test_pfm_reports_loads_outside_its_range():
    heavy = quiet(pfm_steady_state, scenario=lossless(2.0), peak_current=0.5, threshold=VTH)
    assert heavy.status == 1 and not heavy.success
    assert "above what PFM" in heavy.message and heavy.run is None
    assert math.isnan(heavy.switching_frequency)


def test_pfm_refuses_an_orbit_a_ringing_node_cuts_short():
    """sensor_rail has 70 pF at its switch node and no node resistance: the ring through
    the ESR dips the output below the threshold inside the idle interval."""
    sc = bucksim.load_scenario("scenarios/sensor_rail_3v3_battery.toml")
    r = quiet(pfm_steady_state, scenario=with_level(sc, LoadLevel("resistance", 330.0)),
              on_time=100e-9, threshold=VTH)
    assert r.status == 2 and "ring" in r.message and not r.success


# ----------------------------------------------------------------------------- pulse skipping

def skipping_stage(resistance=250.0):
    return buck_scenario(vin=VIN, duty=0.3, frequency=1e6, strategy="diode-emulation",
                         inductance=L, capacitance=22e-6, resistance=resistance, rds_hs=0.05,
                         rds_ls=0.03, dcr=0.03, esr=0.005, dead_time=(10e-9, 10e-9))


def test_pulse_skipping_agrees_with_the_closed_loop_run_from_rest():
    """The orbit (fixed-pattern Newton, verified in closed loop) against the same design
    simulated directly from rest for 150,000 clock periods.

    Tolerance: both are exact to rounding, but the direct run only approaches the orbit
    geometrically (a fixed pattern contracts by a few percent per pattern here): after
    150,000 periods its ripple and efficiency differ by ~1e-10 (measured), so 1e-6 of
    the ripple and 1e-7 in efficiency leave room for that approach while any other
    pattern (one pulse more or less changes the ripple by ~1e-3 of itself) fails.
    """
    sc = skipping_stage()
    t_min = 100e-9
    r = quiet(pulse_skipping_steady_state, scenario=sc, min_on_time=t_min, threshold=VTH)
    assert r.success, r.message
    K = r.clocks
    assert 1 < r.pulses < K and len(r.pattern) == K and r.pattern[0] == 1
    direct = simulate(pulse_skipping_scenario(sc, t_min, VTH, cycles=150_000))
    assert direct.success
    pulses = (np.nan_to_num(direct.duty) > 0).astype(int)
    tail = pulses[-4 * K:]
    assert np.array_equal(tail[K:], tail[:-K])                          # K-periodic at the end
    cyclic = "".join(map(str, r.pattern)) * 2
    assert "".join(map(str, tail[-K:])) in cyclic                       # the same pattern
    window = r.summary.window.cycles
    ref = direct.summary(cycles=int(window))
    assert ref.output_voltage.ripple == pytest.approx(r.output_ripple, rel=1e-6)
    assert ref.efficiency == pytest.approx(r.efficiency, abs=1e-7)
    assert r.switching_frequency == pytest.approx(r.pulses / (K * sc.period), rel=1e-12)
    # charge balance: the pulses carry the load's charge (mean inductor current) [EM]
    assert ref.inductor_current.mean == pytest.approx(ref.output_voltage.mean / 250.0,
                                                      rel=1e-6)


def test_pulse_skipping_reports_a_load_min_on_pulses_cannot_carry():
    r = quiet(pulse_skipping_steady_state, scenario=skipping_stage(33.0), min_on_time=100e-9,
              threshold=VTH)
    assert r.status == 2 and "not skipping" in r.message
    assert r.summary.output_voltage.mean < VTH


def test_a_skipped_clock_edge_turns_neither_switch_on():
    """In diode emulation the low side carries only the current a high-side pulse started
    (common practice): on the radio rail, whose node rings after each pulse, a skipped
    clock edge must not close the low side onto a positive ring current. Each switch
    turns on once per pulse, and the gate drive is ``(Qg_hs + Qg_ls) Vin f_pulse`` with
    the input-fed regulator (the drive's definition)."""
    from pathlib import Path

    from bucksim.analysis.switching import switching_energy

    rail = Path(__file__).resolve().parents[2] / "scenarios"
    sc = bucksim.load_scenario(rail / "radio_rail_3v3_controller_supply.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        r = pulse_skipping_steady_state(sc, min_on_time=80e-9, threshold=3.3,
                                        max_periods=4000, block=2000)
    run, window = r.run, r.summary.window
    events = switching_energy(run, window.start, window.stop)["events"]
    assert 0 < events["high_side_on"] < 0.5 * window.cycles      # it skips
    assert events["low_side_on"] == events["high_side_on"]
    # the node rings after every pulse: the rule is exercised, not vacuous
    assert np.any(run.segments.conduction == CONDUCTION_NAMES.index("open"))
    drive = r.summary.gate_drive
    qg = sc.high_side.qg + sc.low_side.qg
    f = events["high_side_on"] / (window.stop - window.start)
    assert drive.input - drive.quiescent == pytest.approx(qg * sc.supply.voltage * f,
                                                          rel=1e-9)


@pytest.mark.parametrize("skip", [False, True])
def test_open_loop_on_time_below_the_minimum_is_raised_or_skipped(skip):
    """An open-loop controller cannot make a pulse shorter than its minimum on-time
    (common practice): the scheduled 30 ns becomes 100 ns, or no pulse at all with
    pulse skipping; the stretched stage is the stage run at duty 100 ns / T."""
    import dataclasses

    from bucksim.model.parts import Control

    sc = skipping_stage()
    short = dataclasses.replace(sc, control=Control(mode="open-loop", duty=0.03,
                                                    min_on_time=100e-9,
                                                    pulse_skipping=skip))
    run = simulate(short)
    high = run.segments.conduction == CONDUCTION_NAMES.index("high")
    if skip:
        assert not np.any(high)
        assert run.summary().output_voltage.mean < 1e-3      # nothing charges the output
        return
    assert np.count_nonzero(high) == sc.run.cycles
    assert np.allclose(run.segments.dt[high], 100e-9, rtol=1e-9, atol=0)
    ref = simulate(dataclasses.replace(sc, control=Control(mode="open-loop", duty=0.1)))
    assert np.array_equal(run.segments.t0, ref.segments.t0)
    assert np.array_equal(run.x_end, ref.x_end)
    steady = bucksim.steady_state(short)
    assert steady.success
    assert np.allclose(steady.x, bucksim.steady_state(
        dataclasses.replace(sc, control=Control(mode="open-loop", duty=0.1))).x,
        rtol=1e-9, atol=1e-12)     # both solved to a residual of 1e-12 of the scale


def test_pfm_idle_interval_starts_where_the_freewheel_ends():
    # with node capacitance the node is open in the dead time right after the pulse as
    # well (its swing to the low clamp); the idle interval is where the current is back
    # at zero [CB]: toff = L Ipk / Vo after the on-time, within 10 % (the losses, the dead
    # time and the swing move it; the bundled radio rail, its parts read from the file)
    from bucksim.studies.profile import load_scenario_and_profile
    root = Path(__file__).resolve().parents[2]
    sc, _ = load_scenario_and_profile(root / "scenarios" / "radio_rail_3v3_controller_supply.toml")
    r = pfm_steady_state(with_level(sc, LoadLevel("current", 0.01)), peak_current=0.4,
                         threshold=3.3)
    assert r.success, r.message
    seg = r.run.segments
    k = int(np.searchsorted(seg.t0, r.idle_start))
    assert CONDUCTION_NAMES[seg.conduction[k]] in ("idle", "open")
    assert abs(float(r.run.at(r.idle_start, "iL")[0])) < 1e-6 * r.peak_current
    toff = sc.inductor.inductance * r.peak_current / 3.3
    assert r.idle_start - r.on_time == pytest.approx(toff, rel=0.1)
