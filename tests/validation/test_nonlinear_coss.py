"""A voltage-dependent output capacitance (``coss`` tables) against independent integrals.

The engine holds a ``coss`` table piecewise constant and switches the open
node's linear system at each band edge (bucksim.model.capacitance). Checked
here against things outside that arithmetic:

* the table's charge and energy, and the node's charge-transfer loss, against
  ``scipy.integrate.quad`` of the same piecewise function;
* a hard turn-on against the trade's ``Qoss Vin - Eoss`` (common practice: the
  low side's ``coss`` charged from the input through the high-side channel),
  and the factor 2 over ``Eoss`` for ``C ~ v^-1/2`` that follows from it
  (derived: ``Q = 2 k sqrt(V)``, ``E = 2/3 k V^1.5``, so
  ``Q V - E = 4/3 k V^1.5 = 2 E``);
* the lossless resonant swing's peak from energy conservation,
  ``L i0^2 / 2 = integral_{v0}^{v_peak} (v - vo) Cn(v) dv`` (derived from
  ``L iL' = vn - vo`` and ``Cn(vn) vn' = -iL``), solved by ``brentq``;
* a table with one value everywhere equals the linear model.

Curve and stage numbers are invented for these checks.
"""

from __future__ import annotations

import dataclasses
import functools
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import brentq

import bucksim
from bucksim.analysis.edges import node_transfers
from bucksim.model.capacitance import CapacitanceTable, NodeCurve, charge, energy
from bucksim.model.stage import HIGH
from tests.references.node_solver import node_scenario

IO_RAIL = Path(__file__).resolve().parents[2] / "scenarios" / "io_rail_1v8_light_load_zvs.toml"
K_SQRT = 2.0e-9                 # C(v) = K / sqrt(v) [F], v in volts (invented)
VOLTS = (0.0, 0.25, 0.5, 1.0, 2.0, 3.0, 4.5, 6.0, 8.0, 10.0, 12.0, 14.0)


def sqrt_law_table(k=K_SQRT, volts=VOLTS):
    """Charge-equivalent table of ``C = k / sqrt(v)``: each interval holds
    ``(Q(b) - Q(a)) / (b - a)`` with ``Q = 2 k sqrt(v)``, so the table's charge
    equals the curve's at every point (module notes of bucksim.model.capacitance)."""
    v = np.asarray(volts)
    q = 2.0 * k * np.sqrt(v)
    caps = list(np.diff(q) / np.diff(v)) + [k / np.sqrt(v[-1])]
    return CapacitanceTable(tuple(map(float, v)), tuple(map(float, caps)))


def _piecewise(table):
    def c(v):
        k = np.searchsorted(np.asarray(table.voltages[1:]), v, side="right")
        return table.capacitances[k]
    return c


def _quad(f, a, b, points):
    """``integral_a^b f``, by quad on each piece between the breakpoints."""
    lo, hi = min(a, b), max(a, b)
    cuts = [lo] + sorted(p for p in points if lo < p < hi) + [hi]
    val = sum(quad(f, x0, x1, epsabs=0.0, epsrel=1e-13)[0]
              for x0, x1 in zip(cuts[:-1], cuts[1:], strict=True))
    return val if b >= a else -val


def test_table_charge_and_energy_against_quadrature():
    tab = sqrt_law_table()
    c = _piecewise(tab)
    for v in (-0.7, 0.1, 0.5, 2.7, 12.0, 15.0):
        assert charge(tab, v) == pytest.approx(_quad(c, 0.0, v, tab.voltages), rel=1e-11)
        assert energy(tab, v) == pytest.approx(
            _quad(lambda u: u * c(u), 0.0, v, tab.voltages), rel=1e-11)
    # the table keeps the curve's charge at its points (charge-equivalent entry)
    for v in VOLTS:
        assert charge(tab, v) == pytest.approx(2 * K_SQRT * np.sqrt(v), rel=1e-12, abs=1e-24)


