"""Periodic steady state (shooting-Newton) against brute-force settling and scipy expm.

Sources: Aprille & Trick, Proc. IEEE 60(1), 1972 (shooting on the one-period
map); the monodromy matrix of a piecewise-linear system with fixed switching
times is the product of its state-transition matrices (Floquet theory), here
computed independently with ``scipy.linalg.expm`` from the reference circuit
of ``tests/references/stage_solver.py``.
"""

import dataclasses

import numpy as np
import pytest
from scipy.linalg import expm

import bucksim
from bucksim.steady.solve import steady_state
from tests.references.stage_solver import HIGH, LOW, LOW_DIODE, Circuit, buck_scenario

CASES = {
    # CCM, forced PWM with dead time on both edges
    "ccm": dict(strategy="forced-pwm", resistance=0.66, dead_time=(20e-9, 25e-9)),
    # forced PWM at light load: the current reverses every period
    "reverse": dict(strategy="forced-pwm", resistance=20.0, dead_time=(20e-9, 25e-9)),
    # DCM, diode emulation and asynchronous
    "dcm-emulation": dict(strategy="diode-emulation", resistance=20.0, dead_time=(20e-9, 25e-9)),
    "dcm-async": dict(strategy="asynchronous", resistance=20.0),
}


def scenario(case, cycles=1):
    return buck_scenario(vin=12.0, duty=0.3, frequency=500e3, inductance=4.7e-6,
                         capacitance=47e-6, dcr=0.01, esr=0.005, rds_hs=0.01, rds_ls=0.005,
                         vf_hs=0.7, r_hs=0.01, vf_ls=0.7, r_ls=0.01, cycles=cycles,
                         **CASES[case])


@pytest.mark.parametrize("case", list(CASES))
def test_steady_state_matches_brute_force(case):
    """Shooting result vs the engine run long enough to settle (~60 filter time constants)."""
    ss = steady_state(scenario(case))
    assert ss.success and ss.method == "newton", ss.message
    assert ss.iterations <= 5
    assert ss.residual <= 1e-10
    run = bucksim.simulate(scenario(case, cycles=30000))
    scale = np.abs(run.segments.x0).max(axis=0)
    assert np.all(np.abs(run.x_end - ss.x) <= 1e-9 * scale), (run.x_end, ss.x)
    assert ss.stable


@pytest.mark.parametrize("case", ["ccm", "reverse"])
def test_floquet_multipliers_equal_expm_product(case):
    """Forced PWM: fixed conduction sequence per phase, so the monodromy matrix is
    prod expm(A_k d_k) over the phases (Floquet theory; scipy expm)."""
    sc = scenario(case)
    ss = steady_state(sc)
    c = Circuit.from_scenario(sc)
    T = c.period
    on = c.duty * T
    tf, tr = c.dead_falling, c.dead_rising
    # conduction in each dead time follows the sign of iL at its start
    run = bucksim.simulate(dataclasses.replace(sc, run=dataclasses.replace(
        sc.run, initial_current=ss.x[0], initial_voltage=ss.x[1])))
    il_fall, il_rise = run.at([on, T - tr])[:, 0]
    from tests.references.stage_solver import HIGH_DIODE
    dead = [LOW_DIODE if i > 0 else HIGH_DIODE for i in (il_fall, il_rise)]
    sequence = [(HIGH, on), (dead[0], tf), (LOW, T - on - tf - tr), (dead[1], tr)]
    P = np.eye(2)
    for code, d in sequence:
        A, _ = c.system(code)
        P = expm(A * d) @ P
    want = np.sort_complex(np.linalg.eigvals(P))
    got = np.sort_complex(ss.floquet)
    assert np.allclose(got, want, rtol=1e-10, atol=1e-12)


def test_dcm_multiplier_is_zero():
    """In DCM the current restarts from zero every cycle: the map forgets iL, so one
    Floquet multiplier is exactly 0 (saltation at the zero-current event)."""
    ss = steady_state(scenario("dcm-async"))
    assert np.min(np.abs(ss.floquet)) < 1e-12
    assert 0 < np.max(np.abs(ss.floquet)) < 1


def test_run_can_start_in_steady_state():
    sc = scenario("ccm", cycles=50)
    sc = dataclasses.replace(sc, run=dataclasses.replace(sc.run, start="steady-state"))
    run = bucksim.simulate(sc)
    assert run.steady_state.success
    # already periodic: the state after 50 periods equals the start
    assert np.allclose(run.x_end, run.steady_state.x, rtol=1e-10)


def test_high_q_filter_needs_few_cycles():
    """Q >= 10 output filter: shooting evaluates a handful of periods, settling needs thousands."""
    sc = buck_scenario(vin=12.0, duty=0.3, frequency=500e3, inductance=4.7e-6,
                       capacitance=100e-6, dcr=1e-3, esr=1e-3, rds_hs=2e-3, rds_ls=2e-3,
                       resistance=5.0, strategy="forced-pwm", cycles=1)
    z0 = np.sqrt(4.7e-6 / 100e-6)   # characteristic impedance (circuit theory)
    assert 5.0 / z0 >= 10           # Q of the parallel-loaded filter ~ R / Z0
    ss = steady_state(sc)
    assert ss.success and ss.cycles <= 10
