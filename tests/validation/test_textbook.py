"""Steady-state waveforms of a near-ideal buck stage against closed-form results.

Parts are low-loss (1 uohm channels, Vf = 0 and r = 0 diodes, no DCR and no
ESR) so that the textbook's ideal-switch, small-ripple formulas apply; each
run lasts many filter time constants and the summary covers its last 20
periods. The stage numbers are our own.

References
----------
.. [EM] R. W. Erickson and D. Maksimovic, *Fundamentals of Power Electronics*,
   3rd ed., Springer, 2020. Chapter 2 (CCM buck: M = D, inductor current
   ripple, output voltage ripple of the two-pole filter) and chapter 5 (DCM:
   K = 2L/(R Ts), Kcrit = 1 - D, M = 2/(1 + sqrt(1 + 4K/D^2))). Chapter
   numbers are from memory. [EM] writes ripples as the half amplitude
   (Delta i, Delta v); the summary reports peak-to-peak, twice those, and
   the p-p forms below follow by doubling both sides.
"""

from __future__ import annotations

import functools
import math

import pytest

import bucksim
from tests.references.stage_solver import buck_scenario

_IDEAL = dict(rds_hs=1e-6, rds_ls=1e-6, vf_hs=0.0, r_hs=0.0, vf_ls=0.0, r_ls=0.0)
WINDOW = 20

# CCM forced PWM, 12 V -> 4.8 V at 500 kHz, Io = 1 A with dI = 1.2 A p-p, so
# the ripple term is 12 % of the RMS^2 and the RMS checks can see it.
VIN, D, FS, L, R, C = 12.0, 0.4, 500e3, 4.8e-6, 4.8, 200e-6
VO = D * VIN                       # [EM] ch. 2, volt-second balance: M(D) = D
IO = VO / R
DI = VO * (1 - D) / (L * FS)       # [EM] ch. 2: 2 Delta iL = Vo (1 - D) Ts / L
DV = DI / (8 * C * FS)             # [EM] ch. 2: Delta v = Delta iL / (8 C fs)


@functools.cache
def _ccm_summary():
    # Start at the valley current and the ideal output voltage; 8000 periods is
    # ~8 time constants 2RC of the high-Q filter, so what is left of the start
    # transient is far below the 0.5 % tolerances.
    sc = buck_scenario(vin=VIN, duty=D, frequency=FS, strategy="forced-pwm", inductance=L,
                       capacitance=C, resistance=R, cycles=8000, summary_cycles=WINDOW,
                       x0=(IO - DI / 2, VO), **_IDEAL)
    return bucksim.simulate(sc, check=True).summary(cycles=WINDOW).to_dict()


def test_ccm_conversion_ratio():
    s = _ccm_summary()
    assert s["conduction_mode"] == "ccm"
    assert s["output_voltage"]["mean"] == pytest.approx(VO, rel=5e-3)   # [EM] ch. 2: M = D


def test_ccm_inductor_ripple():
    s = _ccm_summary()
    # [EM] ch. 2, with the measured Vo: dI = Vo (1 - D) / (L fs), peak to peak.
    vo = s["output_voltage"]["mean"]
    assert s["inductor_current"]["ripple"] == pytest.approx(vo * (1 - D) / (L * FS), rel=5e-3)


def test_ccm_output_ripple():
    s = _ccm_summary()
    # [EM] ch. 2, zero ESR: dV = dI / (8 C fs), peak to peak.
    assert s["output_voltage"]["ripple"] == pytest.approx(DV, rel=5e-3)


def test_ccm_rms_currents():
    """Closed-form RMS of the triangular inductor current and its pieces.

    Common practice (derived): a current ramping by dI about Io has
    RMS^2 = Io^2 + dI^2/12 over each of its two intervals, so the high side
    (on for D Ts) has D times that, the low side (1 - D) times it, and the
    capacitor, which carries the AC part, dI / sqrt(12).
    """
    dev = _ccm_summary()["devices"]
    sq = IO**2 + DI**2 / 12
    assert dev["inductor"]["rms"] == pytest.approx(math.sqrt(sq), rel=5e-3)
    assert dev["high_side"]["rms"] == pytest.approx(math.sqrt(D * sq), rel=5e-3)
    assert dev["low_side"]["rms"] == pytest.approx(math.sqrt((1 - D) * sq), rel=5e-3)
    assert dev["output_capacitor"]["rms"] == pytest.approx(DI / math.sqrt(12), rel=5e-3)


def _dcm_stage(strategy, duty, k, cycles, x0=(0.0, 0.0), capacitance=470e-6):
    # 12 V, 200 kHz, 10 ohm; L follows from K = 2L/(R Ts) ([EM] ch. 5).
    vin, fs, r = 12.0, 200e3, 10.0
    inductance = k * r / (2 * fs)
    return buck_scenario(vin=vin, duty=duty, frequency=fs, strategy=strategy,
                         inductance=inductance, capacitance=capacitance, resistance=r,
                         cycles=cycles, summary_cycles=WINDOW, x0=x0, **_IDEAL)


@pytest.mark.parametrize("strategy", ["asynchronous", "diode-emulation"])
@pytest.mark.parametrize("duty, k", [(0.3, 0.1), (0.5, 0.2), (0.2, 0.05)])
def test_dcm_conversion_ratio(strategy, duty, k):
    # [EM] ch. 5: M = 2 / (1 + sqrt(1 + 4K/D^2)) for K < Kcrit = 1 - D. The
    # small-signal DCM pole sits at ~(2 - M)/((1 - M) R C), so 6000 periods
    # from rest are > 20 time constants with C = 470 uF; C that large keeps
    # the output ripple (neglected by the formula) near 0.06 % of Vo.
    sc = _dcm_stage(strategy, duty, k, cycles=6000)
    s = bucksim.simulate(sc, check=True).summary(cycles=WINDOW).to_dict()
    m = 2 / (1 + math.sqrt(1 + 4 * k / duty**2))
    assert s["conduction_mode"] == "dcm"
    assert s["output_voltage"]["mean"] == pytest.approx(m * sc.supply.voltage, rel=2e-3)
    _assert_no_reverse_current(s)


def _assert_no_reverse_current(s):
    # Fact of the trade (and of the stage contract): the freewheel diode, or
    # a low side turned off at zero current, blocks reverse current, so these
    # stages never reverse with vo < Vin. The minimum may sit a rounding step
    # below zero (event instants are absolute times), the flag may not.
    i = s["inductor_current"]
    assert i["min"] >= -1e-9 * i["max"]
    assert s["reverse_current"] is False


@pytest.mark.parametrize("strategy", ["asynchronous", "diode-emulation"])
@pytest.mark.parametrize("duty", [0.3, 0.5, 0.7])
@pytest.mark.parametrize("margin, mode", [(1.05, "ccm"), (0.95, "dcm")])
def test_ccm_dcm_boundary(strategy, duty, margin, mode):
    # [EM] ch. 5: the buck leaves CCM when K = 2L/(R Ts) drops below
    # Kcrit(D) = 1 - D. C = 47 uF makes 2RC ~190 periods: 4000 periods from rest
    # settle, and the ripple stays small against the 5 % margin.
    sc = _dcm_stage(strategy, duty, margin * (1 - duty), cycles=4000, capacitance=47e-6)
    s = bucksim.simulate(sc, check=True).summary(cycles=WINDOW).to_dict()
    assert s["conduction_mode"] == mode
    if mode == "ccm":
        assert s["inductor_current"]["min"] > 0.0
    _assert_no_reverse_current(s)