def test_node_transfer_loss_against_quadrature():
    """``integral (V_p - v) (C_hs(Vin - v) + C_ls(v)) dv`` for a few jumps."""
    hs, ls = sqrt_law_table(0.6e-9), sqrt_law_table()
    vin = 12.0
    curve = NodeCurve(hs, ls, vin)
    c_hs, c_ls = _piecewise(hs), _piecewise(ls)
    points = list(ls.voltages) + [vin - v for v in hs.voltages]
    for va, vb, vp in ((-0.8, 11.9, vin), (0.0, vin, vin), (7.5, -0.75, 0.0), (3.0, 9.0, vin)):
        ref = _quad(lambda v, vp=vp: (vp - v) * (c_hs(vin - v) + c_ls(v)), va, vb, points)
        assert curve.transfer_loss(va, vb, vp) == pytest.approx(ref, rel=1e-10)
        q = _quad(lambda v: c_hs(vin - v) + c_ls(v), va, vb, points)
        assert curve.charge(va, vb) == pytest.approx(q, rel=1e-10)


# A 12 V stage in forced PWM at heavy load (CCM): the high side turns on against
# the conducting low-side body diode every period.
_HARD = dict(vin=12.0, duty=0.3, frequency=500e3, strategy="forced-pwm", inductance=4.7e-6,
             capacitance=47e-6, rs=0.0, rds_hs=5e-3, rds_ls=3e-3, vf_hs=0.7, r_hs=5e-3,
             vf_ls=0.7, r_ls=5e-3, dead_time=(20e-9, 20e-9), resistance=0.5, cycles=40)


TINY_HS = 1e-12


@functools.cache
def _hard_run():
    sc = node_scenario(coss_hs=TINY_HS, coss_ls=sqrt_law_table(), **_HARD)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, start="steady-state"))
    return bucksim.simulate(sc)


def test_hard_turn_on_costs_qoss_vin_minus_eoss():
    """The waveform's high-side turn-on loss against ``Qoss Vin - Eoss`` (common
    practice) plus the strips below 0 V and above ``vb`` (quadrature)."""
    run = _hard_run()
    T = run.scenario.period
    tr = node_transfers(run, run.t_end - 4 * T)
    hard = tr["conduction"] == HIGH
    assert np.count_nonzero(hard) == 4
    ls = sqrt_law_table()
    vin = 12.0
    # the table's own Qoss (equal to the curve's) and Eoss (the table's, within
    # 1e-2 of the curve's 2/3 k V^1.5: the bands hold the mean, not the curve)
    q, e = charge(ls, vin), energy(ls, vin)
    e_curve = 2.0 / 3.0 * K_SQRT * vin ** 1.5
    assert e == pytest.approx(e_curve, rel=1e-2)
    c = _piecewise(ls)
    for va, vb, loss in zip(tr["v_from"][hard], tr["v_to"][hard], tr["loss"][hard], strict=True):
        assert -1.0 < va < -0.7 and vin - 0.2 < vb < vin       # body diode, then the channel
        strips = (_quad(lambda v: (vin - v) * c(v), va, 0.0, ls.voltages)
                  - _quad(lambda v: (vin - v) * c(v), vb, vin, ls.voltages))
        # the tiny high-side coss (1 pF, linear) dissipates its own stored energy
        own = 0.5 * TINY_HS * ((vin - va) ** 2 - (vin - vb) ** 2)
        assert loss == pytest.approx(q * vin - e + strips + own, rel=1e-6)
        # about twice the stored energy, the sqrt law's factor (derived, module notes);
        # 0.5 Co(er) Vin^2 = Eoss would book half of it
        assert (loss - strips) / e_curve == pytest.approx(2.0, rel=3e-3)
    assert run.summary().energy_balance_error < 1e-9


# The lossless swing of test_node_closed_forms, with a sqrt-law low side.
_SWING = dict(vin=12.0, duty=0.1, frequency=1e6, strategy="forced-pwm", inductance=1e-6,
              capacitance=100e-6, rs=0.0, rds_hs=1e-3, rds_ls=1e-3, vf_hs=0.7, r_hs=1e-3,
              vf_ls=0.7, r_ls=1e-3, dead_time=(20e-9, 100e-9), cycles=1)


