"""The engine against an independent reference integration of the same circuit.

The reference (:mod:`reference_sim`) derives the stage equations from the
circuit description and integrates them with general tools: the augmented
matrix exponential (``scipy.linalg.expm``) with ``scipy.optimize.brentq``
zero-current events, and ``scipy.integrate.solve_ivp`` (DOP853, rtol 1e-12)
restarted at every gate change with terminal events.

Tolerances, all over 1000 switching cycles from the given start:

* states ``[iL, vC]`` at every gate-change instant: 1e-8 relative to the
  run's scale of that state (``max |iL|``, ``max |vC|`` over those instants);
* zero-current event instants and every change of conduction state: 1e-12 of
  a period against the expm/brentq reference (solve_ivp's dense output locates
  events to ~1e-11 of a period only, so against it the times are checked at
  1e-9 of a period);
* energy balance error (summary key): below 1e-9, the criterion of
  docs/summary-reference.md (``energy_balance_error``).
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest

import bucksim
from tests.references.stage_solver import (
    HIGH,
    HIGH_DIODE,
    IDLE,
    LOW,
    LOW_DIODE,
    Circuit,
    buck_scenario,
    simulate_expm,
    simulate_ivp,
)

CYCLES = 1000
STATE_RTOL = 1e-8
TIME_TOL = 1e-12        # of a period
IVP_TIME_TOL = 1e-9     # of a period, dense-output event location
ENERGY_TOL = 1e-9

# A light-load 12 V, 400 kHz synchronous stage shared by several cases; all
# numbers are invented for these checks, not taken from any product.
_SYNC_LIGHT = dict(vin=12.0, duty=0.3, frequency=400e3, inductance=2.2e-6, dcr=0.01,
                   capacitance=47e-6, esr=0.003, rs=0.005, rds_hs=0.012, rds_ls=0.006,
                   vf_hs=0.75, r_hs=0.02, vf_ls=0.7, r_ls=0.02, dead_time=(25e-9, 20e-9))
_L_CRIT, _C_CRIT = 10e-6, 10e-6

CASES = {
    # K = 2L/(R Ts) = 4.7 >> 1 - D: deep CCM, both dead times on the body diode.
    "ccm_forced_pwm_dead_time": dict(
        vin=12.0, duty=0.42, frequency=500e3, strategy="forced-pwm", inductance=4.7e-6,
        dcr=0.02, capacitance=47e-6, esr=0.005, resistance=1.0, rs=0.01, rds_hs=0.015,
        rds_ls=0.008, vf_hs=0.7, r_hs=0.03, vf_ls=0.7, r_ls=0.03, dead_time=(20e-9, 15e-9)),
    # K = 0.11 < 1 - D = 0.75: DCM with a freewheel diode.
    "dcm_asynchronous": dict(
        vin=24.0, duty=0.25, frequency=300e3, strategy="asynchronous", inductance=3.3e-6,
        dcr=0.015, capacitance=22e-6, esr=0.01, resistance=20.0, rds_hs=0.02, vf_hs=0.7,
        r_hs=0.03, vf_ls=0.45, r_ls=0.02),
    # K = 0.12 < 0.7: the low-side channel opens at zero current.
    "dcm_diode_emulation": dict(_SYNC_LIGHT, strategy="diode-emulation", resistance=15.0),
    # Same light load with forced PWM: the current reverses every cycle.
    "forced_pwm_reverse_current": dict(_SYNC_LIGHT, strategy="forced-pwm", resistance=15.0),
    # R = sqrt(L/C)/2 with no ESR/DCR: the LC-R filter has a double pole at
    # -1/sqrt(LC) (exactly in the diode states, where r = 0; to ~1e-7 with the
    # 1e-14 ohm channels).
    "critically_damped": dict(
        vin=5.0, duty=0.5, frequency=500e3, strategy="forced-pwm", inductance=_L_CRIT,
        capacitance=_C_CRIT, resistance=0.5 * math.sqrt(_L_CRIT / _C_CRIT), rds_hs=1e-14,
        rds_ls=1e-14, vf_hs=0.7, r_hs=0.0, vf_ls=0.7, r_ls=0.0, dead_time=(20e-9, 20e-9)),
    # Only a constant-current sink: the idle state's A is all zeros.
    "current_sink_only": dict(_SYNC_LIGHT, strategy="diode-emulation", current=1.0),
    # No load: the filter rings down on parasitic resistance only.
    "no_load": dict(_SYNC_LIGHT, strategy="forced-pwm"),
}


@functools.cache
def _case(name):
    scenario = buck_scenario(cycles=CYCLES, **CASES[name])
    circuit = Circuit.from_scenario(scenario)
    return scenario, circuit, bucksim.simulate(scenario, check=True), simulate_expm(circuit, CYCLES)


@functools.cache
def _ivp(name):
    _, circuit, _, _ = _case(name)
    return simulate_ivp(circuit, CYCLES)


def _events_between_gates(times, gate_times, period):
    # Events that land on a gate instant do not start a segment of their own;
    # keep those strictly inside a gate phase so both sides count the same.
    times = np.asarray(times)
    j = np.clip(np.searchsorted(gate_times, times), 1, len(gate_times) - 1)
    gap = np.minimum(np.abs(times - gate_times[j - 1]), np.abs(gate_times[j] - times))
    return times[gap > 1e-9 * period]


def _engine_events(run):
    seg = run.segments
    into_idle = (seg.conduction[1:] == IDLE) & (seg.conduction[:-1] != IDLE)
    return seg.t0[1:][into_idle]


def _merged(t0, codes, dt=None):
    t0, codes = np.asarray(t0), np.asarray(codes)
    if dt is not None:
        keep = np.asarray(dt) > 0.0
        t0, codes = t0[keep], codes[keep]
    change = np.r_[True, codes[1:] != codes[:-1]]
    return t0[change], codes[change]


names = pytest.mark.parametrize("name", list(CASES))


@names
def test_stage_matrices_match_derivation(name):
    """The stage's (A, b) per conduction state equals the reference derivation."""
    scenario, circuit, run, _ = _case(name)
    codes = [HIGH, LOW_DIODE, HIGH_DIODE, IDLE]
    if scenario.switching.strategy != "asynchronous":
        codes.append(LOW)
    for code in codes:
        A, b = circuit.system(code)
        ours = np.column_stack([A, b])
        theirs = run.stage.matrices[run.stage.system_id(0, code)][:2, :]
        scale = np.abs(ours).max(axis=1, keepdims=True)
        scale[scale == 0.0] = 1.0   # the idle state's iL row is all zeros
        np.testing.assert_allclose(theirs / scale, ours / scale, rtol=0, atol=1e-12,
                                   err_msg=f"conduction {code}")


