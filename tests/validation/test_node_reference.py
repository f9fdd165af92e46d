"""The engine's switch-node model against the independent stiff reference.

The reference (:mod:`tests.references.node_solver`) keeps the node
capacitance ``Cn`` in the circuit at all times, every closed channel a
resistor and every diode a ``Vf + r`` branch, and integrates with Radau
(rtol 1e-10) restarted at every gate edge and event. The engine treats the
node as algebraic while a branch conducts, jumps it when a channel closes,
and lets a diode take over once the free node reaches its conducting value.
Both start from the same state and run four periods.

What agreement to expect (derived). At a jump ``dV`` the reference node
follows with the branch lag ``tau = R Cn``, so its inductor sees ``dV tau``
less volt-seconds: the currents part by ``dV tau / L`` per jump (a hard
12.9 V turn-on through 4 mohm onto 1.9 nF with 0.33 uH: 3.0e-4 A, 2e-5 of the
heavy-load current; 1e-6 would need R Cn ~ 0.1 ps). While a branch of
resistance ``R`` conducts, the reference node also trails its moving
conducting value ``V - R iL`` by ``R^2 Cn diL/dt`` (1e-6 V here), ``R |d iL|
tau`` volt-seconds per interval. With ``B(t)`` the sum of ``|dV| tau / L``
over the jumps and these drifts up to ``t``, a difference injected as a
current step in a passive network keeps its energy below ``L B^2 / 2``, so

* ``|iL_e - iL_r| <= B``, ``|vC_e - vC_r| <= sqrt(L/C) B`` and, while the node
  is free, ``|vn_e - vn_r| <= sqrt(L/Cn) B`` (energy ``Cn dv^2 / 2``); in a
  conducting state by ``R B`` plus the trailing offset ``R^2 Cn |diL/dt|``;
* the supply energy of a period ``[a, b]`` differs by at most
  ``Vin (B t_h + Cn (sqrt(L/Cn) B + R_h dI))``: the current difference
  through the high side over the time ``t_h`` it conducts, the charge
  ``Cn dv`` the high side pushes onto a node that differs by ``dv``, and the
  charge ``Cn R_h dI`` of the reference node following the on-state drop
  ``R_h iL`` while iL changes by ``dI`` (the engine's algebraic node draws
  none), ``R_h = Rs + max(Rds_hs, r_hs)``.

The checks allow twice these bounds (the bounds treat event-time shifts in
DCM to first order) plus 1e-9 of each scale for rounding and the reference's
tolerance, and one check measures the difference itself against the signed
sum of the lags' volt-seconds over L (to 5 %), so that a tolerance set from
the lag cannot hide a different error. ``vn`` is compared outside ``[t - 20 ps, t + 1 ns]``
of every gate edge and reference event (1 ns is 26 of the slowest lag,
r Cn = 38 ps). Stage numbers are invented for these checks.
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from scipy.linalg import expm

import bucksim
from tests.references.node_solver import node_scenario, settled_start, simulate_node

CYCLES = 4
PER_CYCLE = 2000          # samples per period
SAFETY = 2.0
ROUND = 1e-9
T = 1e-6
_COMMON = dict(vin=12.0, frequency=1.0 / T, inductance=0.33e-6, dcr=2e-3, capacitance=100e-6,
               esr=1e-3, rs=1e-3, rds_hs=3e-3, rds_ls=1.5e-3, vf_hs=0.7, r_hs=0.02,
               vf_ls=0.7, r_ls=0.02)
_SYNC = dict(_COMMON, coss_hs=400e-12, coss_ls=1.5e-9)

# (scenario keywords, start near the periodic state by period averages)
CASES = {
    # 12 V -> 1 V at 12.5 A: both dead times on the low-side body diode.
    "forced_pwm_heavy": (dict(_SYNC, strategy="forced-pwm", duty=0.09, resistance=0.08,
                              dead_time=(20e-9, 30e-9), x0=(11.0, 1.0)), True),
    # Valley -1.7 A: the rising swing reaches Vin + Vf (full ZVS) within 30 ns.
    "forced_pwm_light_full_zvs": (dict(_SYNC, strategy="forced-pwm", duty=0.09,
                                       resistance=10.0, dead_time=(20e-9, 30e-9),
                                       x0=(-1.3, 1.0)), True),
    # Valley -0.5 A, 20 ns: the swing stops near 5 V and the high side closes hard.
    "forced_pwm_light_partial_zvs": (dict(_SYNC, strategy="forced-pwm", duty=0.09,
                                          resistance=1.2, dead_time=(20e-9, 20e-9),
                                          x0=(-0.55, 1.0)), True),
    # K = 2L/(R T) = 0.13: DCM; the node rings about vo once the channel opens.
    "dcm_diode_emulation": (dict(_SYNC, strategy="diode-emulation", duty=0.15, resistance=5.0,
                                 dead_time=(20e-9, 20e-9), x0=(0.0, 2.5)), False),
    # Freewheel diode with cj = 300 pF: Cn = 0.7 nF rings after the diode stops.
    "dcm_asynchronous": (dict(_COMMON, coss_hs=400e-12, cj=300e-12, strategy="asynchronous",
                              duty=0.15, resistance=5.0, vf_ls=0.45, x0=(0.0, 2.5)), False),
}


@functools.cache
def _reference(name):
    kw, settle = CASES[name]
    scenario = node_scenario(cycles=CYCLES, **kw)
    if settle:
        scenario = settled_start(scenario)
    return scenario, simulate_node(scenario)


@functools.cache
def _case(name):
    scenario, trace = _reference(name)
    return scenario, trace, bucksim.simulate(scenario, check=True)


def _grid():
    return np.linspace(0.0, CYCLES * T, CYCLES * PER_CYCLE + 1)


def _bound(trace, t):
    """``B(t)``: sum of ``|dV| tau / L`` over the jumps and drifts up to each ``t`` [A]."""
    lags = np.vstack([trace.lags, trace.drift_lags()])
    lags = lags[np.argsort(lags[:, 0], kind="stable")]
    t_k, dv, tau = lags.T
    step = np.abs(dv) * tau / trace.circuit.inductance
    return np.concatenate([[0.0], np.cumsum(step)])[np.searchsorted(t_k, t, side="right")]


def _drift_offset(c):
    """Largest node offset while conducting [V]: ``R^2 Cn |diL/dt|``, with
    ``|diL/dt| <= (Vin + Vf + vo) / L`` and the largest branch resistance."""
    r = max(c.rs + c.rds_hs, c.rs + c.r_hs, c.rds_ls or 0.0, c.r_ls)
    return r * r * c.cn * (c.vin + max(c.vf_hs, c.vf_ls) + c.vin) / c.inductance


def _quiet(trace, t):
    """Times away from every gate edge and reference event (node transients)."""
    edges = np.sort(np.concatenate([trace.gate_times, trace.event_times]))
    j = np.searchsorted(edges, t, side="right")
    after = t - edges[np.clip(j - 1, 0, None)]
    before = edges[np.clip(j, None, len(edges) - 1)] - t
    return ((j == 0) | (after > 1e-9)) & ((j == len(edges)) | (before > 20e-12))


@pytest.mark.parametrize("name", ["forced_pwm_heavy", "dcm_diode_emulation"])
def test_reference_integration(name):
    """The reference's dense Radau output against ``expm`` of each interval's
    linear system (augmented form, Van Loan 1978): 1e-8 of the state scales."""
    _, tr = _reference(name)
    c = tr.circuit
    ends = np.append(tr.t0[1:], tr.stop)
    worst = 0.0
    for i, (t0, t1) in enumerate(zip(tr.t0, ends, strict=True)):
        A, b = c.system(tr.topology[i])
        M = np.zeros((5, 5))
        M[:4, :4], M[:4, 4] = A, b
        x0 = tr.solutions[i](t0)
        for tau in np.linspace(0.0, t1 - t0, 5)[1:]:
            E = expm(M * tau)
            err = (E[:4, :4] @ x0 + E[:4, 4] - tr.solutions[i](t0 + tau)) / c.scales()
            worst = max(worst, float(np.max(np.abs(err))))
    assert worst < 1e-8


def _rising_dead_times(c):
    return [(k * T + T - c.dead_time[1], (k + 1) * T * (1 - 1e-12)) for k in range(CYCLES)]


def test_case_regimes():
    """Each case exercises what its name says (on the reference)."""
    _, tr = _reference("forced_pwm_heavy")
    assert tr.at(_grid(), "iL").min() > 5.0
    for name, lo, hi in (("forced_pwm_light_full_zvs", 12.7, 13.0),
                         ("forced_pwm_light_partial_zvs", 2.0, 12.0)):
        _, tr = _reference(name)
        assert tr.at(_grid(), "iL").min() < 0.0
        for a, b in _rising_dead_times(tr.circuit):
            assert lo <= tr.at(np.linspace(a, b, 301), "vsw").max() <= hi, name
    for name in ("dcm_diode_emulation", "dcm_asynchronous"):
        _, tr = _reference(name)
        c = tr.circuit
        for k in range(CYCLES):
            # a turn-off at zero current in every period, then a ring about vo
            off = tr.event_times[(tr.event_times > k * T + c.duty * T + 30e-9)
                                 & (tr.event_times < (k + 1) * T)]
            assert off.size == 1, name
            t = np.linspace(off[0], (k + 1) * T - c.dead_time[1], 2001)
            vn, vo = tr.at(t, "vsw"), tr.at(t, "vo")
            assert vn.max() > vo.mean() + 1.0 and vn.min() < vo.mean() - 1.0, name


def _differences(name):
    _, tr, run = _case(name)
    t = _grid()
    return tr, t, {s: run.at(t, s) - tr.at(t, s) for s in ("iL", "vC", "vsw")}


@pytest.mark.parametrize("name", CASES)
def test_states_agree(name):
    """iL and vC within twice the lag bound B (module docstring)."""
    tr, t, d = _differences(name)
    c = tr.circuit
    b = _bound(tr, t)
    i_scale = float(np.max(np.abs(tr.at(t, "iL"))))
    v_scale = float(np.max(np.abs(tr.at(t, "vC"))))
    assert np.all(np.abs(d["iL"]) <= SAFETY * b + ROUND * i_scale)
    assert np.all(np.abs(d["vC"]) <= SAFETY * math.sqrt(c.inductance / c.capacitance) * b
                  + ROUND * v_scale)


@pytest.mark.parametrize("name", CASES)
def test_node_agrees(name):
    """vn within twice sqrt(L/Cn) B away from the picosecond transients."""
    tr, t, d = _differences(name)
    c = tr.circuit
    keep = _quiet(tr, t)
    assert keep.mean() > 0.95
    tol = SAFETY * (math.sqrt(c.inductance / c.cn) * _bound(tr, t) + _drift_offset(c)) \
        + ROUND * c.vin
    assert np.all(np.abs(d["vsw"][keep]) <= tol[keep])


def _high_side_time(trace, a, b):
    """Time [s] within ``[a, b]`` that the high side (channel or body diode) conducts."""
    ends = np.append(trace.t0[1:], trace.stop)
    on = np.array([topo[0] or topo[1] for topo in trace.topology])
    overlap = np.clip(np.minimum(ends, b) - np.maximum(trace.t0, a), 0.0, None)
    return float(np.sum(overlap[on]))


def _energy_windows(c):
    # mid on-time to mid on-time: no edge at either end, one turn-on inside
    a = np.arange(CYCLES - 1) * T + 0.5 * c.duty * T
    return a, a + T


@pytest.mark.parametrize("name", CASES)
def test_supply_energy_per_period(name):
    """Energy from the ideal source per period within twice its lag bound."""
    from bucksim.analysis.edges import supply_energy

    _, tr, run = _case(name)
    c = tr.circuit
    r_h = c.rs + max(c.rds_hs, c.r_hs)
    z = math.sqrt(c.inductance / c.cn)
    for a, b in zip(*_energy_windows(c), strict=True):
        ref = float(np.diff(tr.at(np.array([a, b]), "energy"))[0])
        got = supply_energy(run, a, b)
        i = tr.at(np.linspace(a, b, PER_CYCLE + 1), "iL")
        bnd = float(_bound(tr, np.array([b]))[0])
        on = _high_side_time(tr, a, b)
        tol = SAFETY * c.vin * (bnd * on + c.cn * (z * bnd + r_h * (i.max() - i.min())))
        assert abs(got - ref) <= tol + ROUND * abs(ref), (a, got, ref)


def test_difference_is_the_charge_lag():
    """The engine-minus-reference current just after the first hard turn-on is the
    signed sum of the lags' volt-seconds over L, to 5 %.

    A channel closing: the engine jumps, the reference trails by ``tau``: ``dV tau``.
    A diode's onset: the engine's free node slews on at ``-iL/Cn`` to the diode's
    conducting value ``-Vf - r iL`` and the diode takes over there (measured: its
    onset is ``r Cn`` after the node passes ``-Vf``), a ramp with half the area of
    a jump: ``dV tau / 2`` (a jump at ``-Vf`` would give ``dV tau`` and miss by 11 %).
    Neglected: the output filter's feedback over one period (0.2 % measured) and
    the body diode's share of the first picoseconds of the turn-on.
    """
    _, tr, run = _case("forced_pwm_heavy")
    c = tr.circuit
    t = np.array([T + 1e-9])
    t_k, dv, tau = tr.lags.T
    weight = np.where(np.isin(t_k, tr.gate_times), 1.0, 0.5)
    predicted = float(np.sum((weight * dv * tau)[t_k <= t[0]]) / c.inductance)
    measured = float(run.at(t, "iL")[0] - tr.at(t, "iL")[0])
    assert predicted > 1e-4
    assert measured == pytest.approx(predicted, rel=0.05)
