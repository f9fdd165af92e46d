"""The switch node's series resistance against the damped series RLC.

With ``switching.node_resistance`` ``Rn`` the open node is the series circuit
``L``, ``Rn + DCR``, ``Cn`` driven by the output voltage: while it rings (the
DCM idle interval, nothing conducting) ``L iL' = u - R iL``, ``Cn u' = -iL``
with ``u`` the capacitance's voltage less ``vo`` and ``R = Rn + DCR``. Its
free response decays as ``exp(-alpha t)``, ``alpha = R / (2 L)``, and rings at
``omega_d = sqrt(1 / (L Cn) - alpha^2)`` (the series RLC's natural response;
any circuit-theory text, e.g. Nilsson & Riedel, *Electric Circuits*, ch. 8, from
memory). Checked here on the engine's ring, with the stage's numbers invented
and the output capacitor large enough (1 mF) that ``vo`` stays put.
"""

from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np
import pytest
from scipy.signal import find_peaks

import bucksim
from tests.references.node_solver import node_scenario

L, DCR, CHS, CLS = 3.3e-6, 0.01, 90e-12, 180e-12
CN = CHS + CLS
_RING = dict(vin=12.0, duty=0.12, frequency=200e3, strategy="diode-emulation", inductance=L,
             dcr=DCR, capacitance=1e-3, resistance=10.0, rs=0.0, rds_hs=0.04, rds_ls=0.02,
             vf_hs=0.7, r_hs=0.02, vf_ls=0.7, r_ls=0.02, dead_time=(10e-9, 10e-9), cycles=6,
             x0=(0.0, 2.0))


@functools.cache
def _ring(rn):
    sc = node_scenario(coss_hs=CHS, coss_ls=CLS, **_RING)
    sc = dataclasses.replace(sc, switching=dataclasses.replace(sc.switching, node_resistance=rn))
    return bucksim.simulate(sc)


def _idle_peaks(run):
    """Times and heights of the node's ring maxima about vo in the last period's idle."""
    seg = run.segments
    T = run.scenario.period
    last = seg.t0 >= run.t_end - T
    open_ = last & (seg.conduction == 5)
    k = np.nonzero(open_)[0]
    k = k[np.argmax(seg.dt[k])]                  # the idle interval: the longest open piece
    t = np.linspace(seg.t0[k], seg.t0[k] + seg.dt[k], 40001)
    u = run.at(t, "vsw") - run.at(t, "vo")
    idx, _ = find_peaks(u)
    return t[idx], u[idx]


@pytest.mark.parametrize("rn", [1.0, 3.0])
def test_ring_decays_at_r_over_2l(rn):
    t, u = _idle_peaks(_ring(rn))
    assert len(t) >= 6
    alpha = -np.polyfit(t - t[0], np.log(u), 1)[0]
    assert alpha == pytest.approx((rn + DCR) / (2 * L), rel=1e-2)
    a0 = (rn + DCR) / (2 * L)
    omega_d = math.sqrt(1.0 / (L * CN) - a0 ** 2)
    assert np.mean(np.diff(t)) == pytest.approx(2 * math.pi / omega_d, rel=1e-3)


def test_damping_is_booked_and_balanced():
    s0, s3 = _ring(0.0).summary(), _ring(3.0).summary()
    assert "switch_node" not in s0.devices
    loss = s3.loss_items()["switch_node.resistance"]
    assert loss > 0
    assert s3.energy_balance_error < 1e-9 and s0.energy_balance_error < 1e-9
    # the undamped ring keeps its energy; the damped one gives it to Rn
    t, u = _idle_peaks(_ring(0.0))
    assert u[-1] / u[0] > 0.97