@names
def test_states_at_gate_instants(name):
    """[iL, vC] at every gate change agree with the expm reference to 1e-8."""
    _, _, run, ref = _case(name)
    x = run.at(ref.gate_times)
    err = np.abs(x - ref.gate_states).max(axis=0) / ref.scale
    assert np.all(err <= STATE_RTOL), f"relative error [iL, vC] = {err}"
    np.testing.assert_allclose(run.t_end, ref.stop, rtol=1e-14)


@names
def test_zero_current_events(name):
    """Zero-current instants agree with the brentq-refined reference to 1e-12 T."""
    scenario, _, run, ref = _case(name)
    T = scenario.period
    ours = _events_between_gates(ref.event_times, ref.gate_times, T)
    theirs = _events_between_gates(_engine_events(run), ref.gate_times, T)
    assert theirs.shape == ours.shape, f"{theirs.size} engine events, {ours.size} reference"
    if ours.size:
        assert np.abs(theirs - ours).max() <= TIME_TOL * T


@names
def test_conduction_sequence(name):
    """The run passes through the same conduction states at the same instants."""
    scenario, _, run, ref = _case(name)
    seg = run.segments
    t_eng, c_eng = _merged(seg.t0, seg.conduction, seg.dt)
    t_ref, c_ref = _merged(ref.seg_t0, ref.seg_code)
    assert c_eng.shape == c_ref.shape and np.array_equal(c_eng, c_ref), (
        f"first difference at index {np.argmax(c_eng[:c_ref.size] != c_ref[:c_eng.size])}")
    assert np.abs(t_eng - t_ref).max() <= TIME_TOL * scenario.period


