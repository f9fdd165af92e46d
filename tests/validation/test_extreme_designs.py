"""Extreme but legal designs: each end of the ranges a designer may give.

Every run must complete, balance its energy to 1e-9 (the README's
criterion), carry no NaN anywhere in its summary, and obey one physical fact
of the stage, checked against an outside source named beside it. A closed
loop whose gain is far too high must say so and keep its waveforms. Every
test here is expected to pass; none is marked xfail. All stage numbers are
invented for these checks.

References
----------
.. [EM] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020. Ch. 2: inductor volt-second and capacitor charge
   balance, CCM ripple 2 Delta i = v_L,off (1 - D) Ts / L and
   Delta v = Delta i / (8 C fs) (the summary reports peak-to-peak, twice the
   book's Delta). Ch. 3: averaged model with conduction losses,
   Vo = D Vin - (1 - D) V_D - Io R_eq, efficiency 1 / (1 + R_eq / R).
   Ch. 5: DCM, K = 2L/(R Ts), M = 2 / (1 + sqrt(1 + 4K/D^2)). Chapter numbers
   are from memory.
.. [FPW] G. F. Franklin, J. D. Powell, M. Workman, *Digital Control of Dynamic
   Systems*, 3rd ed., 1998: a sampled loop whose gain is far past its
   stability limit, with a saturating actuator, settles into a limit cycle
   between the actuator limits (from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import bucksim
from bucksim.errors import SimulationError
from bucksim.model.parts import (
    Capacitor,
    Control,
    Diode,
    Inductor,
    Load,
    Mosfet,
    RunSettings,
    Scenario,
    Supply,
    Switching,
)
from tests.references.stage_solver import buck_scenario

ENERGY_TOL = 1e-9          # README criterion: a larger residual is a bug
WINDOW = 20
# Low-loss channels (1 mohm): small, known drops that the averaged model of
# [EM] ch. 3 accounts for; body diodes only matter where a dead time is set.
_LOW_LOSS = dict(rds_hs=1e-3, rds_ls=1e-3, vf_hs=0.7, vf_ls=0.7)


def _nan_paths(tree, path="summary"):
    """Every dotted path in a nested dict/list that holds a float NaN."""
    if isinstance(tree, dict):
        return [p for k, v in tree.items() for p in _nan_paths(v, f"{path}.{k}")]
    if isinstance(tree, (list, tuple)):
        return [p for i, v in enumerate(tree) for p in _nan_paths(v, f"{path}[{i}]")]
    return [path] if isinstance(tree, float) and math.isnan(tree) else []


def _clean_summary(scenario):
    """Simulate and return the summary dict after the checks every run owes."""
    run = bucksim.simulate(scenario)
    assert run.success, run.message
    assert run.t_end == pytest.approx(scenario.duration, rel=1e-12)
    s = run.summary(cycles=WINDOW).to_dict()
    assert not _nan_paths(s)
    assert s["energy_balance_error"] < ENERGY_TOL
    return s


def _r_eq(duty, rds_hs, rds_ls, dcr=0.0):
    # [EM] ch. 3: each resistance weighted by the fraction of the period it
    # carries the inductor current
    return duty * rds_hs + (1 - duty) * rds_ls + dcr


def _off_ripple(vo, io, duty, inductance, fs, r_off):
    # [EM] ch. 2 volt-second balance: during the off interval the inductor
    # sees vo + io r_off (output plus the low-side drop), for (1 - D) Ts
    return (vo + io * r_off) * (1 - duty) / (inductance * fs)


# ----------------------------------------------------------------------------- frequency

def test_switching_frequency_10_khz():
    # 12 V -> 6 V, 1 A, L = 1 mH, C = 1 mF: f0 = 159 Hz, 2RC = 12 ms = 120 periods;
    # 3000 periods from rest leave e^-25 of the start-up ring, far below the
    # 3.7 mV ripple that is checked.
    vin, d, fs, L, C, R = 12.0, 0.5, 10e3, 1e-3, 1e-3, 6.0
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                       capacitance=C, resistance=R, cycles=3000, **_LOW_LOSS)
    s = _clean_summary(sc)
    vo = s["output_voltage"]["mean"]
    io = vo / R
    assert s["conduction_mode"] == "ccm"
    assert vo == pytest.approx(d * vin - io * _r_eq(d, 1e-3, 1e-3), rel=1e-4)   # [EM] ch. 3
    di = _off_ripple(vo, io, d, L, fs, 1e-3)
    assert s["inductor_current"]["ripple"] == pytest.approx(di, rel=5e-3)       # [EM] ch. 2
    assert s["output_voltage"]["ripple"] == pytest.approx(di / (8 * C * fs), rel=1e-2)


def test_switching_frequency_10_mhz():
    # 5 V -> 1 V, 1 A at 10 MHz: f0 = 159 kHz, 2RC = 20 us = 200 periods; 3000
    # periods settle.
    vin, d, fs, L, C, R = 5.0, 0.2, 10e6, 100e-9, 10e-6, 1.0
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                       capacitance=C, resistance=R, cycles=3000, **_LOW_LOSS)
    s = _clean_summary(sc)
    vo = s["output_voltage"]["mean"]
    io = vo / R
    assert vo == pytest.approx(d * vin - io * _r_eq(d, 1e-3, 1e-3), rel=1e-4)   # [EM] ch. 3
    di = _off_ripple(vo, io, d, L, fs, 1e-3)
    assert s["inductor_current"]["ripple"] == pytest.approx(di, rel=5e-3)       # [EM] ch. 2


# ----------------------------------------------------------------------------- inductance

def test_inductance_10_nh():
    # 10 nH needs a fast, heavily loaded stage to stay in CCM: 10 MHz, 10 A,
    # dI ~ 8 A p-p < 2 Io. 2RC = 20 us = 200 periods; 3000 periods settle.
    vin, d, fs, L, C, R = 5.0, 0.2, 10e6, 10e-9, 100e-6, 0.1
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                       capacitance=C, resistance=R, cycles=3000, **_LOW_LOSS)
    s = _clean_summary(sc)
    vo = s["output_voltage"]["mean"]
    io = vo / R
    assert s["conduction_mode"] == "ccm" and s["inductor_current"]["min"] > 0
    di = _off_ripple(vo, io, d, L, fs, 1e-3)
    assert s["inductor_current"]["ripple"] == pytest.approx(di, rel=5e-3)       # [EM] ch. 2


def test_inductance_10_nh_at_10_khz():
    # The stiff corner: L/R = 0.3 us against a 90 us on-time. Each pulse
    # charges the output and the freewheel diode then carries the current to
    # zero within ~1e-10 s: DCM, and the diode blocks reverse current (common
    # practice) while vo < Vin.
    vin, d, fs, L, C, R = 24.0, 0.9, 10e3, 10e-9, 100e-6, 100.0
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="asynchronous", inductance=L,
                       capacitance=C, resistance=R, dcr=0.01, esr=0.01, rds_hs=0.02,
                       vf_hs=0.7, vf_ls=0.5, cycles=200)
    s = _clean_summary(sc)
    assert s["conduction_mode"] == "dcm" and s["reverse_current"] is False
    assert s["output_voltage"]["max"] < vin


def test_inductance_10_mh():
    # 48 V -> 12 V, 0.1 A, 100 kHz: dI = 9 mA p-p, deep CCM even in diode
    # emulation. 2RC = 2.4 ms = 240 periods; 3000 periods settle.
    vin, d, fs, L, C, R = 48.0, 0.25, 100e3, 10e-3, 10e-6, 120.0
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="diode-emulation",
                       inductance=L, capacitance=C, resistance=R, cycles=3000, **_LOW_LOSS)
    s = _clean_summary(sc)
    vo = s["output_voltage"]["mean"]
    io = vo / R
    assert s["conduction_mode"] == "ccm"
    assert vo == pytest.approx(d * vin - io * _r_eq(d, 1e-3, 1e-3), rel=1e-4)   # [EM] ch. 3
    di = _off_ripple(vo, io, d, L, fs, 1e-3)
    assert s["inductor_current"]["ripple"] == pytest.approx(di, rel=5e-3)       # [EM] ch. 2


def test_filter_resonance_far_above_the_switching_frequency():
    # A legal, if odd, corner: f0 = 1/(2 pi sqrt(LC)) = 159 kHz against 10 kHz,
    # so each 50 us on-time rings the lightly damped filter (zeta ~ 0.05) about
    # eight times. Circuit theory: an underdamped series RLC driven by a step
    # overshoots its final value (~Vin here), so vo must exceed Vin. The peaks
    # are also taken from the independent reference solver (scipy expm).
    from tests.references.stage_solver import Circuit, simulate_expm

    vin, d, fs, L, C, R = 1.0, 0.5, 10e3, 1e-6, 1e-6, 50.0
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="asynchronous", inductance=L,
                       capacitance=C, resistance=R, rds_hs=0.1, vf_hs=0.0, vf_ls=0.0,
                       cycles=20)
    s = _clean_summary(sc)            # the window is the whole run
    trace = simulate_expm(Circuit.from_scenario(sc), 20)
    x = trace.at(np.linspace(0.0, sc.duration, 40001))   # [iL, vC]; no ESR: vo = vC
    assert s["output_voltage"]["max"] > vin
    assert s["output_voltage"]["max"] >= x[:, 1].max() * (1 - 1e-9)
    assert s["inductor_current"]["max"] >= x[:, 0].max() * (1 - 1e-9)
    assert s["inductor_current"]["min"] <= x[:, 0].min() * (1 - 1e-9)


# ----------------------------------------------------------------------------- parasitics

def test_zero_esr_and_zero_dcr():
    # With an ideal capacitor the whole output ripple is the charge ripple of
    # the triangular current; fs/f0 = 41, so the load's share is negligible.
    vin, d, fs, L, C, R = 24.0, 0.25, 300e3, 10e-6, 47e-6, 3.0
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                       capacitance=C, resistance=R, dcr=0.0, esr=0.0, cycles=2000, **_LOW_LOSS)
    s = _clean_summary(sc)
    vo = s["output_voltage"]["mean"]
    di = _off_ripple(vo, vo / R, d, L, fs, 1e-3)
    assert s["output_voltage"]["ripple"] == pytest.approx(di / (8 * C * fs), rel=5e-3)  # [EM] ch. 2
    # no resistance in the filter: all loss is in the two channels, Irms^2 Rds
    # each (common practice)
    dev = s["devices"]
    channels = 1e-3 * (dev["high_side"]["rms"] ** 2 + dev["low_side"]["rms"] ** 2)
    assert s["power"]["loss"] == pytest.approx(channels, rel=1e-9)


# ----------------------------------------------------------------------------- load

def test_no_load_forced_pwm_circulates_ripple_around_zero():
    # Forced PWM with nothing connected: capacitor charge balance ([EM] ch. 2)
    # makes the mean inductor current zero, so the channel drops average out
    # and volt-second balance gives Vo = D Vin; the triangle swings D(1-D)Vin/(L fs)
    # about zero, reversing every period (common practice: forced PWM reverses
    # when Io < dI/2). fs/f0 = 31 keeps the output ripple at 0.2 % of Vo, as
    # the small-ripple formula assumes; the 100 mohm channels damp the LC with
    # 2L/R = 22 periods, so 600 periods settle.
    vin, d, fs, L, C = 12.0, 0.5, 500e3, 2.2e-6, 47e-6
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                       capacitance=C, rds_hs=0.1, rds_ls=0.1, vf_hs=0.7, vf_ls=0.7,
                       cycles=600)
    s = _clean_summary(sc)
    il = s["inductor_current"]
    di = d * (1 - d) * vin / (L * fs)
    assert s["reverse_current"] is True
    assert abs(il["mean"]) < 1e-6 * di
    assert il["ripple"] == pytest.approx(di, rel=5e-3)
    assert s["output_voltage"]["mean"] == pytest.approx(d * vin, rel=1e-3)
    assert s["power"]["output"] == 0.0


@pytest.mark.parametrize("strategy", [
    "asynchronous",
    "diode-emulation",
])
def test_no_load_blocking_stage_charges_to_vin(strategy):
    # Derived from the stage equations: with the freewheel diode (or a low side
    # opened at zero current) no current can return through the low side and
    # nothing discharges the capacitor, so each pulse adds charge until no
    # current flows during the on-time, which needs vo = Vin exactly; the
    # diode drop never appears because the diode stops conducting first.
    vin, d, fs, L, C = 12.0, 0.5, 100e3, 10e-6, 10e-6
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy=strategy, inductance=L,
                       capacitance=C, rds_hs=0.01, rds_ls=0.01, vf_hs=0.7, vf_ls=0.5,
                       cycles=1000)
    s = _clean_summary(sc)
    assert s["output_voltage"]["mean"] == pytest.approx(vin, rel=1e-6)
    assert s["power"]["output"] == 0.0


def test_load_1_ma_is_dcm_at_the_textbook_ratio():
    # 1 mA from 3.4 V: R = 3.3 kohm, K = 2L/(R Ts) = 6.1e-4 << 1 - D: DCM.
    # RC = 3.3 ms = 330 periods; 5000 periods from rest are 15 time constants.
    # Diode emulation with no dead time has no diode drop, so [EM]'s ideal
    # ratio applies.
    vin, d, fs, L, C, R = 5.0, 0.03, 100e3, 10e-6, 1e-6, 3.3e3
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="diode-emulation",
                       inductance=L, capacitance=C, resistance=R, cycles=5000, **_LOW_LOSS)
    s = _clean_summary(sc)
    k = 2 * L * fs / R
    m = 2 / (1 + math.sqrt(1 + 4 * k / d**2))                                    # [EM] ch. 5
    assert s["conduction_mode"] == "dcm" and s["reverse_current"] is False
    assert s["output_voltage"]["mean"] == pytest.approx(m * vin, rel=2e-3)
    assert s["output_voltage"]["mean"] / R == pytest.approx(1e-3, rel=0.05)


def test_load_500_a():
    # 12 V -> 1 V at 500 A: 0.1 mohm channels and 50 uohm DCR (so the stage can
    # deliver it), R = 2 mohm, 100 nH, 10 mF. The filter has Q ~ 0.6, its ring
    # decays in ~20 periods; 600 periods settle.
    vin, fs, L, C, R = 12.0, 500e3, 100e-9, 10e-3, 2e-3
    rds, dcr = 1e-4, 5e-5
    d = (1.0 + 500.0 * (rds + dcr)) / vin
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                       capacitance=C, resistance=R, dcr=dcr, rds_hs=rds, rds_ls=rds,
                       vf_hs=0.7, vf_ls=0.7, cycles=600)
    s = _clean_summary(sc)
    r_eq = _r_eq(d, rds, rds, dcr)
    # [EM] ch. 3, averaged model with conduction losses
    assert s["output_voltage"]["mean"] == pytest.approx(d * vin * R / (R + r_eq), rel=1e-4)
    assert s["inductor_current"]["mean"] == pytest.approx(500.0, rel=1e-3)
    # [EM] ch. 3; the ripple adds dI^2/12 = 27 A^2 to 500^2 A^2 in the loss
    assert s["efficiency"] == pytest.approx(1 / (1 + r_eq / R), rel=1e-4)


# ----------------------------------------------------------------------------- duty

def test_duty_0_01():
    # 48 V -> 0.48 V at 2 A, 50 ns on-time at 200 kHz.
    vin, d, fs, L, C, R = 48.0, 0.01, 200e3, 2.2e-6, 100e-6, 0.24
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                       capacitance=C, resistance=R, cycles=1500, **_LOW_LOSS)
    s = _clean_summary(sc)
    vo = s["output_voltage"]["mean"]
    io = vo / R
    assert vo == pytest.approx(d * vin - io * _r_eq(d, 1e-3, 1e-3), rel=1e-3)   # [EM] ch. 3
    di = _off_ripple(vo, io, d, L, fs, 1e-3)
    assert s["inductor_current"]["ripple"] == pytest.approx(di, rel=5e-3)       # [EM] ch. 2


def test_duty_0_99_asynchronous():
    # 12 V, 1 A, the freewheel diode (0.5 V) conducts 1 % of the period. CCM:
    # dI ~ 62 mA p-p. 2RC = 2.4 ms = 470 periods; 6000 periods settle.
    vin, d, fs, L, C, R = 12.0, 0.99, 200e3, 10e-6, 100e-6, 11.8
    vf, r_hs = 0.5, 1e-3
    sc = buck_scenario(vin=vin, duty=d, frequency=fs, strategy="asynchronous", inductance=L,
                       capacitance=C, resistance=R, rds_hs=r_hs, vf_hs=0.7, vf_ls=vf,
                       r_ls=0.0, cycles=6000)
    s = _clean_summary(sc)
    vo = s["output_voltage"]["mean"]
    io = vo / R
    assert s["conduction_mode"] == "ccm"
    # [EM] ch. 3, diode as a drop V_D for (1 - D) Ts
    assert vo == pytest.approx(d * vin - (1 - d) * vf - io * d * r_hs, rel=1e-4)


# ----------------------------------------------------------------------------- dead time

def test_dead_time_zero_leaves_the_body_diodes_dark():
    # Common practice: the body diode only conducts while both channels are off,
    # so with no dead time it carries nothing, and the output loses the
    # volt-seconds (Vf + r Io)(t_fall + t_rise) fs that the dead times cost
    # (derived from volt-second balance, [EM] ch. 2).
    vin, d, fs, L, C, R = 12.0, 0.3, 500e3, 4.7e-6, 100e-6, 0.72
    vf, r = 0.7, 0.01
    common = dict(vin=vin, duty=d, frequency=fs, strategy="forced-pwm", inductance=L,
                  capacitance=C, resistance=R, rds_hs=1e-3, rds_ls=1e-3, vf_hs=vf, r_hs=r,
                  vf_ls=vf, r_ls=r, cycles=2000)
    s0 = _clean_summary(buck_scenario(dead_time=(0.0, 0.0), **common))
    for name in ("high_side_body_diode", "low_side_body_diode"):
        assert s0["devices"][name]["rms"] == 0.0
        assert s0["devices"][name]["conduction_loss"] == 0.0
    td = (20e-9, 20e-9)
    s1 = _clean_summary(buck_scenario(dead_time=td, **common))
    io = s0["output_voltage"]["mean"] / R
    drop = (vf + r * io) * sum(td) * fs
    # the channel the diode replaces would have dropped Rds Io; the load
    # resistor then scales the lost volt-seconds by R / (R + R_eq)
    drop -= 1e-3 * io * sum(td) * fs
    lost = s0["output_voltage"]["mean"] - s1["output_voltage"]["mean"]
    assert lost == pytest.approx(drop * R / (R + 1e-3), rel=5e-3)


# ----------------------------------------------------------------------------- closed loop

def _loop_rail(compensator, cycles=2000):
    hs = Mosfet(0.01, Diode(0.7, 0.01, section="high_side.body_diode"), section="high_side")
    ls = Mosfet(0.005, Diode(0.7, 0.01, section="low_side.body_diode"), section="low_side")
    return Scenario("unstable loop (invented)", Supply(12.0), Switching(500e3, "forced-pwm",
                    (20e-9, 20e-9)), Inductor(4.7e-6, 0.01), Capacitor(47e-6, 0.005), hs, ls,
                    Load(0.66), Control(mode="voltage-mode", reference=3.3,
                                        compensator=compensator),
                    RunSettings(cycles=cycles))


# An integrator with 1e9 /s against a ~1.5 kHz crossover design (PI gain 2000
# /s in tests/validation/test_closed_loop.py): the loop gain is ~1e6 times too high.
_UNSTABLE = {"gain": 1e9}


def test_unstable_loop_runs_to_the_end_and_keeps_its_waveforms():
    sc = _loop_rail(_UNSTABLE)
    run = bucksim.simulate(sc)
    # bounded, not diverged: the clamps keep every state finite to the end
    assert run.t_end == pytest.approx(sc.duration, rel=1e-12)
    assert np.all(np.isfinite(run.segments.x0)) and np.all(np.isfinite(run.duty))
    s = run.summary(cycles=200).to_dict()
    assert not _nan_paths(s)
    assert s["energy_balance_error"] < ENERGY_TOL
    # [FPW]: far past its stability limit the loop becomes a relay between the
    # duty clamps, and the output swings by volts instead of regulating
    d = run.duty[-200:]
    assert d.min() == 0.0 and d.max() == pytest.approx(sc.control.max_duty)
    assert s["output_voltage"]["ripple"] > 0.1 * sc.control.reference


def test_unstable_loop_is_reported():
    """The one behaviour of a run from rest whose loop does not settle: simulate
    returns the run (the waveforms computed so far stay available to look at)
    with status 3, success False and a message saying the loop did not settle;
    only ``check=True`` turns that into a SimulationError. The user must learn
    that the loop failed, not only see "run completed"."""
    from bucksim.simulation import STATUS_LOOP_UNSETTLED

    sc = _loop_rail(_UNSTABLE)
    run = bucksim.simulate(sc)
    assert run.status == STATUS_LOOP_UNSETTLED
    assert run.success is False
    assert "did not settle" in run.message, run.message
    assert run.segments.t0.shape[0] > 0
    assert run.t_end == pytest.approx(sc.duration, rel=1e-12)
    with pytest.raises(SimulationError):
        bucksim.simulate(sc, check=True)
