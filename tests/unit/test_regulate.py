"""The duty trim's starting point: the lossless stage's duty for a target output.

Reference: Erickson & Maksimovic, *Fundamentals of Power Electronics*, 3rd ed.,
2020: ch. 2 (CCM, M = D) and ch. 5 (DCM, M = 2 / (1 + sqrt(1 + 4 K / D^2)),
K = 2 L fs / R, DCM while K < 1 - D); the inverse D = M sqrt(K / (1 - M)) is
derived from it.
"""

from __future__ import annotations

import dataclasses
import math

import pytest

from bucksim.studies.regulate import _lossless_duty
from tests.references.stage_solver import buck_scenario


def _stage(strategy, resistance):
    return buck_scenario(vin=12.0, duty=0.3, frequency=500e3, strategy=strategy,
                         inductance=4.7e-6, capacitance=47e-6, resistance=resistance,
                         dead_time=(0.0, 0.0) if strategy == "asynchronous" else (10e-9, 10e-9))


@pytest.mark.parametrize("strategy", ["diode-emulation", "asynchronous"])
def test_dcm_duty_inverts_the_conversion_ratio(strategy):
    sc = _stage(strategy, 100.0)                      # K = 2 L fs / R = 0.047: DCM
    d, slope = _lossless_duty(sc, 3.3)
    k = 2 * 4.7e-6 * 500e3 / 100.0

    def ratio(x):
        return 2 / (1 + math.sqrt(1 + 4 * k / x ** 2))
    assert k < 1 - d
    assert 12.0 * ratio(d) == pytest.approx(3.3, rel=1e-12)
    h = 1e-7
    assert slope == pytest.approx(12.0 * (ratio(d + h) - ratio(d - h)) / (2 * h), rel=1e-6)


def test_ccm_and_forced_pwm_take_the_ratio_itself():
    heavy = _stage("diode-emulation", 1.0)            # K = 4.7 > 1 - D: CCM
    assert _lossless_duty(heavy, 3.3) == (pytest.approx(3.3 / 12.0), 12.0)
    light_fpwm = _stage("forced-pwm", 100.0)          # forced PWM never enters DCM
    assert _lossless_duty(light_fpwm, 3.3) == (pytest.approx(3.3 / 12.0), 12.0)
    # a microampere: the DCM duty would be 1e-4 of M, below LIGHTEST M
    faint = _stage("diode-emulation", 3.3e6)
    assert _lossless_duty(faint, 3.3) == (pytest.approx(3.3 / 12.0), 12.0)
    sink = dataclasses.replace(heavy, load=dataclasses.replace(heavy.load, resistance=None,
                                                               current=0.0))
    assert _lossless_duty(sink, 3.3) == (pytest.approx(3.3 / 12.0), 12.0)   # no load