@names
def test_dense_output_inside_segments(name):
    """States and vo at the middle of every reference interval agree to 1e-8."""
    _, circuit, run, ref = _case(name)
    ends = np.append(ref.seg_t0[1:], ref.stop)
    t = 0.5 * (ref.seg_t0 + ends)
    x_ref = ref.at(t)
    vo_ref = circuit.output_voltage(x_ref)
    err = np.abs(run.at(t) - x_ref).max(axis=0) / ref.scale
    assert np.all(err <= STATE_RTOL), f"relative error [iL, vC] = {err}"
    err_vo = np.abs(run.at(t, "vo") - vo_ref).max() / np.abs(vo_ref).max()
    assert err_vo <= STATE_RTOL


@names
def test_energy_balance(name):
    """Input energy = load + losses + stored-energy change (docs/summary-reference.md, 1e-9)."""
    _, _, run, _ = _case(name)
    err = run.summary().to_dict()["energy_balance_error"]
    assert abs(err) < ENERGY_TOL


@names
def test_reference_integrators_agree(name):
    """expm/brentq and solve_ivp references agree (guards the reference itself)."""
    scenario, _, _, ref = _case(name)
    ivp = _ivp(name)
    err = np.abs(ivp.gate_states - ref.gate_states).max(axis=0) / ref.scale
    assert np.all(err <= 1e-9), f"relative error [iL, vC] = {err}"
    assert ivp.event_times.shape == ref.event_times.shape
    if ref.event_times.size:
        assert np.abs(ivp.event_times - ref.event_times).max() <= IVP_TIME_TOL * scenario.period


@pytest.mark.parametrize("name", ["dcm_diode_emulation", "forced_pwm_reverse_current"])
def test_states_against_solve_ivp(name):
    """The engine against the solve_ivp reference directly, same 1e-8 criterion."""
    scenario, _, run, _ = _case(name)
    ivp = _ivp(name)
    err = np.abs(run.at(ivp.gate_times) - ivp.gate_states).max(axis=0) / ivp.scale
    assert np.all(err <= STATE_RTOL), f"relative error [iL, vC] = {err}"
    T = scenario.period
    ours = _events_between_gates(ivp.event_times, ivp.gate_times, T)
    theirs = _events_between_gates(_engine_events(run), ivp.gate_times, T)
    assert theirs.shape == ours.shape
    if ours.size:
        assert np.abs(theirs - ours).max() <= IVP_TIME_TOL * T


def _last_cycles(ref, n):
    start = ref.stop - n * ref.circuit.period
    seg = ref.seg_t0 >= start - 1e-15 * ref.stop
    gate = ref.gate_times >= start - 1e-15 * ref.stop
    ev = ref.event_times >= start
    return ref.seg_code[seg], ref.gate_states[gate], ref.event_times[ev]


@names
def test_case_exercises_its_regime(name):
    """Each case really is in the regime it is named for (else the checks prove little).

    IDLE must also be physically consistent (both diodes blocked): the
    contract holds iL at zero there, and a comparison outside that region
    would test a convention rather than the circuit.
    """
    _, _, _, ref = _case(name)
    assert ref.idle_margin() > 0.0
    codes, states, events = _last_cycles(ref, 100)
    if name in ("ccm_forced_pwm_dead_time", "critically_damped"):
        assert states[:, 0].min() > 0 and events.size == 0 and LOW_DIODE in codes
    elif name in ("dcm_asynchronous", "dcm_diode_emulation", "current_sink_only"):
        assert events.size == 100 and IDLE in codes
    else:  # forced PWM light or no load: current reverses
        assert states[:, 0].min() < 0 and HIGH_DIODE in codes and LOW in codes


def test_critically_damped_eigenvalues():
    """The stage's A has the double pole -1/sqrt(LC) in every conducting state.

    Characteristic polynomial of the filter with load R and no series
    resistance: s^2 + s/(RC) + 1/(LC); its discriminant vanishes at
    R = sqrt(L/C)/2 (circuit theory, series-RLC damping).
    """
    _, _, run, _ = _case("critically_damped")
    lam = -1.0 / math.sqrt(_L_CRIT * _C_CRIT)
    for code in (HIGH, LOW, LOW_DIODE, HIGH_DIODE):
        A = run.stage.matrices[run.stage.system_id(0, code)][:2, :2]
        ev = np.linalg.eigvals(A)
        assert np.abs(ev - lam).max() <= 1e-6 * abs(lam), f"conduction {code}: {ev} vs {lam}"