@pytest.mark.parametrize("il0", [-0.6, -0.75])
def test_swing_peak_follows_energy_conservation(il0):
    hs, ls = sqrt_law_table(0.4e-9), sqrt_law_table()
    sc = node_scenario(coss_hs=hs, coss_ls=ls, x0=(il0, 1.0), **_SWING)
    run = bucksim.simulate(sc)
    T = sc.period
    t0 = T - _SWING["dead_time"][1]
    i0, vo, v0 = (float(run.at(np.array([t0]), s)[0]) for s in ("iL", "vo", "vsw"))
    t = np.linspace(t0, T * (1 - 1e-9), 20001)
    v = run.at(t, "vsw")
    curve = NodeCurve(hs, ls, 12.0)
    c_hs, c_ls = _piecewise(hs), _piecewise(ls)
    points = list(ls.voltages) + [12.0 - u for u in hs.voltages]

    def surplus(vp):
        return 0.5 * _SWING["inductance"] * i0 ** 2 - _quad(
            lambda u: (u - vo) * (c_hs(12.0 - u) + c_ls(u)), v0, vp, points)

    if surplus(12.7) > 0:
        pytest.skip("this start current reaches the clamp")   # (set-up, not a result)
    v_peak = brentq(surplus, v0 + 1e-6, 12.7, xtol=1e-13)
    # measured 1.2e-5 and 1.9e-5 low: vo is taken as held, yet the swing's charge moves
    # the output (the 5 ps grid's sampling of a flat peak is far smaller)
    assert float(np.max(v)) == pytest.approx(v_peak, rel=1e-4)
    assert v_peak < 12.0 and curve.n_bands > 10


def test_constant_table_equals_linear_model():
    """A table with the same value at every point (coinciding high- and low-side
    edges included: a band of zero width) gives the linear model's results."""
    sc = bucksim.load_scenario(IO_RAIL)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, cycles=200, start="rest"))
    hs, ls = sc.high_side, sc.low_side

    def tab(c):
        return CapacitanceTable((0.0, 2.0, 6.0), (c, c, c))   # edges 2, 6 | 12-2, 12-6

    sc1 = dataclasses.replace(sc, high_side=dataclasses.replace(hs, coss=tab(hs.coss)),
                              low_side=dataclasses.replace(ls, coss=tab(ls.coss)))
    r0, r1 = bucksim.simulate(sc), bucksim.simulate(sc1)
    assert len(r1.segments) > len(r0.segments)        # the band edges are events
    np.testing.assert_allclose(r1.x_end, r0.x_end, rtol=1e-9, atol=1e-9)
    s0, s1 = r0.summary(), r1.summary()
    for (k0, a), (k1, b) in zip(s0.loss_items().items(), s1.loss_items().items(), strict=True):
        assert k0 == k1
        assert b == pytest.approx(a, rel=1e-9, abs=1e-15)
    assert s1.efficiency == pytest.approx(s0.efficiency, rel=1e-10)
    n0, n1 = dataclasses.asdict(s0.switch_node), dataclasses.asdict(s1.switch_node)
    for key in ("high_side_turn_on", "low_side_turn_on"):     # the node at turn-on: rounding
        assert n1.pop(key) == pytest.approx(n0.pop(key), rel=1e-9, abs=1e-9)
    assert n1 == n0
    assert s1.energy_balance_error < 1e-9


def test_monodromy_through_band_edges_against_finite_differences():
    """The one-period map's Jacobian (transition matrices, resets, saltation at the
    band edges) against central differences of the map itself. With instant turn-on:
    with its 5 ns rise ramp the high side closes on a node its body diode clamps at the
    period's start, and an iL perturbation pulls the node off that clamp on one side
    only (the node then rises back before the channel closes): the map has a kink
    there, its one-sided derivatives differ by 6e-5, and the monodromy is the right-hand
    one (measured)."""
    from bucksim.steady.open_loop import PeriodMap

    sc = bucksim.load_scenario(IO_RAIL)
    sc = dataclasses.replace(sc, high_side=dataclasses.replace(sc.high_side, rise_time=0.0,
                                                               coss=sqrt_law_table(0.3e-9)),
                             low_side=dataclasses.replace(sc.low_side,
                                                          coss=sqrt_law_table(0.8e-9)))
    pmap = PeriodMap(sc)
    x = bucksim.steady_state(sc).x
    x1, J, res = pmap(x)
    open_node = res.conduction == 5
    assert len(set(res.system[open_node].tolist())) > 4      # the swing crosses bands
    for k, h in ((0, 1e-5), (1, 1e-6)):
        dx = np.zeros_like(x)
        dx[k] = h
        fd = (pmap.step(x + dx)[0] - pmap.step(x - dx)[0]) / (2 * h)
        np.testing.assert_allclose(J[:2, k], fd[:2], rtol=1e-5, atol=1e-7)
